"""Tests of sagfit.history: the SQLite store's schema, guarantees and date handling.

Plumbing tests (no outside reference applies): integrity is checked against the
store's own documented guarantees.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from sagfit.core.errors import HistoryError, OptionError, ReadingsFileError
from sagfit.core.fit import fit_lines
from sagfit.io.history import (SCHEMA_VERSION, History, dut_group_labels, dut_test_times,
                            parse_date)
from sagfit.io.readings_csv import parse_table
from sagfit.core.readings import Readings

T0 = 1_775_520_000.0  # 2026-04-07 UTC


def _fits(names=("A", "B"), rth=(0.5e-3, 0.6e-3), seed=0):
    rng = np.random.default_rng(seed)
    i = np.tile([0.0, 25.0, 50.0, 75.0], len(names))
    dut = np.repeat(names, 4)
    r = np.repeat(rth, 4)
    v = 2.14 - r * i + rng.normal(0, 5e-5, i.size)
    rd = Readings.from_arrays(voltage=v, current=i, dut=dut, u_voltage=np.full(i.size, 5e-5))
    return fit_lines(rd)


def _record(h, fits, sha="a" * 64, t=T0, force=False, labels=None):
    return h.record(fits, test_time=t, file_name="f.csv", sha256=sha, settings={"x": 1},
                    group_labels=labels, force=force)


class TestStore:
    def test_records_round_trip(self):
        """What is recorded reads back with the same values, sorted by DUT then date."""
        f = _fits()
        with History(":memory:") as h:
            out = _record(h, f, labels=["S", "S"])
            _record(h, _fits(seed=1), sha="b" * 64, t=T0 - 30 * 86400)
            recs = h.records()
        assert out.added == ("A", "B")
        assert recs.duts == ("A", "B") and len(recs) == 4
        assert np.all(np.diff(recs.time[recs.dut_index == 0]) > 0)
        a_new = np.flatnonzero((recs.dut_index == 0) & (recs.time == T0))[0]
        assert recs.rth[a_new] == f.rth[0] and recs.u_rth[a_new] == f.u_rth[0]
        assert recs.cov_vth_rth[a_new] == f.cov_vr[0]
        assert recs.labels_per_dut() == ("S", "S")

    def test_recording_the_same_file_twice_is_a_no_op(self):
        """The same content hash and DUT are skipped: the record count does not change."""
        with History(":memory:") as h:
            _record(h, _fits())
            again = _record(h, _fits())
            assert again.added == () and again.skipped == ("A", "B") and again.run_id is None
            assert h.count() == 2
            assert h._conn.execute("SELECT COUNT(*) FROM runs").fetchone()[0] == 1

    def test_force_replaces_instead_of_duplicating(self):
        """--force replaces the records of the same file and DUT, and drops the orphaned run."""
        with History(":memory:") as h:
            _record(h, _fits())
            out = _record(h, _fits(rth=(0.7e-3, 0.6e-3)), force=True)
            assert out.replaced == ("A", "B") and h.count() == 2
            assert h.records(["A"]).rth[0] == pytest.approx(0.7e-3, rel=1e-2)
            assert h._conn.execute("SELECT COUNT(*) FROM runs").fetchone()[0] == 1

    def test_unfitted_duts_are_not_recorded(self):
        """A DUT with a fit error is left out of the history."""
        rd = Readings.from_arrays(voltage=[2.1, 2.0, 1.9, 2.1], current=[0, 10, 20, 0],
                                  dut=["A", "A", "A", "B"], u_voltage=[1e-4] * 4)
        f = fit_lines(rd)
        with History(":memory:") as h:
            out = _record(h, f)
            assert out.added == ("A",) and h.duts() == ("A",)

    def test_accepts_an_open_connection(self):
        """History works on a given sqlite3 connection and leaves it open."""
        conn = sqlite3.connect(":memory:")
        with History(conn) as h:
            _record(h, _fits())
        assert conn.execute("SELECT COUNT(*) FROM results").fetchone()[0] == 2
        conn.close()

    def test_schema_version_wal_and_application_id_on_a_file(self, tmp_path):
        """A new file gets the schema version table, WAL journal and sagfit's application id."""
        p = tmp_path / "h.sqlite"
        with History(p) as h:
            assert h.schema_version == SCHEMA_VERSION
        c = sqlite3.connect(p)
        assert c.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert c.execute("PRAGMA application_id").fetchone()[0] == 0x53474648
        c.close()


    def test_a_failing_run_records_nothing(self):
        """One transaction per run: an error on the second DUT leaves the first unrecorded too."""
        with History(":memory:") as h:
            with pytest.raises(HistoryError, match="no test date"):
                h.record(_fits(), test_time=[T0, np.nan], file_name="f.csv", sha256="a" * 64)
            assert h.count() == 0
            assert h._conn.execute("SELECT COUNT(*) FROM runs").fetchone()[0] == 0

    def test_an_empty_file_becomes_a_history(self, tmp_path):
        """A zero-byte file (e.g. made with touch) is initialised, not refused."""
        p = tmp_path / "h.sqlite"
        p.write_bytes(b"")
        with History(p) as h:
            assert h.schema_version == SCHEMA_VERSION and h.count() == 0


