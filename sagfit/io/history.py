"""The history of fits: one SQLite file, behind this one module, in plain SQL.

Edge module (the standard library's ``sqlite3`` is imported here and nowhere else), so
that a server database can be put behind the same ``History`` class later without
touching the rest of sagfit. Length: that one-module rule is the reason; every SQL
statement sagfit runs is in this file.

Guarantees
----------
- **Schema version**: the ``schema_version`` table holds every migration applied; a file
  written by a newer sagfit (a higher version than ``SCHEMA_VERSION``) is refused, never
  altered. Older files are migrated forward in one transaction per step.
- **Atomic record runs**: one ``sagfit record`` is one ``BEGIN IMMEDIATE … COMMIT``
  transaction; a run killed before the commit leaves the database as it was (SQLite's
  write-ahead log is rolled back on the next open). WAL mode with ``synchronous=FULL``.
- **Idempotent**: a UNIQUE key on (file SHA-256, DUT) makes recording the same file
  twice a no-op; ``force=True`` replaces those records instead.
- A file that is not an SQLite database, or an SQLite database of another program, is
  refused with a :class:`~sagfit.errors.HistoryError`.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import sqlite3
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np

from ..core.errors import HistoryError, ReadingsFileError

__all__ = ["History", "HistoryRecords", "RecordOutcome", "SCHEMA_VERSION", "DEFAULT_DB",
           "parse_date", "dut_test_times", "dut_group_labels"]

SCHEMA_VERSION = 2
DEFAULT_DB = "sagfit-history.sqlite"
#: PRAGMA application_id of a sagfit history ("SGFH"), so other tools can tell the file.
APPLICATION_ID = 0x53474648
_SQLITE_MAGIC = b"SQLite format 3\x00"
_EARLIEST = 315532800.0  # 1980-01-01: a time column below this holds elapsed seconds

# Each migration brings the schema from version k-1 to k; statements run one by one
# inside one transaction (executescript would commit on its own).
_MIGRATIONS: dict[int, tuple[str, ...]] = {
    1: (
        """CREATE TABLE runs (
            id INTEGER PRIMARY KEY,
            recorded_at TEXT NOT NULL,          -- UTC, ISO 8601
            file_name TEXT NOT NULL,
            file_sha256 TEXT NOT NULL,
            date_source TEXT NOT NULL,          -- option, time column or comment
            settings_json TEXT NOT NULL,
            tool_version TEXT NOT NULL)""",
        """CREATE TABLE results (
            id INTEGER PRIMARY KEY,
            run_id INTEGER NOT NULL REFERENCES runs(id) ON DELETE CASCADE,
            dut TEXT NOT NULL,
            group_label TEXT NOT NULL DEFAULT '',
            test_time REAL NOT NULL,            -- Unix time, s (UTC)
            test_date TEXT NOT NULL,            -- YYYY-MM-DD (UTC)
            file_sha256 TEXT NOT NULL,
            n INTEGER NOT NULL,
            method TEXT NOT NULL,
            vth REAL NOT NULL,                  -- V
            u_vth REAL,                         -- V, standard uncertainty
            rth REAL NOT NULL,                  -- ohm
            u_rth REAL,                         -- ohm, standard uncertainty
            cov_vth_rth REAL,                   -- V*ohm
            chi2 REAL,
            dof INTEGER NOT NULL,
            p_value REAL,
            scale REAL,
            coverage_factor REAL,
            flags_json TEXT NOT NULL,
            UNIQUE (file_sha256, dut))""",
        "CREATE INDEX results_by_dut ON results (dut, test_time)",
    ),
    # the part of u(Vth) and u(Rth) that came from the meters' systematic errors shared by
    # the sweep (gain and offset): records taken with the same instrument share it, so a
    # trend's rate must not be weighted with it (NULL in records of version 1: unknown)
    2: (
        "ALTER TABLE results ADD COLUMN u_vth_shared REAL",
        "ALTER TABLE results ADD COLUMN u_rth_shared REAL",
    ),
}


def _now_iso() -> str:
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()


def _num(x):
    """A float for SQLite: ``None`` for NaN/inf (SQLite has no NaN)."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def parse_date(text: str) -> float:
    """``YYYY-MM-DD`` (or an ISO 8601 date-time) → Unix time in s (UTC; a date is its
    midnight). Raises ``ValueError`` with a plain message."""
    s = str(text).strip()
    try:
        if len(s) <= 10:
            d = _dt.date.fromisoformat(s)
            when = _dt.datetime(d.year, d.month, d.day, tzinfo=_dt.timezone.utc)
        else:
            when = _dt.datetime.fromisoformat(s.replace("Z", "+00:00"))
            if when.tzinfo is None:
                when = when.replace(tzinfo=_dt.timezone.utc)
    except ValueError:
        raise ValueError(f"{s!r} is not a date (write YYYY-MM-DD, e.g. 2026-11-03)") from None
    t = when.timestamp()
    if t > _dt.datetime.now(_dt.timezone.utc).timestamp() + 2 * 86400:
        raise ValueError(f"{s} is in the future; check the year")
    if t < _EARLIEST:
        raise ValueError(f"{s} is before 1980; check the year")
    return t


