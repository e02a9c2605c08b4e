"""CSV readings files → ``Readings``, and ``Fits`` → CSV.

The reader takes what instruments and spreadsheets write: UTF-8 with or without BOM,
UTF-16 with BOM, Windows-1252, CRLF, ``#`` comment lines (``# date: 2026-11-03``,
``# temperature_C: 23.5`` become metadata), comma / semicolon / tab / pipe delimiters
(sniffed from the header), decimal commas in semicolon files, blank lines, unrelated
columns. Every problem is a ``ReadingsFileError`` naming the file, the line and the column.
"""

from __future__ import annotations

import io
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

import numpy as np

from ..core._parallel import Background
from ..core.errors import ReadingsFileError
from ..core.readings import Readings
from ..core.units import Accuracy, parse_header_unit, parse_resistance

__all__ = ["read_readings", "parse_table", "classify_header", "fits_table", "neutralise",
           "MAX_BYTES", "MAX_LINE", "MAX_COLUMNS"]

MAX_BYTES = int(os.environ.get("SAGFIT_MAX_BYTES", str(2 * 1024 ** 3)))
MAX_LINE = 1 << 20          # one line longer than 1 MiB is not a readings file
MAX_COLUMNS = 1000          # nor is a header with more than a thousand columns

# role -> accepted base names (lower case, separators normalised to '_')
_ROLES: dict[str, tuple[str, ...]] = {
    "dut": ("dut", "serial", "id", "dut_id", "serial_number", "sn", "device", "uut", "unit_id",
            "cell", "pack", "board"),
    "load": ("load", "r_load", "rload", "load_resistance", "resistance", "r", "rl", "r_l",
             "resistor", "load_r"),
    "voltage": ("voltage", "v", "u", "terminal_voltage", "v_term", "vout", "v_out", "volts",
                "v_load", "vload", "output_voltage"),
    "current": ("current", "i", "i_load", "load_current", "iload", "iout", "i_out", "amps"),
    "u_voltage": ("u_voltage", "u_v", "sigma_voltage", "sigma_v", "uncertainty_voltage"),
    "u_current": ("u_current", "u_i", "sigma_current", "sigma_i", "uncertainty_current"),
    "u_load": ("u_load", "u_r", "u_load_resistance", "sigma_load", "uncertainty_load"),
    "load_tolerance": ("load_tolerance", "tolerance", "tol", "r_tolerance", "load_tol"),
    "time": ("time", "t", "timestamp", "datetime", "date_time", "elapsed", "time_s"),
    "group": ("group", "string", "bank", "batch", "lot"),
    "temperature": ("temperature", "temp", "ambient", "temperature_c", "ambient_c"),
}
_DIMENSION = {"load": "ohm", "voltage": "V", "current": "A", "u_voltage": "V",
              "u_current": "A", "u_load": "ohm", "load_tolerance": "%", "time": "s",
              "temperature": "degC"}
_STRICT_UNITS = {"load", "voltage", "current", "u_voltage", "u_current", "u_load"}
_NAME_TO_ROLE = {name: role for role, names in _ROLES.items() for name in names}
_BRACKET_RE = re.compile(r"^(.*?)[\s_]*[\[(]\s*([^\])]*?)\s*[\])]\s*$")
_SEPARATORS_RE = re.compile(r"[\s\-./]+")


@dataclass(frozen=True, slots=True)
class ColumnRole:
    role: str
    scale: float
    header: str
    index: int


def _norm(name: str) -> str:
    return _SEPARATORS_RE.sub("_", name.strip().lower()).strip("_")


