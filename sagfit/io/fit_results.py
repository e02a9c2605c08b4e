"""Measured equivalents for ``sagfit design``: read back from a results file of ``sagfit
fit`` (``--out x.csv``, ``--out x.json`` or ``--json``), or taken from fits made here.

Edge module (files only). Each DUT gives its measured Vth and Rth with their expanded
uncertainties U, the half-widths of the intervals the fit reported; DUTs the fit could
not solve are listed as skipped with the fit's reason.
"""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass

import numpy as np

from ..core.errors import ReadingsFileError
from .files import read_input

__all__ = ["MeasuredUnits", "is_results_file", "measured_from_fits", "read_fit_results"]

#: the columns of a results CSV this reader needs
NEEDED = ("dut", "vth", "vth_ci_low", "vth_ci_high", "rth", "rth_ci_low", "rth_ci_high")
LIMIT = 1 << 30


@dataclass(frozen=True, slots=True)
class MeasuredUnits:
    """Measured Vth (V) and Rth (Ω) per DUT with expanded uncertainties U (SI)."""

    source: str
    duts: tuple[str, ...]
    vth: np.ndarray
    U_vth: np.ndarray
    rth: np.ndarray
    U_rth: np.ndarray
    #: the confidence level of the intervals behind U (e.g. 0.95), NaN when not stated
    confidence: float
    #: DUTs without a fit: (DUT, reason)
    skipped: tuple[tuple[str, str], ...] = ()


def _read(path: str) -> bytes:
    return read_input(path, ReadingsFileError, what="results file", limit=LIMIT,
                      too_large=lambda n: f"{n / 1e9:.1f} GB is larger than a results file "
                                          "can be")


def _header(data: bytes) -> tuple[int, list[str]] | None:
    """(line number, column names) of the first non-comment line, when it reads as CSV."""
    text = data[:65536].decode("utf-8-sig", errors="replace")
    for no, line in enumerate(text.splitlines(), 1):
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        return no, [c.strip().strip('"').lower() for c in line.split(",")]
    return None


def is_results_file(path: str) -> bool:
    """A ``.json`` file, or a CSV whose header has the columns of ``sagfit fit --out``
    (anything else is taken as readings to fit)."""
    if str(path).lower().endswith(".json"):
        return True
    head = _header(_read(path))
    return head is not None and all(c in head[1] for c in NEEDED)


def read_fit_results(path: str) -> MeasuredUnits:
    """Read a results file of ``sagfit fit`` (CSV or JSON) into :class:`MeasuredUnits`."""
    data = _read(path)
    if str(path).lower().endswith(".json"):
        return _from_json(path, data)
    return _from_csv(path, data)


def _num(text: str, path: str, line: int, column: str) -> float:
    if text is None or text.strip() == "":
        return math.nan
    try:
        return float(text)
    except ValueError:
        raise ReadingsFileError(path, f"{text!r} is not a number", line, column) from None


def _from_csv(path, data) -> MeasuredUnits:
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise ReadingsFileError(path, "not UTF-8 text: expected the results CSV of "
                                      "`sagfit fit --out`") from None
    head = _header(data)
    if head is None or not all(c in head[1] for c in NEEDED):
        missing = [c for c in NEEDED if head is None or c not in head[1]]
        raise ReadingsFileError(path, f"not a results file of `sagfit fit --out`: no column "
                                      f"{', '.join(missing)}", head[0] if head else None)
    lines = text.splitlines()
    reader = csv.DictReader(io.StringIO("\n".join(lines[head[0] - 1:])))
    reader.fieldnames = [c.strip().lower() for c in reader.fieldnames]
    duts, cols, skipped = [], {k: [] for k in ("vth", "uv", "rth", "ur")}, []
    conf = math.nan
    for row_no, row in enumerate(reader):
        line = head[0] + 1 + row_no
        dut = (row.get("dut") or "").strip()
        err = (row.get("error") or "").strip()
        v = _num(row.get("vth"), path, line, "vth")
        r = _num(row.get("rth"), path, line, "rth")
        if err or not (math.isfinite(v) and math.isfinite(r)):
            skipped.append((dut, err or "no fitted value"))
            continue
        lo_v, hi_v = (_num(row.get(c), path, line, c) for c in ("vth_ci_low", "vth_ci_high"))
        lo_r, hi_r = (_num(row.get(c), path, line, c) for c in ("rth_ci_low", "rth_ci_high"))
        if "confidence" in row and math.isnan(conf):
            conf = _num(row.get("confidence"), path, line, "confidence")
        duts.append(dut)
        cols["vth"].append(v), cols["rth"].append(r)
        cols["uv"].append((hi_v - lo_v) / 2), cols["ur"].append((hi_r - lo_r) / 2)
    return _units(path, duts, cols, conf, skipped)


