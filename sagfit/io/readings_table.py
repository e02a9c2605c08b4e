"""Arrow columns → validated ``Readings``: the part every readings reader shares.

The CSV, Parquet and workbook readers each turn their file into Arrow columns, the role
of each column (:mod:`sagfit.io.columns`) and the line (or row) each reading came from;
this module converts the columns with Arrow compute, whole columns at a time:

* numbers typed by the reader pass straight through (times the column's unit); text
  cells are trimmed, decimal commas and unambiguous thousands separators are read, and
  the first cell that is no number is reported with its line and column;
* DUT ids, groups and load cells are dictionary-encoded, so each distinct text is
  handled once (a sweep has few loads, a file few DUTs per thousand readings): load
  texts through :func:`sagfit.core.units.parse_resistance` (SI prefixes, RKM codes,
  ``open``);
* times are seconds, Arrow timestamps, or ISO 8601 text.
"""

from __future__ import annotations

import math
import re
from typing import Mapping

import numpy as np

from ..core.errors import ReadingsFileError
from ..core.readings import Readings
from ..core.units import parse_resistance
from .columns import ColumnRole

__all__ = ["readings_from_columns", "Where", "FilesWhere", "note_comment", "file_bytes",
           "too_large", "iso_epoch_ns"]

#: a decimal number as written in a readings cell (after trimming), or a spelling of
#: infinity or not-a-number (these reach the readings' own checks, which name them)
_NUMBER = r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$|^[+-]?(inf|infinity|nan)$"
#: thousands grouped with commas, with a decimal point or more than one group: no
#: decimal comma reads so, so the commas can only be separators
_GROUPED_POINT = r"^[+-]?\d{1,3}(,\d{3})+\.\d*$|^[+-]?\d{1,3}(,\d{3}){2,}$"
_GROUPED_ONE = re.compile(r"^[+-]?\d{1,3},\d{3}$")  # 1,243: a separator or a decimal comma?
#: the same with points in a decimal-comma file (1.243,9 or 1.243.000)
_GROUPED_COMMA = r"^[+-]?\d{1,3}(\.\d{3})+,\d*$|^[+-]?\d{1,3}(\.\d{3}){2,}$"


class Where:
    """Where the readings came from, for error messages: the file, its sheet (a
    workbook) and what a line number counts (``line`` of text, ``row`` of a table)."""

    __slots__ = ("source", "sheet", "place", "lines")

    def __init__(self, source: str, lines: np.ndarray, *, sheet: str | None = None,
                 place: str = "line"):
        self.source, self.lines, self.sheet, self.place = source, lines, sheet, place

    def error(self, message: str, k: int | None = None, column: str | None = None):
        line = None if k is None else int(self.lines[k])
        return ReadingsFileError(self.source, message, line=line, column=column,
                                 sheet=self.sheet, place=self.place)

    def relocate(self, exc: ReadingsFileError) -> ReadingsFileError:
        """An error of the readings' own checks (which know the line) placed as here."""
        return ReadingsFileError(exc.path, exc.detail, exc.line, exc.column, sheet=self.sheet,
                                 place=self.place)


class FilesWhere(Where):
    """Where the readings of several files, read as one table, came from: reading ``k``
    is row ``k − offsets[f] + 1`` of file ``f``."""

    __slots__ = ("files", "offsets")

    def __init__(self, files: list[str], offsets: np.ndarray):
        total = int(offsets[-1])
        super().__init__(files[0], np.arange(1, total + 1, dtype=np.int64), place="row")
        self.files, self.offsets = files, offsets

    def _place(self, k: int) -> tuple[str, int]:
        f = int(np.searchsorted(self.offsets, k, side="right")) - 1
        return self.files[f], k - int(self.offsets[f]) + 1

    def error(self, message: str, k: int | None = None, column: str | None = None):
        if k is None:
            return ReadingsFileError(self.source, message, column=column, place="row")
        path, row = self._place(k)
        return ReadingsFileError(path, message, line=row, column=column, place="row")

    def relocate(self, exc: ReadingsFileError) -> ReadingsFileError:
        if exc.line is None:
            return exc
        return self.error(exc.detail, int(exc.line) - 1, exc.column)


def file_bytes(name: str, limit: int | None) -> bytes:
    """The bytes of a readings file of any format, refused above ``limit`` bytes."""
    from .files import read_input

    limit = 1 << 62 if limit is None else int(limit)
    return read_input(name, ReadingsFileError, what="readings file", limit=limit,
                      too_large=lambda size: too_large(size, limit))


def too_large(size: int, limit: int) -> str:
    """The message for a readings file above the size limit."""
    return (f"the file is {size / 1e6:.1f} MB, above the limit of {limit / 1e6:.1f} MB "
            "(set SAGFIT_MAX_BYTES to raise it)")


