"""Readings files → ``Readings``: CSV read by Arrow (``pyarrow.csv``), and the entry point
:func:`read_readings` for every kind of input (CSV, Parquet, Excel/OpenDocument, a file
object, standard input, a pandas DataFrame).

The CSV reader takes what instruments and spreadsheets write: UTF-8 with or without BOM,
UTF-16 with BOM, Windows-1252, CRLF or CR line ends, ``#`` comment lines (``# date:
2026-11-03``, ``# temperature_C: 23.5`` become metadata), comma / semicolon / tab / pipe
delimiters (sniffed from the header), a units row under the header, decimal commas in
semicolon files, blank lines and rows of bare separators, unrelated columns. The top of
the file (comments, header, units row) is read here; the body goes to Arrow's multi-
threaded CSV parser with a type for each column, and :mod:`sagfit.io.readings_table`
converts the columns. Every problem is a ``ReadingsFileError`` naming the file, the line
and the column.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Mapping

import numpy as np

from ..core.errors import ReadingsFileError
from ..core.readings import Readings
from ..core.units import Accuracy
from .columns import assign_roles, classify_header, parse_column_mapping, units_row_names
from .columns import check_column_mapping
from .results_csv import (Coded, coded, csv_rows, fits_columns, fits_csv, fits_table,  # noqa: F401
                          neutralise, table_csv, table_csv_chunks)

__all__ = ["read_readings", "parse_table", "classify_header", "fits_table", "neutralise",
           "MAX_BYTES", "MAX_LINE", "MAX_COLUMNS"]

MAX_BYTES = int(os.environ.get("SAGFIT_MAX_BYTES", str(2 * 1024 ** 3)))
MAX_LINE = 1 << 20          # one line longer than 1 MiB is not a readings file
MAX_COLUMNS = 1000          # nor is a header with more than a thousand columns

#: Text spellings of a missing value (pandas' and Arrow's defaults): an empty reading, or
#: an "empty DUT id".
NA_SPELLINGS = ["", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan",
                "1.#IND", "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan",
                "null"]
_NUMERIC_ROLES = ("voltage", "current", "u_voltage", "u_current", "u_load", "load_tolerance",
                  "temperature")
_LABEL_ROLES = ("dut", "load", "group")
_PARQUET = (".parquet", ".pq")
_WORKBOOK = (".xlsx", ".xlsm", ".xlsb", ".xls", ".ods")


# -------------------------------------------------------------------------- reading
def read_readings(
    source,
    *,
    voltage_accuracy: Accuracy | None = None,
    current_accuracy: Accuracy | None = None,
    load_tolerance: float | None = None,
    max_bytes: int | None = None,
    columns: str | Mapping[str, str] | None = None,
    sheet: str | None = None,
) -> Readings:
    """Read a readings file (or table) into validated ``Readings``.

    Parameters
    ----------
    source : path-like, file object, pandas DataFrame or pyarrow Table
        A CSV file (see docs/input-format.md), a Parquet file (``.parquet``) or a folder
        or glob of them (read as one table, in name order), an Excel or OpenDocument
        workbook (``.xlsx``, ``.ods``); ``"-"`` for standard input; an open
        file or ``io.StringIO`` / ``io.BytesIO`` (CSV, Parquet or a workbook, told apart
        by their content); a DataFrame or Arrow table with the same columns.
    voltage_accuracy, current_accuracy : Accuracy, optional
        Meter specs applied where the file gives no per-reading uncertainty.
    load_tolerance : float, optional
        Resistor tolerance in %, where the file gives none.
    max_bytes : int, optional
        Refuse larger files (default ``SAGFIT_MAX_BYTES`` or 2 GiB).
    columns : str or mapping, optional
        Which column is which where the headers do not say: ``"voltage=V (V),
        current=I_meas (A)"`` or ``{"voltage": "V (V)", ...}`` (role → header).
    sheet : str, optional
        The sheet of a workbook to read (default: the first).

    Raises
    ------
    ReadingsFileError
        With the file name, and the line (or sheet and row) and column of a bad cell.
    """
    mapping = (parse_column_mapping(columns, what="columns") if isinstance(columns, str)
               else check_column_mapping(columns, what="columns") if columns else None)
    opts = dict(voltage_accuracy=voltage_accuracy, current_accuracy=current_accuracy,
                load_tolerance=load_tolerance, columns=mapping)
    limit = MAX_BYTES if max_bytes is None else int(max_bytes)
    kind = type(source).__module__.split(".")[0]
    if kind in ("pandas", "pyarrow") and hasattr(source, "columns"):
        from .readings_parquet import table_readings

        return table_readings(source, "<table>", **opts)
    if hasattr(source, "read"):
        data = source.read(limit + 1)
        data = data.encode("utf-8") if isinstance(data, str) else bytes(data)
        name = str(getattr(source, "name", "<stream>"))
        return _from_bytes(data, name, None, limit, sheet, opts)
    name = os.fspath(source)
    if name == "-":
        data = sys.stdin.buffer.read(limit + 1)
        return _from_bytes(data, "<stdin>", None, limit, sheet, opts)
    p = Path(name)
    suffix = p.suffix.lower()
    from .dataset import is_dataset

    if is_dataset(name) and not p.is_file():  # 'run[1].csv' may be a file's own name
        from .readings_parquet import read_parquet_set

        return read_parquet_set(name, limit=limit, **opts)
    if suffix in _PARQUET:
        from .readings_parquet import read_parquet

        return read_parquet(name, limit=limit, **opts)
    if suffix in _WORKBOOK:
        from .readings_excel import read_workbook

        return read_workbook(name, sheet=sheet, limit=limit, **opts)
    from .readings_table import file_bytes

    return _from_bytes(file_bytes(name, limit), name, p.stem, limit, sheet, opts)


def _from_bytes(data: bytes, name: str, stem, limit: int, sheet, opts) -> Readings:
    """Bytes of any readings format, told apart by their first bytes."""
    if len(data) > limit:
        from .readings_table import too_large

        raise ReadingsFileError(name, too_large(len(data), limit))
    if data.startswith(b"PAR1"):
        from .readings_parquet import read_parquet

        return read_parquet(name, data=data, **opts)
    if data.startswith((b"PK\x03\x04", b"\xd0\xcf\x11\xe0")):  # zip (xlsx, ods) or OLE (xls)
        from .readings_excel import read_workbook

        return read_workbook(name, data=data, sheet=sheet, **opts)
    return parse_table(data, name, stem=stem, **opts)


# ------------------------------------------------------------------------- decoding
def _decode_head(data: bytes, path: str) -> tuple[str, str]:
    """Pick the text encoding; return (encoding, text)."""
    if data.startswith(b"\xef\xbb\xbf"):
        enc = "utf-8-sig"
    elif data.startswith((b"\xff\xfe", b"\xfe\xff")):
        enc = "utf-16"
    else:
        enc = "utf-8"
    if enc == "utf-8" and b"\x00" in data[:65536]:
        raise ReadingsFileError(path, "this is a binary file, not a CSV text file "
                                      "(NUL bytes found); export the readings as CSV")
    try:
        # plain ASCII (the usual instrument export) is valid UTF-8: look at the head only
        text = data[:65536].decode("ascii") if enc == "utf-8" and data.isascii() else \
            data.decode(enc)
    except UnicodeDecodeError as exc:
        if enc != "utf-8":
            raise ReadingsFileError(path, f"cannot decode the file as {enc}: {exc.reason}") from None
        try:
            text = data.decode("cp1252")
            enc = "cp1252"
        except UnicodeDecodeError:
            line = data[:exc.start].count(b"\n") + 1
            raise ReadingsFileError(path, "not a text file in UTF-8 or Windows-1252 "
                                          "(undecodable bytes)", line=line) from None
    if enc == "utf-8-sig":
        text = text[1:] if text.startswith("\ufeff") else text
    if enc == "utf-16" and text.startswith("\ufeff"):
        text = text[1:]
    bad = sum(1 for ch in text[:4096] if ord(ch) < 32 and ch not in "\r\n\t")
    if bad > 8:
        raise ReadingsFileError(path, "this looks like a binary file, not a CSV text file "
                                      "(control characters found)")
    return enc, text


def _sniff_delimiter(header: str, path: str, line: int) -> str:
    counts = {d: _count_outside_quotes(header, d) for d in (",", ";", "\t", "|")}
    best = max(counts, key=lambda d: counts[d])
    if counts[best] == 0:
        raise ReadingsFileError(
            path, f"cannot find the column separator in the header {header[:60]!r} "
                  "(expected ',', ';' or tab between at least two columns)", line=line)
    return best


def _count_outside_quotes(s: str, d: str) -> int:
    if '"' not in s:
        return s.count(d)
    n, inside = 0, False
    for ch in s:
        if ch == '"':
            inside = not inside
        elif ch == d and not inside:
            n += 1
    return n






# ------------------------------------------------------------------------------ CSV
def sha256_beside(data: bytes):
    """The SHA-256 of ``data`` worked out on a thread while the caller goes on (hashlib
    lets go of the GIL while it hashes): returns a function that waits for the hex
    digest. A readings file is hashed while Arrow parses it and the readings are checked,
    which takes the hash (17 ms of a 27 MB file) off the read; the same digest as
    ``hashlib.sha256(data).hexdigest()`` (tested). Small data is hashed at once."""
    import hashlib
    import threading

    h = hashlib.sha256()
    if len(data) < (1 << 20):
        h.update(data)
        digest = h.hexdigest()
        return lambda: digest
    worker = threading.Thread(target=h.update, args=(data,), name="sagfit-sha256",
                              daemon=True)
    worker.start()

    def digest() -> str:
        worker.join()
        return h.hexdigest()

    return digest


def parse_table(data: bytes, name: str, *, stem: str | None = None,
                voltage_accuracy: Accuracy | None = None,
                current_accuracy: Accuracy | None = None,
                load_tolerance: float | None = None,
                columns: Mapping[str, str] | None = None) -> Readings:
    """Parse the bytes of a readings CSV (see :func:`read_readings`)."""
    from .readings_table import Where, readings_from_columns

    if not data or data.isspace():
        raise ReadingsFileError(name, "the file is empty")
    original = data
    enc, text = _decode_head(data, name)
    if enc != "utf-8":
        data = text.encode("utf-8")  # one encoding from here on; BOM already dropped
    elif data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    if b"\r" in data:  # CRLF (Windows) and lone CR (old Mac) line ends become LF
        data = data.replace(b"\r\n", b"\n").replace(b"\r", b"\n")
    meta: dict[str, object] = {}
    header, header_line, pos = _head(data, name, meta)
    delim = _sniff_delimiter(header, name, header_line)
    names = _split(header, delim)
    if len(names) > MAX_COLUMNS:
        raise ReadingsFileError(name, f"{len(names)} columns in the header, more than the "
                                      f"limit of {MAX_COLUMNS}", line=header_line)
    with_units, after = _units_row(data, pos, delim, names)
    if with_units is not None:
        # a row of units under the header (data-logger exports): 'Voltage' over 'V' reads as
        # 'Voltage [V]'; the data lines are counted from the line after it
        meta["units_row"] = [c.strip().strip('"').strip().strip("[]()").strip() for c in
                             _split(data[pos:after].decode("utf-8", "replace").rstrip("\n"),
                                    delim)]
        names, pos, header_line = with_units, after, header_line + 1
    roles, ignored = assign_roles(names, name, mapping=columns, line=header_line)
    meta.update(ignored_columns=ignored, delimiter=delim, encoding=enc)
    decimal = "," if delim == ";" else "."
    lines, table = _rows(data, pos, header_line, name, delim, len(names), roles, decimal)
    sha256 = sha256_beside(original)  # while the columns are converted and checked
    cols = {role: table.column(f"f{c.index}") for role, c in roles.items()}
    readings = readings_from_columns(
        cols, roles, Where(name, lines), meta=meta, stem=stem, decimal=decimal,
        ids_in_order=True, voltage_accuracy=voltage_accuracy,
        current_accuracy=current_accuracy, load_tolerance=load_tolerance)
    readings.meta["sha256"] = sha256()  # of the file's bytes as they were read
    return readings


def _head(data: bytes, name: str, meta: dict) -> tuple[str, int, int]:
    """Comment lines (into ``meta``) and blank lines up to the header: (header, its line
    number, the position after it)."""
    from .readings_table import note_comment

    pos = lineno = 0
    while pos < len(data):
        end = data.find(b"\n", pos)
        end = len(data) if end < 0 else end
        if end - pos > MAX_LINE:
            raise ReadingsFileError(name, f"line longer than {MAX_LINE} bytes; not a readings "
                                          "table", line=lineno + 1)
        raw = data[pos:end].decode("utf-8", errors="replace")
        lineno += 1
        pos = end + 1
        s = raw.strip()
        if not s:
            continue
        if s.startswith("#"):
            note_comment(meta, s)
            continue
        return raw, lineno, min(pos, len(data))
    raise ReadingsFileError(name, "no header line (only comments or blank lines)")


def _split(line: str, delim: str) -> list[str]:
    import csv

    return next(csv.reader([line], delimiter=delim), [])


def _units_row(data: bytes, pos: int, delim: str, names: list[str]):
    """(headers with their units, position after the row) when the line at ``pos`` is a
    units row (``s,A,V``), else ``(None, pos)``."""
    end = data.find(b"\n", pos)
    end = len(data) if end < 0 else end
    if end - pos > MAX_LINE:
        return None, pos
    raw = data[pos:end].decode("utf-8", errors="replace")
    if not raw.strip() or raw.lstrip().startswith("#"):
        return None, pos
    named = units_row_names(names, _split(raw, delim))
    return (named, min(end + 1, len(data))) if named is not None else (None, pos)


def _body(data: bytes, pos: int, header_line: int, name: str, delim: str):
    """The line number of each data row after byte ``pos``, and the bytes to hand Arrow:
    ``data`` from ``pos`` on when every line is a row (the usual file; no copy), else the
    rows alone, without blank and comment lines and rows of bare separators."""
    import pyarrow as pa

    arr = np.frombuffer(data, dtype=np.uint8)[pos:]
    starts, ends = _line_spans(arr)
    lengths = ends - starts
    if lengths.size and int(lengths.max()) > MAX_LINE:
        raise ReadingsFileError(name, f"line longer than {MAX_LINE} bytes; not a readings table",
                                line=header_line + 1 + int(np.argmax(lengths)))
    lead = np.full(lengths.size, 10, np.uint8)  # an empty line leads with its line end
    lead[lengths > 0] = arr[starts[lengths > 0]]
    filler = b" \t" + delim.encode()
    odd = np.isin(lead, np.frombuffer(filler + b"#\n", np.uint8))
    if not odd.any():  # the usual file: every line is a row
        return (np.arange(header_line + 1, header_line + 1 + lengths.size, dtype=np.int64),
                pa.py_buffer(data).slice(pos))
    blank = lengths == 0
    for k in np.flatnonzero(np.isin(lead, np.frombuffer(filler, np.uint8))).tolist():
        if not data[pos + int(starts[k]):pos + int(ends[k])].strip(filler):
            blank[k] = True  # blanks only, or bare separators (a spreadsheet's empty row)
    keep = ~blank & (lead != ord("#"))
    lines = (header_line + 1 + np.flatnonzero(keep)).astype(np.int64)
    if keep.all():
        return lines, pa.py_buffer(data).slice(pos)
    mask = np.repeat(keep, lengths + 1)[:arr.size]  # each line with its line end
    return lines, pa.py_buffer(arr[mask].tobytes())


def _line_spans(arr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and end (exclusive, before the line end) of each line of ``arr``."""
    nl = np.flatnonzero(arr == 10)
    starts = np.concatenate(([0], nl + 1))
    ends = np.concatenate((nl, [arr.size]))
    if starts[-1] == arr.size:  # nothing after the last line end
        starts, ends = starts[:-1], ends[:-1]
    return starts, ends