def dut_test_times(readings, date: str | None = None) -> tuple[np.ndarray, str]:
    """The test date of each DUT (Unix s) and where it came from.

    Order of precedence: ``date`` (the ``--date`` option); the earliest reading of each
    DUT in a ``time`` column holding dates; the file's ``# date:`` comment. Raises
    ``ReadingsFileError`` when none gives a date.
    """
    m = readings.n_duts
    if date is not None:
        try:
            return np.full(m, parse_date(date)), "option --date"
        except ValueError as exc:
            from ..core.errors import OptionError

            raise OptionError("--date", str(exc)) from None
    comment = readings.meta.get("date")
    t_comment = math.nan
    if comment:
        try:
            t_comment = parse_date(str(comment))
        except ValueError as exc:
            raise ReadingsFileError(readings.source, f"the '# date:' comment: {exc}") from None
    if readings.has_time:
        t = np.where(np.isfinite(readings.time), readings.time, np.inf)
        counts = readings.counts()
        start = np.concatenate(([0], np.cumsum(counts)[:-1]))
        first = np.full(m, np.inf)
        nz = counts > 0
        first[nz] = np.minimum.reduceat(t, start[nz])
        dated = np.isfinite(first) & (first >= _EARLIEST)
        if dated.all():
            return first, "time column"
        if dated.any() or math.isnan(t_comment):
            k = int(np.flatnonzero(~dated)[0])
            why = ("has no time" if not np.isfinite(first[k]) else
                   "has times in elapsed seconds, not dates")
            if math.isnan(t_comment):
                raise ReadingsFileError(
                    readings.source, f"DUT {readings.duts[k]!r} {why}; give the test date "
                    "with --date YYYY-MM-DD or a '# date: YYYY-MM-DD' comment line")
            return np.where(dated, first, t_comment), "time column and '# date:' comment"
    if not math.isnan(t_comment):
        return np.full(m, t_comment), "'# date:' comment"
    raise ReadingsFileError(readings.source, "no test date: give it with --date YYYY-MM-DD, "
                                             "a time column of dates, or a '# date: "
                                             "YYYY-MM-DD' comment line")


def dut_group_labels(readings) -> tuple[str, ...]:
    """The ``group`` label (e.g. the string) of each DUT: its first reading's label."""
    lab = readings.meta.get("group_labels")
    m = readings.n_duts
    if lab is None or len(lab) != len(readings):
        return ("",) * m
    lab = np.asarray(lab, dtype=object)
    # group_labels are in file order; readings may have been re-sorted by DUT
    rank = np.argsort(np.argsort(readings.line, kind="stable"), kind="stable")
    counts = readings.counts()
    start = np.concatenate(([0], np.cumsum(counts)[:-1]))
    out = np.full(m, "", dtype=object)
    nz = counts > 0
    out[nz] = lab[rank[start[nz]]]
    return tuple("" if x is None else str(x).strip() for x in out)