def classify_header(header: str) -> tuple[str, float] | None:
    """Map a header to (role, scale to SI), ``None`` for an unrelated column.

    Units may be a suffix (``voltage_mV``, ``load_kohm``) or in brackets
    (``Voltage [mV]``, ``Load (kΩ)``). Raises ``ValueError`` for a recognised quantity
    with a unit sagfit does not know or of the wrong kind.
    """
    h = header.strip().strip('"').strip()
    m = _BRACKET_RE.match(h)
    unit = None
    if m:
        base, unit = m.group(1), m.group(2)
        role = _NAME_TO_ROLE.get(_norm(base))
        if role is None:
            return None
    else:
        low = _norm(h)
        role = _NAME_TO_ROLE.get(low)
        if role is None:
            # unit as the last '_'-separated token, case kept (mV vs MV)
            raw = re.split(r"[\s_]+", h)
            if len(raw) >= 2:
                base = _norm(" ".join(raw[:-1]))
                role = _NAME_TO_ROLE.get(base)
                if role is not None:
                    unit = raw[-1]
            if role is None:
                return None
    if unit is None or unit == "":
        return role, 1.0
    dim = _DIMENSION.get(role)
    if dim is None:
        raise ValueError(f"header {header!r}: a {role} column takes no unit")
    if role == "time":
        factors = {"s": 1.0, "sec": 1.0, "ms": 1e-3, "min": 60.0, "h": 3600.0, "hr": 3600.0,
                   "iso": 1.0, "iso8601": 1.0, "utc": 1.0, "date": 1.0}
        if unit.lower() in factors:
            return role, factors[unit.lower()]
    parsed = parse_header_unit(unit)
    if parsed is None or parsed[1] != dim:
        if m is None and role not in _STRICT_UNITS:
            return None  # 'temperature_note': a suffix that is no unit, on a side column
        if parsed is None:
            raise ValueError(f"unknown unit {unit!r} in header {header!r} "
                             f"(use e.g. {_example_unit(dim)})")
    scale, got = parsed
    if got != dim:
        raise ValueError(f"unit {unit!r} in header {header!r} is not a unit of {dim}")
    return role, scale


def _example_unit(dim: str) -> str:
    return {"V": "V or mV", "A": "A or mA", "ohm": "ohm, kohm or Ω", "%": "%",
            "s": "s", "degC": "C"}.get(dim, dim)


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


_TIME_UNITS = frozenset({"s", "sec", "ms", "min", "h", "hr"})


def _is_unit(cell: str) -> bool:
    u = cell.strip().strip("[]()").strip()
    return u.lower() in _TIME_UNITS or parse_header_unit(u) is not None


def _units_row(data: bytes, pos: int, delim: str, names: list[str]):
    """The cells of a units row right under the header (``s,A,V``) and the position after
    it, or ``(None, pos)`` when the next line is data. A units row has a cell for each
    column, at least one of them a unit, and every non-empty cell a unit."""
    end = data.find(b"\n", pos)
    end = len(data) if end < 0 else end
    if end - pos > MAX_LINE:
        return None, pos
    raw = data[pos:end].decode("utf-8", errors="replace")
    if not raw.strip() or raw.lstrip().startswith("#"):
        return None, pos
    cells = [c.strip().strip('"').strip() for c in _split_header(raw, delim)]
    if len(cells) != len(names) or not any(cells):
        return None, pos
    if not all(_is_unit(c) for c in cells if c):
        return None, pos
    return [c.strip("[]()").strip() for c in cells], end + 1


def _split_header(header: str, delim: str) -> list[str]:
    import csv

    return next(csv.reader([header], delimiter=delim))


# -------------------------------------------------------------------------- reading
def read_readings(
    path: str | os.PathLike,
    *,
    voltage_accuracy: Accuracy | None = None,
    current_accuracy: Accuracy | None = None,
    load_tolerance: float | None = None,
    max_bytes: int | None = None,
) -> Readings:
    """Read a readings CSV into validated ``Readings``.

    Parameters
    ----------
    path : path-like
        The CSV file (see docs/input-format.md).
    voltage_accuracy, current_accuracy : Accuracy, optional
        Meter specs applied where the file gives no per-reading uncertainty.
    load_tolerance : float, optional
        Resistor tolerance in %, where the file gives none.
    max_bytes : int, optional
        Refuse larger files (default ``SAGFIT_MAX_BYTES`` or 2 GiB).

    Raises
    ------
    ReadingsFileError
        With the file name, and the line and column of a bad cell.
    """
    from .files import read_input

    limit = MAX_BYTES if max_bytes is None else int(max_bytes)
    data = read_input(path, ReadingsFileError, what="readings file", limit=limit,
                      too_large=lambda size: (
                          f"the file is {size / 1e6:.1f} MB, above the limit of "
                          f"{limit / 1e6:.1f} MB (set SAGFIT_MAX_BYTES to raise it)"))
    name, p = str(path), Path(path)
    return parse_table(data, name, stem=p.stem, voltage_accuracy=voltage_accuracy,
                       current_accuracy=current_accuracy, load_tolerance=load_tolerance)


