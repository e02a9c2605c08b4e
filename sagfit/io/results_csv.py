"""``Fits`` → the results table: the columns of ``--out results.csv`` (and ``.parquet``),
written by Arrow's CSV writer, with text cells made safe for spreadsheets.

Edge module; the readers are in :mod:`sagfit.io.readings_csv` and its neighbours.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

__all__ = ["neutralise", "fits_columns", "Coded", "coded", "fits_table", "fits_csv",
           "fits_parquet", "table_csv_chunks", "csv_rows", "table_csv", "table_parquet"]

_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def neutralise(text: str) -> str:
    """Make a text cell safe for a spreadsheet: a leading ``= + - @`` gets a ``'`` prefix.

    Against CSV formula injection (OWASP, "CSV Injection", common practice).
    """
    if text and text.startswith(_FORMULA_START):
        return "'" + text
    return text


def fits_columns(fits, extra_columns: Mapping[str, object] | None = None) -> dict:
    """The per-DUT result columns (SI units, full precision) of ``--out results.csv``."""
    k = fits.k
    cols = {
        "dut": list(fits.duts),
        "method": coded(fits.method),
        "n": fits.n,
        "vth": fits.vth, "vth_u": fits.u_vth,
        "vth_ci_low": fits.vth - k * fits.u_vth, "vth_ci_high": fits.vth + k * fits.u_vth,
        "rth": fits.rth, "rth_u": fits.u_rth,
        "rth_ci_low": fits.rth - fits.k_rth * fits.u_rth,
        "rth_ci_high": fits.rth + fits.k_rth * fits.u_rth,
        "isc": fits.isc, "isc_u": fits.u_isc,
        "pmax": fits.pmax, "pmax_u": fits.u_pmax,
        "corr_vth_rth": _corr(fits),
        "chi2": fits.chi2, "dof": fits.dof, "p_value": fits.p_value,
        "coverage_factor": k, "confidence": np.full(len(fits), fits.confidence),
        "flags": _flag_codes(fits),
        "error": coded(fits.error),
    }
    if extra_columns:
        cols.update(extra_columns)
    return cols


class Coded:
    """A text column of few distinct values: ``labels[codes[i]]`` is row i's text. The
    CSV writer encodes each label once; ``list(column)`` gives the texts."""

    __slots__ = ("codes", "labels")

    def __init__(self, codes: np.ndarray, labels: list[str]):
        self.codes, self.labels = codes, labels

    def __len__(self) -> int:
        return int(self.codes.size)

    def __getitem__(self, key):
        if isinstance(key, slice):
            return Coded(self.codes[key], self.labels)
        return self.labels[int(self.codes[key])]

    def __iter__(self):
        return iter(map(self.labels.__getitem__, self.codes.tolist()))


def coded(values) -> Coded:
    """Text (or None, written as an empty cell) per DUT → :class:`Coded` (hash-based)."""
    import pandas as pd

    codes, uniques = pd.factorize(np.asarray(values, dtype=object), use_na_sentinel=True)
    labels = ["" if u is None else str(u) for u in uniques.tolist()] + [""]
    return Coded(np.where(codes < 0, len(labels) - 1, codes), labels)


def _flag_codes(fits) -> Coded:
    """'code;code' per DUT, joined once per distinct flag tuple (``Fits.flag_groups``)."""
    codes, distinct = fits.flag_groups
    return Coded(codes, [";".join(f.code for f in fl) for fl in distinct])


def fits_table(fits, extra_columns: Mapping[str, object] | None = None):
    """The results as a pandas DataFrame (text cells formula-neutralised)."""
    import pandas as pd

    cols = fits_columns(fits, extra_columns)
    for name, col in cols.items():
        if isinstance(col, Coded):
            col = cols[name] = list(col)
        if isinstance(col, list) and col and isinstance(col[0], str):
            cols[name] = [neutralise(c) for c in col]
    return pd.DataFrame(cols)


def fits_csv(fits, extra_columns: Mapping[str, object] | None = None) -> list:
    """The results as UTF-8 CSV, a list of byte chunks in file order (see
    :func:`table_csv_chunks`; ``outputs.atomic_write`` writes such a list without joining
    it, ``b"".join`` makes one bytes object)."""
    return table_csv_chunks(fits_columns(fits, extra_columns))


def fits_parquet(fits, extra_columns: Mapping[str, object] | None = None) -> bytes:
    """The results as a Parquet file (the columns of :func:`fits_csv`), as bytes."""
    return table_parquet(fits_columns(fits, extra_columns))


def table_parquet(columns: Mapping[str, object]) -> bytes:
    """Columns → the bytes of a Parquet file: numbers as float64 (NaN as null) or int64,
    text of few distinct values dictionary-encoded, other text as strings. Text is kept
    as it is: a Parquet file is read by data tools, not opened as a spreadsheet."""
    import io

    import pyarrow as pa
    import pyarrow.parquet as pq

    arrays = []
    for col in columns.values():
        if isinstance(col, np.ndarray) and col.dtype.kind in "fiub":
            col = col.reshape(-1)
            if col.dtype.kind in "iu":
                arrays.append(pa.array(col.astype(np.int64)))
            elif col.dtype.kind == "b":
                arrays.append(pa.array(col))
            else:
                arrays.append(pa.array(col.astype(np.float64), mask=np.isnan(col)))
        elif isinstance(col, Coded):
            arrays.append(pa.DictionaryArray.from_arrays(
                pa.array(col.codes.astype(np.int32)), pa.array(col.labels, type=pa.string())))
        else:
            arrays.append(pa.array([None if v is None else str(v) for v in col],
                                   type=pa.string()))
    sink = io.BytesIO()
    pq.write_table(pa.table(arrays, names=[str(k) for k in columns]), sink)
    return sink.getvalue()


def _csv_text_cell(text: str) -> str:
    text = neutralise(text)
    if any(c in text for c in ',"\n\r'):
        return '"' + text.replace('"', '""') + '"'
    return text


def table_csv_chunks(columns: Mapping[str, object]) -> list:
    """Columns → UTF-8 CSV, as byte chunks in file order (header first).

    Written by Arrow's CSV writer (``pyarrow.csv.write_csv``, whole columns in C++).
    Floats are written in their shortest form that reads back to the same double (full
    precision), NaN and ±inf become empty cells, integers stay integers; text cells are
    formula-neutralised (:func:`neutralise`) and quoted, so numeric columns (unquoted)
    stay numeric for a spreadsheet.
    """
    header = (",".join(_csv_text_cell(n) for n in columns) + "\n").encode("utf-8")
    return [header, *csv_rows(columns)]


def csv_rows(columns: Mapping[str, object]) -> list:
    """The data rows of :func:`table_csv_chunks` (no header), as a list of byte chunks."""
    import io

    import pyarrow as pa
    import pyarrow.csv as pa_csv

    names = list(columns)
    if not names:
        return []
    arrays = []
    for col in columns.values():
        if isinstance(col, np.ndarray) and col.dtype.kind in "fiub":
            col = col.reshape(-1)
            if col.dtype.kind in "iub":
                arrays.append(pa.array(col.astype(np.int64)))
            else:
                arrays.append(pa.array(col.astype(np.float64), mask=~np.isfinite(col)))
        elif isinstance(col, Coded):
            labels = pa.array([neutralise(t) for t in col.labels], type=pa.string())
            arrays.append(labels.take(pa.array(col.codes.astype(np.int64))))
        else:
            vals = ["" if v is None else neutralise(str(v)) for v in col]
            arrays.append(pa.array(vals, type=pa.string()))
    if not len(arrays[0]):
        return []
    table = pa.table(arrays, names=[str(k) for k in range(len(arrays))])
    sink = io.BytesIO()
    pa_csv.write_csv(table, sink, pa_csv.WriteOptions(include_header=False,
                                                      quoting_style="needed"))
    return [sink.getvalue()]


def table_csv(columns: Mapping[str, object]) -> str:
    """:func:`table_csv_chunks` as one text."""
    return b"".join(table_csv_chunks(columns)).decode("utf-8")


def _corr(fits):
    with np.errstate(divide="ignore", invalid="ignore"):
        return fits.cov_vr / (fits.u_vth * fits.u_rth)