_COMMENT_RE = re.compile(r"#\s*([A-Za-z][\w]*)\s*[:=]\s*(.*)$")


def note_comment(meta: dict, text: str) -> None:
    """A ``#`` comment line of a readings file into ``meta``: its text under
    ``comments``, and ``# key: value`` (``# date: 2026-11-03``) as ``meta[key]``."""
    from .columns import normalise_name

    m = _COMMENT_RE.match(text)
    if m:
        meta[normalise_name(m.group(1))] = m.group(2).strip()
    meta.setdefault("comments", []).append(text.lstrip("#").strip())


def _pa():
    import pyarrow as pa
    import pyarrow.compute as pc

    return pa, pc


def _one_chunk(col):
    pa, _ = _pa()
    if isinstance(col, pa.ChunkedArray):
        if pa.types.is_dictionary(col.type):
            col = col.unify_dictionaries()
        return col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)
    return col


def _first(mask) -> int:
    return int(np.flatnonzero(np.asarray(mask))[0])


def _as_text(col):
    """A string column from a string, dictionary or other column (its text)."""
    pa, pc = _pa()
    t = col.type
    if pa.types.is_dictionary(t):
        col = col.cast(t.value_type)
        t = t.value_type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return col
    return pc.cast(col, pa.string())


def numbers(col, scale: float, where: Where, header: str, decimal: str = ".") -> np.ndarray:
    """A column of readings → float64 in SI units (``nan`` for an empty cell)."""
    pa, pc = _pa()
    col = _one_chunk(col)
    t = col.type
    if pa.types.is_floating(t) or pa.types.is_integer(t) or pa.types.is_decimal(t):
        a = col.cast(pa.float64()).to_numpy(zero_copy_only=False)
        return a * scale if scale != 1.0 else a
    if pa.types.is_null(t):
        return np.full(len(col), np.nan)
    if not (pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_dictionary(t)):
        k = _first(pc.is_valid(col))
        raise where.error(f"{str(col[k].as_py())[:40]!r} is not a number", k, header)
    text = pc.utf8_trim_whitespace(_as_text(col))
    if decimal == ",":
        grouped = pc.match_substring_regex(text, _GROUPED_COMMA)
        text = pc.if_else(grouped, pc.replace_substring(text, ".", ""), text)
        text = pc.replace_substring(text, ",", ".")
    else:
        grouped = pc.match_substring_regex(text, _GROUPED_POINT)
        text = pc.if_else(grouped, pc.replace_substring(text, ",", ""), text)
    ok = pc.or_kleene(pc.match_substring_regex(text, _NUMBER, ignore_case=True),
                      pc.equal(text, ""))
    bad = pc.invert(pc.fill_null(ok, True)).to_numpy(zero_copy_only=False)
    if bad.any():
        k = _first(bad)
        cell = str(_as_text(col)[k].as_py()).strip()
        hint = ""
        if "," in cell and decimal == ".":
            hint = (" (a thousands separator or a decimal comma? write it without the "
                    "separator, e.g. 1243, or with a decimal point, e.g. 1.243)"
                    if _GROUPED_ONE.match(cell) else " (use '.' as the decimal separator)")
        raise where.error(f"{cell[:40]!r} is not a number{hint}", k, header)
    text = pc.if_else(pc.equal(text, ""), pa.scalar(None, pa.string()), text)
    a = pc.cast(text, pa.float64()).to_numpy(zero_copy_only=False)
    return a * scale if scale != 1.0 else a


def codes_and_texts(col, in_order: bool = False, as_arrow: bool = False):
    """Codes (−1 for an empty cell) and texts of a column of labels, numbered in order of
    first appearance (what users expect). ``in_order``: the dictionary already is (the
    CSV reader's, built row by row). ``as_arrow``: the texts as an Arrow array where they
    need no renumbering (a list otherwise)."""
    pa, pc = _pa()
    col = _one_chunk(col)
    if not pa.types.is_dictionary(col.type):
        col = pc.dictionary_encode(_as_text(col))  # hash-based, in order of appearance
        in_order = True
    elif not (pa.types.is_string(col.type.value_type)
              or pa.types.is_large_string(col.type.value_type)):
        col = pc.dictionary_encode(_as_text(col))
        in_order = True
    indices = pc.fill_null(col.indices, -1) if col.null_count else col.indices
    codes = indices.to_numpy(zero_copy_only=False).astype(np.int64)
    if in_order and as_arrow:
        return codes, col.dictionary
    texts = col.dictionary.to_pylist()
    if not in_order and codes.size and not _in_order(codes, len(texts)):
        seen = codes[codes >= 0]
        uniq, first = np.unique(seen, return_index=True)
        order = uniq[np.argsort(first, kind="stable")]
        remap = np.full(len(texts) + 1, -1, dtype=np.int64)
        remap[order] = np.arange(order.size)
        texts = [texts[j] for j in order.tolist()]
        codes = remap[codes]
    return codes, texts


