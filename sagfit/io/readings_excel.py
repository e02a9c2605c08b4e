"""Readings from spreadsheet workbooks: Excel (``.xlsx``, ``.xlsm``, ``.xlsb``, ``.xls``) and
OpenDocument (``.ods``), read by python-calamine (a maintained reader in Rust).

Edge module. The first sheet is read unless one is named. The sheet is read as a CSV
file is: ``#`` comment rows and blank rows skipped, the first other row is the header, a
units row under it gives the units, rows of empty cells are skipped. Cells keep their
types (numbers stay numbers, dates become times); errors name the file, the sheet, the
row as the spreadsheet numbers it, and the column.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import io
from pathlib import Path
from typing import Mapping

import numpy as np

from ..core.errors import ReadingsFileError
from ..core.readings import Readings
from .columns import units_row_names
from .readings_table import note_comment

__all__ = ["read_workbook", "sheet_rows"]


def read_workbook(name: str, *, data: bytes | None = None, sheet: str | None = None,
                  limit: int | None = None, columns: Mapping[str, str] | None = None,
                  **accuracies) -> Readings:
    """A workbook (``name``, or its bytes ``data``) → ``Readings`` from one sheet."""
    from .readings_parquet import arrow_readings

    if data is None:
        from .readings_table import file_bytes

        data = file_bytes(name, limit)
    title, rows = sheet_rows(name, data, sheet)
    meta: dict[str, object] = {"sha256": hashlib.sha256(data).hexdigest(), "sheet": title}
    table, names, lines, header_row = _table(name, title, rows, meta)
    return arrow_readings(table, name, stem=Path(name).stem, meta=meta, columns=columns,
                          names=names, lines=lines, header_row=header_row, sheet=title,
                          **accuracies)


def sheet_rows(name: str, data: bytes, sheet: str | None = None) -> tuple[str, list[list]]:
    """(sheet name, its rows from A1 on, each a list of cell values)."""
    try:
        from python_calamine import CalamineWorkbook
    except ImportError:  # pragma: no cover - a required dependency
        raise ReadingsFileError(name, "reading workbooks needs python-calamine "
                                      "(pip install python-calamine)") from None
    try:
        book = CalamineWorkbook.from_filelike(io.BytesIO(data))
        names = list(book.sheet_names)
        if not names:
            raise ReadingsFileError(name, "the workbook has no sheets")
        if sheet is None:
            title = names[0]
        else:
            match = [s for s in names if s == sheet] or [s for s in names
                                                         if s.casefold() == sheet.casefold()]
            if not match:
                listed = ", ".join(repr(s) for s in names)
                raise ReadingsFileError(name, f"no sheet {sheet!r}; the sheets are {listed}")
            title = match[0]
        rows = book.get_sheet_by_name(title).to_python(skip_empty_area=False)
    except ReadingsFileError:
        raise
    except Exception as exc:  # calamine reports zip, XML and format errors as its own types
        detail = str(exc).strip().splitlines()
        raise ReadingsFileError(name, "not a readable Excel or OpenDocument workbook "
                                      f"({detail[0][:160] if detail else type(exc).__name__})"
                                ) from None
    return title, rows


def _blank(row) -> bool:
    return all(c is None or (isinstance(c, str) and not c.strip()) for c in row)


def _table(name: str, title: str, rows: list[list], meta: dict):
    """The sheet's header and readings rows → (Arrow table of text or number columns,
    the headers, the sheet row number of each reading, the header's row number)."""
    import pyarrow as pa

    k = 0
    header = None
    while k < len(rows):
        row = rows[k]
        k += 1
        if _blank(row):
            continue
        first = row[0] if row else None
        if isinstance(first, str) and first.strip().startswith("#"):
            note_comment(meta, " ".join(str(c) for c in row if c not in (None, "")).strip())
            continue
        header = [_text(c) for c in row]
        break
    if header is None:
        raise ReadingsFileError(name, "no header row (the sheet is empty)", sheet=title)
    header_row = k
    while header and not header[-1].strip():
        header.pop()
    body = rows[k:]
    if body:
        named = units_row_names(header, [_text(c) for c in body[0][:len(header)]])
        if named is not None:
            meta["units_row"] = [_text(c).strip("[]() ") for c in body[0][:len(header)]]
            header, body, header_row = named, body[1:], header_row + 1
    keep = [j for j, row in enumerate(body) if not _blank(row)
            and not (isinstance(row[0], str) and row[0].strip().startswith("#"))]
    cols = [_column([body[j][c] if c < len(body[j]) else None for j in keep])
            for c in range(len(header))]
    names = [h if h.strip() else "" for h in header]
    lines = np.asarray([header_row + 1 + j for j in keep], dtype=np.int64)
    table = pa.table(cols, names=[f"{c}:{h}" for c, h in enumerate(names)])
    return table, names, lines, header_row


def _text(cell) -> str:
    if cell is None:
        return ""
    if isinstance(cell, float) and cell.is_integer():
        return str(int(cell))
    return str(cell).strip()


def _column(values: list):
    """One sheet column → an Arrow array: float64 when every cell is a number (or empty),
    timestamps when every cell is a date-time, else text."""
    import pyarrow as pa

    present = [v for v in values if v is not None and v != ""]
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in present):
        return pa.array([None if v is None or v == "" else float(v) for v in values],
                        type=pa.float64())
    if present and all(isinstance(v, _dt.datetime) for v in present):
        return pa.array([v if isinstance(v, _dt.datetime) else None for v in values],
                        type=pa.timestamp("us"))
    return pa.array([None if v is None or v == "" else _text(v) for v in values],
                    type=pa.string())