def parse_table(data: bytes, name: str, *, stem: str | None = None,
                voltage_accuracy: Accuracy | None = None,
                current_accuracy: Accuracy | None = None,
                load_tolerance: float | None = None) -> Readings:
    """Parse the bytes of a readings CSV (see :func:`read_readings`)."""
    import pandas as pd

    if not data or data.isspace():
        raise ReadingsFileError(name, "the file is empty")
    big = len(data) >= BACKGROUND_BYTES
    sha256 = Background(_sha256, data, inline=not big)  # hashlib releases the GIL
    enc, text = _decode_head(data, name)
    if enc != "utf-8":
        data = text.encode("utf-8")  # one encoding from here on; BOM already dropped
    elif data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    if b"\r" in data:  # CRLF (Windows) and lone CR (old Mac) line ends become LF
        data = data.replace(b"\r\n", b"\n")
        if b"\r" in data:
            data = data.replace(b"\r", b"\n")
    # ---- comment lines and the header, read by hand from the top of the file
    meta: dict[str, object] = {}
    pos = 0
    lineno = 0
    header = None
    while pos < len(data):
        end = data.find(b"\n", pos)
        end = len(data) if end < 0 else end
        if end - pos > MAX_LINE:
            raise ReadingsFileError(name, f"line longer than {MAX_LINE} bytes; not a readings "
                                          "table", line=lineno + 1)
        raw = data[pos:end].rstrip(b"\r").decode("utf-8", errors="replace")
        lineno += 1
        pos = end + 1
        s = raw.strip()
        if not s:
            continue
        if s.startswith("#"):
            m = re.match(r"#\s*([A-Za-z][\w]*)\s*[:=]\s*(.*)$", s)
            if m:
                meta[_norm(m.group(1))] = m.group(2).strip()
            meta.setdefault("comments", []).append(s.lstrip("#").strip())
            continue
        header = raw
        break
    if header is None:
        raise ReadingsFileError(name, "no header line (only comments or blank lines)")
    header_line = lineno
    delim = _sniff_delimiter(header, name, header_line)
    names = _split_header(header, delim)
    if len(names) > MAX_COLUMNS:
        raise ReadingsFileError(name, f"{len(names)} columns in the header, more than the "
                                      f"limit of {MAX_COLUMNS}", line=header_line)
    units_row, pos = _units_row(data, pos, delim, names)
    if units_row is not None:
        # a row of units under the header (data-logger exports): 'Voltage' over 'V' reads as
        # 'Voltage [V]'; the data lines are counted from the line after it
        names = [f"{h.strip()} [{u}]" if u and not _BRACKET_RE.match(h.strip()) else h
                 for h, u in zip(names, units_row)]
        meta["units_row"] = list(units_row)
        header_line += 1
    roles: dict[str, ColumnRole] = {}
    ignored = []
    for col, h in enumerate(names):
        if not h.strip():
            continue
        try:
            c = classify_header(h)
        except ValueError as exc:
            raise ReadingsFileError(name, str(exc), line=header_line, column=h.strip()) from None
        if c is None:
            ignored.append(h.strip())
            continue
        role, scale = c
        if role in roles:
            raise ReadingsFileError(name, f"columns {roles[role].header!r} and {h.strip()!r} "
                                          f"both look like {role}; rename one", line=header_line,
                                    column=h.strip())
        roles[role] = ColumnRole(role, scale, h.strip(), col)
    meta["ignored_columns"] = ignored
    meta["delimiter"] = delim
    meta["encoding"] = enc
    present = [r for r in ("load", "voltage", "current") if r in roles]
    if len(present) < 2 or ("voltage" not in roles and "current" not in roles):
        found = ", ".join(repr(n.strip()) for n in names if n.strip()) or "none"
        raise ReadingsFileError(
            name, f"need two of load, voltage and current columns; found headers {found} "
                  "(name them e.g. load_ohm, voltage_V, current_A)", line=header_line)

    dut_col = roles["dut"].index if "dut" in roles else None
    lines_of_rows, (body, body_pos), dut_spans = _data_rows(data, pos, header_line, name,
                                                            delim, len(names), dut_col)
    if lines_of_rows.size == 0:
        raise ReadingsFileError(name, "no readings (the table has a header but no rows)",
                                line=header_line)
    decimal = "," if delim == ";" else "."
    # the DUT ids straight from their bytes where the table is plain (see _ids_from_spans),
    # for a large file in a worker thread while pandas parses the other columns
    ids_job = (Background(_ids_from_spans, *dut_spans, inline=not big)
               if dut_spans is not None else None)
    parsed = [r for r in roles if not (r == "dut" and ids_job is not None)]

    def table(columns, dtypes):
        return _read_frame(body, body_pos, lines_of_rows.size, name, sep=delim,
                           ncols=len(names), usecols=columns, dtypes=dtypes, decimal=decimal)

    # text columns as categories: the tokenizer interns the few distinct ids and load
    # codes, instead of making a Python string per cell (faster, less memory)
    text_roles = ("dut", "load", "group")
    frame = table([roles[r].index for r in parsed],
                  {roles[r].index: "category" for r in parsed if r in text_roles})
    dut_ids = ids_job.result() if ids_job is not None else None
    if ids_job is not None and dut_ids is None:  # ids the byte spans leave to pandas
        c = roles["dut"].index
        frame[c] = table([c], {c: "category"})[c]
        parsed.append("dut")
    # pandas turns categories that all look like numbers or booleans into numbers or
    # booleans, which merges ids such as '01' and '1' (or 'True' and 'true'); ids keep
    # their text, so such id columns are read again as text
    as_text = [roles[r].index for r in ("dut", "group") if r in parsed
               and frame[roles[r].index].cat.categories.dtype.kind in "biufc"]
    if as_text:
        again = table(as_text, {c: str for c in as_text})
        for c in as_text:
            frame[c] = again[c].astype("category")

    def column(role):
        return frame[roles[role].index]

    def header_of(role):
        return roles[role].header

    def numeric(role):
        s = column(role)
        if s.dtype.kind in "fiu":
            a = s.to_numpy(dtype=np.float64)
        else:
            conv = pd.to_numeric(s.str.replace(",", ".", regex=False) if decimal == "," else s,
                                 errors="coerce")
            bad = conv.isna() & s.notna()
            if bad.any():
                k = int(np.flatnonzero(bad.to_numpy())[0])
                cell = str(s.iloc[k])
                hint = (" (use '.' as the decimal separator)" if "," in cell and decimal == "."
                        else "")
                raise ReadingsFileError(name, f"{cell[:40]!r} is not a number{hint}",
                                        line=int(lines_of_rows[k]), column=header_of(role))
            a = conv.to_numpy(dtype=np.float64)
        return a * roles[role].scale

    def row_error(role, k, msg):
        raise ReadingsFileError(name, msg, line=int(lines_of_rows[k]), column=header_of(role))

    kwargs: dict[str, object] = {}
    for role in ("voltage", "current", "u_voltage", "u_current", "u_load"):
        if role in roles:
            a = numeric(role)
            if role.startswith("u_"):
                a = np.where(np.isnan(a), np.nan, a)
            kwargs[role] = a
    if "load_tolerance" in roles:
        kwargs["load_tolerance_pct"] = numeric("load_tolerance")
    if "load" in roles:
        kwargs["load"] = _parse_loads(column("load"), roles["load"].scale, name,
                                      header_of("load"), lines_of_rows, decimal)
    if "time" in roles:
        kwargs["time"] = _parse_times(column("time"), roles["time"].scale, name,
                                      header_of("time"), lines_of_rows)
    if "dut" in roles:
        codes, names_u = dut_ids if dut_ids is not None else _categories(column("dut"))
        if (codes < 0).any():
            row_error("dut", int(np.flatnonzero(codes < 0)[0]), "empty DUT id")
        joined = "\x00".join(names_u)  # one scan for the (rare) ids with outer blanks
        padded = (joined != joined.strip() or _BLANK_AFTER_NUL.search(joined) is not None
                  or _BLANK_AFTER_NUL.search(joined[::-1]) is not None)
        stripped = [u.strip() for u in names_u] if padded else names_u
        if stripped != names_u:  # ' A' and 'A' are one DUT: merge after stripping
            codes2, names2 = pd.factorize(pd.Series(stripped, dtype=object), sort=False)
            codes = np.asarray(codes2)[codes]
            stripped = [str(u) for u in names2.tolist()]
        kwargs["group"] = np.asarray(codes, dtype=np.int64)
        kwargs["duts"] = stripped
    else:
        kwargs["group"] = np.zeros(lines_of_rows.size, np.int64)
        kwargs["duts"] = [stem or "DUT"]
    if "group" in roles:
        codes, labels = _categories(column("group"))
        meta["group_labels"] = np.asarray(labels + [""], dtype=object)[codes]
    if "temperature" in roles:
        meta["temperature_C"] = numeric("temperature")
    columns = {r: roles[r].header for r in roles}
    columns["load_tolerance_pct"] = columns.get("load_tolerance", "load_tolerance_pct")
    meta["sha256"] = sha256.result()  # hashed beside the parse
    return Readings.from_arrays(
        voltage_accuracy=voltage_accuracy, current_accuracy=current_accuracy,
        load_tolerance=load_tolerance, source=name, line=lines_of_rows, columns=columns,
        meta=meta, copy=False, **kwargs)  # every array here is our own


