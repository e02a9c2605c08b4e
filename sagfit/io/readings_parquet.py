"""Readings from Parquet files and from in-memory tables (pandas DataFrame, Arrow table).

Edge module. A Parquet file carries its column types: numbers stay numbers (float32 and
integers widened to float64), ids may be dictionary-encoded, times may be Arrow
timestamps; text columns are read as the CSV reader reads its cells. Rows are counted
from 1 (``row 4`` in a message is the fourth reading), as a data tool shows them.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Mapping

import numpy as np

from ..core.errors import ReadingsFileError
from ..core.readings import Readings
from .columns import assign_roles, units_row_names
from .readings_table import Where, readings_from_columns

__all__ = ["read_parquet", "read_parquet_set", "table_readings", "arrow_readings"]


def read_parquet(name: str, *, data: bytes | None = None, limit: int | None = None,
                 columns: Mapping[str, str] | None = None, **accuracies) -> Readings:
    """A Parquet file (``name``, or its bytes ``data``) → ``Readings``."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    if data is None:
        from .readings_table import file_bytes

        data = file_bytes(name, limit)
    from .readings_csv import sha256_beside

    try:
        table = pq.read_table(pa.BufferReader(data),
                              read_dictionary=_text_columns(pa.BufferReader(data)))
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise ReadingsFileError(name, f"not a readable Parquet file ({_short(exc)})") from None
    sha256 = sha256_beside(data)  # while the columns are converted and checked
    readings = arrow_readings(table, name, stem=Path(name).stem, meta={"format": "parquet"},
                              columns=columns, **accuracies)
    readings.meta["sha256"] = sha256()
    return readings


def _text_columns(source) -> list[str]:
    """The text columns of a Parquet file, read dictionary-encoded: Parquet stores them
    so, and ids and loads are read as codes and their few distinct texts (on 100,000
    DUTs × 8 readings the read took 0.6× the time of a plain read and a re-encoding)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    schema = pq.read_schema(source)
    return [f.name for f in schema if pa.types.is_string(f.type)
            or pa.types.is_large_string(f.type)]


def read_parquet_set(path: str, *, limit: int | None = None,
                     columns: Mapping[str, str] | None = None, **accuracies) -> Readings:
    """A folder or glob of Parquet files, read as one table in name order (the order of
    ``sagfit fit`` on a data set); errors name the file and its row."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from .dataset import dataset_files
    from .readings_table import FilesWhere

    files = dataset_files(path)
    if Path(files[0]).suffix.lower() not in (".parquet", ".pq"):
        raise ReadingsFileError(path, "a folder or glob of CSV files is a data set for "
                                      "`sagfit fit` and `sagfit accept`; read one CSV file "
                                      "at a time here, or store the set as Parquet")
    tables, digest, total = [], hashlib.sha256(), 0
    for f in files:
        try:
            size = Path(f).stat().st_size
            total += size
            if limit is not None and total > limit:
                raise ReadingsFileError(path, f"the files add up to more than "
                                              f"{limit / 1e6:.1f} MB (set SAGFIT_MAX_BYTES "
                                              "to raise the limit)")
            data = Path(f).read_bytes()
            tables.append(pq.read_table(pa.BufferReader(data),
                                        read_dictionary=_text_columns(pa.BufferReader(data))))
        except (pa.ArrowException, OSError, ValueError) as exc:
            raise ReadingsFileError(f, f"not a readable Parquet file ({_short(exc)})") from None
        digest.update(data)
    names = [str(c) for c in tables[0].column_names]
    roles, ignored = assign_roles(names, files[0], mapping=columns, place="row")
    wanted = [c.header for c in roles.values()]
    parts = []
    for f, t in zip(files, tables):
        missing = [h for h in wanted if h not in t.column_names]
        if missing:
            raise ReadingsFileError(f, f"no column {missing[0]!r} (the first file, "
                                       f"{files[0]}, has it)", place="row")
        parts.append(t.select(wanted))
    try:
        table = pa.concat_tables(parts, promote_options="permissive")
    except TypeError:  # pyarrow < 14 spells it promote=True
        table = pa.concat_tables(parts, promote=True)
    except pa.ArrowException as exc:
        raise ReadingsFileError(path, f"the files' columns do not agree ({_short(exc)})"
                                ) from None
    if table.num_rows == 0:
        raise ReadingsFileError(path, "no readings in these files")
    offsets = np.cumsum([0] + [t.num_rows for t in tables])
    cols = {role: table.column(k) for k, role in enumerate(roles)}
    meta = {"sha256": digest.hexdigest(), "format": "parquet", "files": files,
            "ignored_columns": ignored}
    return readings_from_columns(cols, roles, FilesWhere(files, offsets), meta=meta,
                                 stem=Path(path).stem, **accuracies)


def table_readings(table, name: str, *, columns: Mapping[str, str] | None = None,
                   **accuracies) -> Readings:
    """A pandas DataFrame or an Arrow table with readings columns → ``Readings``."""
    import pyarrow as pa

    if not isinstance(table, pa.Table):
        try:
            table = pa.Table.from_pandas(table, preserve_index=False)
        except (pa.ArrowException, TypeError, ValueError) as exc:
            raise ReadingsFileError(name, f"cannot read the table ({_short(exc)})") from None
    return arrow_readings(table, name, stem="DUT", meta={"format": "table"}, columns=columns,
                          **accuracies)


def arrow_readings(table, name: str, *, stem: str, meta: dict,
                   columns: Mapping[str, str] | None = None, names: list[str] | None = None,
                   lines=None, header_row: int | None = None, sheet: str | None = None,
                   **accuracies) -> Readings:
    """An Arrow table → ``Readings``. ``names``: the headers (default: the table's column
    names; then a units row in the first row, text cells ``V``, ``mA`` …, gives the units
    as in a CSV file); ``lines``: the row number of each reading (default 1, 2, …)."""
    if names is None:
        names = [str(c) for c in table.column_names]
        if table.num_rows and all(_is_text(t) for t in table.schema.types):
            head = [table.column(k)[0].as_py() for k in range(table.num_columns)]
            named = units_row_names(names, ["" if c is None else str(c) for c in head])
            if named is not None:
                meta["units_row"] = [("" if c is None else str(c)).strip("[]() ") for c in head]
                names, table = named, table.slice(1)
                lines = np.arange(2, table.num_rows + 2, dtype=np.int64)
    roles, ignored = assign_roles(names, name, mapping=columns, sheet=sheet,
                                  line=header_row, place="row")
    meta["ignored_columns"] = ignored
    if table.num_rows == 0:
        raise ReadingsFileError(name, "no readings (the table has a header but no rows)",
                                sheet=sheet, line=header_row, place="row")
    if lines is None:
        lines = np.arange(1, table.num_rows + 1, dtype=np.int64)
    cols = {role: table.column(c.index) for role, c in roles.items()}
    return readings_from_columns(cols, roles, Where(name, lines, sheet=sheet, place="row"),
                                 meta=meta, stem=stem, **accuracies)


def _is_text(t) -> bool:
    import pyarrow as pa

    if pa.types.is_dictionary(t):
        t = t.value_type
    return pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_null(t)


def _short(exc: Exception) -> str:
    s = str(exc).strip().splitlines()
    return s[-1][:200] if s else type(exc).__name__
