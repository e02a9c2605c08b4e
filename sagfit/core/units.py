"""Physical units, SI prefixes, resistor codes and instrument accuracy specs.

Pure string and number handling: no file access, no heavy imports.

References
----------
- SI prefixes: BIPM, *The International System of Units* (SI Brochure, 9th ed., 2019), Table 7.
- Resistor "RKM" code (``4k7``, ``R47``, ``1M5``): IEC 60062:2016, clause 4 (letter
  code for resistance values). The letter stands where the decimal point would be.
- Meter specification ±(p % of reading + offset) read as a rectangular half-width a,
  standard uncertainty a/√3: JCGM 100:2008 (GUM), 4.3.7.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from .errors import InputError

__all__ = [
    "PREFIXES",
    "Accuracy",
    "parse_accuracy",
    "parse_quantity",
    "parse_resistance",
    "parse_percent",
    "parse_header_unit",
    "unit_dimension",
]

# SI Brochure (2019) Table 7, the prefixes a bench sees. 'u' stands for micro
# when no Greek letter is at hand (common practice); 'K' is read as kilo because
# resistor markings and spreadsheets write it so (common practice).
PREFIXES: dict[str, float] = {
    "T": 1e12, "G": 1e9, "M": 1e6, "k": 1e3, "K": 1e3, "": 1.0,
    "m": 1e-3, "u": 1e-6, "µ": 1e-6, "μ": 1e-6, "n": 1e-9, "p": 1e-12,
}

# unit symbol (case as written) -> dimension
_UNIT_SYMBOLS: dict[str, str] = {
    "V": "V", "v": "V", "volt": "V", "volts": "V",
    "A": "A", "a": "A", "amp": "A", "amps": "A", "ampere": "A",
    "ohm": "ohm", "ohms": "ohm", "Ohm": "ohm", "Ohms": "ohm", "OHM": "ohm",
    "\u03a9": "ohm", "\u2126": "ohm", "R": "ohm",
    "s": "s", "sec": "s",
    "%": "%", "pct": "%", "percent": "%",
    "C": "degC", "°C": "degC", "degC": "degC", "celsius": "degC",
    "W": "W",
    "h": "h", "min": "min",
}

_NUMBER = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_QUANTITY_RE = re.compile(rf"^\s*({_NUMBER})\s*([TGMkKmuµμnp]?)\s*([A-Za-z\u03a9\u2126°%]*)\s*$")
_RKM_RE = re.compile(r"^\s*(\d*)([RKMGTLrkm])(\d*)\s*$")
# IEC 60062 letters; a lower-case 'm' is read as milli, as in SI (common practice).
_RKM_SCALE = {"R": 1.0, "r": 1.0, "K": 1e3, "k": 1e3, "M": 1e6, "m": 1e-3, "G": 1e9,
              "T": 1e12, "L": 1e-3}
_OPEN_WORDS = {"open", "oc", "o/c", "inf", "+inf", "infinity", "∞", "open circuit", "opencircuit",
               "none", "nc"}
_SHORT_WORDS = {"short", "sc", "s/c", "short circuit", "shortcircuit"}


def unit_dimension(symbol: str) -> tuple[float, str] | None:
    """Return (scale to SI, dimension) for a unit such as ``mV``, ``kΩ``, ``mA``, ``%``.

    ``None`` when the symbol is not a unit sagfit knows. Prefixes are case-sensitive
    (``mV`` is millivolt, ``MV`` megavolt) except ``K``, read as kilo.
    """
    s = symbol.strip()
    if s in _UNIT_SYMBOLS:
        return 1.0, _UNIT_SYMBOLS[s]
    if s.lower() in ("ohm", "ohms"):
        return 1.0, "ohm"
    if len(s) > 1 and s[0] in PREFIXES:
        rest = s[1:]
        dim = _UNIT_SYMBOLS.get(rest) or ("ohm" if rest.lower() in ("ohm", "ohms") else None)
        if dim in ("V", "A", "ohm", "W") and rest != "R":
            return PREFIXES[s[0]], dim
        if dim == "s" and rest == "s":
            return PREFIXES[s[0]], "s"
    return None


def parse_header_unit(symbol: str) -> tuple[float, str] | None:
    """Unit in a CSV header (``mV``, ``kohm``, ``Ω``, ``%``); alias of :func:`unit_dimension`."""
    return unit_dimension(symbol)


def parse_quantity(text: str, dimension: str, *, what: str = "value") -> float:
    """Parse ``'2mV'``, ``'0.5 A'``, ``'4.7k'`` into SI units of ``dimension``.

    A bare number is taken in SI base units. Raises :class:`InputError` on
    anything else, naming ``what``.
    """
    m = _QUANTITY_RE.match(str(text))
    if not m:
        raise InputError(f"{what}: cannot read {text!r} as a quantity in {dimension}")
    num, prefix, unit = m.groups()
    value = float(num)
    if unit:
        u = unit_dimension(prefix + unit) if prefix else unit_dimension(unit)
        if u is None and prefix == "" and len(unit) > 1 and unit[0] in PREFIXES:
            u = unit_dimension(unit)
        if u is None or u[1] != dimension:
            raise InputError(f"{what}: unit of {text!r} is not a unit of {dimension}")
        return value * u[0]
    return value * PREFIXES[prefix]


def parse_percent(text: str, *, what: str = "value") -> float:
    """Parse ``'1%'`` or ``'0.5 %'`` into a percentage number (1.0, 0.5).

    The per-cent sign is required: a bare ``1`` could be a fraction or a percentage.
    """
    s = str(text).strip()
    m = re.match(rf"^({_NUMBER})\s*(%|pct|percent)$", s)
    if not m:
        raise InputError(f"{what}: {text!r} needs a per-cent sign, e.g. '1%'")
    return float(m.group(1))


def parse_resistance(text: str, scale: float = 1.0) -> float:
    """Parse one load cell into ohms; ``inf`` for open circuit, ``0`` for a short.

    Accepts plain numbers (times ``scale``, the column's unit), SI-prefixed values with
    or without the ohm sign (``4.7k``, ``4.7 kΩ``, ``470R``, ``1M``) and IEC 60062 RKM
    codes (``4k7``, ``R47``, ``1M5``, ``2L2`` = 2.2 mΩ). A prefix or code in the cell
    gives ohms directly, whatever the column's unit. Raises ``ValueError``.
    """
    s = str(text).strip()
    low = s.lower()
    if low in _OPEN_WORDS:
        return math.inf
    if low in _SHORT_WORDS:
        return 0.0
    try:
        return float(s) * scale
    except ValueError:
        pass
    m = _RKM_RE.match(s)
    if m and (m.group(1) or m.group(3)):
        whole, letter, frac = m.groups()
        return float(f"{whole or '0'}.{frac or '0'}") * _RKM_SCALE[letter]
    m = _QUANTITY_RE.match(s)
    if m:
        num, prefix, unit = m.groups()
        if unit in ("", "\u03a9", "\u2126", "ohm", "ohms", "Ohm", "R", "r", "OHM"):
            return float(num) * PREFIXES[prefix]
        u = unit_dimension(unit)
        if u is not None and u[1] == "ohm" and not prefix:
            return float(num) * u[0]
    raise ValueError(f"cannot read {text!r} as a resistance (write e.g. 4.7k, 4k7, 470R, open)")


@dataclass(frozen=True, slots=True)
class Accuracy:
    """An instrument specification ±(``percent`` % of reading + ``offset``).

    ``offset`` is in SI units of the quantity. ``divisor`` turns the half-width into a
    standard uncertainty: √3 for a rectangular distribution (GUM 4.3.7), or the stated
    coverage factor k for a normal one.

    The two parts of the spec are calibration deviations of the meter, not noise: one
    unknown gain error (the % of reading) and one unknown offset error, each the same for
    every reading the meter takes on one range in one sweep. With ``shared`` (the
    default) sagfit models them so (GUM, JCGM 100:2008, 5.2 and F.1.2.1: input quantities
    correlated through a common effect); ``shared=False`` treats each reading's error as
    independent of the others' (different meters, a range change mid-sweep, readings
    days apart). ``noise_percent`` and ``noise_offset`` state the meter's random error
    per reading (repeatability, resolution), as a standard uncertainty (1σ), independent
    from reading to reading.
    """

    percent: float = 0.0
    offset: float = 0.0
    divisor: float = math.sqrt(3.0)
    text: str = ""
    shared: bool = True
    noise_percent: float = 0.0
    noise_offset: float = 0.0

    def standard_uncertainty(self, reading):
        """Standard uncertainty of each reading from the spec alone (array or float), same
        unit as the reading: the whole half-width as one rectangular (or normal) term."""
        import numpy as np

        half_width = self.percent / 100.0 * np.abs(reading) + self.offset
        return half_width / self.divisor

    def noise(self, reading):
        """Random standard uncertainty of each reading (the stated noise; 0 if none)."""
        import numpy as np

        return self.noise_percent / 100.0 * np.abs(reading) + self.noise_offset

    @property
    def gain_u(self) -> float:
        """Standard uncertainty of the relative gain error (the % of reading part)."""
        return self.percent / 100.0 / self.divisor

    @property
    def offset_u(self) -> float:
        """Standard uncertainty of the offset error, in the unit of the quantity."""
        return self.offset / self.divisor

    @property
    def has_noise(self) -> bool:
        return self.noise_percent > 0.0 or self.noise_offset > 0.0

    @property
    def is_zero(self) -> bool:
        return self.percent == 0.0 and self.offset == 0.0 and not self.has_noise

    def with_noise(self, noise: "Accuracy") -> "Accuracy":
        """This spec with the random part ``noise`` (parsed like a spec, read as 1σ)."""
        return Accuracy(self.percent, self.offset, self.divisor, self.text, self.shared,
                        noise.percent, noise.offset)

    def with_shared(self, shared: bool) -> "Accuracy":
        return Accuracy(self.percent, self.offset, self.divisor, self.text, bool(shared),
                        self.noise_percent, self.noise_offset)


_SPEC_SCALE = {"%": 1.0, "pct": 1.0, "percent": 1.0, "ppm": 1e-4}  # → per cent
_COUNT_WORDS = r"(?:counts?|digits?|dgts?|lsds?|d)"


def parse_accuracy(text: str, dimension: str, *, what: str = "accuracy",
                   range: float | str | None = None,
                   resolution: float | str | None = None) -> Accuracy:
    """Parse a meter's accuracy specification into ±(p % of reading + offset).

    Accepted forms (terms joined by ``+``; the data-sheet forms of common practice):

    - ``'0.05%+2mV'``, ``'±(0.2 % + 1 mA)'``, ``'2mV'``, ``'0.1%'``: per cent of reading
      plus a fixed offset in a unit of the quantity;
    - ``'35ppm + 5ppm of range, range 10V'``: parts per million of reading and of range;
      ``ppm`` or ``%`` alone, or ``of reading`` (``rdg``), is of reading;
    - ``'0.1% of range, range 20A'`` or ``'0.1% of 20A'``: per cent of range (the range
      named in the term, in a ``range`` clause, or by the ``range`` argument);
    - ``'0.5% + 3 counts, resolution 1mV'``: counts (digits) of the last displayed
      digit, with the meter's resolution on that range.

    Every part of range and every count becomes part of the fixed offset (a per cent of
    range is the same number of volts at any reading on that range). The whole is read as
    a rectangular half-width (GUM 4.3.7), the usual reading of a meter's specification
    when no confidence level is stated (common practice).
    """
    raw = str(text).strip()
    s = raw.replace("±", "").replace("+/-", "")
    clauses = [c.strip() for c in re.split(r"[,;]", s)]
    s = clauses[0]
    if s.startswith("(") and s.endswith(")"):
        s = s[1:-1]
    if not s:
        raise InputError(f"{what}: empty specification")
    for clause in clauses[1:]:
        m = re.match(r"^(range|rng|resolution|res)\s*[:=]?\s*(.+)$", clause, re.I)
        if not m:
            raise InputError(f"{what}: cannot read {clause!r} in {raw!r} (after a comma, "
                             "write 'range 10V' or 'resolution 1mV')")
        if m.group(1).lower() in ("range", "rng"):
            range = m.group(2)
        else:
            resolution = m.group(2)

    def quantity(value, name):
        if value is None or isinstance(value, (int, float)):
            return None if value is None else float(value)
        if not re.search(r"[A-Za-zΩΩµμ]\s*$", str(value)):
            unit = {"V": "V", "A": "A", "ohm": "Ω"}.get(dimension, dimension)
            raise InputError(f"{what}: the {name} {value!r} needs a unit, e.g. '10{unit}'")
        return parse_quantity(str(value).replace(" ", ""), dimension, what=f"{what} {name}")

    percent = 0.0
    offset = 0.0
    parts = [" ".join(p.split()) for p in re.split(r"(?<![eE])\+", s) if p.strip()]
    if not parts or len(parts) > 2:
        raise InputError(f"{what}: cannot read {raw!r}; write it as e.g. '0.05%+2mV'")
    for part in parts:
        rel = re.match(rf"^({_NUMBER})\s*(%|pct|percent|ppm)(?:\s*of\s*(.+))?$", part, re.I)
        cnt = re.match(rf"^({_NUMBER})\s*{_COUNT_WORDS}$", part, re.I)
        if rel:
            x = float(rel.group(1)) * _SPEC_SCALE[rel.group(2).lower()]
            of = (rel.group(3) or "reading").strip().lower()
            if of in ("reading", "rdg", "rd", "value"):
                percent += x
            elif of in ("range", "rng", "full scale", "fs"):
                r = quantity(range, "range")
                if r is None:
                    raise InputError(f"{what}: {part!r} in {raw!r} needs the range; write e.g. "
                                     f"'{raw}, range 10{_unit_of(dimension)}' (or give the "
                                     "range in the bench profile)")
                offset += x / 100.0 * r
            else:
                offset += x / 100.0 * quantity(rel.group(3).strip(), "range")
        elif cnt:
            res = quantity(resolution, "resolution")
            if res is None:
                raise InputError(f"{what}: {part!r} in {raw!r} needs the resolution (one "
                                 f"count); write e.g. '{raw}, resolution "
                                 f"1m{_unit_of(dimension)}'")
            offset += float(cnt.group(1)) * res
        else:
            try:
                if not re.search(r"[A-Za-zΩΩµμ]\s*$", part):
                    raise InputError("offset without a unit")  # '2' could be V, mV or digits
                offset += parse_quantity(part.replace(" ", ""), dimension, what=what)
            except InputError:
                raise InputError(
                    f"{what}: cannot read {part!r} in {raw!r} (give the offset with a unit "
                    f"of {dimension}, e.g. '2m{_unit_of(dimension)}', or as '% of range', "
                    "'ppm of range' or 'counts')") from None
    if percent < 0 or offset < 0 or not math.isfinite(percent) or not math.isfinite(offset):
        raise InputError(f"{what}: {raw!r} must be non-negative and finite")
    return Accuracy(percent=percent, offset=offset, text=raw)


def _unit_of(dimension: str) -> str:
    return {"V": "V", "A": "A", "ohm": "Ω"}.get(dimension, dimension)
