"""Bench profiles: a small TOML file with the instruments' accuracies and identities.

Edge module (reads one file). Format, in docs/input-format.md::

    [voltage]
    accuracy = "0.015%+2mV"      # ±(% of reading + offset), a rectangular half-width
    noise = "50uV"               # optional: random error per reading, a standard deviation
    errors = "shared"            # optional: "shared" (default: one gain and one offset
                                 # error per sweep) or "independent" (per reading)
    instrument = "DMM-T2"        # optional: identifier, for the report's traceability list
    calibration_due = 2027-05-01 # optional: a TOML date
    [current]
    accuracy = "0.2%+1mA"
    [load]
    tolerance = "1%"
    [fit]
    confidence = 0.95
    [columns]                    # optional: which column is which, role = "header"
    voltage = "V (V)"
    current = "I_meas (A)"       # the measured current, not the set value

Where no ``--bench`` is given, :func:`default_bench` finds the profile a bench states
once: the file named by the environment variable ``SAGFIT_BENCH``, else ``bench.toml``
in the user's configuration folder of the platform (:func:`user_bench_path`).
"""

from __future__ import annotations

import datetime as _dt
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping

from ..core.errors import InputError, SpecFileError
from .columns import ROLES, check_column_mapping
from .tomlfile import check_layout, read_toml
from ..core.units import Accuracy, parse_accuracy, parse_percent

__all__ = ["BenchProfile", "Instrument", "read_bench", "default_bench", "user_bench_path",
           "BENCH_ENV"]

#: Environment variable naming the default bench profile (a TOML file).
BENCH_ENV = "SAGFIT_BENCH"


def user_bench_path(environ: Mapping[str, str] | None = None,
                    platform: str | None = None) -> Path | None:
    """Where the user's default profile lives (whether or not it exists): ``bench.toml``
    in a ``sagfit`` folder of the platform's usual configuration place —
    ``$XDG_CONFIG_HOME`` or ``~/.config`` on Linux and other Unix systems (the XDG Base
    Directory Specification), ``%APPDATA%`` on Windows, ``~/Library/Application Support``
    on macOS. None when the place cannot be told (no home folder)."""
    env = os.environ if environ is None else environ
    plat = sys.platform if platform is None else platform
    home = env.get("HOME") or env.get("USERPROFILE")
    if plat.startswith("win"):
        base = env.get("APPDATA") or (str(Path(home) / "AppData" / "Roaming") if home else "")
    elif plat == "darwin":
        base = str(Path(home) / "Library" / "Application Support") if home else ""
    else:
        base = env.get("XDG_CONFIG_HOME", "").strip()
        if not base or not os.path.isabs(base):  # the spec: a relative value is ignored
            base = str(Path(home) / ".config") if home else ""
    return Path(base) / "sagfit" / "bench.toml" if base else None


def default_bench(environ: Mapping[str, str] | None = None,
                  platform: str | None = None) -> tuple[str | None, str]:
    """The bench profile to use when no ``--bench`` is given, and where it came from:
    ``(path, "SAGFIT_BENCH")``, ``(path, "user configuration")`` or ``(None, "")``.

    A ``SAGFIT_BENCH`` naming a missing file is an error (a typing slip should not
    silently leave a bench without its meters); an empty one means none.
    """
    env = os.environ if environ is None else environ
    named = env.get(BENCH_ENV, "").strip()
    if named:
        if not os.path.isfile(named):
            raise InputError(f"{BENCH_ENV}={named}: no such bench profile (fix the path, or "
                             f"unset {BENCH_ENV})")
        return named, BENCH_ENV
    if BENCH_ENV in env:  # set but empty: no default profile
        return None, ""
    user = user_bench_path(env, platform)
    if user is not None and user.is_file():
        return str(user), "user configuration"
    return None, ""

_ALLOWED = {
    "voltage": {"accuracy", "instrument", "calibration_due", "distribution", "k", "noise",
                "errors", "range", "resolution"},
    "current": {"accuracy", "instrument", "calibration_due", "distribution", "k", "noise",
                "errors", "range", "resolution"},
    "load": {"tolerance", "instrument", "calibration_due"},
    "fit": {"confidence"},
    "bench": {"name", "operator", "location", "notes"},
    "columns": set(ROLES),
}


@dataclass(frozen=True, slots=True)
class Instrument:
    role: str
    identifier: str
    spec: str
    calibration_due: _dt.date | None = None

    def to_dict(self) -> dict:
        return {"role": self.role, "identifier": self.identifier, "spec": self.spec,
                "calibration_due": self.calibration_due.isoformat()
                if self.calibration_due else None}


@dataclass(frozen=True, slots=True)
class BenchProfile:
    voltage_accuracy: Accuracy | None = None
    current_accuracy: Accuracy | None = None
    load_tolerance: float | None = None
    confidence: float | None = None
    instruments: tuple[Instrument, ...] = ()
    info: dict = field(default_factory=dict)
    path: str = ""
    columns: dict = field(default_factory=dict)  # role -> header, the [columns] table