#: A blank after a separator; searched in the joined ids and in the same text reversed (a
#: blank before a separator). A pattern that starts with a literal is scanned for that
#: character first: five times faster on 100,000 ids than one pattern of two branches.
_BLANK_AFTER_NUL = re.compile(r"\x00\s")


#: From this many bytes on, work that releases the GIL runs in a worker thread beside the
#: parse (the file's SHA-256: 15 ms on 27 MB; the DUT ids from their byte spans).
BACKGROUND_BYTES = 4 << 20


def _sha256(data: bytes) -> str:
    import hashlib

    return hashlib.sha256(data).hexdigest()


def _short(exc: Exception) -> str:
    s = str(exc).strip().splitlines()
    return s[-1][:200] if s else type(exc).__name__


#: Byte slices of this size bound the temporaries of the line scan (a 27 MB file would
#: otherwise need two 27 MB masks: fresh memory, and page faults cost time).
_SCAN_BYTES = 1 << 20


def _scan(arr: np.ndarray, delim: int):
    """Newline positions of ``arr`` and the number of ``delim`` bytes on each line (the
    last line may lack its newline), computed slice by slice."""
    nls, counts = [np.empty(0, dtype=np.intp)], []
    carry = 0  # delimiters seen since the last newline, in earlier slices
    for a in range(0, arr.size, _SCAN_BYTES):
        part = arr[a:a + _SCAN_BYTES]
        nl = np.flatnonzero(part == 10)
        dpos = np.flatnonzero(part == delim)
        # delimiters before each newline of the slice, differenced
        before = np.searchsorted(dpos, nl)
        per = np.diff(before, prepend=0)
        if per.size:
            per[0] += carry
            carry = dpos.size - int(before[-1])
        else:
            carry += dpos.size
        nls.append(nl + a)
        counts.append(per)
    counts.append(np.array([carry]))
    return np.concatenate(nls), np.concatenate(counts)


