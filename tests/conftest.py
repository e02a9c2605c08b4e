"""Shared fixtures: run the CLI in-process and capture its streams."""

from __future__ import annotations

import hashlib
import pathlib
from dataclasses import dataclass

import os

import pytest
from hypothesis import settings

# Property tests explore new random examples on a developer's machine; in CI they run a
# fixed, repeatable set so that a landing never depends on the luck of the draw.
settings.register_profile("ci", derandomize=True)
if os.environ.get("CI"):
    settings.load_profile("ci")

ROOT = pathlib.Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "sample_runs"


@pytest.fixture(autouse=True)
def _no_user_bench_profile(monkeypatch, tmp_path_factory):
    """The developer's own default bench profile ($SAGFIT_BENCH, ~/.config/sagfit/...)
    never reaches a test: the variable is removed and the configuration places point to
    an empty folder (HOME is left alone: matplotlib keeps its font cache there)."""
    import sys

    empty = tmp_path_factory.getbasetemp() / "no-user-config"
    empty.mkdir(exist_ok=True)
    monkeypatch.delenv("SAGFIT_BENCH", raising=False)
    monkeypatch.setenv("XDG_CONFIG_HOME", str(empty))
    monkeypatch.setenv("APPDATA", str(empty))
    if sys.platform == "darwin":
        monkeypatch.setenv("HOME", str(empty))


@dataclass
class Run:
    code: int
    out: str
    err: str


@pytest.fixture
def cli(capsys):
    """Call ``sagfit`` in-process: ``cli("fit", path, "--json")`` → Run(code, out, err)."""
    from sagfit.cli import main

    def run(*args) -> Run:
        capsys.readouterr()
        try:
            main([str(a) for a in args])
            code = 0
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 2)
        cap = capsys.readouterr()
        return Run(code, cap.out, cap.err)

    return run


def digest(path) -> str:
    return hashlib.sha256(pathlib.Path(path).read_bytes()).hexdigest()
