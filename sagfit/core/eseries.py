"""IEC 60063 preferred-number series E6 … E192 (the values resistors are made in).

Pure core: the tables are data in this module, no file access.

Each series is a list of mantissas in [1, 10), repeated in every decade (4.7 Ω, 47 Ω,
470 Ω …). E6, E12 and E24 are written with two significant figures, E48, E96 and E192
with three; the tables below hold the mantissa digits as integers (47 = 4.7, 475 =
4.75), so every value is built exactly from its decimal digits.

The E3–E24 values between 2.7 and 4.7, and 8.2, do not follow the rounding of
10^(i/N): they predate the series formula and are kept by the standard, which is why
the values are tabulated rather than computed.

References
----------
- IEC 60063:2015, *Preferred number series for resistors and capacitors*, Tables 1–3
  (series E6 … E192). The values were checked against the public reproductions listed in
  ``tests/data/e_series.SOURCES.md``; no text of the standard is copied.
- Usual resistor tolerance of each series (E6 ±20 %, E12 ±10 %, E24 ±5 %, E48 ±2 %,
  E96 ±1 %, E192 ±0.5 %): common practice, from memory. Today many E24 and E96 parts
  are sold at ±1 % or better, so use the tolerance printed on the part.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import InputError

__all__ = ["SERIES", "DIGITS", "TYPICAL_TOLERANCE_PCT", "series_name", "mantissas",
           "values", "below", "above", "nearest", "is_member"]

# IEC 60063:2015 mantissas, as integers of DIGITS[name] significant figures.
SERIES: dict[str, tuple[int, ...]] = {
    "E6": (
        10, 15, 22, 33, 47, 68,
    ),
    "E12": (
        10, 12, 15, 18, 22, 27, 33, 39, 47, 56, 68, 82,
    ),
    "E24": (
        10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30, 33, 36, 39, 43, 47, 51, 56, 62, 68, 75,
        82, 91,
    ),
    "E48": (
        100, 105, 110, 115, 121, 127, 133, 140, 147, 154, 162, 169, 178, 187, 196, 205, 215,
        226, 237, 249, 261, 274, 287, 301, 316, 332, 348, 365, 383, 402, 422, 442, 464, 487,
        511, 536, 562, 590, 619, 649, 681, 715, 750, 787, 825, 866, 909, 953,
    ),
    "E96": (
        100, 102, 105, 107, 110, 113, 115, 118, 121, 124, 127, 130, 133, 137, 140, 143, 147,
        150, 154, 158, 162, 165, 169, 174, 178, 182, 187, 191, 196, 200, 205, 210, 215, 221,
        226, 232, 237, 243, 249, 255, 261, 267, 274, 280, 287, 294, 301, 309, 316, 324, 332,
        340, 348, 357, 365, 374, 383, 392, 402, 412, 422, 432, 442, 453, 464, 475, 487, 499,
        511, 523, 536, 549, 562, 576, 590, 604, 619, 634, 649, 665, 681, 698, 715, 732, 750,
        768, 787, 806, 825, 845, 866, 887, 909, 931, 953, 976,
    ),
    "E192": (
        100, 101, 102, 104, 105, 106, 107, 109, 110, 111, 113, 114, 115, 117, 118, 120, 121,
        123, 124, 126, 127, 129, 130, 132, 133, 135, 137, 138, 140, 142, 143, 145, 147, 149,
        150, 152, 154, 156, 158, 160, 162, 164, 165, 167, 169, 172, 174, 176, 178, 180, 182,
        184, 187, 189, 191, 193, 196, 198, 200, 203, 205, 208, 210, 213, 215, 218, 221, 223,
        226, 229, 232, 234, 237, 240, 243, 246, 249, 252, 255, 258, 261, 264, 267, 271, 274,
        277, 280, 284, 287, 291, 294, 298, 301, 305, 309, 312, 316, 320, 324, 328, 332, 336,
        340, 344, 348, 352, 357, 361, 365, 370, 374, 379, 383, 388, 392, 397, 402, 407, 412,
        417, 422, 427, 432, 437, 442, 448, 453, 459, 464, 470, 475, 481, 487, 493, 499, 505,
        511, 517, 523, 530, 536, 542, 549, 556, 562, 569, 576, 583, 590, 597, 604, 612, 619,
        626, 634, 642, 649, 657, 665, 673, 681, 690, 698, 706, 715, 723, 732, 741, 750, 759,
        768, 777, 787, 796, 806, 816, 825, 835, 845, 856, 866, 876, 887, 898, 909, 920, 931,
        942, 953, 965, 976, 988,
    ),
}
DIGITS: dict[str, int] = {"E6": 2, "E12": 2, "E24": 2, "E48": 3, "E96": 3, "E192": 3}
TYPICAL_TOLERANCE_PCT: dict[str, float] = {"E6": 20.0, "E12": 10.0, "E24": 5.0, "E48": 2.0,
                                           "E96": 1.0, "E192": 0.5}

# relative slack when matching a value to the table, so that 4.7e-3 computed in
# floating point still counts as an E-series value
_FUZZ = 1e-9


def series_name(text: str) -> str:
    """Canonical series name (``"E12"``) from ``"e12"``, ``"E 12"`` or ``"12"``."""
    s = str(text).strip().upper().replace(" ", "")
    if not s.startswith("E"):
        s = "E" + s
    if s not in SERIES:
        raise InputError(f"unknown resistor series {text!r}; use one of "
                         f"{', '.join(SERIES)} (IEC 60063)")
    return s


def _ints(series: str) -> np.ndarray:
    return np.asarray(SERIES[series_name(series)], dtype=np.int64)


def _build(ints: np.ndarray, exponent: np.ndarray) -> np.ndarray:
    """ints × 10^exponent, correctly rounded (a power of ten up to 10^22 is exact)."""
    ints = np.asarray(ints, dtype=np.float64)
    exponent = np.asarray(exponent, dtype=np.int64)
    pos = np.where(exponent >= 0, exponent, 0)
    neg = np.where(exponent < 0, -exponent, 0)
    return ints * np.power(10.0, pos) / np.power(10.0, neg)


def mantissas(series: str) -> np.ndarray:
    """The series' values in [1, 10) as floats, e.g. E6 → [1.0, 1.5, 2.2, 3.3, 4.7, 6.8]."""
    name = series_name(series)
    return _build(_ints(name), np.full(len(SERIES[name]), -(DIGITS[name] - 1)))


