"""Partitioned readings data sets (a directory or glob of Parquet or CSV files) on Dask.

The Dask edge of sagfit: each file becomes one partition (``dask.dataframe.from_map``), so a
bad cell is reported with its file, row and column exactly as on one machine. The readings are
regrouped on the DUT id (a Dask shuffle), so a DUT whose readings lie in several files is
fitted once, whole. Each partition then goes through the unchanged vectorised core
(:func:`sagfit.fit` on :meth:`sagfit.Readings.from_arrays`) with ``map_partitions``; the
result columns are those of ``sagfit fit --out results.csv`` (:func:`fits_table`).

Nothing here is imported by ``import sagfit``, ``sagfit --help`` or a plain ``sagfit fit``:
Dask is an optional extra (``pip install "sagfit[dask]"``).
"""

from __future__ import annotations

import math

import glob as _glob
import os
from pathlib import Path
from typing import Mapping

import numpy as np

from ..core.errors import InputError, ReadingsFileError
from .readings_csv import classify_header, fits_table

__all__ = ["is_dataset", "dataset_files", "read_dataset", "fit_dataset", "fit_partition",
           "write_results_dataset", "DatasetError"]

#: Reading columns carried to the fit, in SI units, plus the position of each reading.
_VALUE_ROLES = ("voltage", "current", "load", "u_voltage", "u_current", "u_load")
_GLOB_CHARS = set("*?[")


class DatasetError(ReadingsFileError):
    """A :class:`ReadingsFileError` that survives the trip from a Dask worker back to the
    client (it pickles with its file, line and column)."""

    def __reduce__(self):
        return (type(self), (self.path, self.detail, self.line, self.column))


def is_dataset(path: str) -> bool:
    """True for a directory or a glob pattern: the input of a partitioned data set.
    Needs no Dask (the CLI asks before importing it)."""
    return os.path.isdir(path) or bool(_GLOB_CHARS & set(os.path.basename(path)))


def dataset_files(path: str) -> list[str]:
    """The Parquet / CSV files of a data set, sorted by name (the single-process order)."""
    if os.path.isdir(path):
        found = [str(p) for p in sorted(Path(path).rglob("*"))
                 if p.is_file() and p.suffix.lower() in (".parquet", ".pq", ".csv")]
    else:
        found = sorted(_glob.glob(path, recursive=True))
    found = [f for f in found if not os.path.basename(f).startswith((".", "_"))]
    if not found:
        raise InputError(f"{path}: no .parquet or .csv files found")
    kinds = {Path(f).suffix.lower() in (".parquet", ".pq") for f in found}
    if len(kinds) > 1:
        raise InputError(f"{path}: mixes Parquet and CSV files; keep one format per data set")
    return found


def _meta():
    import pandas as pd

    cols = {"dut": pd.Series([], dtype=object), "_file": pd.Series([], dtype="int64"),
            "_row": pd.Series([], dtype="int64")}
    for role in _VALUE_ROLES:
        cols[role] = pd.Series([], dtype="float64")
    return pd.DataFrame(cols)