def read_bench(path: str) -> BenchProfile:
    """Read and strictly validate a bench profile; ``SpecFileError`` names the key."""
    doc = read_toml(path, "bench profile")
    check_layout(doc, _ALLOWED, path)
    out: dict = {"path": str(path)}
    instruments = []
    for role, dim in (("voltage", "V"), ("current", "A")):
        sec = doc.get(role, {})
        if "accuracy" in sec:
            key = f"{role}.accuracy"
            if not isinstance(sec["accuracy"], str):
                raise SpecFileError(path, "write the accuracy as a string, e.g. \"0.05%+2mV\"",
                                    key=key)
            extent = {}
            for word in ("range", "resolution"):  # for '% of range' and 'counts' specs
                if word in sec:
                    if not isinstance(sec[word], str):
                        raise SpecFileError(path, f"write the {word} with its unit as a "
                                            f"string, e.g. \"10{dim}\"", key=f"{role}.{word}")
                    extent[word] = sec[word]
            try:
                acc = parse_accuracy(sec["accuracy"], dim, what=key, **extent)
            except InputError as exc:
                raise SpecFileError(path, str(exc), key=key) from None
            dist = sec.get("distribution", "rectangular")
            if dist not in ("rectangular", "normal"):
                raise SpecFileError(path, "must be 'rectangular' or 'normal'",
                                    key=f"{role}.distribution")
            if dist == "normal":
                k = sec.get("k", 2.0)
                if not isinstance(k, (int, float)) or isinstance(k, bool) or not k > 0:
                    raise SpecFileError(path, "coverage factor must be a positive number",
                                        key=f"{role}.k")
                acc = Accuracy(acc.percent, acc.offset, float(k), acc.text)
            elif "k" in sec:
                raise SpecFileError(path, "k applies only with distribution = 'normal'",
                                    key=f"{role}.k")
            if "noise" in sec:
                if not isinstance(sec["noise"], str):
                    raise SpecFileError(path, "write the noise as a string, e.g. \"50uV\"",
                                        key=f"{role}.noise")
                try:
                    acc = acc.with_noise(parse_accuracy(sec["noise"], dim, what=f"{role}.noise"))
                except InputError as exc:
                    raise SpecFileError(path, str(exc), key=f"{role}.noise") from None
            errors = sec.get("errors", "shared")
            if errors not in ("shared", "independent"):
                raise SpecFileError(path, "must be 'shared' (one gain and one offset error per "
                                    "sweep) or 'independent' (per reading)",
                                    key=f"{role}.errors")
            out[f"{role}_accuracy"] = acc.with_shared(errors == "shared")
        instruments += _instrument(path, role, sec)
    sec = doc.get("load", {})
    if "tolerance" in sec:
        t = sec["tolerance"]
        try:
            out["load_tolerance"] = parse_percent(t, what="load.tolerance") if isinstance(
                t, str) else _bad_number(path, "load.tolerance")
        except InputError as exc:
            raise SpecFileError(path, str(exc), key="load.tolerance") from None
        if not 0 <= out["load_tolerance"] < 100:
            raise SpecFileError(path, "tolerance must be between 0 % and 100 %",
                                key="load.tolerance")
    instruments += _instrument(path, "load", sec)
    conf = doc.get("fit", {}).get("confidence")
    if conf is not None:
        if not isinstance(conf, (int, float)) or isinstance(conf, bool) or not 0 < conf < 1:
            raise SpecFileError(path, "must be a number between 0 and 1, e.g. 0.95",
                                key="fit.confidence")
        out["confidence"] = float(conf)
    for role, header in doc.get("columns", {}).items():
        if not isinstance(header, str) or not header.strip():
            raise SpecFileError(path, f"write the column's header as text, e.g. {role} = "
                                      "\"V (V)\"", key=f"columns.{role}")
    out["columns"] = check_column_mapping(doc.get("columns", {}), what="[columns]")
    return BenchProfile(instruments=tuple(instruments), info=dict(doc.get("bench", {})), **out)


def _bad_number(path, key):
    raise SpecFileError(path, "write the tolerance with a per-cent sign, e.g. \"1%\"", key=key)


def _instrument(path, role, sec) -> list[Instrument]:
    if "instrument" not in sec and "calibration_due" not in sec:
        return []
    ident = sec.get("instrument", "")
    if not isinstance(ident, str):
        raise SpecFileError(path, "must be a string", key=f"{role}.instrument")
    due = sec.get("calibration_due")
    if due is not None and not isinstance(due, _dt.date):
        raise SpecFileError(path, "must be a TOML date such as 2027-05-01 (no quotes)",
                            key=f"{role}.calibration_due")
    if isinstance(due, _dt.datetime):
        due = due.date()
    spec = str(sec.get("accuracy", sec.get("tolerance", "")))
    return [Instrument(role, ident, spec, due)]