def _from_json(path, data) -> MeasuredUnits:
    try:
        doc = json.loads(data.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise ReadingsFileError(path, "not UTF-8 text: expected the JSON of `sagfit fit "
                                      "--json`") from None
    except json.JSONDecodeError as exc:
        raise ReadingsFileError(path, f"not valid JSON ({exc.msg}), column {exc.colno}; "
                                      "expected the output of `sagfit fit --json`",
                                exc.lineno) from None
    results = doc.get("results") if isinstance(doc, dict) else None
    if not isinstance(results, list):
        raise ReadingsFileError(path, "no 'results' list: expected the JSON of `sagfit fit "
                                      "--json` or `--out x.json`")
    conf = doc.get("confidence")
    conf = float(conf) if isinstance(conf, (int, float)) else math.nan
    duts, cols, skipped = [], {k: [] for k in ("vth", "uv", "rth", "ur")}, []
    for i, r in enumerate(results):
        try:
            dut = str(r["dut"])
            if r.get("error"):
                skipped.append((dut, str(r["error"])))
                continue
            vals = []
            for q in ("vth", "rth"):
                value, (lo, hi) = r[q]["value"], r[q]["ci"]
                if value is None or lo is None or hi is None:
                    raise ValueError(f"{q} has no value or interval")
                vals.append((float(value), (float(hi) - float(lo)) / 2))
        except (KeyError, TypeError, ValueError) as exc:
            raise ReadingsFileError(path, f"results[{i}]: not a fit result of `sagfit fit` "
                                          f"({exc})") from None
        duts.append(dut)
        cols["vth"].append(vals[0][0]), cols["uv"].append(vals[0][1])
        cols["rth"].append(vals[1][0]), cols["ur"].append(vals[1][1])
    return _units(path, duts, cols, conf, skipped)


def _units(path, duts, cols, conf, skipped) -> MeasuredUnits:
    if not duts:
        why = f" ({skipped[0][0]}: {skipped[0][1]})" if skipped else ""
        raise ReadingsFileError(path, "no fitted DUT in this results file" + why)
    a = {k: np.array(v, dtype=float) for k, v in cols.items()}
    return MeasuredUnits(path, tuple(duts), a["vth"], a["uv"], a["rth"], a["ur"], conf,
                         tuple(skipped))


def measured_from_fits(fits, source: str, confidence: float) -> MeasuredUnits:
    """The same from a :class:`~sagfit.core.results.Fits` made here (U = k·u, the
    intervals ``sagfit fit`` reports)."""
    ok = np.array([e is None for e in fits.error], dtype=bool)
    with np.errstate(invalid="ignore"):
        ok &= np.isfinite(fits.vth) & np.isfinite(fits.rth)
    duts = tuple(str(d) for d, g in zip(fits.duts, ok) if g)
    skipped = tuple((str(d), str(e or "no fitted value"))
                    for d, e, g in zip(fits.duts, fits.error, ok) if not g)
    if not duts:
        raise ReadingsFileError(source, "no DUT could be fitted"
                                + (f" ({skipped[0][0]}: {skipped[0][1]})" if skipped else ""))
    k_v = np.asarray(fits.k, float)[ok]
    k_r = np.asarray(fits.k_rth, float)[ok]
    return MeasuredUnits(source, duts, np.asarray(fits.vth, float)[ok],
                         k_v * np.asarray(fits.u_vth, float)[ok],
                         np.asarray(fits.rth, float)[ok],
                         k_r * np.asarray(fits.u_rth, float)[ok], confidence, skipped)
