"""Acceptance specs: a TOML file of tolerance limits and a decision rule.

Edge module (reads one file with ``tomllib``). The format is described in docs/accept.md;
in short::

    [spec]                       # optional: what this spec is
    name = "RB-C 5 V rail, incoming inspection"
    revision = "B"

    [limits.vth]                 # open-circuit voltage, V
    min = "4.90V"
    max = "5.10V"
    [limits.rth]                 # internal resistance, Ω
    max = "40mΩ"
    [limits.isc]                 # short-circuit current, A
    min = 50
    [limits.pmax]                # maximum power, W
    min = "100W"
    [[limits.voltage]]           # terminal voltage at a load or a current
    at = "1.5A"                  # or "3.3Ω", "4k7", "open"
    min = "4.85V"
    [[limits.regulation]]        # (V_light − V_heavy)/V_heavy × 100 %
    light = "0A"
    heavy = "1.5A"
    max = "1.5%"

    [decision]
    rule = "guarded"             # simple | guarded | risk
    confidence = 0.95            # or k = 2
    min_conformance = 0.95       # risk rule
    guard = 1.0                  # guarded rule: w = guard × U
    cap_flagged = true           # a flagged DUT is at best inconclusive
    ignore_flags = []            # warning codes that do not cap

Everything is validated strictly; every problem is a ``SpecFileError`` naming the key.
"""

from __future__ import annotations

import hashlib
import math
import re

from ..core.acceptance import RULES, Check, Condition, DecisionRule, Spec
from ..core.errors import InputError, SpecFileError
from .tomlfile import check_layout, parse_toml, read_bytes
from ..core.units import PREFIXES, parse_percent, parse_quantity, parse_resistance

__all__ = ["read_spec", "parse_spec"]

_SCALAR = {"vth": "V", "rth": "ohm", "isc": "A", "pmax": "W"}
_LIMIT_KEYS = {"min", "max", "note"}
_ALLOWED = {
    "spec": {"name", "revision", "part", "notes", "author", "date"},
    "limits": set(_SCALAR) | {"voltage", "regulation"},
    "decision": {"rule", "confidence", "k", "min_conformance", "guard", "cap_flagged",
                 "ignore_flags"},
}
_NUMBER_RE = re.compile(r"^\s*[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?\s*(.*?)\s*$")
_NAME_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_.@-]{0,63}$")
_OPEN = {"open", "oc", "open circuit", "inf", "∞", "no load"}
_UNIT_WORDS = {"V": "V", "ohm": "Ω", "A": "A", "W": "W"}


def read_spec(path: str) -> Spec:
    """Read and strictly validate an acceptance spec.

    Parameters
    ----------
    path : str
        The TOML file.

    Returns
    -------
    Spec

    Raises
    ------
    SpecFileError
        With the file name and the key at fault.
    """
    return parse_spec(read_bytes(path, "spec file"), str(path))


