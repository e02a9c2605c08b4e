"""Numbers as the trade writes them: SI prefixes, units, uncertainty to two digits.

Everything here returns strings; nothing prints.

References
----------
JCGM 100:2008 (GUM), 7.2.6: state the uncertainty with at most two significant digits
and round the estimate to the same decimal place (10.05762 Ω with u = 27 mΩ is
reported as 10.058 Ω). SI prefixes: SI Brochure, 9th ed. (2019), Table 7.
"""

from __future__ import annotations

import math

__all__ = [
    "si_prefix",
    "format_value",
    "format_estimate",
    "format_interval",
    "format_percent",
    "format_p",
]

_PREFIX_BY_EXP = {-12: "p", -9: "n", -6: "µ", -3: "m", 0: "", 3: "k", 6: "M", 9: "G", 12: "T"}


def si_prefix(x: float) -> tuple[float, str]:
    """Return (scale, prefix) so that 1 ≤ |x|/scale < 1000, within p … T."""
    if not math.isfinite(x) or x == 0:
        return 1.0, ""
    exp3 = int(math.floor(math.log10(abs(x)) / 3.0)) * 3
    exp3 = max(-12, min(12, exp3))
    return 10.0 ** exp3, _PREFIX_BY_EXP[exp3]


def _beyond_prefixes(x: float) -> bool:
    """True when ``|x|`` lies outside what p … T can show (≥ 1000 T or < 1 p)."""
    return math.isfinite(x) and x != 0 and not (1e-12 <= abs(x) < 1e15)


def _sci(x: float, unit: str, digits: int = 4) -> str:
    return f"{x:.{digits - 1}e} {unit}".rstrip()


def _decimals_for(u_scaled: float) -> int:
    """Decimal places that leave two significant digits of ``u_scaled``."""
    return 1 - int(math.floor(math.log10(u_scaled)))


def _fmt_fixed(x: float, decimals: int) -> str:
    if decimals > 0:
        return f"{x:.{decimals}f}"
    q = 10.0 ** (-decimals)
    return f"{round(x / q) * q:.0f}"


def format_value(value: float, unit: str = "", digits: int = 4) -> str:
    """``value`` with an SI prefix and ``digits`` significant digits: ``4.700 kΩ``."""
    if value is None or not math.isfinite(value):
        return "∞" + (f" {unit}" if unit else "") if value == math.inf else "n/a"
    if _beyond_prefixes(value):
        return _sci(value, unit, digits)
    scale, prefix = si_prefix(value)
    v = value / scale
    if v == 0:
        text = "0"
    else:
        decimals = max(0, digits - 1 - int(math.floor(math.log10(abs(v)))))
        text = f"{v:.{decimals}f}"
    return f"{text} {prefix}{unit}".rstrip()


def format_estimate(value: float, u: float | None, unit: str = "") -> str:
    """``value ± u`` with one SI prefix, ``u`` to two significant digits (GUM 7.2.6).

    >>> format_estimate(12.483162, 0.0041789, "V")
    '12.4832 ± 0.0042 V'
    >>> format_estimate(0.0412149, 0.00093, "Ω")
    '41.21 ± 0.93 mΩ'
    """
    if value is None or not math.isfinite(value):
        return "n/a"
    if u is None or not math.isfinite(u) or u <= 0:
        return format_value(value, unit, digits=5)
    if _beyond_prefixes(value if abs(value) >= u else u):
        return f"{_sci(value, '', 5)} ± {_sci(u, unit, 2)}"
    scale, prefix = si_prefix(value if abs(value) >= u else u)
    v, uu = value / scale, u / scale
    d = _decimals_for(uu)
    if v != 0:  # an uncertainty at float round-off: no more digits than float64 holds
        d = min(d, 14 - int(math.floor(math.log10(abs(v)))))
    return f"{_fmt_fixed(v, d)} ± {_fmt_fixed(uu, d)} {prefix}{unit}".rstrip()


def format_interval(lo: float, hi: float, unit: str = "", u: float | None = None,
                    value: float | None = None) -> str:
    """``[lo, hi] unit`` with one prefix, rounded like an estimate with uncertainty ``u``.

    Given the estimate ``value``, the interval takes the prefix its ``value ± u`` is shown
    with, so the two read side by side (``999.98 ± 0.16 Ω`` beside ``[999.54, 1000.41] Ω``,
    not ``[0.99954, 1.00041] kΩ``).
    """
    if lo is None or hi is None or not (math.isfinite(lo) and math.isfinite(hi)):
        return "n/a"
    ref = max(abs(lo), abs(hi))
    if value is not None and math.isfinite(value) and value != 0:
        ref = abs(value) if not (u and math.isfinite(u) and u > abs(value)) else u
    if _beyond_prefixes(ref):
        return f"[{_sci(lo, '')}, {_sci(hi, '')}] {unit}".rstrip()
    scale, prefix = si_prefix(ref)
    width = hi - lo
    step = (u if u and u > 0 and math.isfinite(u) else width / 4 if width > 0 else abs(ref) / 1e4)
    d = _decimals_for(step / scale) if step > 0 else 4
    return f"[{_fmt_fixed(lo / scale, d)}, {_fmt_fixed(hi / scale, d)}] {prefix}{unit}".rstrip()


def format_percent(value: float, u: float | None = None) -> str:
    """A percentage, with its uncertainty to two significant digits when given."""
    if value is None or not math.isfinite(value):
        return "n/a"
    if u is None or not math.isfinite(u) or u <= 0:
        return f"{value:.2f} %"
    d = max(0, _decimals_for(u))
    return f"{value:.{d}f} ± {u:.{d}f} %"


def format_p(p: float | None) -> str:
    """A p-value the way a statistician reads it: three digits, or '< 0.001'."""
    if p is None or not math.isfinite(p):
        return "n/a"
    if p < 0.001:
        return "< 0.001"
    if p > 0.999:
        return "> 0.999"
    return f"{p:.3f}"