def _clean_rows(arr: np.ndarray, delim: int, ncols: int, check_fields: bool,
                field: int | None = None, spans: list | None = None) -> int | None:
    """The number of data lines when the table is plain: no blank or comment line, no line
    starting with a blank, no line longer than MAX_LINE, and (``check_fields``) exactly
    ``ncols − 1`` delimiters on every line. None otherwise (the full scan then finds out
    what is wrong, and where).

    Works window by window (windows end at a line end), so the temporaries are small and
    reused: the full scan's per-line arrays for a 27 MB file cost about 60 ms of fresh
    memory on their own. With ``field`` (a column index) and ``check_fields``, appends to
    ``spans`` the (start, end) byte offsets in ``arr`` of that field on each line.
    """
    bad_first = np.zeros(256, bool)
    bad_first[[ord("#"), ord(" "), ord("\t")]] = True
    count = 0
    a, size = 0, arr.size
    while a < size:
        part = arr[a:a + _SCAN_BYTES]
        last = a + part.size >= size
        seps = None
        if check_fields:
            # every separator (delimiter or line end) in one pass; a plain table has ncols − 1
            # delimiters and then a line end on every line, so they form an (lines, ncols)
            # matrix whose last column holds the line ends
            sep = np.flatnonzero((part == 10) | (part == delim))
            is_nl = part[sep] == 10
            if not last:
                nls = np.flatnonzero(is_nl)
                if nls.size == 0:
                    return None  # a line as long as a window: the full scan reports it
                cut = int(nls[-1]) + 1
                sep, is_nl = sep[:cut], is_nl[:cut]
                part = part[:int(sep[-1]) + 1]
            elif part[-1] != 10:  # a last line without its line end: end it at the data's end
                sep = np.append(sep, part.size)
                is_nl = np.append(is_nl, True)
            if sep.size % ncols:
                return None
            kinds = is_nl.reshape(-1, ncols)
            if not kinds[:, -1].all() or kinds[:, :-1].any():
                return None
            seps = sep.reshape(-1, ncols)
            ends = seps[:, -1]
        else:
            nl = np.flatnonzero(part == 10)
            if not last:
                if nl.size == 0:
                    return None
                part = part[:int(nl[-1]) + 1]
            ends = nl
            tail = int(ends[-1]) + 1 if ends.size else 0
            if last and tail < part.size:  # a last line without its line end
                ends = np.append(ends, part.size)
        starts = np.empty(ends.size, dtype=np.intp)
        if ends.size:
            starts[0] = 0
            starts[1:] = ends[:-1] + 1
        lengths = ends - starts
        if lengths.size and (lengths.min() == 0 or lengths.max() > MAX_LINE
                             or bad_first[part[starts]].any()):
            return None
        if seps is not None and spans is not None and field is not None and ncols > 1:
            fs = starts if field == 0 else seps[:, field - 1] + 1
            spans.append((fs + a, seps[:, field] + a))
        count += lengths.size
        a += part.size
    return count