def _read_file(item: tuple[int, str], mapping: Mapping[str, str] | None = None):
    """One file → a frame of dut, SI reading columns, file number and row; every non-numeric
    cell raises :class:`DatasetError` naming file, row (line, for CSV) and column.
    ``mapping``: the column mapping (role → header) where the headers do not say."""
    import pandas as pd

    number, path = item
    parquet = Path(path).suffix.lower() in (".parquet", ".pq")
    try:
        if parquet:
            raw = pd.read_parquet(path)
            lines = np.arange(1, len(raw) + 1, dtype=np.int64)  # Parquet rows count from 1
        else:
            raw, lines = _read_csv_text(path)
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise DatasetError(path, f"cannot read the file ({exc})") from None
    roles: dict[str, tuple[str, float]] = {}
    if mapping:
        from .columns import assign_roles

        try:
            found, _ = assign_roles([str(h) for h in raw.columns], path, mapping=mapping,
                                    place="row")
        except ReadingsFileError as exc:
            raise DatasetError(exc.path, exc.detail, exc.line, exc.column) from None
        roles = {r: (c.header, c.scale) for r, c in found.items()
                 if r == "dut" or r in _VALUE_ROLES}
    for header in ([] if mapping else raw.columns):
        try:
            got = classify_header(str(header))
        except ValueError as exc:
            raise DatasetError(path, str(exc), column=str(header)) from None
        if got and got[0] not in roles and (got[0] == "dut" or got[0] in _VALUE_ROLES):
            roles[got[0]] = (str(header), got[1])
    if "dut" not in roles:
        raise DatasetError(path, "no DUT id column (dut, serial, id, ...): a data set needs "
                                 "one so that readings split across files can be regrouped")
    if sum(r in roles for r in ("voltage", "current", "load")) < 2:
        raise DatasetError(path, "needs two of the voltage, current and load columns")
    n = len(raw)
    frame = {"dut": raw[roles["dut"][0]].astype(str).to_numpy(dtype=object),
             "_file": np.full(n, number, dtype=np.int64),
             "_row": lines}
    for role in _VALUE_ROLES:
        if role not in roles:
            frame[role] = np.full(n, np.nan)
            continue
        header, scale = roles[role]
        col = raw[header]
        if parquet and col.dtype.kind in "fiu":
            vals = col.to_numpy(dtype=float) * scale
        elif role == "load":  # each distinct load text once: 4.7, 4k7, 470R, open
            from ..core.units import parse_resistance

            text = col.astype(str).str.strip()
            codes, uniques = pd.factorize(text)

            def one(t):
                try:
                    return parse_resistance(t, scale)
                except ValueError:
                    return math.nan
            vals = np.array([one(t) for t in uniques], dtype=float)[codes]
            bad = np.isnan(vals)
            if bad.any():
                i = int(np.argmax(bad))
                what = (f"{text.iloc[i]!r} is not a resistance (write e.g. 4.7k, 4k7, open)"
                        if text.iloc[i] else "empty cell")
                raise DatasetError(path, what, line=int(lines[i]), column=header)
        else:
            text = col.astype(str).str.strip()
            vals = pd.to_numeric(text.str.replace(",", ".", regex=False),
                                 errors="coerce").to_numpy(dtype=float)
            # an empty cell is allowed only where a value is optional (the uncertainties)
            missing = ["nan", "none"] + ([""] if role.startswith("u_") else [])
            bad = np.isnan(vals) & ~text.str.lower().isin(missing).to_numpy()
            if bad.any():
                i = int(np.argmax(bad))
                what = f"{text.iloc[i]!r} is not a number" if text.iloc[i] else "empty cell"
                raise DatasetError(path, what, line=int(lines[i]), column=header)
            vals = vals * scale
        frame[role] = vals
    out = pd.DataFrame(frame)
    return out if n else _meta()


def _read_csv_text(path: str):
    """A CSV file without its ``#`` comment lines, blank lines and rows of bare separators
    → (text frame, the file line number of each row), so that errors name the line as an
    editor shows it."""
    import io

    import pandas as pd

    with open(path, encoding="utf-8-sig", newline="") as fh:
        all_lines = fh.read().splitlines()
    # blank lines, comments and rows of bare separators (a spreadsheet's empty rows) go
    keep = [i for i, ln in enumerate(all_lines) if ln.strip(" \t,;|")
            and not ln.lstrip().startswith("#")]
    if not keep:
        return pd.DataFrame(), np.zeros(0, dtype=np.int64)
    text = "\n".join(all_lines[i] for i in keep)
    raw = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False, sep=None,
                      engine="python") if "\t" in all_lines[keep[0]] or ";" in \
        all_lines[keep[0]] else pd.read_csv(io.StringIO(text), dtype=str,
                                            keep_default_na=False)
    return raw, np.asarray(keep[1:], dtype=np.int64) + 1


def read_dataset(path: str, columns: Mapping[str, str] | None = None):
    """A data set as a Dask DataFrame of readings, one partition per file (lazy);
    ``columns``: the column mapping, as for :func:`sagfit.read_readings`."""
    import dask.dataframe as dd

    files = dataset_files(path)
    return dd.from_map(_read_file, list(enumerate(files)), meta=_meta(),
                       enforce_metadata=False, mapping=dict(columns or {}) or None)


