"""Hostile and broken input, faults and extreme numbers, against every reader and command.

Property-based fuzzing (hypothesis, bounded and derandomised so CI is repeatable) feeds
random bytes, random CSV tables and random TOML to the readers and commands and asserts
the guarantees of docs/hardening.md: exit status in {0, 1, 2, 3}, never a traceback and
never an "internal error", an error line that names the file, and inputs unchanged
byte for byte. Plumbing tests: the numerical checks elsewhere cite their sources; the
extreme-value checks here compare against the closed-form divider (textbook Thevenin,
common practice).
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sagfit
from sagfit.core.readings import Readings
from sagfit.core.units import Accuracy

from conftest import SAMPLES, digest

FUZZ = settings(max_examples=60, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])
OK_CODES = {0, 1, 2, 3}
# what the installed `sagfit` console script runs
ENTRY = "import sys, _sagfit_entry; sys.argv[0] = 'sagfit'; _sagfit_entry.main()"


def check_run(run, path, *, expect_file_in_error=True):
    """The common guarantees of every command run."""
    assert run.code in OK_CODES, (run.code, run.err)
    assert "Traceback" not in run.err and "Traceback" not in run.out
    assert "internal error" not in run.err, run.err
    if run.code == 2:
        lines = [ln for ln in run.err.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("error: "), run.err
        if expect_file_in_error:
            assert str(path) in lines[0] or os.path.basename(str(path)) in lines[0], run.err


# ---------------------------------------------------------------- random CSV tables
HEADERS = ["load", "load_ohm", "Load (kΩ)", "r_load", "voltage", "voltage_V", "Voltage [mV]",
           "V", "current", "current_mA", "I [A]", "dut", "serial", "id", "u_voltage_V",
           "u_current_A", "u_load_ohm", "load_tolerance_pct", "time", "group", "temperature",
           "comment", "x", "", "voltage_furlong", "Ω", "time [s]", "=cmd()", "🔋"]
CELLS = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.floats(-1e3, 1e3).map(lambda x: f"{x:.6g}"),
    st.sampled_from(["open", "short", "4k7", "R47", "1M5", "470R", "inf", "-inf", "nan", "",
                     " ", "NA", "1,5", "=1+1", "@SUM(A1)", "+1", "-0", "1e309", "0x10",
                     "２", "∞", "µ", "\"", "\"\"", "a\"b", "PK-07", "../../x", "CON",
                     "<script>alert(1)</script>", "2026-11-03T10:00:00", "1e-300"]),
    st.text(max_size=8),
)


@st.composite
def csv_tables(draw):
    ncols = draw(st.integers(1, 6))
    headers = draw(st.lists(st.sampled_from(HEADERS), min_size=ncols, max_size=ncols))
    delim = draw(st.sampled_from([",", ";", "\t", "|"]))
    rows = draw(st.lists(st.lists(CELLS, min_size=max(0, ncols - 1), max_size=ncols + 1),
                         max_size=12))
    eol = draw(st.sampled_from(["\n", "\r\n", "\r"]))
    lines = []
    if draw(st.booleans()):
        lines.append(draw(st.sampled_from(["# date: 2026-11-03", "# temperature_C: 21",
                                           "#", "# date: yesterday", "# \x00"])))
    lines.append(delim.join(headers))
    lines += [delim.join(r) for r in rows]
    text = eol.join(lines) + draw(st.sampled_from(["", eol, eol * 3]))
    enc = draw(st.sampled_from(["utf-8", "utf-8-sig", "utf-16", "cp1252", "latin-1"]))
    return text.encode(enc, errors="replace")


class TestFuzzFit:
    @FUZZ
    @given(data=st.binary(max_size=2000))
    def test_random_bytes(self, cli, tmp_path, data):
        """Random bytes: a clean exit or one error line naming the file; file untouched."""
        p = tmp_path / "bytes.csv"
        p.write_bytes(data)
        before = digest(p)
        check_run(cli("fit", p), p)
        assert digest(p) == before

    @FUZZ
    @given(data=csv_tables())
    def test_random_tables(self, cli, tmp_path, data):
        """Random CSV tables (headers, units, delimiters, encodings, cells, row counts)."""
        p = tmp_path / "table.csv"
        p.write_bytes(data)
        before = digest(p)
        run = cli("fit", p, "--json")
        check_run(run, p)
        if run.code in (0, 3):
            doc = json.loads(run.out)  # valid JSON, no NaN or Infinity tokens
            assert "NaN" not in run.out and "Infinity" not in run.out
            for r in doc["results"]:
                if r.get("error") is None:
                    assert math.isfinite(r["vth"]["value"])
        assert digest(p) == before

    @FUZZ
    @given(data=csv_tables())
    def test_random_tables_other_commands(self, cli, tmp_path, data):
        """The same tables through accept, record and the report writer."""
        p = tmp_path / "table.csv"
        p.write_bytes(data)
        before = digest(p)
        check_run(cli("accept", p, "--spec", SAMPLES / "accept_spec.toml", "--json"), p)
        check_run(cli("record", p, "--db", tmp_path / "h.sqlite", "--date", "2026-11-03"), p)
        check_run(cli("fit", p, "--report", tmp_path / "rep", "--figures", "none"), p)
        assert digest(p) == before


TOML_KEYS = ["limits.vth", "limits.rth", "limits.isc", "limits.pmax", "limits.bogus",
             "decision", "voltage", "current", "load", "fit", "bench", "nonsense"]
TOML_VALUES = st.one_of(st.integers(-10, 10).map(str), st.floats(allow_nan=False).map(repr),
                        st.sampled_from(['"4.75V"', '"100mΩ"', '"1%"', '"0.05%+2mV"',
                                         '"guarded"', '"risk"', '"bogus"', "true",
                                         "2027-05-01", '"x"', "[1, 2]", "{a = 1}", '"nan"',
                                         '"-1%"', '""']))


@st.composite
def toml_docs(draw):
    out = []
    for _ in range(draw(st.integers(0, 4))):
        out.append(f"[{draw(st.sampled_from(TOML_KEYS))}]")
        for _ in range(draw(st.integers(0, 3))):
            key = draw(st.sampled_from(["min", "max", "rule", "accuracy", "tolerance",
                                        "confidence", "k", "instrument", "calibration_due",
                                        "distribution", "name", "bogus", "value", "at_load"]))
            out.append(f"{key} = {draw(TOML_VALUES)}")
    if draw(st.booleans()):
        out.append(draw(st.sampled_from(["[[", "= 1", "a = ", "\x00", "[limits.vth]\nmin=1\nmin=2"])))
    return "\n".join(out).encode()


class TestFuzzToml:
    @FUZZ
    @given(doc=toml_docs())
    def test_random_spec(self, cli, tmp_path, doc):
        """Random acceptance specs: exit 0–3, error lines name the spec file."""
        spec = tmp_path / "spec.toml"
        spec.write_bytes(doc)
        before = digest(spec)
        run = cli("accept", SAMPLES / "accept_reel.csv", "--spec", spec)
        check_run(run, spec, expect_file_in_error=False)
        if run.code == 2:
            assert "spec.toml" in run.err or "accept_reel" in run.err or "option" in run.err
        assert digest(spec) == before

    @FUZZ
    @given(doc=toml_docs())
    def test_random_bench(self, cli, tmp_path, doc):
        """Random bench profiles."""
        bench = tmp_path / "bench.toml"
        bench.write_bytes(doc)
        run = cli("fit", SAMPLES / "pack_a.csv", "--bench", bench)
        check_run(run, bench)

    @FUZZ
    @given(data=st.binary(max_size=500))
    def test_random_bytes_as_spec_and_results(self, cli, tmp_path, data):
        """Random bytes as a spec, a bench profile, a saved fit and a history database."""
        f = tmp_path / "junk"
        f.write_bytes(data)
        check_run(cli("accept", SAMPLES / "accept_reel.csv", "--spec", f), f)
        check_run(cli("fit", SAMPLES / "pack_a.csv", "--bench", f), f)
        check_run(cli("predict", f, "--load", "10"), f)
        check_run(cli("trend", "--db", f), f)
        assert f.read_bytes() == data


JSON_LEAF = st.one_of(st.none(), st.booleans(), st.integers(-10, 10),
                     st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=5))
JSON_ANY = st.recursive(JSON_LEAF, lambda inner: st.one_of(
    st.lists(inner, max_size=3), st.dictionaries(st.sampled_from(
        ["results", "dut", "vth", "rth", "value", "u", "ci", "prediction", "cov", "n", "dof",
         "coverage_factor", "confidence", "x"]), inner, max_size=4)), max_leaves=12)


class TestFuzzSavedFit:
    @FUZZ
    @given(doc=JSON_ANY)
    def test_random_json_documents(self, cli, tmp_path, doc):
        """Random JSON structures as a saved fit for `predict`: one error line, never a crash."""
        f = tmp_path / "fit.json"
        f.write_text(json.dumps(doc))
        check_run(cli("predict", f, "--load", "10,open", "--current", "1"), f)

    @FUZZ
    @given(field=st.sampled_from(["vth", "rth", "prediction", "dut", "results"]),
           value=JSON_LEAF)
    def test_one_field_broken_in_a_real_fit(self, cli, tmp_path, field, value):
        """A real saved fit with one field replaced by junk."""
        good = json.loads(cli("fit", SAMPLES / "pack_a.csv", "--bench", SAMPLES / "bench.toml",
                              "--json").out)
        if field == "results":
            good["results"] = value
        else:
            good["results"][0][field] = value
        f = tmp_path / "fit.json"
        f.write_text(json.dumps(good))
        check_run(cli("predict", f, "--load", "10"), f)


class TestFuzzOptions:
    @FUZZ
    @given(args=st.lists(st.sampled_from(
        ["--voltage", "--resistance", "--max-current", "--max-power", "--series", "--points",
         "--have", "12.6", "0.05", "-1", "0", "nan", "inf", "1e308", "E7", "E24", "3",
         "1,2,x", "open", "10A", "25W", "1k", "--json", "--no-battery", "50mohm"]),
        max_size=8))
    def test_plan_options(self, cli, args):
        """Random `plan` option soup: never a traceback."""
        run = cli("plan", *args)
        check_run(run, "", expect_file_in_error=False)

    @FUZZ
    @given(loads=st.text(max_size=20), seed=st.integers(-5, 2 ** 40))
    def test_simulate_options(self, cli, tmp_path, loads, seed):
        """Random `simulate` loads and seeds: a file or one error line."""
        run = cli("simulate", "--vth", "12", "--rth", "0.1", "--loads", loads or ",",
                  "--seed", seed, "--out", tmp_path / "s.csv")
        check_run(run, "", expect_file_in_error=False)


# ------------------------------------------------------------------ resource limits
class TestLimits:
    def test_long_line(self, cli, tmp_path):
        """A single line longer than 1 MiB is refused quickly with its line number."""
        p = tmp_path / "long.csv"
        p.write_bytes(b"load,voltage\nopen," + b"1" * (2 << 20) + b"\n")
        t = time.perf_counter()
        run = cli("fit", p)
        assert run.code == 2 and "line 2" in run.err and "longer" in run.err
        assert time.perf_counter() - t < 10

    def test_million_columns(self, cli, tmp_path):
        """A header with two million columns is refused, not parsed."""
        p = tmp_path / "wide.csv"
        p.write_bytes(b"load,voltage" + b",x" * 2_000_000 + b"\nopen,1\n")
        t = time.perf_counter()
        run = cli("fit", p)
        assert run.code == 2 and ("columns" in run.err or "longer" in run.err)
        assert time.perf_counter() - t < 15

    def test_size_limit(self, tmp_path):
        """A file larger than SAGFIT_MAX_BYTES is refused before it is read."""
        p = tmp_path / "big.csv"
        p.write_text("load,voltage\n" + "10,1.0\n5,0.9\n" * 5000)
        env = dict(os.environ, SAGFIT_MAX_BYTES="10000")
        r = subprocess.run([sys.executable, "-m", "sagfit", "fit", str(p)], capture_output=True,
                           text=True, env=env, timeout=120)
        assert r.returncode == 2 and "limit" in r.stderr

    def test_many_rows_of_one_column_pair(self, cli, tmp_path):
        """200,000 valid rows of one DUT fit (and the line count is right)."""
        n = 200_000
        i = np.linspace(0, 2, n)
        v = 5.0 - 0.05 * i
        p = tmp_path / "many.csv"
        p.write_text("current,voltage\n" + "\n".join(f"{a:.9g},{b:.9g}" for a, b in zip(i, v)))
        run = cli("fit", p, "--json")
        assert run.code == 0
        r = json.loads(run.out)["results"][0]
        assert r["n"] == n and r["rth"]["value"] == pytest.approx(0.05, rel=1e-6)


# ------------------------------------------------------------------------- outputs
class TestOutputs:
    @pytest.mark.parametrize("name", ["../../x", "CON", "a/b\\c", "..", ".", "nul.txt",
                                      "<script>alert(1)</script>", "x" * 300])
    def test_dut_ids_never_become_paths(self, cli, tmp_path, name):
        """Hostile DUT ids stay inside the report folder."""
        p = tmp_path / "in" / "r.csv"
        p.parent.mkdir()
        q = '"' + name.replace('"', '""') + '"'
        p.write_text("dut,load,voltage\n" + "".join(f"{q},{r},{v}\n" for r, v in
                                                    (("open", 12.7), ("10", 12.6), ("4.7", 12.5),
                                                     ("2.2", 12.3))))
        rep = tmp_path / "rep"
        run = cli("fit", p, "--report", rep, "--figures", "all")
        assert run.code in (0, 3), run.err
        outside = {str(q) for q in tmp_path.rglob("*")} - {str(q) for q in rep.rglob("*")}
        assert outside <= {str(tmp_path / "in"), str(p), str(rep)}
        html = (rep / "report.html").read_text()
        assert "<script>alert(1)</script>" not in html

    def test_read_only_target(self, cli, tmp_path, monkeypatch):
        """A folder that refuses writes gives one clear error line (root bypasses modes, so
        the refusal is simulated at the OS call)."""
        import tempfile

        def refuse(*a, **k):
            raise PermissionError(13, "Permission denied")

        monkeypatch.setattr(tempfile, "mkstemp", refuse)
        run = cli("fit", SAMPLES / "pack_a.csv", "--out", tmp_path / "r.csv")
        assert run.code == 2 and "cannot write" in run.err and "ermission" in run.err
        assert not (tmp_path / "r.csv").exists()

    def test_full_disk(self, cli, tmp_path, monkeypatch):
        """ENOSPC while writing: a clear error, no partial or temporary file left."""
        import errno

        real_fsync = os.fsync

        def full(fd):
            raise OSError(errno.ENOSPC, "No space left on device")

        monkeypatch.setattr(os, "fsync", full)
        run = cli("fit", SAMPLES / "pack_a.csv", "--out", tmp_path / "r.csv")
        monkeypatch.setattr(os, "fsync", real_fsync)
        assert run.code == 2 and "no space left" in run.err.lower()
        assert list(tmp_path.iterdir()) == []

    def test_sigint_leaves_no_partial_output(self, tmp_path):  # noqa: C901
        """Ctrl-C during a large fit leaves neither the output nor a temporary file."""
        from sagfit.core.simulate import run_csv_text, simulate

        run = simulate(12.6, 0.05, [math.inf, 10, 4.7, 2.2, 1.0, 0.47], duts=60_000, seed=3,
                       voltage_accuracy=Accuracy(0.015, 0.002), load_tolerance=1.0)
        src = tmp_path / "big.csv"
        src.write_text(run_csv_text(run, ["INVENTED test data"]))
        out_dir = tmp_path / "out"
        out_dir.mkdir()
        for delay in (0.4, 1.0, 1.6):
            proc = subprocess.Popen([sys.executable, "-c", ENTRY, "fit", str(src),
                                     "--voltage-accuracy", "0.015%+2mV", "--load-tolerance",
                                     "1%", "--out", str(out_dir / "r.json"), "--json"],
                                    stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
            time.sleep(delay)
            proc.send_signal(signal.SIGINT)
            _, err = proc.communicate(timeout=120)
            leftovers = list(out_dir.iterdir())
            if proc.returncode == 0:  # finished before the signal: a complete file
                json.loads((out_dir / "r.json").read_text())
                (out_dir / "r.json").unlink()
                continue
            assert proc.returncode == 130, err
            # one error line; or nothing at all when the signal landed while the Python
            # interpreter itself was still starting, before any sagfit code ran
            assert b"Traceback" not in err and (err == b"" or err.decode().startswith("error:"))
            assert leftovers == [], leftovers


    @pytest.mark.parametrize("command", ["simulate", "accept"])
    def test_sigint_in_other_writing_commands(self, tmp_path, command):
        """Ctrl-C during `simulate --out` and `accept --out --report`: no partial output,
        no temporary file, exit 130 (or a complete output if it finished first)."""
        out = tmp_path / "out"
        out.mkdir()
        if command == "simulate":
            args = ["simulate", "--vth", "12.6", "--rth", "0.05", "--loads",
                    "open,10,4.7,2.2,1", "--duts", "150000", "--voltage-accuracy",
                    "0.015%+2mV", "--out", str(out / "sim.csv")]
        else:
            from sagfit.core.simulate import run_csv_text, simulate

            run = simulate(5.02, 0.02, [math.inf, 50, 20, 10, 6.8, 4.7, 3.9, 3.3],
                           duts=40_000, seed=4, measure_current=True,
                           voltage_accuracy=Accuracy(0.01, 0.0005),
                           current_accuracy=Accuracy(0.05, 0.0005))
            src = tmp_path / "reel.csv"
            src.write_text(run_csv_text(run, ["INVENTED test data"]))
            args = ["accept", str(src), "--spec", str(SAMPLES / "accept_spec.toml"),
                    "--voltage-accuracy", "0.01%+0.5mV", "--current-accuracy", "0.05%+0.5mA",
                    "--out", str(out / "d.csv"), "--report", str(out / "rep")]
        proc = subprocess.Popen([sys.executable, "-c", ENTRY, *args],
                                stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        time.sleep(1.2)
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=180)
        assert b"Traceback" not in err
        leftovers = [p for p in out.rglob("*") if p.name.endswith(".part")]
        assert leftovers == []
        assert proc.returncode in (0, 1, 3, 130), err
        import csv as _csv

        for f in (out / "sim.csv", out / "d.csv"):  # written whole, or not at all
            if f.exists():
                text = f.read_text()
                assert text.endswith("\n")
                rows = [r for r in _csv.reader(ln for ln in text.splitlines()
                                               if not ln.startswith("#"))]
                assert len({len(r) for r in rows}) == 1

    def test_sigint_during_record_keeps_the_history_consistent(self, tmp_path):
        """Ctrl-C during `record` of a large file: the earlier records stay, the database
        passes SQLite's integrity check, and nothing of the interrupted run is half-written."""
        import sqlite3

        from sagfit.core.simulate import run_csv_text, simulate

        db = tmp_path / "h.sqlite"
        small = tmp_path / "small.csv"
        small.write_text("# date: 2026-10-01\n" + (SAMPLES / "fleet_packs.csv").read_text())
        first = subprocess.run([sys.executable, "-c", ENTRY, "record", str(small), "--db",
                                str(db)], capture_output=True, text=True, timeout=120)
        assert first.returncode == 0, first.stderr
        before = sqlite3.connect(db).execute("SELECT COUNT(*) FROM results").fetchone()[0]
        run = simulate(12.6, 0.05, [math.inf, 10, 4.7, 2.2, 1.0], duts=60_000, seed=5,
                       voltage_accuracy=Accuracy(0.015, 0.002), load_tolerance=1.0)
        big = tmp_path / "big.csv"
        big.write_text("# date: 2026-11-01\n" + run_csv_text(run, ["INVENTED test data"]))
        for delay in (0.5, 1.5, 2.5):
            proc = subprocess.Popen([sys.executable, "-c", ENTRY, "record", str(big), "--db",
                                     str(db)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
            time.sleep(delay)
            proc.send_signal(signal.SIGINT)
            _, err = proc.communicate(timeout=180)
            assert b"Traceback" not in err
            con = sqlite3.connect(db)
            assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            n = con.execute("SELECT COUNT(*) FROM results").fetchone()[0]
            con.close()
            if proc.returncode == 0:  # it finished first: all of it is there
                assert n == before + 60_000
                break
            assert proc.returncode == 130, err
            # all or nothing: interrupted before its commit, the run left nothing behind;
            # after it (while printing), everything is there
            assert n in (before, before + 60_000)
            if n != before:
                break


# ------------------------------------------------------------------------ numerics
def divider(vth, rth, r):
    """Closed-form terminal voltage of a Thevenin source into r (r = inf: open circuit)."""
    return vth / (1 + rth / r)


class TestNumerics:
    @pytest.mark.parametrize("vth,rth,loads", [
        (1e-6, 1e-6, [math.inf, 1e-5, 3e-6, 1e-6]),          # µV source, µΩ
        (1.2e3, 1e6, [math.inf, 1e7, 3e6, 1e6]),               # kV source, MΩ
        (12.6, 1e-7, [math.inf, 1.0, 0.1, 0.01]),              # Rth ≈ 0
        (1e-9, 10.0, [math.inf, 100.0, 10.0, 1.0]),            # Vth ≈ 0
    ])
    def test_extreme_but_valid(self, vth, rth, loads):
        """µV…kV and µΩ…MΩ fit without overflow; exact data give the exact source."""
        r = np.array(loads)
        v = divider(vth, rth, r)
        f = sagfit.fit(Readings.from_arrays(voltage=v, load=r,
                                            u_voltage=np.abs(v) * 1e-6 + 1e-15))[0]
        assert f.ok
        assert f.vth.value == pytest.approx(vth, rel=1e-6)
        assert f.rth.value == pytest.approx(rth, rel=1e-4)
        assert all(math.isfinite(x) for x in (f.vth.u, f.rth.u))

    def test_nine_decades_of_current(self):
        """Currents from 1 nA to 1 A in one sweep."""
        i = np.logspace(-9, 0, 10)
        v = 3.3 - 0.02 * i
        f = sagfit.fit(Readings.from_arrays(current=i, voltage=v,
                                            u_voltage=np.full(10, 1e-6)))[0]
        assert f.rth.value == pytest.approx(0.02, rel=1e-4)

    def test_mixed_units_in_one_file(self, tmp_path):
        """kΩ and mΩ loads, mV and V in one file read consistently."""
        p = tmp_path / "m.csv"
        p.write_text("dut,Load (kΩ),Voltage [mV]\nA,open,5000\nA,0.01,4975.12\nA,0.001,4761.9\n"
                     "B,R010,1.2\nB,open,1.25\nB,R020,1.222\n")
        r = sagfit.read_readings(p)
        f = sagfit.fit(r)
        assert f["A"].ok and f["B"].ok

    @pytest.mark.parametrize("kw,words", [
        (dict(current=[1.0, 1.0, 1.0], voltage=[5.0, 4.9, 5.1]), "distinct currents"),
        (dict(current=[0.0, 1.0, 0.0, 1.0], voltage=[5.0, 4.9, 5.0, 4.9],
              u_voltage=[0.0, 0.01, 0.01, 0.01]), "zero uncertainty"),
        (dict(load=[10.0, 10.0, 10.0], voltage=[5.0, 5.0, 5.0]), "one load"),
    ])
    def test_degenerate_inputs_give_messages(self, kw, words):
        """One current, collinear duplicates at one load, zero uncertainty mixed with
        non-zero: a message, never NaN or inf in the output."""
        f = sagfit.fit(Readings.from_arrays(**kw))
        assert not f[0].ok and words in f[0].error
        d = f[0].to_dict()
        json.dumps(d, allow_nan=False)

    def test_collinear_duplicates_fit(self):
        """Exact duplicates of a perfect line: a fit with zero scatter, finite output."""
        f = sagfit.fit(Readings.from_arrays(current=[0, 0, 1, 1, 2, 2.0],
                                            voltage=[5, 5, 4.9, 4.9, 4.8, 4.8]))[0]
        assert f.ok and f.rth.value == pytest.approx(0.1)
        json.dumps(f.to_dict(), allow_nan=False)