def _data_rows(data: bytes, pos: int, header_line: int, name: str, delim: str, ncols: int,
               field: int | None = None):
    """Line numbers of the data rows (after byte ``pos``), and what to hand the tokenizer:
    ``data`` itself read from ``pos`` on when no blank or comment line has to go (no
    copy), else new bytes without them.

    Checks every row's field count against the header (vectorised) when the file has no
    quote characters; with quotes, pandas' tokenizer checks it.
    """
    arr = np.frombuffer(data, dtype=np.uint8)[pos:]
    spans: list = []
    plain = _clean_rows(arr, ord(delim), ncols, data.find(b'"', pos) < 0, field, spans)
    if plain:  # the usual file: every line after the header is a row
        field_spans = None
        if spans:
            field_spans = (arr, np.concatenate([a for a, _ in spans]),
                           np.concatenate([b for _, b in spans]))
        return (np.arange(header_line + 1, header_line + 1 + plain, dtype=np.int64),
                (data, pos), field_spans)
    nl, per_line = _scan(arr, ord(delim))
    starts = np.concatenate(([0], nl + 1))
    ends = np.concatenate((nl, [arr.size]))
    lengths = ends - starts
    if lengths.size and int(lengths.max()) > MAX_LINE:
        k = int(np.argmax(lengths))
        raise ReadingsFileError(name, f"line longer than {MAX_LINE} bytes; not a readings table",
                                line=header_line + 1 + k)
    eff = lengths  # no CR is left: parse_table turned CRLF and lone CR into LF
    first = np.full(lengths.size, 32, np.uint8)
    ne = eff > 0
    first[ne] = arr[starts[ne]]
    blank = eff == 0
    for k in np.flatnonzero(ne & ((first == 32) | (first == 9))):
        a = pos + int(starts[k])
        if not data[a:a + int(eff[k])].strip():
            blank[k] = True  # spaces and tabs only
    keep = ~blank & (first != 35)
    rows = np.flatnonzero(keep)
    if rows.size and data.find(b'"', pos) < 0:
        wrong = keep & (per_line != ncols - 1)
        if wrong.any():
            k = int(np.flatnonzero(wrong)[0])
            got = int(per_line[k]) + 1
            hint = ""
            if delim == "," and got > ncols:
                hint = " (a decimal comma in a comma-separated file? use '.' or ';' as separator)"
            raise ReadingsFileError(name, f"{got} fields where the header has {ncols}{hint}",
                                    line=header_line + 1 + k)
    lines = np.asarray(header_line + 1 + rows, dtype=np.int64)
    if rows.size == 0:
        return lines, (b"", 0), None
    last = int(rows[-1])
    if keep[: last + 1].all():
        if last + 1 == lengths.size or (last + 2 == lengths.size and lengths[-1] == 0):
            return lines, (data, pos), None  # nothing after the last row but its line end
        return lines, (data[pos:pos + int(ends[last])], 0), None
    return (lines, (b"\n".join(data[pos + int(starts[k]):pos + int(ends[k])] for k in rows), 0),
            None)