def values(series: str, low: float, high: float) -> np.ndarray:
    """Every value of ``series`` in [low, high], all decades, ascending.

    Parameters
    ----------
    series : str
        ``"E6"`` … ``"E192"``.
    low, high : float
        Bounds in the quantity's unit (Ω for resistors), 0 < low ≤ high, finite.
    """
    name = series_name(series)
    if not (0 < low <= high and math.isfinite(high)):
        raise InputError(f"E-series range: need 0 < low ≤ high, finite (got {low!r}, {high!r})")
    d0 = math.floor(math.log10(low)) - 1
    d1 = math.floor(math.log10(high)) + 1
    ints = _ints(name)
    dec = np.arange(d0, d1 + 1)
    grid = _build(np.tile(ints, dec.size), np.repeat(dec - (DIGITS[name] - 1), ints.size))
    keep = (grid >= low * (1 - _FUZZ)) & (grid <= high * (1 + _FUZZ))
    return grid[keep]


def _split(x: np.ndarray):
    """Decade d and mantissa m with x = m·10^d, 1 ≤ m < 10 (guarding log10 round-off)."""
    d = np.floor(np.log10(x)).astype(np.int64)
    m = x / _build(np.ones_like(x), d)
    low = m < 1.0
    d = np.where(low, d - 1, d)
    high = m >= 10.0
    d = np.where(high, d + 1, d)
    m = x / _build(np.ones_like(x), d)
    return d, m


def _positive(x, what):
    a = np.asarray(x, dtype=np.float64)
    if not np.all(np.isfinite(a) & (a > 0)):
        raise InputError(f"{what}: E-series values exist only for finite values > 0")
    return a


def below(x, series: str):
    """The largest value of ``series`` ≤ ``x`` (array or float), e.g. below(5, "E12") = 4.7."""
    name = series_name(series)
    a = _positive(x, "below")
    d, m = _split(np.atleast_1d(a))
    mant = mantissas(name)
    idx = np.searchsorted(mant, m * (1 + _FUZZ), side="right") - 1
    wrap = idx < 0  # only reachable through the fuzz at m just under 1
    idx = np.where(wrap, mant.size - 1, idx)
    d = np.where(wrap, d - 1, d)
    out = _build(_ints(name)[idx], d - (DIGITS[name] - 1))
    return out.reshape(a.shape) if a.ndim else float(out[0])


def above(x, series: str):
    """The smallest value of ``series`` ≥ ``x`` (array or float), e.g. above(5, "E12") = 5.6."""
    name = series_name(series)
    a = _positive(x, "above")
    d, m = _split(np.atleast_1d(a))
    mant = mantissas(name)
    idx = np.searchsorted(mant, m * (1 - _FUZZ), side="left")
    wrap = idx >= mant.size  # past the last mantissa: 1.0 of the next decade
    ints = np.where(wrap, 10 ** (DIGITS[name] - 1), _ints(name)[np.minimum(idx, mant.size - 1)])
    d = np.where(wrap, d + 1, d)
    out = _build(ints, d - (DIGITS[name] - 1))
    return out.reshape(a.shape) if a.ndim else float(out[0])


def nearest(x, series: str):
    """The value of ``series`` nearest to ``x`` by ratio (the series is geometric).

    nearest(5, "E12") = 4.7 (5/4.7 = 1.064 < 5.6/5 = 1.12).
    """
    lo, hi = below(x, series), above(x, series)
    a = np.asarray(x, dtype=np.float64)
    pick_hi = np.log(hi / a) < np.log(a / lo)
    out = np.where(pick_hi, hi, lo)
    return out if np.ndim(out) else float(out)


def is_member(x, series: str):
    """Whether ``x`` is a value of ``series`` (within floating-point round-off)."""
    a = np.asarray(x, dtype=np.float64)
    ok = np.isfinite(a) & (a > 0)
    safe = np.where(ok, a, 1.0)
    near = np.asarray(nearest(safe, series))
    out = ok & (np.abs(near / safe - 1) <= _FUZZ)
    return out if np.ndim(out) else bool(out)
