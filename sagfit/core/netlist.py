"""Reading a DC netlist in plain SPICE element syntax into elements (pure: text in).

Subset read: R, V, I, E, F, G, H elements; L (a short at DC) and C (open at DC);
``*`` comment lines, ``;`` or ``$`` end-of-line comments, ``+`` continuation lines,
SPICE suffixes (``4.7k``, ``1meg``, ``10m``) and IEC 60062 RKM codes (``4k7``).
A trailing ``tol=1%`` on an element gives its tolerance (half-width, per cent).
``.port a b`` names the two nodes to look into; ``.end`` stops reading. Node ``0``
(or ``gnd``) is ground.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from .errors import ReadingsFileError
from .units import parse_resistance

GROUND = ("0", "gnd")

# SPICE scale suffixes, case-insensitive; letters after them are ignored as SPICE does.
_SPICE_RE = re.compile(
    r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)(t|g|meg|k|mil|m|u|µ|n|p|f)?([a-zA-Z]*)$",
    re.IGNORECASE)
_SCALE = {"t": 1e12, "g": 1e9, "meg": 1e6, "k": 1e3, "mil": 25.4e-6, "m": 1e-3, "u": 1e-6,
          "µ": 1e-6, "n": 1e-9, "p": 1e-12, "f": 1e-15}


class NetlistError(ReadingsFileError):
    """A problem in a netlist, located by file, line and column (1-based character)."""

    def __init__(self, path: str, message: str, line: int | None = None,
                 column: int | None = None):
        super().__init__(path, message, line, None if column is None else str(column))


@dataclass(frozen=True, slots=True)
class Element:
    """One element. ``kind`` is the SPICE letter; ``value`` in SI (ohms, volts, amperes,
    gain); ``control`` the controlling nodes (E, G) or voltage-source name (F, H);
    ``tol`` the tolerance half-width as a fraction (0 if none)."""

    name: str
    kind: str
    nodes: tuple[str, str]
    value: float
    control: tuple[str, ...] = ()
    tol: float = 0.0
    line: int = 0
    #: columns (1-based characters) of the element's name and of its two nodes; the
    #: nodes' lines (a continuation line may hold them)
    column: int = 0
    node_at: tuple[tuple[int, int], tuple[int, int]] = ((0, 0), (0, 0))


@dataclass(frozen=True, slots=True)
class Netlist:
    path: str
    elements: tuple[Element, ...]
    port: tuple[str, str]
    notes: tuple[str, ...] = ()


def parse_value(text: str) -> float:
    """A SPICE number (``4.7k``, ``1meg``, ``10m``, ``1e-3``) or an RKM code (``4k7``).

    Raises ``ValueError``. SPICE reading wins: ``1m`` is one milli, ``1meg`` one mega."""
    m = _SPICE_RE.match(text.strip())
    if m:
        num, suffix, _unit = m.groups()
        return float(num) * (_SCALE[suffix.lower()] if suffix else 1.0)
    return parse_resistance(text)


def _lines(text: str):
    """Yield (line number, [(column, token)]) with continuations joined."""
    current: list | None = None
    start = 0
    for no, raw in enumerate(text.splitlines(), 1):
        body = re.split(r"[;$]", raw, maxsplit=1)[0]
        stripped = body.strip()
        if not stripped or stripped.startswith("*"):
            continue
        if stripped.startswith("+"):
            if current is None:
                raise NetlistError("", "a continuation line '+' with nothing before it", no, 1)
            col0 = body.index("+") + 1
            current += [(col0 + m.start() + 1, m.group(), no)
                        for m in re.finditer(r"\S+", body[col0:])]
            continue
        if current is not None:
            yield start, current
        start = no
        current = [(m.start() + 1, m.group(), no) for m in re.finditer(r"\S+", body)]
    if current is not None:
        yield start, current


def parse_netlist(text: str, path: str = "<netlist>", port: tuple[str, str] | None = None
                  ) -> Netlist:
    """Parse netlist text into a :class:`Netlist`; ``port`` overrides a ``.port`` line."""
    try:
        return _parse(text, path, port)
    except NetlistError as exc:
        if exc.path == "":
            raise NetlistError(path, exc.detail, exc.line,
                               None if exc.column is None else int(exc.column)) from None
        raise


def _parse(text, path, port):
    elements: list[Element] = []
    notes: list[str] = []
    names: dict[str, int] = {}
    port_line = None
    port_at = ((None, None), (None, None))
    for start, toks in _lines(text):
        col, word, lno = toks[0]
        letter = word[0].upper()
        if word.startswith("."):
            d = word.lower()
            if d == ".end":
                break
            if d == ".port":
                if len(toks) != 3:
                    raise NetlistError(path, ".port needs two nodes, e.g. '.port out 0'",
                                       lno, col)
                port_line = (toks[1][1].lower(), toks[2][1].lower())
                port_at = ((toks[1][2], toks[1][0]), (toks[2][2], toks[2][0]))
                continue
            if d in (".title", ".op", ".tf", ".options", ".option"):
                continue
            raise NetlistError(path, f"directive {word!r} is not read (only .port, .end)",
                               lno, col)
        if word.lower() in names:
            raise NetlistError(path, f"element {word!r} is defined twice (first on line "
                               f"{names[word.lower()]})", lno, col)
        names[word.lower()] = lno
        tol = 0.0
        rest = []
        for c, t, ln in toks[1:]:
            if t.lower().startswith("tol="):
                v = t[4:]
                try:
                    tol = (float(v[:-1]) / 100.0 if v.endswith("%") else parse_value(v))
                except ValueError:
                    raise NetlistError(path, f"cannot read tolerance {t!r} (write e.g. tol=1%)",
                                       ln, c) from None
                if not (tol >= 0 and math.isfinite(tol)) or tol >= 1:
                    raise NetlistError(path, f"tolerance {t!r} must be between 0 and 100 %",
                                       ln, c)
                continue
            rest.append((c, t, ln))
        if letter in "VI" and len(rest) >= 3 and rest[2][1].upper() == "DC":
            del rest[2]
        want = {"R": 3, "V": 3, "I": 3, "L": 3, "C": 3, "E": 5, "G": 5, "F": 4, "H": 4}
        if letter not in want:
            raise NetlistError(path, f"element {word!r}: only R, V, I, E, F, G, H (and L as a "
                               "short, C as an open at DC) are read", lno, col)
        if len(rest) != want[letter]:
            c = rest[-1][0] if rest else col
            raise NetlistError(path, f"element {word!r} needs {want[letter]} fields after its "
                               f"name, found {len(rest)}", lno, c)
        nodes = (rest[0][1].lower(), rest[1][1].lower())
        nodes = tuple("0" if n in GROUND else n for n in nodes)
        where = {"line": lno, "column": col,
                 "node_at": ((rest[0][2], rest[0][0]), (rest[1][2], rest[1][0]))}
        if letter in "LC":
            what = "inductor taken as a short" if letter == "L" else "capacitor taken as an open"
            notes.append(f"{word}: {what} at DC")
            elements.append(Element(word, letter, nodes, 0.0, **where))
            continue
        vc, vt, vl = rest[-1]
        control: tuple[str, ...] = ()
        if letter in "EG":
            control = tuple("0" if t[1].lower() in GROUND else t[1].lower() for t in rest[2:4])
        elif letter in "FH":
            control = (rest[2][1].lower(),)
        try:
            value = parse_value(vt)
        except ValueError:
            raise NetlistError(path, f"cannot read value {vt!r} of {word}", vl, vc) from None
        if letter == "R" and not (value > 0 and math.isfinite(value)):
            raise NetlistError(path, f"resistor {word} must be above 0 Ω and finite", vl, vc)
        if not math.isfinite(value):
            raise NetlistError(path, f"value {vt!r} of {word} is not a finite number", vl, vc)
        elements.append(Element(word, letter, nodes, value, control, tol, **where))
    p = port or port_line
    if p is None:
        raise NetlistError(path, "no port: add a line '.port <node+> <node->' or give the "
                           "port nodes", None, None)
    p = tuple("0" if n.lower() in GROUND else n.lower() for n in p)
    if port is not None:  # given as an option: no place in the file
        port_at = ((None, None), (None, None))
    if p[0] == p[1]:
        raise NetlistError(path, f"the port's two nodes are the same ({p[0]!r}): give two "
                           "different nodes", *port_at[1])
    if not elements:
        raise NetlistError(path, "no elements", None, None)
    _check(path, elements, p, port_at)
    return Netlist(path, tuple(elements), p, tuple(notes))


def _check(path, elements, port, port_at):
    """Floating nodes, loops of voltage sources/inductors, controls that do not exist."""
    vnames = {e.name.lower() for e in elements if e.kind in "VL"}
    nodes = {n for e in elements for n in e.nodes} | {n for e in elements if e.kind in "EG"
                                                      for n in e.control}
    for e in elements:
        if e.kind in "FH" and e.control[0] not in vnames:
            raise NetlistError(path, f"{e.name}: controlling source {e.control[0]!r} is not a "
                               "voltage source of this netlist", e.line, e.column)
    for n, (ln, c) in zip(port, port_at):
        if n not in nodes:
            raise NetlistError(path, f"port node {n!r} is not in the netlist", ln, c)
    if "0" not in nodes:
        raise NetlistError(path, "no ground node '0'", None, None)
    # union-find over conducting elements (C is open; controlled-source control pins draw
    # no current) for floating parts; over V/E/H/L for loops of voltage sources.
    parent = {n: n for n in nodes}

    def find(x):
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for e in elements:
        if e.kind != "C":
            parent[find(e.nodes[0])] = find(e.nodes[1])
    g = find("0")
    for e in elements:
        for n, (ln, c) in zip(e.nodes, e.node_at):
            if find(n) != g:
                raise NetlistError(path, f"node {n!r} of {e.name} is floating (no DC path to "
                                   "ground)", ln, c)
        for n in (e.control if e.kind in "EG" else ()):
            if find(n) != g:
                raise NetlistError(path, f"control node {n!r} of {e.name} is not connected to "
                                   "the circuit (no DC path to ground)", e.line, e.column)
    parent = {n: n for n in nodes}
    for e in elements:
        if e.kind in "VEHL":
            a, b = find(e.nodes[0]), find(e.nodes[1])
            if a == b:
                raise NetlistError(path, f"{e.name} closes a loop of voltage sources (or "
                                   "inductors, shorts at DC)", e.line, e.column)
            parent[a] = b


def apply_tolerances(net: Netlist, text: str, path: str = "<tolerances>") -> Netlist:
    """The netlist with tolerances from a side table (pure: text in).

    One rule a line, ``PATTERN TOLERANCE`` (whitespace or a comma between): the pattern an
    element name or a shell-style pattern (``R*``, ``RC?``, ``[RL]*``; case-insensitive),
    the tolerance ``1%`` or ``0.01``. A later line wins over an earlier one, and the table
    over a ``tol=`` in the netlist (``* 1%``: every valued part). ``#`` starts a
    comment. A pattern that
    matches no valued element, or a tolerance that cannot be read, is a
    :class:`NetlistError` naming the table's line and column.
    """
    import fnmatch

    tol = {e.name: e.tol for e in net.elements}
    valued = [e.name for e in net.elements if e.kind not in "LC"]
    given: set[str] = set()
    for no, raw in enumerate(text.splitlines(), 1):
        body = re.split(r"#", raw, maxsplit=1)[0]
        if not body.strip():
            continue
        toks = [(m.start() + 1, m.group()) for m in re.finditer(r"[^\s,]+", body)]
        if len(toks) != 2:
            raise NetlistError(path, "write one part (or pattern) and its tolerance, e.g. "
                               "'R* 1%'", no, toks[0][0] if toks else 1)
        (pc, pat), (tc, tv) = toks
        try:
            value = float(tv[:-1]) / 100.0 if tv.endswith("%") else float(tv)
        except ValueError:
            raise NetlistError(path, f"cannot read tolerance {tv!r} (write e.g. 1%)", no,
                               tc) from None
        if not (math.isfinite(value) and 0 <= value < 1):
            raise NetlistError(path, f"tolerance {tv!r} must be between 0 and 100 %", no, tc)
        hits = [n for n in valued if fnmatch.fnmatchcase(n.lower(), pat.lower())]
        if not hits:
            raise NetlistError(path, f"{pat!r} matches no element of {net.path} with a "
                               "value", no, pc)
        for n in hits:
            tol[n] = value
        given.update(hits)
    from dataclasses import replace

    note = f"tolerances of {len(given)} part(s) from {path}"
    return replace(net, elements=tuple(replace(e, tol=tol[e.name]) for e in net.elements),
                   notes=net.notes + (note,))