def fit_partition(part, settings: Mapping[str, object] | None = None, files=None):
    """The core fit of one partition of readings (all readings of each DUT inside it) → the
    results table. Rows are put back in file-and-row order first, so each DUT sees its
    readings in the order a single-process fit of the concatenated files would."""
    from ..core.analysis import fit
    from ..core.readings import Readings

    settings = dict(settings or {})
    if len(part) == 0:
        return _result_meta(settings)
    part = part.sort_values(["_file", "_row"], kind="stable")
    arrays = {role: part[role].to_numpy(dtype=float) for role in _VALUE_ROLES
              if not np.isnan(part[role].to_numpy(dtype=float)).all()}
    src = "data set" if files is None else os.path.commonpath(files) or "data set"
    readings = Readings.from_arrays(
        dut=part["dut"].to_numpy(dtype=object).astype(str), source=src,
        voltage_accuracy=settings.get("voltage_accuracy"),
        current_accuracy=settings.get("current_accuracy"),
        load_tolerance=settings.get("load_tolerance"), **arrays)
    fits = fit(readings, confidence=float(settings.get("confidence", 0.95)),
               level=float(settings.get("level", 0.01)))
    return fits_table(fits, _decisions(fits, readings, settings))


def _decisions(fits, readings, settings) -> dict | None:
    """With a ``spec`` in the settings: the ``decision`` column of ``sagfit accept``."""
    if settings.get("spec") is None:
        return None
    from ..core.acceptance import DECISIONS, accept

    acc = accept(fits, settings["spec"], rule=settings.get("rule"), readings=readings)
    return {"decision": [DECISIONS[d] for d in acc.decision]}


def _result_meta(settings: Mapping[str, object] | None = None):
    """The (empty) results table with its column types, from a fit of three readings of
    one invented DUT (the only sure way to get the exact columns of :func:`fits_table`)."""
    from ..core.analysis import fit
    from ..core.readings import Readings

    r = Readings.from_arrays(voltage=[4.0, 3.9, 3.8], current=[0.0, 1.0, 2.0],
                             u_voltage=[1e-3] * 3, u_current=[1e-3] * 3, dut=["x"] * 3)
    fits = fit(r)
    return fits_table(fits, _decisions(fits, r, dict(settings or {}))).iloc[:0]


def fit_dataset(readings, settings: Mapping[str, object] | None = None,
                npartitions: int | None = None):
    """A Dask DataFrame of readings (from :func:`read_dataset` or your own, with columns
    ``dut``, two of ``voltage``/``current``/``load`` in SI units, optional ``u_*``) → a lazy
    Dask DataFrame of results, one row per DUT. ``settings``: ``confidence``, ``level``,
    ``voltage_accuracy``, ``current_accuracy``, ``load_tolerance`` as for :func:`sagfit.fit`;
    with ``spec`` (a :class:`sagfit.core.acceptance.Spec`, optional ``rule``) a ``decision``
    column (pass / inconclusive / fail / error) as ``sagfit accept`` gives.

    The readings are first shuffled on ``dut``, so every DUT is fitted once with all its
    readings, whatever partition they started in."""
    ddf = readings
    if "_file" not in ddf.columns:
        ddf = ddf.assign(_file=0)
    if "_row" not in ddf.columns:
        # the position inside each original partition keeps the order of the readings
        ddf = ddf.map_partitions(lambda p: p.assign(_row=np.arange(len(p), dtype=np.int64)))
    for role in _VALUE_ROLES:
        if role not in ddf.columns:
            ddf = ddf.assign(**{role: np.nan})
    n = npartitions or max(1, ddf.npartitions)
    ddf = ddf.shuffle(on="dut", npartitions=n)
    meta = _result_meta(settings)
    out = ddf.map_partitions(fit_partition, dict(settings or {}), meta=meta,
                             enforce_metadata=False)
    return out


def write_results_dataset(results, out_dir: str, compute_kwargs=None) -> None:
    """Write a results Dask DataFrame as a Parquet data set (``part.N.parquet`` files; a
    recomputed partition overwrites its own file, so nothing is duplicated)."""
    results.to_parquet(out_dir, write_index=False, overwrite=False,
                       compute_kwargs=compute_kwargs or {})