@dataclass(frozen=True, slots=True)
class RecordOutcome:
    """What one record run did: DUTs added, skipped as already recorded, replaced."""

    added: tuple[str, ...]
    skipped: tuple[str, ...]
    replaced: tuple[str, ...]
    run_id: int | None


@dataclass(frozen=True)
class HistoryRecords:
    """Recorded fits as columns (one row per DUT per test), sorted by DUT then date."""

    duts: tuple[str, ...]
    dut_index: np.ndarray
    time: np.ndarray
    rth: np.ndarray
    u_rth: np.ndarray
    vth: np.ndarray
    u_vth: np.ndarray
    cov_vth_rth: np.ndarray
    chi2: np.ndarray
    dof: np.ndarray
    group_label: tuple[str, ...]
    file_name: tuple[str, ...]
    file_sha256: tuple[str, ...]
    #: the meters' shared (systematic) part of u_rth (Ω; 0 where none was modelled, NaN in
    #: records written before it was stored)
    u_rth_shared: np.ndarray | None = None
    #: the instruments each record was taken with ("voltage:ID|current:ID" from the bench
    #: profile's identifiers; "" when the profile named none)
    instrument: tuple[str, ...] | None = None

    def __post_init__(self):
        n = int(np.asarray(self.dut_index).size)
        if self.u_rth_shared is None:
            object.__setattr__(self, "u_rth_shared", np.full(n, np.nan))
        if self.instrument is None:
            object.__setattr__(self, "instrument", ("",) * n)

    def __len__(self) -> int:
        return int(self.dut_index.size)

    def labels_per_dut(self) -> tuple[str, ...]:
        """Each DUT's group label from its latest record that has one."""
        lab = np.asarray(self.group_label, dtype=object)
        out = np.full(len(self.duts), "", dtype=object)
        has = np.flatnonzero(lab != "") if lab.size else np.zeros(0, np.int64)
        last = np.full(len(self.duts), -1, np.int64)
        np.maximum.at(last, self.dut_index[has], has)  # rows are sorted by date
        out[last >= 0] = lab[last[last >= 0]]
        return tuple(str(x) for x in out)


