"""Logged traces from CSV or Parquet files → :class:`~sagfit.core.trace.Trace` (edge module).

Arrow reads the file (its multi-threaded CSV reader, or Parquet with only the needed
columns); Python touches only the first lines (comments, delimiter, header) and the few
rows an error names. Tolerance for real files, as for readings files:

- comment lines starting with ``#`` (or ``;`` / ``//`` when that is not the delimiter)
  before the header; comment lines further down are skipped;
- delimiter ``,``, ``;`` or tab, guessed from the header line; decimal comma when the
  delimiter is not a comma and the numbers use one;
- units in the headers, as a suffix (``voltage_mV``) or in brackets (``I [mA]``);
- time in seconds (or ``ms``, ``min``, ``h``) or as ISO 8601 date-times (then seconds
  from the first row);
- a channel column (``channel``, ``cell``, ``dut``, ``id``, ``serial``) for many cells in
  one file; optional ``soc`` (%) or ``capacity`` (Ah) column.

Memory: the columns are read once into Arrow buffers and handed to numpy without a copy
where Arrow allows (float columns without nulls); about 8 bytes per value and column.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import numpy as np

from ..core.errors import ReadingsFileError
from ..core.trace import Trace
from ..core.units import unit_dimension

__all__ = ["read_trace", "read_profile", "columns_csv", "ROLE_NAMES"]

#: Accepted header names (case-insensitive, unit removed) for each role.
ROLE_NAMES = {
    "time": ("time", "t", "timestamp", "datetime", "date_time", "elapsed", "test_time",
             "elapsed_time", "time_s"),
    "current": ("current", "i", "i_load", "load_current", "iout", "cell_current"),
    "voltage": ("voltage", "v", "u", "vout", "v_out", "terminal_voltage", "cell_voltage"),
    "channel": ("channel", "ch", "cell", "dut", "id", "serial", "sn", "cell_id", "device"),
    "soc": ("soc", "state_of_charge"),
    "capacity": ("capacity", "charge", "ah", "capacity_ah", "charge_ah"),
}
_DIM = {"time": "s", "current": "A", "voltage": "V", "soc": "%", "capacity": "Ah"}
_TIME_SCALE = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "min": 60.0, "h": 3600.0}
_HEAD_BYTES = 1 << 16
_COMMENT = ("#", "//")


def _split_header(text: str) -> tuple[str, str]:
    """``'Voltage [mV]'`` → ('voltage', 'mV'); ``'current_mA'`` → ('current', 'mA')."""
    s = text.strip().strip('"').strip()
    m = re.match(r"^(.*?)\s*[\[(]\s*([^\])]*)\s*[\])]\s*$", s)
    if m:
        return m.group(1).strip().lower().replace(" ", "_"), m.group(2).strip()
    low = s.lower().replace(" ", "_")
    if low in sum(ROLE_NAMES.values(), ()):
        return low, ""
    if "_" in s:
        base, unit = s.rsplit("_", 1)
        return base.strip().lower().replace(" ", "_"), unit.strip()
    return low, ""


def _unit_scale(role: str, unit: str, header: str, path: str) -> float:
    """Scale of a header unit to SI (A, V, s; % and Ah as written)."""
    if not unit:
        return 1.0
    if role == "time":
        if unit in _TIME_SCALE:
            return _TIME_SCALE[unit]
    elif role == "capacity":
        m = re.fullmatch(r"([mk]?)Ah", unit)
        if m:
            return {"": 1.0, "m": 1e-3, "k": 1e3}[m.group(1)]
    elif role == "soc":
        if unit in ("%", "pct", "percent"):
            return 1.0
    else:
        u = unit_dimension(unit)
        if u is not None and u[1] == _DIM[role]:
            return u[0]
    raise ReadingsFileError(path, f"unit {unit!r} is not a unit of {role} "
                                  f"({_DIM[role]})", line=None, column=header)


def _roles(headers: list[str], path: str, header_line: int | None,
           required=("time", "current", "voltage")) -> dict:
    """Map each role to (column index, header text, scale)."""
    found: dict = {}
    for k, h in enumerate(headers):
        base, unit = _split_header(h)
        for role, names in ROLE_NAMES.items():
            if base in names and role not in found:
                found[role] = (k, h, _unit_scale(role, unit, h, path))
                break
    for role in required:
        if role not in found:
            raise ReadingsFileError(
                path, f"no {role} column (found: {', '.join(headers) or 'no header'}); name "
                      f"the columns e.g. {', '.join(r + '_' + _DIM[r] for r in required)}",
                line=header_line)
    return {r: x for r, x in found.items() if r in required or r in ("channel", "soc",
                                                                     "capacity")}


def _head_lines(path: str) -> tuple[list[str], bool]:
    """The first lines of a text file, and whether the file is Parquet (magic bytes)."""
    p = Path(path)
    try:
        if p.is_dir():
            raise ReadingsFileError(path, "is a folder, not a trace file")
        with open(p, "rb") as fh:
            raw = fh.read(_HEAD_BYTES)
    except FileNotFoundError:
        raise ReadingsFileError(path, "no such file") from None
    except PermissionError:
        raise ReadingsFileError(path, "permission denied") from None
    except OSError as exc:
        raise ReadingsFileError(path, f"cannot read the file ({exc.strerror or exc})") from None
    if raw.startswith(b"PAR1"):
        return [], True
    text = raw.decode("utf-8-sig", errors="replace")
    lines = text.splitlines()
    if len(raw) == _HEAD_BYTES and lines:
        lines = lines[:-1]  # the last line may be cut
    return lines, False


def read_profile(path: str | os.PathLike) -> tuple[np.ndarray, np.ndarray]:
    """A current profile (time, current; CSV or Parquet, as tolerant as a trace): times
    in s from the first row, currents in A (positive = discharge). The current of a row
    holds until the next row's time."""
    name = str(path)
    lines, parquet = _head_lines(name)
    req = ("time", "current")
    if parquet:
        table, roles, first_line, comments = _read_parquet(name, req)
    else:
        table, roles, first_line, comments = _read_csv(name, lines, req)
    roles.pop("channel", None)
    roles.pop("soc", None)
    roles.pop("capacity", None)
    # a profile has no voltage: the current column stands in for it, so that the one
    # converter (and its checks of time order, NaN and text) serves both
    tr = _to_trace(name, table, {**roles, "voltage": roles["current"]}, first_line, comments,
                   False)
    return np.asarray(tr.time), np.asarray(tr.current)


