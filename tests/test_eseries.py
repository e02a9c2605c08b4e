"""Tests of sagfit.eseries: the IEC 60063 preferred-number tables and look-ups."""

import csv
import math
import pathlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sagfit.core import eseries
from sagfit.core.errors import InputError

DATA = pathlib.Path(__file__).parent / "data" / "e_series.csv"
IEC = "IEC 60063:2015, Preferred number series for resistors and capacitors, Tables 1-3"


def _reference() -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    with DATA.open(encoding="utf-8") as fh:
        for row in csv.DictReader(fh):
            out.setdefault(row["series"], []).append(row["value"])
    return out


REF = _reference()


class TestTables:
    @pytest.mark.reference(IEC)
    @pytest.mark.parametrize("name", ["E6", "E12", "E24", "E48", "E96", "E192"])
    def test_values_match_iec_60063(self, name):
        """Every mantissa of each series equals the IEC 60063 table, digit for digit."""
        ref = REF[name]
        digits = eseries.DIGITS[name]
        got = [f"{m:.{digits - 1}f}" for m in eseries.mantissas(name)]
        assert got == ref

    @pytest.mark.reference(IEC)
    def test_counts(self):
        """E-N has N values per decade (IEC 60063)."""
        for name, values in eseries.SERIES.items():
            assert len(values) == int(name[1:])
        assert sum(len(v) for v in REF.values()) == 378

    @pytest.mark.reference(IEC)
    @pytest.mark.parametrize("coarse, fine", [("E6", "E12"), ("E12", "E24"), ("E48", "E96"),
                                              ("E96", "E192")])
    def test_nesting(self, coarse, fine):
        """Each coarser series is every second value of the next finer one (IEC 60063)."""
        np.testing.assert_array_equal(eseries.mantissas(coarse), eseries.mantissas(fine)[::2])

    def test_strictly_increasing_in_one_decade(self):
        """Mantissas increase strictly from 1 and stay below 10."""
        for name in eseries.SERIES:
            m = eseries.mantissas(name)
            assert m[0] == 1.0 and m[-1] < 10.0 and np.all(np.diff(m) > 0)

    @pytest.mark.reference("IEC 60063:2015; the E6-E24 values 2.7-4.7 and 8.2 predate the "
                           "10^(i/N) rounding (reference notes, tests/data/e_series.SOURCES.md)")
    def test_historic_values_differ_from_the_formula(self):
        """E12 keeps 2.7, 3.3, 3.9, 4.7 and 8.2 where round(10^(i/12), 1) gives other values."""
        m = eseries.mantissas("E12")
        formula = np.round(10 ** (np.arange(12) / 12), 1)
        assert sorted(np.round(m[m != formula], 1).tolist()) == [2.7, 3.3, 3.9, 4.7, 8.2]


class TestLookups:
    def test_values_over_decades(self):
        """values() lists every decade's copy within the bounds, inclusive, exactly."""
        v = eseries.values("E6", 0.1, 100)
        assert v.tolist() == [0.1, 0.15, 0.22, 0.33, 0.47, 0.68, 1.0, 1.5, 2.2, 3.3, 4.7, 6.8,
                              10, 15, 22, 33, 47, 68, 100]
        assert 4700.0 in eseries.values("E12", 1e3, 1e4).tolist()

    @pytest.mark.parametrize("x, lo, hi, near", [
        (5.0, 4.7, 5.6, 4.7), (4.7, 4.7, 4.7, 4.7), (9.0, 8.2, 10.0, 8.2),
        (0.0051, 0.0047, 0.0056, 0.0047), (1e6, 1e6, 1e6, 1e6), (0.95, 0.82, 1.0, 1.0),
    ])
    def test_below_above_nearest_e12(self, x, lo, hi, near):
        """below/above/nearest pick the neighbouring E12 values (nearest by ratio)."""
        assert eseries.below(x, "E12") == lo
        assert eseries.above(x, "E12") == hi
        assert eseries.nearest(x, "E12") == near

    def test_vectorised(self):
        """The look-ups take arrays and return arrays of the same shape."""
        x = np.array([[1.1, 50.0], [0.013, 3e5]])
        assert eseries.nearest(x, "E6").shape == (2, 2)
        assert eseries.nearest(x, "E6").tolist() == [[1.0, 47.0], [0.015, 3.3e5]]

    @settings(max_examples=200, deadline=None)
    @given(st.floats(1e-4, 1e9), st.sampled_from(list(eseries.SERIES)))
    def test_neighbours_bracket_any_value(self, x, name):
        """below(x) ≤ x ≤ above(x), both are members, and nearest is one of them."""
        lo, hi = eseries.below(x, name), eseries.above(x, name)
        assert lo <= x * (1 + 1e-9) and hi >= x * (1 - 1e-9)
        assert eseries.is_member(lo, name) and eseries.is_member(hi, name)
        assert eseries.nearest(x, name) in (lo, hi)
        assert hi / lo < 1.6  # no gap wider than E6's largest step (1.0 → 1.5)

    def test_is_member(self):
        """Exact series values are members; others and non-positive values are not."""
        assert eseries.is_member(4.7e3, "E12") and eseries.is_member(0.0475, "E96")
        assert not eseries.is_member(4.8, "E12") and not eseries.is_member(0.0, "E12")
        assert not eseries.is_member(math.inf, "E12")

    @pytest.mark.parametrize("text, name", [("e12", "E12"), ("E 24", "E24"), ("96", "E96")])
    def test_series_name(self, text, name):
        """Series names are read case-insensitively, with or without the E."""
        assert eseries.series_name(text) == name

    def test_bad_input(self):
        """An unknown series or a non-positive value is an InputError."""
        with pytest.raises(InputError, match="E3"):
            eseries.series_name("E3")
        with pytest.raises(InputError):
            eseries.below(0.0, "E12")
        with pytest.raises(InputError):
            eseries.values("E12", 10, 1)