class TestRefusals:
    def test_newer_schema_is_refused_unchanged(self, tmp_path):
        """A database of a newer schema version is refused with a clear message, untouched."""
        p = tmp_path / "h.sqlite"
        with History(p) as h:
            _record(h, _fits())
        c = sqlite3.connect(p)
        c.execute("INSERT INTO schema_version VALUES (?, '2099-01-01')", (SCHEMA_VERSION + 1,))
        c.commit()
        c.close()
        before = p.read_bytes()
        with pytest.raises(HistoryError, match=r"newer sagfit .*version 2.*upgrade"):
            History(p)
        assert p.read_bytes() == before

    def test_non_sqlite_file_is_refused(self, tmp_path):
        """A text file given as the database is refused, not overwritten."""
        p = tmp_path / "readings.csv"
        p.write_text("dut,load,voltage\n")
        with pytest.raises(HistoryError, match="not an SQLite database"):
            History(p)
        assert p.read_text() == "dut,load,voltage\n"

    def test_another_programs_database_is_refused(self, tmp_path):
        """An SQLite file without sagfit's schema table is not taken over."""
        p = tmp_path / "other.sqlite"
        c = sqlite3.connect(p)
        c.execute("CREATE TABLE inventory (x)")
        c.commit()
        c.close()
        with pytest.raises(HistoryError, match="another program"):
            History(p)

    def test_corrupt_file_gives_a_clear_error(self, tmp_path):
        """A damaged database (SQLite header, garbage pages) raises HistoryError."""
        p = tmp_path / "h.sqlite"
        with History(p) as h:
            _record(h, _fits())
        data = bytearray(p.read_bytes())
        data[100:] = os.urandom(len(data) - 100)
        p.write_bytes(bytes(data))
        for f in (tmp_path / "h.sqlite-wal", tmp_path / "h.sqlite-shm"):
            if f.exists():
                f.unlink()
        with pytest.raises(HistoryError):
            with History(p) as h:
                h.records()

    def test_missing_file_is_refused_when_not_creating(self, tmp_path):
        """trend (create=False) does not create a database where none exists."""
        p = tmp_path / "none.sqlite"
        with pytest.raises(HistoryError, match="no history database"):
            History(p, create=False)
        assert not p.exists()


CHILD = textwrap.dedent("""
    import sys, time
    import numpy as np
    from sagfit.io.history import History
    from sagfit.core.readings import Readings
    from sagfit.core.fit import fit_lines

    class Slow(History):
        def _before_commit(self):
            print("in-transaction", flush=True)
            time.sleep(60)

    m = 3000
    i = np.tile([0.0, 25.0, 50.0], m)
    rd = Readings.from_arrays(voltage=2.1 - 1e-3 * i, current=i,
                              dut=np.repeat([f"X{k}" for k in range(m)], 3),
                              u_voltage=np.full(3 * m, 1e-4))
    h = Slow(sys.argv[1])
    # a tiny page cache makes SQLite spill uncommitted pages into the write-ahead log,
    # so the kill leaves real uncommitted frames for recovery to discard
    h._conn.execute("PRAGMA cache_size = 10")
    h.record(fit_lines(rd), test_time=1.78e9, file_name="new.csv", sha256="c" * 64)
""")