def _rows(data: bytes, pos: int, header_line: int, name: str, delim: str, ncols: int,
          roles, decimal: str):
    """The data rows after byte ``pos`` as an Arrow table, and the line number of each.

    The usual file, every line after the header a row, is handed to Arrow whole and its
    rows numbered in order; a file with blank, comment or bare-separator lines among the
    rows (Arrow reads those as rows of empty cells, or fails on them) is read with those
    lines taken out first (:func:`_body`): at once where a ``#`` after the header, a long
    line or odd last lines show it might be such a file, else after the whole read finds
    it out (:func:`_only_rows`). Both give the same table: the first is only the cheaper
    way when there is nothing to take out.
    """
    import pyarrow as pa

    first = data[pos:pos + 1]
    if (_first_read(roles) and first not in (b"#", b"\n", b" ", b"\t", delim.encode())
            and data.find(b"#", pos) < 0  # no comment line can be among the rows
            and _no_long_line(data, pos) and _plain_tail(data, pos, delim)):
        try:
            table = _arrow_read(pa.py_buffer(data).slice(pos), delim, ncols, roles, decimal)
        except pa.ArrowInvalid:
            table = None  # read again below, where the line of the problem can be named
        if table is not None and table.num_rows and _only_rows(table):
            start = header_line + 1
            return np.arange(start, start + table.num_rows, dtype=np.int64), table
    lines, body = _body(data, pos, header_line, name, delim)
    if lines.size == 0:
        raise ReadingsFileError(name, "no readings (the table has a header but no rows)",
                                line=header_line)
    try:
        table = _arrow_read(body, delim, ncols, roles, decimal)
    except pa.ArrowInvalid as exc:
        raise _located(body, lines, name, delim, ncols, exc) from None
    if table.num_rows != lines.size:
        raise ReadingsFileError(name, "rows could not be matched to lines (an unbalanced "
                                      "quote character?)")
    return lines, table