def read_trace(path: str | os.PathLike, *, discharge_negative: bool = False) -> Trace:
    """Read a logged trace (CSV or Parquet).

    Parameters
    ----------
    path : str or path
    discharge_negative : bool
        The file writes discharge current as negative (many cell cyclers do); sagfit
        turns it so that positive current is delivered by the source.

    Raises
    ------
    ReadingsFileError
        Missing columns, text in a number column, NaN, time going backwards: one line
        with the file, line and column.
    """
    name = str(path)
    lines, parquet = _head_lines(name)
    if parquet:
        table, roles, first_line, comments = _read_parquet(name)
    else:
        table, roles, first_line, comments = _read_csv(name, lines)
    return _to_trace(name, table, roles, first_line, comments, discharge_negative)


def _read_parquet(path: str, required=("time", "current", "voltage")):
    import pyarrow.parquet as pq

    try:
        schema = pq.read_schema(path)
    except Exception as exc:  # noqa: BLE001 - Arrow raises several kinds for a bad file
        raise ReadingsFileError(path, f"not a readable Parquet file ({exc})") from None
    roles = _roles(list(schema.names), path, None, required)
    names = [schema.names[k] for k, _, _ in roles.values()]
    table = pq.read_table(path, columns=names)
    roles = {r: (names.index(h), h, s) for r, (_, h, s) in roles.items()}
    return table, roles, None, 0