def _in_order(codes: np.ndarray, m: int) -> bool:
    """True when codes 0…m−1 all appear, each new one one above the highest before it.
    Looked at on the first code of each run of equal codes (a DUT's readings are mostly
    together): the same answer from an eighth of the data."""
    valid = codes[codes >= 0] if (codes < 0).any() else codes
    if valid.size == 0 or valid[0] != 0:
        return valid.size == 0 and m == 0
    heads = valid[np.concatenate(([0], np.flatnonzero(valid[1:] != valid[:-1]) + 1))]
    top = np.maximum.accumulate(heads)
    return int(top[-1]) == m - 1 and bool((np.diff(top) <= 1).all())


def _strip_merge(codes: np.ndarray, texts) -> tuple[np.ndarray, list[str]]:
    """' A' and 'A' are one label (spreadsheet exports pad cells; common practice).
    ``texts``: a list, or the Arrow array of the dictionary (checked without leaving
    Arrow in the usual case of ids without outer blanks)."""
    pa, pc = _pa()
    arr = texts if isinstance(texts, pa.Array) else pa.array(texts, type=pa.string())
    if pc.all(pc.equal(pc.utf8_trim_whitespace(arr), arr)).as_py() in (True, None):
        return codes, arr.to_pylist() if isinstance(texts, pa.Array) else texts
    index: dict[str, int] = {}
    new = np.array([index.setdefault(t.strip(), len(index)) for t in arr.to_pylist()] + [-1],
                   dtype=np.int64)
    return new[codes], list(index)


def loads(col, scale: float, where: Where, header: str, decimal: str = ".") -> np.ndarray:
    """Load cells → ohms: each distinct spelling parsed once (``4.7``, ``4k7``, ``open``)."""
    pa, pc = _pa()
    col = _one_chunk(col)
    if pa.types.is_floating(col.type) or pa.types.is_integer(col.type):
        a = numbers(col, scale, where, header)
        if np.isnan(a).any():
            raise where.error("empty load cell (write a resistance such as 4.7k, or 'open')",
                              _first(np.isnan(a)), header)
        return a
    if col.null_count:
        raise where.error("empty load cell (write a resistance such as 4.7k, or 'open')",
                          _first(pc.is_null(col)), header)
    if pa.types.is_dictionary(col.type) and pa.types.is_string(col.type.value_type):
        texts = col.dictionary.to_pylist()  # the codes as Arrow has them
        codes = col.indices.to_numpy(zero_copy_only=False)
    else:
        codes, texts = codes_and_texts(col, in_order=True)  # any numbering will do here
    values = np.full(len(texts), np.nan)
    problems: dict[int, str] = {}
    for j, text in enumerate(texts):
        spelled = text.replace(",", ".") if decimal == "," else text
        try:
            values[j] = parse_resistance(spelled, scale)
        except ValueError as exc:
            problems[j] = str(exc)
            continue
        if math.isnan(values[j]) or values[j] == -math.inf:
            problems[j] = f"{text[:40]!r} is not a load resistance"
    if problems:  # the first row with a bad load (a dictionary may hold unused texts)
        bad = np.isin(codes, list(problems))
        if bad.any():
            k = _first(bad)
            raise where.error(problems[int(codes[k])], k, header)
    return values[codes]