def _no_long_line(data: bytes, pos: int) -> bool:
    """True when no line after byte ``pos`` can be longer than ``MAX_LINE``: every stretch
    of ``MAX_LINE // 2`` bytes, taken end to end, holds a line end (a longer line would
    hold one such stretch whole). False only says "maybe": :func:`_body` measures."""
    half = MAX_LINE // 2
    return all(data.find(b"\n", k, k + half) >= 0
               for k in range(pos, len(data) - half + 1, half))


def _plain_tail(data: bytes, pos: int, delim: str) -> bool:
    """False when one of the last lines (the last 4 kB) is blank, a comment or starts with
    a blank or a separator: spreadsheets leave rows of bare separators and blank lines at
    the end of an export, and such a file goes straight to :func:`_body` rather than
    being read whole first and found out by :func:`_only_rows`."""
    start = max(pos, len(data) - 4096)
    lines = data[start:].split(b"\n")
    if start > pos:
        lines = lines[1:]  # the first may be the end of a longer line
    if lines and lines[-1] == b"":
        lines = lines[:-1]  # after the last line end
    odd = (b"#", b" ", b"\t", delim.encode())
    return not any(not line or line[:1] in odd for line in lines)


def _first_read(roles) -> bool:
    """Whether the first column is one of those read (it shows a comment or blank line
    Arrow took for a row; see :func:`_only_rows`)."""
    return any(c.index == 0 for c in roles.values())


