"""First-contact cases of the terminal, the reports and the Python API: instruments listed
only when they entered the result, cautions that follow the data, tables on a narrow
terminal, one naming scheme, the default bench profile (all data invented)."""

from __future__ import annotations

import json

import pytest

from conftest import SAMPLES

# invented: an ammeter that a (R, V) sweep never uses, calibration long overdue
BENCH_UNUSED_AMMETER = """\
[voltage]
accuracy = "0.015%+2mV"
instrument = "DMM-Q1"
calibration_due = 2027-05-01

[current]
accuracy = "0.2%+1mA"
instrument = "SHUNT-Q9"
calibration_due = 2020-01-01
"""


class TestInstrumentsThatEnteredTheResult:
    def test_unused_ammeter_is_not_listed(self, cli, tmp_path):
        """Readings with I = V/R list the voltmeter only: terminal, JSON and report."""
        bench = tmp_path / "bench.toml"
        bench.write_text(BENCH_UNUSED_AMMETER)
        src = SAMPLES / "pack_a.csv"  # load_ohm, voltage_V
        doc = json.loads(cli("fit", src, "--bench", bench, "--json").out)
        ids = [row["identifier"] for row in doc["traceability"]["instruments"]]
        assert ids == ["DMM-Q1"]
        assert not doc["traceability"]["warnings"]
        term = cli("fit", src, "--bench", bench)
        assert "SHUNT-Q9" not in term.out
        cli("fit", src, "--bench", bench, "--report", tmp_path / "rep")
        html = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
        assert "DMM-Q1" in html and "SHUNT-Q9" not in html

    def test_measured_current_keeps_the_ammeter(self, cli, tmp_path):
        """(I, V) readings use both meters, and the overdue ammeter is reported."""
        bench = tmp_path / "bench.toml"
        bench.write_text(BENCH_UNUSED_AMMETER)
        p = tmp_path / "iv.csv"
        p.write_text("# date: 2026-11-03\ncurrent_A,voltage_V\n0,12.0\n0.5,11.97\n"
                     "1,11.95\n1.5,11.92\n")
        doc = json.loads(cli("fit", p, "--bench", bench, "--json").out)
        ids = [row["identifier"] for row in doc["traceability"]["instruments"]]
        assert ids == ["DMM-Q1", "SHUNT-Q9"]
        assert any("SHUNT-Q9" in w for w in doc["traceability"]["warnings"])

    def test_accept_lists_only_the_voltmeter(self, cli, tmp_path):
        bench = tmp_path / "bench.toml"
        bench.write_text(BENCH_UNUSED_AMMETER)
        run = cli("accept", SAMPLES / "pack_a.csv", "--spec", SAMPLES / "accept_spec.toml",
                  "--bench", bench, "--json")
        doc = json.loads(run.out)
        assert "SHUNT-Q9" not in json.dumps(doc)
