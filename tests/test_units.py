"""SI prefixes, IEC 60062 resistor codes, header units and meter specs."""

import math

import pytest

from sagfit.core.errors import InputError
from sagfit.core.units import (parse_accuracy, parse_percent, parse_quantity, parse_resistance,
                          unit_dimension)


@pytest.mark.reference("IEC 60062:2016 clause 4, letter code for resistance values (RKM); "
                       "SI Brochure 9th ed. (2019) Table 7 prefixes")
class TestResistance:
    CASES = [
        ("4k7", 4700.0), ("R47", 0.47), ("1M5", 1.5e6), ("470R", 470.0), ("4K7", 4700.0),
        ("2R2", 2.2), ("1R0", 1.0), ("0R1", 0.1), ("R010", 0.010), ("10K", 1e4), ("1M", 1e6),
        ("2G2", 2.2e9), ("4.7k", 4700.0), ("4.7 kΩ", 4700.0), ("4.7kohm", 4700.0),
        ("10 Ω", 10.0), ("33mΩ", 0.033), ("47m", 0.047), ("1e3", 1000.0), ("0.47", 0.47),
        ("100 ohm", 100.0), ("2L2", 0.0022), ("1.5 MΩ", 1.5e6), ("220µ", 220e-6),
        ("4.7 k\u2126", 4700.0), ("10\u2126", 10.0),  # OHM SIGN as well as Greek omega
    ]

    @pytest.mark.parametrize("text,ohms", CASES)
    def test_codes_and_prefixes(self, text, ohms):
        """Each marking reads as its value in ohms."""
        assert parse_resistance(text) == pytest.approx(ohms, rel=1e-12)

    @pytest.mark.parametrize("text", ["open", "OC", "inf", "Open", "∞", "o/c"])
    def test_open_circuit(self, text):
        """Open-circuit words mean an infinite load (no current)."""
        assert parse_resistance(text) == math.inf

    @pytest.mark.parametrize("text", ["short", "SC", "s/c"])
    def test_short(self, text):
        """'short' means a zero-ohm load."""
        assert parse_resistance(text) == 0.0

    def test_column_scale_applies_to_bare_numbers_only(self):
        """In a kΩ column a bare 4.7 is 4.7 kΩ, a marked 470R stays 470 Ω."""
        assert parse_resistance("4.7", scale=1e3) == 4700.0
        assert parse_resistance("470R", scale=1e3) == 470.0

    @pytest.mark.parametrize("text", ["abc", "4k7k", "", "4.7 V", "k"])
    def test_garbage(self, text):
        """Anything else is refused."""
        with pytest.raises(ValueError):
            parse_resistance(text)


class TestUnits:
    @pytest.mark.parametrize("sym,scale,dim", [
        ("V", 1, "V"), ("mV", 1e-3, "V"), ("kV", 1e3, "V"), ("µV", 1e-6, "V"), ("uV", 1e-6, "V"),
        ("A", 1, "A"), ("mA", 1e-3, "A"), ("uA", 1e-6, "A"), ("ohm", 1, "ohm"),
        ("kohm", 1e3, "ohm"), ("Mohm", 1e6, "ohm"), ("mohm", 1e-3, "ohm"), ("Ω", 1, "ohm"),
        ("kΩ", 1e3, "ohm"), ("MΩ", 1e6, "ohm"), ("%", 1, "%"), ("s", 1, "s"), ("ms", 1e-3, "s"),
    ])
    def test_header_units(self, sym, scale, dim):
        """Unit symbols with SI prefixes (SI Brochure Table 7) resolve to scale and dimension."""
        assert unit_dimension(sym) == (pytest.approx(scale), dim)

    def test_prefix_case_matters(self):
        """mV is millivolt and MV megavolt."""
        assert unit_dimension("MV") == (1e6, "V")

    @pytest.mark.parametrize("sym", ["furlong", "mXyz", "kR", "%%"])
    def test_unknown(self, sym):
        """Unknown symbols give None (the CSV reader turns that into an error)."""
        assert unit_dimension(sym) is None

    def test_quantity(self):
        """'2mV' is 0.002 V; a unit of the wrong kind is refused."""
        assert parse_quantity("2mV", "V") == pytest.approx(0.002)
        assert parse_quantity("1.5 A", "A") == 1.5
        with pytest.raises(InputError):
            parse_quantity("2mA", "V")

    def test_percent_needs_the_sign(self):
        """'1%' is 1; a bare '1' is ambiguous and refused."""
        assert parse_percent("1%") == 1.0
        assert parse_percent("0.5 %") == 0.5
        with pytest.raises(InputError):
            parse_percent("1")


@pytest.mark.reference("JCGM 100:2008 (GUM) 4.3.7: rectangular half-width a → u = a/√3")
class TestAccuracy:
    def test_percent_plus_offset(self):
        """±(0.05 % + 2 mV) at 10 V is a half-width of 7 mV, u = 7 mV/√3."""
        acc = parse_accuracy("0.05%+2mV", "V")
        assert acc.standard_uncertainty(10.0) == pytest.approx(0.007 / math.sqrt(3))

    @pytest.mark.parametrize("text", ["±(0.2 % + 1 mA)", "0.2%+1mA", "1mA+0.2%", "+/-(0.2%+1mA)"])
    def test_spellings(self, text):
        """The usual spellings of a meter spec are read the same way."""
        acc = parse_accuracy(text, "A")
        assert (acc.percent, acc.offset) == (pytest.approx(0.2), pytest.approx(0.001))

    @pytest.mark.parametrize("text", ["", "0.05%+2", "fast", "0.05%+2mA", "-1%", "1%+2mV+3mV"])
    def test_bad(self, text):
        """Specs that cannot be read, have no offset unit or a wrong one are refused."""
        with pytest.raises(InputError):
            parse_accuracy(text, "V")
