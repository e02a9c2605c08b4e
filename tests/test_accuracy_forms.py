"""Meter specifications in data-sheet form (sagfit.core.units.parse_accuracy, bench
profiles, the command line).

The forms are those printed in the accuracy tables of digital multimeter and electronic
load data sheets (common practice): ±(ppm of reading + ppm of range), ±(% of reading +
counts) with the resolution of the range, ±(% of range). Each is reduced by hand here to
a gain in per cent of reading plus a fixed offset on that range; the whole spec is read
as a rectangular half-width (JCGM 100:2008, 4.3.7).
"""

import math

import numpy as np
import pytest

import sagfit
from sagfit.core.errors import InputError
from sagfit.core.readings import Readings
from sagfit.core.units import parse_accuracy
from sagfit.io.bench import read_bench


@pytest.mark.parametrize("text, dim, percent, offset", [
    # 35 ppm of reading = 0.0035 %, 5 ppm of 10 V = 50 µV
    ("35ppm + 5ppm of range, range 10V", "V", 0.0035, 50e-6),
    ("0.0035 % of reading + 0.0005 % of range; range 10 V", "V", 0.0035, 50e-6),
    ("±(0.1% of range), range 20A", "A", 0.0, 0.02),
    ("0.1% of 20A", "A", 0.0, 0.02),
    ("0.5% + 3 counts, resolution 1mV", "V", 0.5, 3e-3),
    ("0.05% rdg + 2 digits, res 10uA", "A", 0.05, 20e-6),
    ("0.015%+2mV", "V", 0.015, 2e-3),
])
def test_datasheet_forms_reduce_to_gain_and_offset(text, dim, percent, offset):
    a = parse_accuracy(text.replace(" rdg", " of reading"), dim)
    assert a.percent == pytest.approx(percent, rel=1e-12)
    assert a.offset == pytest.approx(offset, rel=1e-12)
    assert a.divisor == pytest.approx(math.sqrt(3.0))


def test_range_and_resolution_as_arguments():
    a = parse_accuracy("0.02% + 0.01% of range", "V", range="2V")
    assert (a.percent, a.offset) == (pytest.approx(0.02), pytest.approx(2e-4))
    b = parse_accuracy("0.3% + 5 counts", "A", resolution=1e-3)
    assert b.offset == pytest.approx(5e-3)


@pytest.mark.parametrize("text, hint", [
    ("0.1% of range", "needs the range"),
    ("0.5%+3 counts", "needs the resolution"),
    ("0.1% of range, range 10", "needs a unit"),
    ("1%, colour blue", "after a comma"),
])
def test_missing_range_or_resolution_is_a_clear_error(text, hint):
    with pytest.raises(InputError, match=hint):
        parse_accuracy(text, "V")


def test_the_fit_uses_the_reduced_spec_as_shared_gain_and_offset():
    """A ppm-of-range spec is an offset: it moves Vth one for one (GUM 5.1.2) and leaves
    Rth alone, exactly as the same offset written in volts."""
    i = np.array([0.0, 0.5, 1.0, 2.0, 3.0])
    v = 12.0 - 0.05 * i
    a = sagfit.fit(Readings.from_arrays(current=i, voltage=v, voltage_accuracy=parse_accuracy(
        "35ppm + 5ppm of range, range 10V", "V")))
    b = sagfit.fit(Readings.from_arrays(current=i, voltage=v, voltage_accuracy=parse_accuracy(
        "0.0035%+50uV", "V")))
    np.testing.assert_allclose([a.u_vth[0], a.u_rth[0]], [b.u_vth[0], b.u_rth[0]], rtol=1e-12)


def test_bench_profile_range_and_resolution(tmp_path):
    p = tmp_path / "bench.toml"
    p.write_text('[voltage]\naccuracy = "0.0035% + 0.0005% of range"\nrange = "10V"\n'
                 '[current]\naccuracy = "0.2% + 4 counts"\nresolution = "1mA"\n',
                 encoding="utf-8")
    prof = read_bench(str(p))
    assert prof.voltage_accuracy.offset == pytest.approx(50e-6)
    assert prof.current_accuracy.offset == pytest.approx(4e-3)
    bad = tmp_path / "bad.toml"
    bad.write_text('[voltage]\naccuracy = "0.1% of range"\n', encoding="utf-8")
    with pytest.raises(Exception, match="voltage.accuracy.*needs the range"):
        read_bench(str(bad))


def test_command_line_takes_the_datasheet_form(tmp_path, cli):
    csv = tmp_path / "s.csv"
    csv.write_text("current,voltage\n0,5.002\n0.5,4.990\n1,4.978\n1.5,4.966\n",
                   encoding="utf-8")
    r = cli("fit", csv, "--voltage-accuracy", "0.5% + 3 counts, resolution 1mV", "--json")
    assert r.code == 0, r.err
    r = cli("fit", csv, "--voltage-accuracy", "0.5% + 3 counts")
    assert r.code == 2
    assert "needs the resolution" in r.err and "Traceback" not in r.err
