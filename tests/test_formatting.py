"""Numbers the way the trade writes them."""

import pytest

from sagfit.core.formatting import format_estimate, format_interval, format_p, format_value, si_prefix


@pytest.mark.reference("JCGM 100:2008 (GUM) 7.2.6: two significant digits for u, the estimate "
                       "rounded to match (worked example 10.05762 Ω, u = 27 mΩ → 10.058 Ω)")
class TestEstimate:
    def test_gum_example(self):
        """The GUM's own example."""
        assert format_estimate(10.05762, 0.027, "Ω") == "10.058 ± 0.027 Ω"

    @pytest.mark.parametrize("v,u,unit,text", [
        (12.483162, 0.0041789, "V", "12.4832 ± 0.0042 V"),
        (0.0412149, 0.00093, "Ω", "41.21 ± 0.93 mΩ"),
        (250.3, 12.0, "A", "250 ± 12 A"),
        (1884.6, 13.2, "W", "1.885 ± 0.013 kW"),
        (3.3e-6, 1.2e-7, "A", "3.30 ± 0.12 µA"),
        (0.0005, 0.12, "Ω", "0 ± 120 mΩ"),
    ])
    def test_cases(self, v, u, unit, text):
        """SI prefix chosen from the value, u to two digits, the value to the same place."""
        assert format_estimate(v, u, unit) == text

    def test_round_off_uncertainty_is_capped_at_float_precision(self):
        """u at float64 round-off (noise-free data) shows no more than 15 significant digits."""
        assert format_estimate(5.627, 5.0e-16, "kV") == "5.62700000000000 ± 0.00000000000000 kV"

    def test_missing_uncertainty(self):
        """Without an uncertainty the value gets five significant digits."""
        assert format_estimate(4.7e3, None, "Ω") == "4.7000 kΩ"


def test_value_interval_and_p():
    """Helpers for plain values, intervals and p-values."""
    assert format_value(4700, "Ω") == "4.700 kΩ"
    assert format_value(float("inf"), "Ω") == "∞ Ω"
    assert format_interval(12.475, 12.4915, "V", 0.0042) == "[12.4750, 12.4915] V"
    assert format_p(0.0001) == "< 0.001"
    assert format_p(0.5) == "0.500"
    assert si_prefix(0.047) == (1e-3, "m")