def parse_spec(raw: bytes | str, path: str = "<spec>") -> Spec:
    """Parse the text of a spec (see :func:`read_spec`)."""
    data = raw.encode("utf-8") if isinstance(raw, str) else raw
    doc = parse_toml(data, path)
    check_layout(doc, _ALLOWED, path)
    if "limits" not in doc or not doc["limits"]:
        raise SpecFileError(path, "no limits: add at least one table such as [limits.vth] "
                                  "with min and/or max", key="limits")
    info = doc.get("spec", {})
    for key, val in info.items():
        if not isinstance(val, str) and key != "date":
            raise SpecFileError(path, "must be a string", key=f"spec.{key}")
    checks = []
    limits = doc["limits"]
    for q in ("vth", "rth", "isc", "pmax"):
        if q in limits:
            body = _table(path, f"limits.{q}", limits[q])
            _keys(path, f"limits.{q}", body, _LIMIT_KEYS)
            lo, hi = _bounds(path, f"limits.{q}", body, _SCALAR[q])
            checks.append(_make(path, f"limits.{q}", name=q, quantity=q, lower=lo, upper=hi,
                                note=_note(path, f"limits.{q}", body)))
    for q in ("voltage", "regulation"):
        if q not in limits:
            continue
        items = limits[q]
        if isinstance(items, dict):
            items = [items]
            keys = [f"limits.{q}"]
        elif isinstance(items, list):
            keys = [f"limits.{q}[{i}]" for i in range(len(items))]
        else:
            raise SpecFileError(path, f"must be a table ([limits.{q}]) or an array of tables "
                                      f"([[limits.{q}]])", key=f"limits.{q}")
        for key, body in zip(keys, items):
            body = _table(path, key, body)
            if q == "voltage":
                _keys(path, key, body, _LIMIT_KEYS | {"at", "name"})
                if "at" not in body:
                    raise SpecFileError(path, "missing: the load or current of this check, "
                                              "e.g. at = \"1.5A\" or at = \"3.3ohm\"",
                                        key=f"{key}.at")
                at = _condition(path, f"{key}.at", body["at"])
                lo, hi = _bounds(path, key, body, "V")
                name = _name(path, key, body, "v_at_" + _slug(at))
                checks.append(_make(path, key, name=name, quantity="voltage", lower=lo,
                                    upper=hi, at=at, note=_note(path, key, body)))
            else:
                _keys(path, key, body, _LIMIT_KEYS | {"light", "heavy", "name"})
                for end, example in (("light", "open"), ("heavy", "2.2ohm")):
                    if end not in body:
                        raise SpecFileError(path, f"missing: the {end} load or current, e.g. "
                                                  f"{end} = \"{example}\"", key=f"{key}.{end}")
                light = _condition(path, f"{key}.light", body["light"])
                heavy = _condition(path, f"{key}.heavy", body["heavy"])
                _order(path, key, light, heavy)
                lo, hi = _bounds(path, key, body, "%")
                name = _name(path, key, body, f"regulation_{_slug(light)}_to_{_slug(heavy)}")
                checks.append(_make(path, key, name=name, quantity="regulation", lower=lo,
                                    upper=hi, light=light, heavy=heavy,
                                    note=_note(path, key, body)))
    names = {}
    for c in checks:
        if c.name in names:
            raise SpecFileError(path, f"check name {c.name!r} is used twice (also at "
                                      f"{names[c.name]}); give one of them a name = \"…\"",
                                key=c.key)
        names[c.name] = c.key
    decision = _decision(path, doc.get("decision", {}))
    try:
        return Spec(checks=tuple(checks), decision=decision, name=str(info.get("name", "")),
                    revision=str(info.get("revision", "")), source=path,
                    sha256=hashlib.sha256(data).hexdigest(),
                    info={k: str(v) for k, v in info.items()})
    except InputError as exc:
        raise SpecFileError(path, str(exc), key="limits") from None


# ------------------------------------------------------------------------ helpers
def _table(path, key, body) -> dict:
    if not isinstance(body, dict):
        raise SpecFileError(path, f"must be a table ([{key}]) with min and/or max", key=key)
    return body


def _keys(path, key, body, allowed):
    for k in body:
        if k not in allowed:
            raise SpecFileError(path, f"unknown key (allowed: {', '.join(sorted(allowed))})",
                                key=f"{key}.{k}")


def _note(path, key, body) -> str:
    note = body.get("note", "")
    if not isinstance(note, str):
        raise SpecFileError(path, "must be a string", key=f"{key}.note")
    return note


def _name(path, key, body, default) -> str:
    if "name" not in body:
        return default
    name = body["name"]
    if not isinstance(name, str) or not _NAME_RE.match(name):
        raise SpecFileError(path, "must be a short name of letters, digits and _ . @ - "
                                  "starting with a letter", key=f"{key}.name")
    if name in _SCALAR:
        raise SpecFileError(path, f"{name!r} is reserved for [limits.{name}]",
                            key=f"{key}.name")
    return name