def _read_csv(path: str, lines: list[str], required=("time", "current", "voltage")):
    import pyarrow as pa
    import pyarrow.csv as pcsv

    skip = 0
    for ln in lines:
        if ln.strip() and not ln.lstrip().startswith(_COMMENT + (";",)):
            break
        skip += 1
    if skip >= len(lines):
        raise ReadingsFileError(path, "no header line (the file is empty or all comments)")
    header = lines[skip]
    delim = max((",", ";", "\t"), key=header.count)
    if header.count(delim) == 0:
        raise ReadingsFileError(path, "one column only: the header needs time, current and "
                                      "voltage separated by ',', ';' or tabs", line=skip + 1)
    headers = [h.strip().strip('"') for h in header.split(delim)]
    roles = _roles(headers, path, skip + 1, required)
    sample = [ln for ln in lines[skip + 1: skip + 50] if ln.strip()
              and not ln.lstrip().startswith(_COMMENT)]
    decimal = "," if delim != "," and any(re.search(r"\d,\d", ln) for ln in sample) else "."
    comments = [0]

    def invalid(row):
        if row.text.lstrip().startswith(_COMMENT):
            comments[0] += 1
            return "skip"
        return "error"

    want = {headers[k]: None for k, _, _ in roles.values()}
    types = {headers[roles["channel"][0]]: pa.string()} if "channel" in roles else {}
    try:
        table = pcsv.read_csv(
            path,
            read_options=pcsv.ReadOptions(skip_rows=skip, block_size=1 << 24),
            parse_options=pcsv.ParseOptions(delimiter=delim, invalid_row_handler=invalid),
            convert_options=pcsv.ConvertOptions(include_columns=list(want),
                                                column_types=types, decimal_point=decimal,
                                                strings_can_be_null=True))
    except pa.ArrowInvalid as exc:
        msg = str(exc)
        m = re.search(r"Row #(\d+)", msg)
        line = int(m.group(1)) + skip if m else None
        raise ReadingsFileError(path, f"cannot read the table ({msg.splitlines()[0]})",
                                line=line) from None
    roles = {r: (table.column_names.index(headers[k]), headers[k], s)
             for r, (k, _, s) in roles.items()}
    return table, roles, skip + 2, comments[0]