class TestInterruptedWrite:
    def test_killed_record_leaves_previous_records_intact(self, tmp_path):
        """A record run SIGKILLed before COMMIT leaves the earlier records intact and readable."""
        p = tmp_path / "h.sqlite"
        with History(p) as h:
            _record(h, _fits())
            before = h.records()
        wal_before = (tmp_path / "h.sqlite-wal").stat().st_size \
            if (tmp_path / "h.sqlite-wal").exists() else 0
        proc = subprocess.Popen([sys.executable, "-c", CHILD, str(p)], stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True)
        try:
            line = proc.stdout.readline()
            assert line.strip() == "in-transaction", proc.stderr.read()
            wal = tmp_path / "h.sqlite-wal"
            assert wal.exists() and wal.stat().st_size > wal_before  # uncommitted frames
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=20)
        finally:
            if proc.poll() is None:
                proc.kill()
            proc.stdout.close()
            proc.stderr.close()
        assert proc.returncode == -signal.SIGKILL
        with History(p) as h:
            after = h.records()
            assert h.count() == 2 and after.duts == ("A", "B")
            np.testing.assert_array_equal(after.rth, before.rth)
            assert h._conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            # and the database still takes new records
            assert _record(h, _fits(), sha="d" * 64).added == ("A", "B")


class TestDates:
    def _readings(self, text):
        return parse_table(text.encode(), "t.csv")

    def test_date_option_wins(self):
        """--date overrides the comment."""
        rd = self._readings("# date: 2026-05-01\ndut,current,voltage\nA,0,2\nA,1,1.9\nA,2,1.8\n")
        t, src = dut_test_times(rd, "2026-04-07")
        assert t[0] == T0 and "--date" in src

    def test_comment_date_is_used(self):
        """Without --date or a time column, the '# date:' comment gives the test date."""
        rd = self._readings("# date: 2026-04-07\ndut,current,voltage\nA,0,2\nA,1,1.9\n")
        t, src = dut_test_times(rd)
        assert t[0] == T0 and "comment" in src

    def test_time_column_of_dates_is_used(self):
        """A time column of ISO dates gives each DUT the date of its first reading."""
        rd = self._readings("dut,time,current,voltage\nA,2026-04-07T10:00,0,2\n"
                            "A,2026-04-07T10:01,1,1.9\nB,2026-04-08T09:00,0,2\n"
                            "B,2026-04-08T09:01,1,1.9\n")
        t, src = dut_test_times(rd)
        assert t[0] == T0 + 10 * 3600 and t[1] == T0 + 86400 + 9 * 3600 and src == "time column"

    def test_elapsed_time_column_falls_back_to_the_comment(self):
        """A time column of elapsed seconds is not a date; the comment is used instead."""
        rd = self._readings("# date: 2026-04-07\ndut,time_s,current,voltage\nA,0,0,2\nA,10,1,1.9\n")
        t, _ = dut_test_times(rd)
        assert t[0] == T0

    def test_no_date_is_refused_with_the_way_out(self):
        """No --date, time column or comment: a clear error naming the file and the fixes."""
        rd = self._readings("dut,current,voltage\nA,0,2\nA,1,1.9\n")
        with pytest.raises(ReadingsFileError, match=r"t\.csv: no test date.*--date"):
            dut_test_times(rd)

    def test_bad_dates_are_refused(self):
        """A malformed or future --date is an OptionError; a bad comment a file error."""
        rd = self._readings("# date: 2026-13-45\ndut,current,voltage\nA,0,2\nA,1,1.9\n")
        with pytest.raises(ReadingsFileError, match="date"):
            dut_test_times(rd)
        with pytest.raises(OptionError, match="future"):
            dut_test_times(rd, "2099-01-01")
        with pytest.raises(ValueError):
            parse_date("07/04/2026")

    def test_group_labels_follow_their_duts_when_rows_are_resorted(self):
        """Labels of a 'string' column stay with their DUTs even for interleaved rows."""
        rd = self._readings("cell,string,current,voltage\nA,S1,0,2\nB,S2,0,2\nA,S1,1,1.9\n"
                            "B,S2,1,1.9\n")
        assert dict(zip(rd.duts, dut_group_labels(rd))) == {"A": "S1", "B": "S2"}


class TestLocking:
    def test_a_locked_database_is_a_clear_error(self, tmp_path):
        """While another writer holds the lock, record fails with HistoryError, not a traceback."""
        p = tmp_path / "h.sqlite"
        with History(p) as h:
            _record(h, _fits())
        other = sqlite3.connect(p, isolation_level=None)
        other.execute("BEGIN IMMEDIATE")
        try:
            conn = sqlite3.connect(p, isolation_level=None, timeout=0.05)
            with History(conn) as h:
                with pytest.raises(HistoryError, match="another sagfit"):
                    _record(h, _fits(), sha="e" * 64)
            conn.close()
        finally:
            other.execute("ROLLBACK")
            other.close()
        with History(p) as h:
            assert h.count() == 2