class History:
    """A history database of fits.

    Parameters
    ----------
    target : path-like or sqlite3.Connection
        The SQLite file (``":memory:"`` for a throw-away one), or an open connection
        (tests); a given connection is not closed by :meth:`close`.
    create : bool
        Create the file when missing (``sagfit record``); ``False`` refuses a missing
        file (``sagfit trend``).

    Raises
    ------
    HistoryError
        Not an SQLite file, another program's database, a newer schema, or corrupt.
    """

    def __init__(self, target, *, create: bool = True):
        self._own = not isinstance(target, sqlite3.Connection)
        if self._own:
            self.path = str(target)
            if self.path != ":memory:":
                self._check_file(Path(self.path), create)
            self._readonly = not create and self.path != ":memory:"
            try:
                if self._readonly:  # reading a history never writes to it (not even WAL)
                    from urllib.parse import quote

                    uri = "file:" + quote(str(Path(self.path).resolve())) + "?mode=ro"
                    conn = sqlite3.connect(uri, uri=True, isolation_level=None, timeout=10.0)
                else:
                    conn = sqlite3.connect(self.path, isolation_level=None, timeout=10.0)
            except sqlite3.Error as exc:
                raise HistoryError(f"{self.path}: cannot open the history database ({exc})") \
                    from None
        else:
            conn = target
            conn.isolation_level = None
            self.path = "<connection>"
            self._readonly = False
        self._conn = conn
        try:
            self._setup()
        except sqlite3.DatabaseError as exc:
            self.close()
            raise HistoryError(f"{self.path}: the history database is damaged or not a "
                               f"database ({exc}); restore it from a backup") from None
        except BaseException:
            self.close()
            raise

    # ------------------------------------------------------------------ set-up
    @staticmethod
    def _check_file(p: Path, create: bool) -> None:
        if p.is_dir():
            raise HistoryError(f"{p}: is a folder, not a history database")
        if not p.exists():
            if not create:
                raise HistoryError(f"{p}: no history database here; record tests into it "
                                   "first with 'sagfit record FILE --db " + str(p) + "'")
            if not (p.parent if str(p.parent) else Path(".")).is_dir():
                raise HistoryError(f"{p}: folder {p.parent} does not exist")
            return
        try:
            with open(p, "rb") as fh:
                head = fh.read(len(_SQLITE_MAGIC))
        except OSError as exc:
            raise HistoryError(f"{p}: cannot read the history database "
                               f"({exc.strerror or exc})") from None
        if head and head != _SQLITE_MAGIC:
            raise HistoryError(f"{p}: not an SQLite database (give a sagfit history file "
                               "with --db, or a new file name)")

    def _setup(self) -> None:
        c = self._conn
        c.execute("PRAGMA foreign_keys = ON")
        tables = {r[0] for r in c.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table'")}
        if tables and "schema_version" not in tables:
            raise HistoryError(f"{self.path}: an SQLite database of another program (tables "
                               f"{', '.join(sorted(tables)[:5])}), not a sagfit history")
        version = self._version() if tables else 0
        if self._readonly and version == 0:
            raise HistoryError(f"{self.path}: no history recorded in this file; record tests "
                               f"into it first with 'sagfit record FILE --db {self.path}'")
        # an older schema is read as it is (missing columns read as unknown); the next
        # 'sagfit record' upgrades it
        if version > SCHEMA_VERSION:
            raise HistoryError(
                f"{self.path}: written by a newer sagfit (history schema version {version}; "
                f"this sagfit reads up to version {SCHEMA_VERSION}); upgrade sagfit to use "
                "it — the file was not changed")
        if self._readonly:
            return
        if self.path != ":memory:" and self._own:
            try:
                c.execute("PRAGMA journal_mode = WAL")
            except sqlite3.OperationalError:
                pass  # a read-only file: readable without switching the journal
        c.execute("PRAGMA synchronous = FULL")
        if version < SCHEMA_VERSION:
            self._migrate()

    def _version(self) -> int:
        row = self._conn.execute("SELECT MAX(version) FROM schema_version").fetchone()
        return int(row[0] or 0)

    def _migrate(self) -> None:
        c = self._conn
        c.execute("BEGIN IMMEDIATE")
        try:
            c.execute("CREATE TABLE IF NOT EXISTS schema_version ("
                      "version INTEGER PRIMARY KEY, applied_at TEXT NOT NULL)")
            version = self._version()  # re-read under the write lock
            if version > SCHEMA_VERSION:
                raise HistoryError(f"{self.path}: written by a newer sagfit (schema version "
                                   f"{version})")
            for v in range(version + 1, SCHEMA_VERSION + 1):
                for stmt in _MIGRATIONS[v]:
                    c.execute(stmt)
                c.execute("INSERT INTO schema_version (version, applied_at) VALUES (?, ?)",
                          (v, _now_iso()))
            c.execute(f"PRAGMA application_id = {APPLICATION_ID}")
            c.execute("COMMIT")
        except BaseException:
            c.execute("ROLLBACK")
            raise

    @property
    def schema_version(self) -> int:
        return self._version()

    def close(self) -> None:
        if self._own and self._conn is not None:
            self._conn.close()
        self._conn = None

    def __enter__(self) -> "History":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------------ writing
    def _before_commit(self) -> None:
        """Called inside the record transaction just before COMMIT (a test seam for the
        interrupted-write test; does nothing)."""

    def record(self, fits, *, test_time, file_name: str, sha256: str,
               group_labels: Sequence[str] | None = None, settings: Mapping | None = None,
               date_source: str = "", tool_version: str = "", force: bool = False
               ) -> RecordOutcome:
        """Append the fitted DUTs of ``fits`` in one transaction.

        Parameters
        ----------
        fits : Fits
            DUTs with an ``error`` are not recorded.
        test_time : array_like of float
            Test date of each DUT (Unix s).
        file_name, sha256 : str
            The readings file and the SHA-256 of its bytes (the deduplication key with
            the DUT).
        group_labels : sequence of str, optional
            Group label per DUT.
        settings : mapping, optional
            The fit settings (stored as JSON).
        force : bool
            Replace records of the same file and DUT instead of skipping them.
        """
        if not sha256:
            raise HistoryError(f"{file_name}: no content hash; cannot record")
        t = np.broadcast_to(np.asarray(test_time, float), (len(fits),))
        labels = tuple(group_labels) if group_labels is not None else ("",) * len(fits)
        ok = np.flatnonzero(fits.ok).tolist()
        c = self._conn
        try:
            c.execute("BEGIN IMMEDIATE")
        except sqlite3.OperationalError as exc:
            raise HistoryError(f"{self.path}: cannot write the history ({exc}); another "
                               "sagfit may be recording into it; try again") from None
        try:
            have = {r[0] for r in c.execute(
                "SELECT dut FROM results WHERE file_sha256 = ?", (sha256,))}
            todo, skipped, replaced = [], [], []
            for i in ok:
                d = fits.duts[i]
                if d in have:
                    (replaced if force else skipped).append(d)
                    if not force:
                        continue
                todo.append(i)
            run_id = None
            if replaced:
                c.executemany("DELETE FROM results WHERE file_sha256 = ? AND dut = ?",
                              [(sha256, d) for d in replaced])
                c.execute("DELETE FROM runs WHERE id NOT IN (SELECT run_id FROM results)")
            if todo:
                cur = c.execute(
                    "INSERT INTO runs (recorded_at, file_name, file_sha256, date_source, "
                    "settings_json, tool_version) VALUES (?, ?, ?, ?, ?, ?)",
                    (_now_iso(), str(file_name), sha256, date_source,
                     json.dumps(dict(settings or {}), default=str, allow_nan=False),
                     tool_version))
                run_id = cur.lastrowid
                c.executemany(
                    "INSERT INTO results (run_id, dut, group_label, test_time, test_date, "
                    "file_sha256, n, method, vth, u_vth, rth, u_rth, cov_vth_rth, chi2, dof, "
                    "p_value, scale, coverage_factor, flags_json, u_vth_shared, u_rth_shared) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (self._row(fits, i, run_id, labels[i], float(t[i]), sha256) for i in todo))
            self._before_commit()
            c.execute("COMMIT")
        except BaseException as exc:
            if c.in_transaction:
                c.execute("ROLLBACK")
            if isinstance(exc, sqlite3.OperationalError):
                hint = ("another sagfit may be recording into it; try again" if "locked" in
                        str(exc) else "nothing of this run was recorded")
                raise HistoryError(f"{self.path}: cannot write the history ({exc}); {hint}") \
                    from None
            if isinstance(exc, sqlite3.DatabaseError):
                raise HistoryError(f"{self.path}: the history database is damaged ({exc}); "
                                   "restore it from a backup") from None
            raise
        added = tuple(fits.duts[i] for i in todo if fits.duts[i] not in replaced)
        return RecordOutcome(added, tuple(skipped), tuple(replaced), run_id)

    @staticmethod
    def _row(fits, i, run_id, label, t, sha256):
        if not math.isfinite(t):
            raise HistoryError(f"DUT {fits.duts[i]!r}: no test date")
        flags = [f.to_dict() for f in fits.flags[i]]
        day = _dt.datetime.fromtimestamp(t, _dt.timezone.utc).date().isoformat()
        return (run_id, fits.duts[i], label or "", t, day, sha256, int(fits.n[i]),
                str(fits.method[i]), _num(fits.vth[i]), _num(fits.u_vth[i]),
                _num(fits.rth[i]), _num(fits.u_rth[i]), _num(fits.cov_vr[i]),
                _num(fits.chi2[i]), int(fits.dof[i]), _num(fits.p_value[i]),
                _num(fits.scale[i]), _num(fits.k[i]), json.dumps(flags, ensure_ascii=False),
                _num(math.sqrt(max(float(fits.var_vth_shared[i]), 0.0))),
                _num(math.sqrt(max(float(fits.var_rth_shared[i]), 0.0))))

    # ------------------------------------------------------------------ reading
    def count(self) -> int:
        """Number of recorded results (DUT-tests)."""
        return int(self._conn.execute("SELECT COUNT(*) FROM results").fetchone()[0])

    def duts(self) -> tuple[str, ...]:
        return tuple(r[0] for r in self._conn.execute(
            "SELECT DISTINCT dut FROM results ORDER BY dut"))

    def records(self, duts: Iterable[str] | None = None) -> HistoryRecords:
        """All records (or those of the named DUTs), sorted by DUT then test date."""
        have = {r[1] for r in self._conn.execute("PRAGMA table_info(results)")}
        shared = "u_rth_shared" if "u_rth_shared" in have else "NULL"
        cols = ("dut, test_time, rth, u_rth, vth, u_vth, cov_vth_rth, chi2, dof, group_label, "
                f"r.file_sha256, file_name, {shared}, settings_json")
        base = (f"SELECT {cols} FROM results r JOIN runs ON runs.id = r.run_id")
        try:
            if duts is None:
                rows = self._conn.execute(base + " ORDER BY dut, test_time, r.id").fetchall()
            else:
                names = list(dict.fromkeys(str(d) for d in duts))
                rows = []
                for k in range(0, len(names), 500):  # stay below SQLite's variable limit
                    chunk = names[k:k + 500]
                    rows += self._conn.execute(
                        base + f" WHERE dut IN ({', '.join('?' * len(chunk))})", chunk
                    ).fetchall()
                rows.sort(key=lambda r: (r[0], r[1]))
        except sqlite3.DatabaseError as exc:
            raise HistoryError(f"{self.path}: cannot read the history ({exc})") from None
        names_col = [r[0] for r in rows]
        uniq = tuple(dict.fromkeys(names_col))
        pos = {d: i for i, d in enumerate(uniq)}

        def col(j, dtype=float):
            return np.array([np.nan if r[j] is None else r[j] for r in rows], dtype=dtype)

        return HistoryRecords(
            duts=uniq, dut_index=np.array([pos[d] for d in names_col], np.int64),
            time=col(1), rth=col(2), u_rth=col(3), vth=col(4), u_vth=col(5),
            cov_vth_rth=col(6), chi2=col(7), dof=np.array([r[8] for r in rows], np.int64),
            group_label=tuple(r[9] or "" for r in rows),
            file_sha256=tuple(r[10] for r in rows), file_name=tuple(r[11] for r in rows),
            u_rth_shared=col(12), instrument=_instrument_keys([r[13] for r in rows]))


def _instrument_keys(settings_texts) -> tuple[str, ...]:
    """Per record, which meters took it: ``"voltage:ID|current:ID"`` from the identifiers
    the bench profile gave (stored with each run's settings); ``""`` when none was named.
    Parsed once per run, not per record."""
    cache: dict = {}
    out = []
    for text in settings_texts:
        if text not in cache:
            try:
                insts = json.loads(text).get("instruments") or []
            except (TypeError, ValueError, AttributeError):
                insts = []
            parts = sorted(f"{d.get('role')}:{d.get('identifier')}" for d in insts
                           if isinstance(d, Mapping) and d.get("role") in ("voltage", "current")
                           and d.get("identifier"))
            cache[text] = "|".join(parts)
        out.append(cache[text])
    return tuple(out)


def check_db_path(db: str, inputs: Iterable[str] = ()) -> str:
    """Refuse a ``--db`` that is one of the input files."""
    p = Path(db)
    for src in inputs:
        try:
            same = p.exists() and os.path.samefile(p, src)
        except OSError:
            same = False
        if same or p.resolve() == Path(src).resolve():
            from ..core.errors import OptionError

            raise OptionError("--db", f"{db} is an input file; give another database name")
    return db