def _only_rows(table) -> bool:
    """True when no row of ``table`` came from a line :func:`_body` would take out: a
    blank line, a comment, a line of blanks and separators. Such a row starts with an
    empty cell, a blank one or one starting with ``#``; where the first column holds none
    of these (a column read as numbers holds text of neither kind; a label column shows
    its few distinct texts), every row is a line of readings."""
    import pyarrow as pa
    import pyarrow.compute as pc

    first = table.column("f0")
    if first.null_count:
        return False
    for chunk in first.chunks:
        texts = chunk.dictionary if pa.types.is_dictionary(chunk.type) else chunk
        if not (pa.types.is_string(texts.type) or pa.types.is_large_string(texts.type)):
            return True
        if len(texts) and pc.any(pc.or_(pc.starts_with(texts, "#"), pc.equal(
                pc.utf8_trim_whitespace(texts), ""))).as_py():
            return False
    return True


def _arrow_read(body, delim: str, ncols: int, roles, decimal: str):
    """The columns of the roles, read by Arrow: numbers as float64 (text where a cell is
    not a plain number, for :mod:`readings_table` to read or report), DUT ids, loads and
    groups dictionary-encoded, times as text. Raises ``pyarrow.ArrowInvalid`` where Arrow
    cannot read the rows (the caller names the line)."""
    import pyarrow as pa
    import pyarrow.csv as pa_csv

    names = [f"f{k}" for k in range(ncols)]
    label = pa.dictionary(pa.int32(), pa.string())
    wanted = {f"f{c.index}": (pa.float64() if r in _NUMERIC_ROLES or r == "time" else
                              label if r in _LABEL_ROLES else pa.string())
              for r, c in roles.items()}

    def read(types):
        return pa_csv.read_csv(
            pa.BufferReader(body),
            read_options=pa_csv.ReadOptions(column_names=names),
            parse_options=pa_csv.ParseOptions(delimiter=delim, quote_char='"',
                                              double_quote=True, newlines_in_values=False,
                                              ignore_empty_lines=False),
            convert_options=pa_csv.ConvertOptions(
                include_columns=list(wanted), column_types=types, null_values=NA_SPELLINGS,
                strings_can_be_null=True, quoted_strings_can_be_null=True,
                decimal_point=decimal))

    try:
        return read(wanted)
    except pa.ArrowInvalid as exc:
        if "conversion error" not in str(exc):
            raise
    # a cell that is not a plain number: the numbers as text, read (thousands separators,
    # ISO 8601 times) or reported with their line by readings_table
    return read({k: (pa.string() if t == pa.float64() else t) for k, t in wanted.items()})