def _to_trace(path, table, roles, first_line, comments, discharge_negative) -> Trace:
    import pyarrow as pa
    import pyarrow.compute as pc

    n = table.num_rows

    def where(row: int) -> int | None:
        if first_line is None or comments:
            return None
        return first_line + row

    def fail(msg, row, header):
        ln = where(row)
        if ln is None:
            msg = f"data row {row + 1}: {msg}"
        raise ReadingsFileError(path, msg, line=ln, column=header)

    def numbers(role) -> np.ndarray:
        k, header, scale = roles[role]
        col = table.column(k)
        if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
            import pandas as pd

            s = pd.Series(col.to_numpy(zero_copy_only=False))
            conv = pd.to_numeric(s.str.replace(",", ".", regex=False), errors="coerce")
            bad = np.flatnonzero(conv.isna().to_numpy() & s.notna().to_numpy())
            if bad.size:
                fail(f"{s.iloc[bad[0]]!r} is not a number", int(bad[0]), header)
            a = conv.to_numpy(dtype=np.float64)
        elif pa.types.is_timestamp(col.type) or pa.types.is_date(col.type):
            fail("a date where a number was expected", 0, header)
        else:
            if pa.types.is_boolean(col.type):
                fail("true/false where a number was expected", 0, header)
            a = col.to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
        return a * scale if scale != 1.0 else a

    meta: dict = {"rows": n, "comment_lines": comments}
    k, theader, tscale = roles["time"]
    tcol = table.column(k)
    if pa.types.is_timestamp(tcol.type) or pa.types.is_string(tcol.type):
        from .readings_table import iso_epoch_ns

        read = iso_epoch_ns(tcol) if pa.types.is_string(tcol.type) else None
        if read is not None:  # Arrow's parser read them all
            ns, valid = read
            nulls = ~valid
        elif pa.types.is_string(tcol.type):  # other ISO 8601 spellings: pandas
            import pandas as pd

            s = pd.Series(tcol.to_numpy(zero_copy_only=False))
            ts = pd.to_datetime(s, errors="coerce", format="ISO8601", utc=True)
            bad = np.flatnonzero(ts.isna().to_numpy() & s.notna().to_numpy())
            if bad.size:
                fail(f"{s.iloc[bad[0]]!r} is neither seconds nor an ISO 8601 date-time",
                     int(bad[0]), theader)
            ns = ts.to_numpy(dtype="datetime64[ns]").astype(np.int64)
            nulls = ts.isna().to_numpy()
        else:
            arr = pc.cast(tcol, pa.timestamp("ns", tz=tcol.type.tz))
            nulls = pc.is_null(arr).to_numpy(zero_copy_only=False)
            ns = pc.fill_null(arr.cast(pa.int64()), 0).to_numpy()
        if nulls.any():
            fail("empty time", int(np.flatnonzero(nulls)[0]), theader)
        t0 = int(ns[0]) if n else 0
        time = (ns - t0).astype(np.float64) * 1e-9
        meta["t0"] = str(np.datetime64(t0, "ns")) if n else None
    else:
        time = numbers("time")
        if n:
            time = time - time[0]
    current = numbers("current")
    if discharge_negative:
        current = -current
    voltage = numbers("voltage")
    channel, channels = None, None
    if "channel" in roles:
        col = table.column(roles["channel"][0])
        enc = pc.dictionary_encode(pc.fill_null(col.cast(pa.string()), "")).combine_chunks()
        channel = enc.indices.to_numpy(zero_copy_only=False).astype(np.int64)
        channels = [str(x) for x in enc.dictionary.to_pylist()]
    soc, kind = None, ""
    if "soc" in roles:
        soc, kind = numbers("soc"), "soc_pct"
    elif "capacity" in roles:
        soc, kind = numbers("capacity"), "capacity_Ah"
    cols = {r: h for r, (_, h, _) in roles.items()}
    return Trace.from_arrays(time=time, current=current, voltage=voltage, channel=channel,
                             channels=channels if channels else
                             (Path(path).stem or "cell",),
                             soc=soc, soc_kind=kind, source=path,
                             first_line=None if comments else first_line,
                             columns=cols, meta=meta)


_FORMULA_START = ("=", "+", "-", "@")


def columns_csv(columns: dict) -> bytes:
    """Columns (name → 1-D array or list) as UTF-8 CSV, written by Arrow's CSV writer:
    floats in their shortest exact form, NaN as an empty cell; text cells that a
    spreadsheet would run as a formula get a ``'`` prefix (OWASP "CSV Injection",
    common practice)."""
    import io

    import pyarrow as pa
    import pyarrow.csv as pcsv

    arrays = {}
    for name, values in columns.items():
        a = np.asarray(values)
        if a.dtype.kind in "OUS":
            texts = ["'" + s if s.startswith(_FORMULA_START) else s
                     for s in (str(x) for x in a.tolist())]  # one cell per step, not per sample
            arrays[name] = pa.array(texts, pa.string())
        elif a.dtype.kind == "f":
            arrays[name] = pa.array(a, pa.float64(), mask=~np.isfinite(a))
        else:
            arrays[name] = pa.array(a)
    buf = io.BytesIO()
    buf.write((",".join(columns) + "\n").encode("utf-8"))
    pcsv.write_csv(pa.table(arrays), buf,
                   write_options=pcsv.WriteOptions(include_header=False,
                                                   quoting_style="needed"))
    return buf.getvalue()