def _read_frame(body: bytes, pos: int, nrows: int, name: str, *, sep: str, ncols: int,
                usecols, dtypes, decimal: str):
    """The table body (``body`` from byte ``pos`` on) as a DataFrame of ``usecols``."""
    import pandas as pd

    kw = dict(sep=sep, header=None, names=list(range(ncols)), usecols=usecols,
              decimal=decimal, dtype=dtypes, skip_blank_lines=False, engine="c",
              encoding="utf-8", quotechar='"', keep_default_na=True, na_values=[""],
              low_memory=False)
    try:
        stream = io.BytesIO(body)  # shares the bytes (no copy)
        stream.seek(pos)
        frame = pd.read_csv(stream, **kw)
    except (ValueError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise ReadingsFileError(name, f"cannot parse the table ({_short(exc)})") from None
    if len(frame) != nrows:
        raise ReadingsFileError(name, "rows could not be matched to lines (an unbalanced "
                                      "quote character?)")
    return frame


#: pandas' default spellings of a missing value (``read_csv``, ``na_values``). A DUT id
#: spelled so is left to pandas, which reads it as missing: "empty DUT id".
_NA_SPELLINGS = frozenset({"", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN",
                           "-nan", "1.#IND", "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN",
                           "None", "n/a", "nan", "null"})
_ID_WIDTH = 64      # longest id read from its byte spans; longer ones go to pandas
_ID_ROWS = 1 << 16  # rows compared at a time (bounds the temporaries)
_HIGH_BITS = np.uint64(0x8080808080808080)
_LOW_BITS = np.uint64(0x0101010101010101)
#: little-endian masks of the first k bytes of a 64-bit word, k = 0…8
_BYTE_MASKS = np.array([(1 << (8 * k)) - 1 for k in range(9)], dtype=np.uint64)


def _ids_from_spans(arr: np.ndarray, fs: np.ndarray, fe: np.ndarray):
    """(codes, texts) of the DUT id column, from its byte spans ``arr[fs[i]:fe[i]]`` on each
    row, numbered in order of first appearance; or None, when pandas should read it.

    Each id is read as a few 64-bit words (its bytes, zero-padded). A file's rows usually
    come DUT by DUT, so each row's words are compared with the row before and only the first
    row of each run of equal ids is kept; the runs' words are then numbered with integer
    hashing. On 100,000 DUTs × 8 readings this takes a fraction of the time pandas'
    categorical parse of the column does (that interns every cell and then tries each id as
    a number and as a boolean). Left to pandas: an empty cell, a missing-value spelling
    (``NA``, ``null`` …), a non-ASCII or NUL byte, an id longer than 64 bytes.
    """
    import pandas as pd

    n = fs.size
    lens = fe - fs
    if n == 0 or int(lens.min()) <= 0 or int(lens.max()) > _ID_WIDTH:
        return None
    nw = (int(lens.max()) + 7) // 8  # words per id
    width = 8 * nw
    windows = np.lib.stride_tricks.sliding_window_view(arr, width) if arr.size >= width else None
    firsts, heads = [], []
    prev = None
    for a in range(0, n, _ID_ROWS):
        b = min(n, a + _ID_ROWS)
        start, ln = fs[a:b], lens[a:b]
        if windows is not None and int(start[-1]) + width <= arr.size:
            mat = windows[start]  # each row's ``width`` bytes from the id's first byte on
        else:  # the last id near the end of the file: clip, the mask drops the rest
            mat = arr.take(start[:, None] + np.arange(width), mode="clip")
        words = mat.view("<u8")  # (rows, nw)
        pad = np.zeros(b - a, dtype=np.uint64)
        for c in range(nw):
            k = np.clip(ln - 8 * c, 0, 8)
            words[:, c] &= _BYTE_MASKS[k]
            # a NUL byte inside the id: the zero-byte test on the word with its padding
            # bytes set to 1 (Warren, Hacker's Delight, 2nd ed. 2012, §6-1)
            filled = words[:, c] | (_LOW_BITS & ~_BYTE_MASKS[k])
            pad |= ((filled - _LOW_BITS) & ~filled) | words[:, c]
        if (pad & _HIGH_BITS).any():
            return None  # non-ASCII text or a NUL byte: pandas' way
        # zero padding and no NUL byte: equal words mean equal ids (lengths included)
        new = np.ones(b - a, bool)
        if b - a > 1:
            new[1:] = words[1:, 0] != words[:-1, 0]
            for c in range(1, nw):
                new[1:] |= words[1:, c] != words[:-1, c]
        if prev is not None:
            new[0] = bool((words[0] != prev).any())
        prev = words[-1].copy()
        firsts.append(np.flatnonzero(new) + a)
        heads.append(words[new])
    starts = np.concatenate(firsts)
    runs = np.concatenate(heads)  # (runs, nw) words
    codes_runs = np.asarray(pd.factorize(runs[:, 0], sort=False)[0], dtype=np.int64)
    for c in range(1, nw):  # pairs of codes numbered again: first appearance kept
        col = np.asarray(pd.factorize(runs[:, c], sort=False)[0], dtype=np.int64)
        codes_runs = np.asarray(pd.factorize(codes_runs * (int(col.max()) + 1) + col,
                                             sort=False)[0], dtype=np.int64)
    # the first run of each id (codes count up from 0 in order of first appearance)
    top = np.maximum.accumulate(codes_runs)
    first = np.flatnonzero(np.concatenate(([True], top[1:] > top[:-1])))
    text = runs[first].view(np.uint8).reshape(first.size, width)
    text = np.concatenate([text, np.full((first.size, 1), 10, np.uint8)], axis=1).reshape(-1)
    texts = text[text != 0].tobytes().decode("ascii").split("\n")[:-1]
    if not _NA_SPELLINGS.isdisjoint(texts):
        return None
    codes = np.repeat(codes_runs, np.diff(starts, append=n))
    return codes, texts


def _categories(s) -> tuple[np.ndarray, list[str]]:
    """Codes (−1 for an empty cell) and texts of a categorical column, numbered in order of
    first appearance in the file (pandas sorts categories; users expect file order)."""
    import pandas as pd

    codes = np.asarray(s.cat.codes)
    cats = s.cat.categories
    order = pd.unique(codes)  # hash-based, in order of appearance
    order = order[order >= 0]
    if order.size == 0:
        return np.full(codes.size, -1, dtype=np.int64), []
    remap = np.full(len(cats) + 1, -1, dtype=np.int64)  # code −1 picks the last entry
    remap[order] = np.arange(order.size)
    texts = cats[order].tolist()
    if set(map(type, texts)) != {str}:
        texts = [str(c) for c in texts]
    return remap[codes], texts


def _parse_loads(s, scale: float, name: str, header: str, lines, decimal: str = ".") -> np.ndarray:
    """Load cells → ohms: each distinct spelling is parsed once (a sweep has few loads)."""
    codes, uniques = _categories(s)
    if (codes < 0).any():
        k = int(np.flatnonzero(codes < 0)[0])
        raise ReadingsFileError(name, "empty load cell (write a resistance such as 4.7k, or "
                                      "'open')", line=int(lines[k]), column=header)
    values = np.empty(len(uniques))
    for j, text in enumerate(uniques):
        spelled = text.replace(",", ".") if decimal == "," else text
        try:
            values[j] = parse_resistance(spelled, scale)
        except ValueError as exc:
            k = int(np.flatnonzero(codes == j)[0])
            raise ReadingsFileError(name, str(exc), line=int(lines[k]), column=header) from None
        if math.isnan(values[j]) or values[j] == -math.inf:
            k = int(np.flatnonzero(codes == j)[0])
            raise ReadingsFileError(name, f"{text[:40]!r} is not a load resistance",
                                    line=int(lines[k]), column=header)
    return values[codes]


def _parse_times(s, scale: float, name: str, header: str, lines) -> np.ndarray:
    """Seconds (a numeric column, times its unit) or ISO 8601 date-times → epoch seconds."""
    import pandas as pd

    if s.dtype.kind in "fiu":
        a = s.to_numpy(dtype=np.float64) * scale
        bad = np.flatnonzero(np.isinf(a))
        if bad.size:
            raise ReadingsFileError(name, "infinite time", line=int(lines[bad[0]]), column=header)
        return a
    if s.isna().all():
        return np.full(len(s), np.nan)
    num = pd.to_numeric(s, errors="coerce")
    if not (num.isna() & s.notna()).any():
        return num.to_numpy(dtype=np.float64) * scale
    try:
        ts = pd.to_datetime(s, errors="coerce", format="ISO8601", utc=True)
    except (ValueError, TypeError):
        ts = pd.Series(pd.NaT, index=s.index)
    bad = ts.isna() & s.notna()
    if bad.any():
        k = int(np.flatnonzero(bad.to_numpy())[0])
        raise ReadingsFileError(name, f"{str(s.iloc[k])[:40]!r} is neither seconds nor an ISO "
                                      "8601 date-time (e.g. 2026-11-03T14:05:00)",
                                line=int(lines[k]), column=header)
    secs = (ts - pd.Timestamp("1970-01-01", tz="UTC")).dt.total_seconds()
    return secs.to_numpy(dtype=np.float64)


# -------------------------------------------------------------------------- writing
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