def _located(body, lines, name, delim, ncols, exc) -> ReadingsFileError:
    """The error of a table Arrow could not parse, with its line: a line too long, or a
    row with the wrong number of fields."""
    import csv
    import io

    arr = np.frombuffer(body, dtype=np.uint8)
    starts, ends = _line_spans(arr)
    lengths = ends - starts
    if lengths.size and int(lengths.max()) > MAX_LINE:
        k = int(np.argmax(lengths))
        return ReadingsFileError(name, f"line longer than {MAX_LINE} bytes; not a readings "
                                       "table", line=int(lines[min(k, lines.size - 1)]))
    text = io.StringIO(arr.tobytes().decode("utf-8", errors="replace"))
    for k, row in enumerate(csv.reader(text, delimiter=delim)):
        if len(row) != ncols:
            hint = (" (a decimal comma in a comma-separated file? use '.' or ';' as separator)"
                    if delim == "," and len(row) > ncols else "")
            line = int(lines[k]) if k < lines.size else None
            return ReadingsFileError(name, f"{len(row)} fields where the header has "
                                           f"{ncols}{hint}", line=line)
    detail = str(exc).strip().splitlines()
    return ReadingsFileError(name, "cannot parse the table "
                                   f"({detail[-1][:200] if detail else type(exc).__name__})")
