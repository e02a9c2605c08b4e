"""Traceability of a test: which instruments were used and whether their calibration
was current on the test date.

Pure core: instrument records in, plain rows and warning strings out. An instrument is
anything with ``role``, ``identifier``, ``spec`` and ``calibration_due`` — a
:class:`sagfit.io_bench.Instrument` or its ``to_dict()`` form (``calibration_due`` as a
``datetime.date`` or an ISO ``YYYY-MM-DD`` string).

An instrument used after its calibration due date is outside its calibration interval
(a laboratory's quality system would normally require it to be taken out of service or
its results to be reviewed; ISO/IEC 17025:2017 clause 6.4 deals with equipment —
clause number from memory). sagfit only reports the fact; the lab decides.
"""

from __future__ import annotations

import datetime as _dt
from typing import Iterable, Mapping

__all__ = ["date_of_test", "instrument_rows", "calibration_warnings", "traceability_record",
           "instruments_used", "DUE_SOON_DAYS"]

DUE_SOON_DAYS = 30  # "due soon" note: sagfit's own choice, a month's notice
_ROLE_WORDS = {"voltage": "voltmeter", "current": "ammeter", "load": "load resistors"}


def _get(inst, name):
    if isinstance(inst, Mapping):
        return inst.get(name)
    return getattr(inst, name, None)


def _as_date(value) -> _dt.date | None:
    if value is None or value == "":
        return None
    if isinstance(value, _dt.datetime):
        return value.date()
    if isinstance(value, _dt.date):
        return value
    text = str(value).strip()
    try:
        return _dt.date.fromisoformat(text[:10])
    except ValueError:
        return None


def date_of_test(meta: Mapping | None, today: _dt.date | None = None) -> tuple[_dt.date, str]:
    """The date of the test and where it came from.

    Parameters
    ----------
    meta : mapping
        ``Readings.meta``; its ``date`` (from a ``# date: 2026-11-03`` comment) is used when
        it is an ISO 8601 date (a date-time is cut to its date).
    today : date, optional
        Fallback (default: today's UTC date).

    Returns
    -------
    (date, source)
        ``source`` is ``"file"`` or a phrase saying why today's date was used.
    """
    raw = (meta or {}).get("date")
    d = _as_date(raw)
    if d is not None:
        return d, "file"
    fallback = today or _dt.datetime.now(_dt.timezone.utc).date()
    if raw:
        return fallback, f"today (the file's date {str(raw)[:40]!r} is not an ISO date)"
    return fallback, "today (the file has no '# date:' line)"


def instruments_used(instruments: Iterable, current_from: str, voltage_from: str) -> tuple:
    """The instruments whose readings entered the result.

    ``current_from`` and ``voltage_from`` are ``Readings.current_from`` and
    ``Readings.voltage_from`` (``"measured"`` or ``"load"``). An ammeter named in a bench
    profile did not enter a fit of (R, V) readings, where I = V/R; a voltmeter did not enter
    one of (R, I) readings; the load resistors entered only where a quantity was computed
    from them (with both V and I measured, R is only cross-checked). Instruments of any
    other role are kept.
    """
    used = {"current": current_from == "measured", "voltage": voltage_from == "measured",
            "load": "load" in (current_from, voltage_from)}
    return tuple(inst for inst in instruments or ()
                 if used.get(str(_get(inst, "role") or ""), True))


def instrument_rows(instruments: Iterable, on: _dt.date) -> list[dict]:
    """One plain row per instrument with its calibration status on the date ``on``.

    Each row: ``role``, ``identifier``, ``spec``, ``calibration_due`` (ISO text or None),
    ``days_left`` (int or None) and ``status``: ``"current"``, ``"due soon"`` (within
    ``DUE_SOON_DAYS``), ``"past due"`` or ``"no due date stated"``.
    """
    rows = []
    for inst in instruments or ():
        due = _as_date(_get(inst, "calibration_due"))
        days = None if due is None else (due - on).days
        if due is None:
            status = "no due date stated"
        elif days < 0:
            status = "past due"
        elif days <= DUE_SOON_DAYS:
            status = "due soon"
        else:
            status = "current"
        rows.append({"role": str(_get(inst, "role") or ""),
                     "identifier": str(_get(inst, "identifier") or ""),
                     "spec": str(_get(inst, "spec") or ""),
                     "calibration_due": due.isoformat() if due else None,
                     "days_left": days, "status": status})
    return rows


def calibration_warnings(instruments: Iterable, test_date: _dt.date) -> list[str]:
    """A warning per instrument whose calibration was past due on ``test_date``.

    A calibration due on the test date itself is still current (due means "by the end of").
    """
    out = []
    for row in instrument_rows(instruments, test_date):
        if row["status"] != "past due":
            continue
        who = row["identifier"] or "(no identifier)"
        what = _ROLE_WORDS.get(row["role"], row["role"] or "instrument")
        late = -row["days_left"]
        out.append(f"calibration of the {what} {who} was due on {row['calibration_due']}, "
                   f"{late} day{'s' if late != 1 else ''} before the test date "
                   f"{test_date.isoformat()}: the readings it gave are outside its "
                   "calibration interval; have it calibrated and review these results")
    return out


def traceability_record(instruments: Iterable, meta: Mapping | None,
                        today: _dt.date | None = None) -> dict:
    """Everything above as one JSON-ready dict, for a results document:
    ``{"test_date", "test_date_source", "instruments": [rows], "warnings": [str]}``."""
    when, source = date_of_test(meta, today=today)
    instruments = list(instruments or ())
    return {"test_date": when.isoformat(), "test_date_source": source,
            "instruments": instrument_rows(instruments, when),
            "warnings": calibration_warnings(instruments, when)}
