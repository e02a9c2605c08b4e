"""The layer rule of DEVELOPERS.md: core modules import no I/O, plotting or CLI library.

Plumbing test (no outside reference needed): it parses each core module with ``ast``.
"""

import ast
import pathlib

import pytest

PKG = pathlib.Path(__file__).resolve().parents[1] / "sagfit"
EDGE_OR_SHELL = {"io_csv", "io_bench", "io_spec", "outputs", "history", "plots", "report",
                 "cli", "__main__"}
FORBIDDEN = {"pandas", "matplotlib", "sqlite3", "typer", "click", "rich", "statsmodels",
             "odrpack"}
EDGE_PREFIXES = ("io_", "report", "plots")


def _is_edge(stem: str) -> bool:
    return stem in EDGE_OR_SHELL or stem.startswith(EDGE_PREFIXES)


CORE = sorted(p for p in PKG.glob("*.py") if not _is_edge(p.stem) and p.stem != "__init__")


def _imports(path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name.split(".")[0], node.lineno
        elif isinstance(node, ast.ImportFrom):
            if node.level == 0 and node.module:
                yield node.module.split(".")[0], node.lineno
            elif node.level >= 1 and node.module:
                yield "sagfit." + node.module.split(".")[0], node.lineno


class TestLayers:
    @pytest.mark.parametrize("path", CORE, ids=lambda p: p.stem)
    def test_core_imports_no_edge_library(self, path):
        """A core module imports neither I/O, plotting nor CLI libraries, nor an edge module."""
        for name, line in _imports(path):
            assert name not in FORBIDDEN, f"{path.name}:{line} imports {name}"
            if name.startswith("sagfit."):
                assert not _is_edge(name.split(".")[1]), f"{path.name}:{line} imports {name}"

    @pytest.mark.parametrize("path", CORE, ids=lambda p: p.stem)
    def test_core_opens_no_file(self, path):
        """A core module never calls open()."""
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id != "open", f"{path.name}:{node.lineno} calls open()"

    def test_import_sagfit_does_not_import_typer(self):
        """`import sagfit` stays free of the CLI and of heavy optional libraries."""
        import subprocess
        import sys

        code = ("import sys, sagfit; bad=[m for m in ('typer','matplotlib','scipy.stats',"
                "'scipy.optimize','sqlite3') if m in sys.modules]; print(','.join(bad))")
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             check=True).stdout.strip()
        assert out == ""