_BARE = re.compile(r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$")
_SYMBOL = {"ohm": "Ω"}


def _limit(path, key, raw, dim) -> float:
    """One limit value in SI units (per cent for regulation)."""
    if isinstance(raw, bool):
        raise SpecFileError(path, "must be a number or a quantity such as \"4.75V\", not "
                                  "true/false", key=key)
    if dim == "%":
        if isinstance(raw, (int, float)):
            raise SpecFileError(path, "ambiguous without a unit (a fraction or per cent?): "
                                      "write it with a per-cent sign, e.g. \"1.5%\"", key=key)
        if not isinstance(raw, str):
            raise SpecFileError(path, "must be a string such as \"1.5%\"", key=key)
        try:
            value = parse_percent(raw, what=key)
        except InputError:
            raise SpecFileError(path, f"cannot read {raw!r} as a percentage (write e.g. "
                                      "\"1.5%\")", key=key) from None
    elif isinstance(raw, float) and not math.isfinite(raw):
        value = raw  # refused just below
    elif isinstance(raw, (int, float)) or (isinstance(raw, str) and _BARE.match(raw)):
        # A bare number is how "50" meant as mΩ became 50 Ω: every limit states its unit.
        num = str(raw).strip()
        sym = _SYMBOL.get(dim, dim)
        raise SpecFileError(path, f"{num} has no unit: write it with one, e.g. "
                                  f"{key.rsplit('.', 1)[-1]} = \"{num}{sym}\" or "
                                  f"\"{num}m{sym}\"", key=key)
    elif isinstance(raw, str):
        try:
            value = parse_quantity(_ohm(raw), dim, what=key)
        except InputError:
            raise SpecFileError(path, f"cannot read {raw!r} as a value in "
                                      f"{_UNIT_WORDS.get(dim, dim)} (write e.g. "
                                      f"{_example(dim)})", key=key) from None
    else:
        raise SpecFileError(path, f"must be a number or a string such as {_example(dim)}",
                            key=key)
    if not math.isfinite(value):
        raise SpecFileError(path, "must be finite (leave the key out for no limit)", key=key)
    return value


def _ohm(text: str) -> str:
    # units.parse_quantity knows the Greek capital omega; map the OHM SIGN (U+2126) to it
    return text.replace("\u2126", "\u03a9")


def _example(dim) -> str:
    return {"V": "\"4.75V\"", "ohm": "\"100mΩ\" or \"100 mohm\"", "A": "\"2.5A\"",
            "W": "\"10W\"", "%": "\"1.5%\""}[dim]


def _bounds(path, key, body, dim) -> tuple[float, float]:
    if "min" not in body and "max" not in body:
        raise SpecFileError(path, "give min and/or max", key=key)
    lo = _limit(path, f"{key}.min", body["min"], dim) if "min" in body else -math.inf
    hi = _limit(path, f"{key}.max", body["max"], dim) if "max" in body else math.inf
    if lo > hi:
        raise SpecFileError(path, f"min ({body['min']}) is above max ({body['max']})",
                            key=f"{key}.min")
    return lo, hi


def _condition(path, key, raw) -> Condition:
    """An operating point: a string with a unit of Ω or A, an RKM code, or "open"."""
    if isinstance(raw, bool) or not isinstance(raw, str):
        if isinstance(raw, (int, float)) and not isinstance(raw, bool):
            raise SpecFileError(path, f"{raw!r} is ambiguous without a unit (a load or a "
                                      "current?): write e.g. \"1.5A\" or \"3.3ohm\"", key=key)
        raise SpecFileError(path, "must be a string such as \"1.5A\", \"3.3ohm\" or \"open\"",
                            key=key)
    s = raw.strip()
    if s.lower() in _OPEN:
        return Condition("load", math.inf, "open")
    m = _NUMBER_RE.match(s)
    if m and (m.group(1) == "" or m.group(1) in PREFIXES):
        raise SpecFileError(path, f"{raw!r} is ambiguous without a unit (a load or a "
                                  "current?): write e.g. \"1.5A\" or \"3.3ohm\"", key=key)
    try:
        value = parse_quantity(s, "A", what=key)
        kind = "current"
    except InputError:
        try:
            value = parse_quantity(_ohm(s), "ohm", what=key)
        except InputError:
            try:
                value = parse_resistance(s)
            except ValueError:
                raise SpecFileError(path, f"cannot read {raw!r} as a load (\"3.3ohm\", \"4k7\", "
                                          "\"open\") or a current (\"1.5A\")", key=key) from None
        kind = "load"
    try:
        return Condition(kind, float(value), s)
    except InputError as exc:
        raise SpecFileError(path, str(exc), key=key) from None


def _order(path, key, light: Condition, heavy: Condition) -> None:
    """The light point must draw less current than the heavy one (when comparable)."""
    if light.kind == heavy.kind:
        lighter = (light.value > heavy.value if light.kind == "load"
                   else abs(light.value) < abs(heavy.value))
        if not lighter:
            raise SpecFileError(path, f"the light point ({light.label}) must draw less current "
                                      f"than the heavy one ({heavy.label})", key=f"{key}.light")


def _slug(c: Condition) -> str:
    if c.kind == "load" and math.isinf(c.value):
        return "open"
    return (c.text.replace(" ", "").replace("\u03a9", "ohm").replace("\u2126", "ohm")
            .replace("µ", "u").replace("μ", "u"))


def _make(path, key, **kw) -> Check:
    try:
        return Check(key=key, **kw)
    except InputError as exc:
        raise SpecFileError(path, str(exc), key=key) from None


def _finite(v) -> float | None:
    """A TOML number as a finite float (None for text, booleans, nan, inf, or an integer
    too large for a float)."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    try:
        f = float(v)
    except OverflowError:
        return None
    return f if math.isfinite(f) else None


#: The numeric keys of [decision]: name, the range it must lie in, and the message.
_DECISION_NUMBERS = (
    ("confidence", lambda v: 0 < v < 1, "must be a number between 0 and 1, e.g. 0.95"),
    ("k", lambda v: v > 0, "coverage factor must be a positive number, e.g. 2"),
    ("min_conformance", lambda v: 0.5 < v < 1,
     "must be a probability above 0.5 and below 1, e.g. 0.95"),
    ("guard", lambda v: v >= 0, "must be a number ≥ 0 (the guard band as a multiple of U)"),
)


def _decision(path, body) -> DecisionRule:
    kw: dict = {}
    if "rule" in body:
        rule = body["rule"]
        if not isinstance(rule, str) or rule not in RULES:
            raise SpecFileError(path, f"must be one of {', '.join(RULES)}", key="decision.rule")
        kw["rule"] = rule
    if "confidence" in body and "k" in body:
        raise SpecFileError(path, "give either confidence or k, not both", key="decision.k")
    for name, fits, msg in _DECISION_NUMBERS:
        if name in body:
            v = _finite(body[name])
            if v is None or not fits(v):
                raise SpecFileError(path, msg, key=f"decision.{name}")
            kw[name] = v
    if "cap_flagged" in body:
        if not isinstance(body["cap_flagged"], bool):
            raise SpecFileError(path, "must be true or false", key="decision.cap_flagged")
        kw["cap_flagged"] = body["cap_flagged"]
    if "ignore_flags" in body:
        codes = body["ignore_flags"]
        if not isinstance(codes, list) or not all(isinstance(c, str) for c in codes):
            raise SpecFileError(path, "must be a list of flag codes, e.g. [\"scale-applied\"]",
                                key="decision.ignore_flags")
        kw["ignore_flags"] = tuple(codes)
    try:
        return DecisionRule(**kw)
    except InputError as exc:
        raise SpecFileError(path, str(exc), key="decision") from None