def times(col, scale: float, where: Where, header: str) -> np.ndarray:
    """Seconds (numbers times their unit), Arrow timestamps or ISO 8601 date-times →
    seconds (epoch seconds for date-times)."""
    pa, pc = _pa()
    col = _one_chunk(col)
    t = col.type
    if pa.types.is_timestamp(t) or pa.types.is_date(t):
        ts = col.cast(pa.timestamp("us", tz=getattr(t, "tz", None)))
        us = pc.cast(ts, pa.int64()).to_numpy(zero_copy_only=False)
        valid = pc.is_valid(col).to_numpy(zero_copy_only=False)
        return np.where(valid, us.astype(np.float64) / 1e6, np.nan)
    if not (pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_dictionary(t)):
        a = numbers(col, scale, where, header)
        if np.isinf(a).any():
            raise where.error("infinite time", _first(np.isinf(a)), header)
        return a
    text = pc.utf8_trim_whitespace(_as_text(col))
    numeric = pc.or_kleene(pc.match_substring_regex(text, _NUMBER, ignore_case=True),
                           pc.equal(text, ""))
    if pc.all(pc.fill_null(numeric, True)).as_py():
        a = numbers(text, scale, where, header)
        if np.isinf(a).any():
            raise where.error("infinite time", _first(np.isinf(a)), header)
        return a
    text = pc.if_else(pc.equal(text, ""), pa.scalar(None, pa.string()), text)
    read = iso_epoch_ns(text)
    if read is not None:
        ns, valid = read
        return np.where(valid, ns / 1e9, np.nan)
    import pandas as pd  # other ISO 8601 spellings (basic format, mixed zones)

    s = pd.Series(text.to_pylist(), dtype=object)
    try:
        stamps = pd.to_datetime(s, errors="coerce", format="ISO8601", utc=True)
    except (ValueError, TypeError):
        stamps = pd.Series(pd.NaT, index=s.index)
    bad = (stamps.isna() & s.notna()).to_numpy()
    if bad.any():
        k = _first(bad)
        raise where.error(f"{str(s.iloc[k])[:40]!r} is neither seconds nor an ISO 8601 "
                          "date-time (e.g. 2026-11-03T14:05:00)", k, header)
    return (stamps - pd.Timestamp("1970-01-01", tz="UTC")).dt.total_seconds().to_numpy(
        dtype=np.float64)


def iso_epoch_ns(text):
    """ISO 8601 date-times (``2026-11-03T14:05:00``, a space for the ``T``, fractions of a
    second; all without a zone, read as UTC, or all with one, ``Z`` or ``+01:00``) →
    (nanoseconds since 1970-01-01 UTC as int64, valid mask), by Arrow's own parser (on
    800,000 stamps 46 ms against 224 ms through pandas, same values); ``None`` where it
    cannot read them all (the caller tries pandas' wider ISO 8601 reading)."""
    pa, pc = _pa()
    for tz in (None, "UTC"):
        try:
            stamps = pc.cast(text, pa.timestamp("ns", tz=tz))
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            continue
        valid = pc.is_valid(stamps).to_numpy(zero_copy_only=False)
        ns = pc.fill_null(pc.cast(stamps, pa.int64()), 0).to_numpy(zero_copy_only=False)
        return np.asarray(ns, dtype=np.int64), np.asarray(valid, dtype=bool)
    return None


def readings_from_columns(
    columns: Mapping[str, object], roles: Mapping[str, ColumnRole], where: Where, *,
    meta: dict, stem: str | None = None, decimal: str = ".", ids_in_order: bool = False,
    voltage_accuracy=None, current_accuracy=None, load_tolerance=None,
) -> Readings:
    """The readings of a table: ``columns`` maps each role to its Arrow column, ``roles``
    gives each role's header and unit, ``where`` the file and line of each row."""
    kwargs: dict[str, object] = {}

    def num(role):
        c = roles[role]
        return numbers(columns[role], c.scale, where, c.header, decimal)

    for role in ("voltage", "current", "u_voltage", "u_current", "u_load"):
        if role in roles:
            kwargs[role] = num(role)
    if "load_tolerance" in roles:
        kwargs["load_tolerance_pct"] = num("load_tolerance")
    if "load" in roles:
        c = roles["load"]
        kwargs["load"] = loads(columns["load"], c.scale, where, c.header, decimal)
    if "time" in roles:
        c = roles["time"]
        kwargs["time"] = times(columns["time"], c.scale, where, c.header)
    n = where.lines.size
    if "dut" in roles:
        codes, texts = _strip_merge(*codes_and_texts(columns["dut"], ids_in_order, True))
        if (codes < 0).any():
            raise where.error("empty DUT id", _first(codes < 0), roles["dut"].header)
        kwargs["group"], kwargs["duts"] = codes, texts
    else:
        kwargs["group"], kwargs["duts"] = np.zeros(n, np.int64), [stem or "DUT"]
    if "group" in roles:
        codes, labels = codes_and_texts(columns["group"])
        meta["group_labels"] = np.asarray(labels + [""], dtype=object)[codes]
    if "temperature" in roles:
        meta["temperature_C"] = num("temperature")
    names = {r: roles[r].header for r in roles}
    names["load_tolerance_pct"] = names.get("load_tolerance", "load_tolerance_pct")
    try:
        return Readings.from_arrays(
            voltage_accuracy=voltage_accuracy, current_accuracy=current_accuracy,
            load_tolerance=load_tolerance, source=where.source, line=where.lines,
            columns=names, meta=meta, copy=False, **kwargs)  # every array here is our own
    except ReadingsFileError as exc:
        if where.sheet is None and where.place == "line":
            raise
        raise where.relocate(exc) from None
