"""Which column is which: header names, units in headers or in a units row, and the
column mapping a user writes (``--columns``, the bench profile's ``[columns]`` table).

Edge module shared by every readings reader (CSV, Parquet, Excel/OpenDocument, a
DataFrame): each hands over its header texts and gets back the role of each column and
its scale to SI units, or a ``ReadingsFileError`` that lists the columns and shows the
mapping to write.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Mapping

from ..core.errors import InputError, ReadingsFileError
from ..core.units import parse_header_unit

__all__ = ["ColumnRole", "ROLES", "classify_header", "normalise_name", "assign_roles", "parse_column_mapping",
           "check_column_mapping", "units_row_names", "is_unit"]

# role -> accepted base names (lower case, separators normalised to '_')
_ROLES: dict[str, tuple[str, ...]] = {
    "dut": ("dut", "serial", "id", "dut_id", "serial_number", "sn", "device", "uut", "unit_id",
            "cell", "pack", "board"),
    "load": ("load", "r_load", "rload", "load_resistance", "resistance", "r", "rl", "r_l",
             "resistor", "load_r"),
    "voltage": ("voltage", "v", "u", "terminal_voltage", "v_term", "vout", "v_out", "volts",
                "v_load", "vload", "output_voltage"),
    "current": ("current", "i", "i_load", "load_current", "iload", "iout", "i_out", "amps"),
    "u_voltage": ("u_voltage", "u_v", "sigma_voltage", "sigma_v", "uncertainty_voltage"),
    "u_current": ("u_current", "u_i", "sigma_current", "sigma_i", "uncertainty_current"),
    "u_load": ("u_load", "u_r", "u_load_resistance", "sigma_load", "uncertainty_load"),
    "load_tolerance": ("load_tolerance", "tolerance", "tol", "r_tolerance", "load_tol"),
    "time": ("time", "t", "timestamp", "datetime", "date_time", "elapsed", "time_s"),
    "group": ("group", "string", "bank", "batch", "lot"),
    "temperature": ("temperature", "temp", "ambient", "temperature_c", "ambient_c"),
}
#: The roles a column can take, in the order the documentation lists them.
ROLES = tuple(_ROLES)
_DIMENSION = {"load": "ohm", "voltage": "V", "current": "A", "u_voltage": "V",
              "u_current": "A", "u_load": "ohm", "load_tolerance": "%", "time": "s",
              "temperature": "degC"}
_STRICT_UNITS = {"load", "voltage", "current", "u_voltage", "u_current", "u_load"}
_NAME_TO_ROLE = {name: role for role, names in _ROLES.items() for name in names}
_BRACKET_RE = re.compile(r"^(.*?)[\s_]*[\[(]\s*([^\])]*?)\s*[\])]\s*$")
_SEPARATORS_RE = re.compile(r"[\s\-./]+")
_TIME_FACTORS = {"s": 1.0, "sec": 1.0, "ms": 1e-3, "min": 60.0, "h": 3600.0, "hr": 3600.0,
                 "iso": 1.0, "iso8601": 1.0, "utc": 1.0, "date": 1.0}
_TIME_UNITS = frozenset({"s", "sec", "ms", "min", "h", "hr"})


@dataclass(frozen=True, slots=True)
class ColumnRole:
    """One column's part in the readings: ``role`` (voltage, load, ...), ``scale`` to SI
    units, the ``header`` as written and its position ``index`` in the table."""

    role: str
    scale: float
    header: str
    index: int


def normalise_name(name: str) -> str:
    """A header or key as compared: lower case, blanks, dashes, dots and slashes as '_'."""
    return _SEPARATORS_RE.sub("_", name.strip().lower()).strip("_")


def classify_header(header: str) -> tuple[str, float] | None:
    """Map a header to (role, scale to SI), ``None`` for an unrelated column.

    Units may be a suffix (``voltage_mV``, ``load_kohm``) or in brackets
    (``Voltage [mV]``, ``Load (kΩ)``). Raises ``ValueError`` for a recognised quantity
    with a unit sagfit does not know or of the wrong kind.
    """
    h = header.strip().strip('"').strip()
    m = _BRACKET_RE.match(h)
    unit = None
    if m:
        base, unit = m.group(1), m.group(2)
        role = _NAME_TO_ROLE.get(normalise_name(base))
        if role is None:
            return None
    else:
        role = _NAME_TO_ROLE.get(normalise_name(h))
        if role is None:
            # unit as the last '_'-separated token, case kept (mV vs MV)
            raw = re.split(r"[\s_]+", h)
            if len(raw) >= 2:
                role = _NAME_TO_ROLE.get(normalise_name(" ".join(raw[:-1])))
                if role is not None:
                    unit = raw[-1]
            if role is None:
                return None
    if unit is None or unit == "":
        return role, 1.0
    return _unit_scale(role, unit, header, strict=m is not None or role in _STRICT_UNITS)


def _unit_scale(role: str, unit: str, header: str, *, strict: bool = True):
    """(role, scale) of ``unit`` for ``role``; ``None`` for a non-strict suffix that is no
    unit (``temperature_note``); ``ValueError`` for an unknown or wrong unit."""
    dim = _DIMENSION.get(role)
    if dim is None:
        raise ValueError(f"header {header!r}: a {role} column takes no unit")
    if role == "time" and unit.lower() in _TIME_FACTORS:
        return role, _TIME_FACTORS[unit.lower()]
    parsed = parse_header_unit(unit)
    if parsed is None or parsed[1] != dim:
        if not strict:
            return None
        if parsed is None:
            raise ValueError(f"unknown unit {unit!r} in header {header!r} "
                             f"(use e.g. {_example_unit(dim)})")
        raise ValueError(f"unit {unit!r} in header {header!r} is not a unit of {dim}")
    return role, parsed[0]


def _example_unit(dim: str) -> str:
    return {"V": "V or mV", "A": "A or mA", "ohm": "ohm, kohm or Ω", "%": "%",
            "s": "s", "degC": "C"}.get(dim, dim)


# ------------------------------------------------------------------------ units rows
def is_unit(cell: str) -> bool:
    """True for a unit as a units row writes it: ``V``, ``mA``, ``[kohm]``, ``s``."""
    u = str(cell).strip().strip("[]()").strip()
    return u.lower() in _TIME_UNITS or parse_header_unit(u) is not None


def units_row_names(names: list[str], cells: list[str]) -> list[str] | None:
    """The headers with the units of a units row under them (``Voltage`` over ``V`` reads
    as ``Voltage [V]``), or ``None`` when ``cells`` is not a units row: a cell for each
    column, at least one of them a unit, every non-empty cell a unit."""
    cells = [str(c).strip().strip('"').strip() for c in cells]
    if len(cells) != len(names) or not any(cells) or not all(is_unit(c) for c in cells if c):
        return None
    units = [c.strip("[]()").strip() for c in cells]
    return [f"{h.strip()} [{u}]" if u and not _BRACKET_RE.match(h.strip()) else h
            for h, u in zip(names, units)]


# --------------------------------------------------------------------- the mapping
def parse_column_mapping(text: str, *, what: str = "--columns") -> dict[str, str]:
    """``"voltage=V (V), current=I_meas (A)"`` → ``{"voltage": "V (V)", "current":
    "I_meas (A)"}``. Pairs are split at a comma followed by a role name and ``=``, so a
    header may itself hold commas. Raises ``InputError`` naming ``what``."""
    words = sorted(set(_NAME_TO_ROLE) | set(ROLES), key=len, reverse=True)
    role_re = "|".join(re.escape(w) for w in words)
    parts = re.split(rf",\s*(?=(?:{role_re})\s*=)", text.strip(), flags=re.IGNORECASE)
    out: dict[str, str] = {}
    for part in parts:
        if not part.strip():
            continue
        if "=" not in part:
            raise InputError(f"{what}: {part.strip()!r} is not ROLE=COLUMN "
                             "(e.g. voltage=V (V),current=I_meas (A))")
        key, value = (s.strip() for s in part.split("=", 1))
        out[key] = value
    return check_column_mapping(out, what=what)


def check_column_mapping(mapping: Mapping[str, object], *, what: str) -> dict[str, str]:
    """Role words of a mapping read as roles (``serial`` → ``dut``); every value a
    non-empty column name, no role twice. Raises ``InputError`` naming ``what``."""
    out: dict[str, str] = {}
    for key, value in mapping.items():
        role = key if key in _ROLES else _NAME_TO_ROLE.get(normalise_name(str(key)))
        if role is None:
            raise InputError(f"{what}: {key!r} is not a column role; use "
                             f"{', '.join(ROLES)}")
        if not isinstance(value, str) or not value.strip():
            raise InputError(f"{what}: give the column name for {role} as text, e.g. "
                             f"{role} = \"{_EXAMPLE[role]}\"")
        if role in out:
            raise InputError(f"{what}: {role} is given twice")
        out[role] = value.strip()
    return out


_EXAMPLE = {"dut": "Serial", "load": "R_load (ohm)", "voltage": "V (V)",
            "current": "I_meas (A)", "u_voltage": "sigma V (V)", "u_current": "sigma I (A)",
            "u_load": "sigma R (ohm)", "load_tolerance": "Tol (%)", "time": "Time (s)",
            "group": "Lot", "temperature": "Ambient (C)"}


def _find(names: list[str], wanted: str) -> tuple[int, str | None] | None:
    """(index, unit given in the mapping) of the column ``wanted`` names: its header
    exactly (case and outer blanks aside), or ``Header [unit]`` for a header without
    the unit."""
    fold = [n.strip().casefold() for n in names]
    w = wanted.strip().casefold()
    if w in fold:
        return fold.index(w), None
    m = _BRACKET_RE.match(wanted.strip())
    if m and m.group(1).strip().casefold() in fold:
        return fold.index(m.group(1).strip().casefold()), m.group(2)
    return None


def _mapped_role(role: str, header: str, unit: str | None) -> tuple[str, float]:
    """(role, scale) of a column the user mapped to ``role``: the unit given with the
    mapping, else the one in the header (brackets or suffix), else SI."""
    if unit is not None:
        return _unit_scale(role, unit, header)
    try:
        own = classify_header(header)
    except ValueError:
        own = None
    if own is not None and own[0] == role:
        return own
    m = _BRACKET_RE.match(header.strip())
    if m and m.group(2):
        return _unit_scale(role, m.group(2), header)
    return role, 1.0


def assign_roles(names: list[str], source: str, *, mapping: Mapping[str, str] | None = None,
                 line: int | None = None, sheet: str | None = None,
                 place: str = "line") -> tuple[dict[str, ColumnRole], list[str]]:
    """The role of each column (by its header), and the headers left unused.

    ``mapping`` (role → header, from :func:`parse_column_mapping` or a bench profile)
    says which column is which where the headers do not; the other columns are
    recognised by name, except that a role the mapping gives is not taken again. Errors
    name ``source`` and the header row (``line``; ``sheet`` and ``place`` for a workbook
    or a Parquet table).
    """
    where = dict(line=line, sheet=sheet, place=place)
    roles: dict[str, ColumnRole] = {}
    taken: set[int] = set()
    for role, wanted in (mapping or {}).items():
        hit = _find(names, wanted)
        if hit is None:
            listed = ", ".join(repr(n.strip()) for n in names if n.strip()) or "none"
            raise ReadingsFileError(source, f"no column {wanted!r} for {role} (the mapping "
                                            f"says so); the columns are {listed}", **where)
        col, unit = hit
        header = names[col].strip()
        if col in taken:
            raise ReadingsFileError(source, f"column {header!r} is mapped to two roles",
                                    column=header, **where)
        try:
            _, scale = _mapped_role(role, header, unit)
        except ValueError as exc:
            raise ReadingsFileError(source, str(exc), column=header, **where) from None
        roles[role] = ColumnRole(role, scale, header, col)
        taken.add(col)
    ignored = []
    for col, h in enumerate(names):
        if not h.strip() or col in taken:
            continue
        try:
            c = classify_header(h)
        except ValueError as exc:
            raise ReadingsFileError(source, str(exc), column=h.strip(), **where) from None
        if c is None or (mapping and c[0] in mapping):
            ignored.append(h.strip())
            continue
        role, scale = c
        if role in roles:
            raise ReadingsFileError(source, f"columns {roles[role].header!r} and {h.strip()!r} "
                                            f"both look like {role}; rename one, or say which "
                                            f"is which: --columns \"{role}={h.strip()}\"",
                                    column=h.strip(), **where)
        roles[role] = ColumnRole(role, scale, h.strip(), col)
    present = [r for r in ("load", "voltage", "current") if r in roles]
    if len(present) < 2:
        found = ", ".join(repr(n.strip()) for n in names if n.strip()) or "none"
        raise ReadingsFileError(
            source, f"need two of load, voltage and current columns; found headers {found} "
                    "(name them e.g. load_ohm, voltage_V, current_A, or say which is which: "
                    f"--columns \"{suggest_mapping(names, roles)}\", or a [columns] table in "
                    "the bench profile)", **where)
    return roles, ignored


#: Words that mark a column as the set value rather than the measured one.
_SET_WORDS = ("set", "prog", "limit", "target", "nom", "cmd", "demand")


def suggest_mapping(names: list[str], roles: Mapping[str, ColumnRole]) -> str:
    """A mapping to show in the error: the roles found, and for each missing one the
    likeliest column (by the unit in its header, then by its name), measured values
    before set values."""
    chosen = {r: c.header for r, c in roles.items() if r in ("load", "voltage", "current")}
    used = set(chosen.values())
    for role in ("voltage", "current", "load"):
        if role in chosen or len(chosen) >= 2:
            continue
        best, best_score = None, 0
        for h in names:
            h = h.strip()
            if not h or h in used:
                continue
            score = _likeness(role, h)
            if score > best_score:
                best, best_score = h, score
        chosen[role] = best or "COLUMN"
        used.add(chosen[role])
    return ",".join(f"{r}={h}" for r, h in chosen.items())


def _likeness(role: str, header: str) -> int:
    m = _BRACKET_RE.match(header)
    unit = m.group(2) if m else re.split(r"[\s_]+", header)[-1]
    dim = parse_header_unit(unit) if unit else None
    low = normalise_name(m.group(1) if m else header)
    score = 0
    if dim is not None and dim[1] == _DIMENSION[role]:
        score += 4
    first = {"voltage": ("v", "u", "volt"), "current": ("i", "curr", "amp"),
             "load": ("r", "load", "res")}[role]
    if low.startswith(first):
        score += 2
    if score and any(w in low for w in _SET_WORDS):
        score -= 1
    return score
