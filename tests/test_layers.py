"""The layer rule of DEVELOPERS.md, read from the source with ``ast`` (plumbing test).

Layers, lowest first: ``sagfit.core`` (numeric core: arrays in, frozen results out),
``sagfit.io`` and ``sagfit.report`` (the edges: files, SQLite, figures, HTML), and
``sagfit.cli`` (the shell). A module may import its own layer and the layers below it,
never one above: the core imports no edge and no shell, an edge never imports the shell.
Every import form is resolved: ``import sagfit.x``, ``from sagfit.x import y``,
``from .x import y``, ``from . import x`` and ``from .. import x``.
"""

import ast
import pathlib
import re

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]
PKG = ROOT / "sagfit"
RANK = {"core": 0, "io": 1, "report": 1, "cli": 2}
FORBIDDEN_IN_CORE = {"pandas", "pyarrow", "matplotlib", "sqlite3", "typer", "click", "rich",
                     "statsmodels", "odrpack", "dask", "distributed"}


def _module_name(path: pathlib.Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _package_of(path: pathlib.Path) -> list[str]:
    name = _module_name(path).split(".")
    return name if path.name == "__init__.py" else name[:-1]


def imported_modules(path: pathlib.Path):
    """Yield (absolute module name, line) for every import in ``path``, relative ones resolved."""
    return resolve_imports(path.read_text(encoding="utf-8"), _package_of(path))


def resolve_imports(source: str, pkg: list[str]):
    """Imports of ``source`` as if it sat in package ``pkg`` (a list of names)."""
    tree = ast.parse(source)
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, node.lineno
        elif isinstance(node, ast.ImportFrom):
            if node.level == 0:
                base = node.module or ""
            else:
                stem = pkg[:len(pkg) - (node.level - 1)]
                base = ".".join(stem + ([node.module] if node.module else []))
            yield base, node.lineno
            for a in node.names:          # `from . import x` imports the module x
                yield f"{base}.{a.name}", node.lineno


def _layer(module: str) -> str | None:
    parts = module.split(".")
    if parts[0] != "sagfit" or len(parts) < 2:
        return None
    return parts[1] if parts[1] in RANK else None


MODULES = sorted(p for p in PKG.rglob("*.py"))
LAYERED = [p for p in MODULES if _layer(_module_name(p)) is not None]


def test_every_module_sits_in_a_layer():
    """Apart from the package's own __init__/__main__, each module lives in a layer folder."""
    loose = [p.name for p in PKG.glob("*.py") if p.name not in ("__init__.py", "__main__.py")]
    assert loose == []


@pytest.mark.parametrize("path", LAYERED, ids=lambda p: _module_name(p))
def test_no_upward_import(path):
    """No module imports a layer above its own (core < io, report < cli)."""
    own = RANK[_layer(_module_name(path))]
    for name, line in imported_modules(path):
        layer = _layer(name)
        if layer is not None:
            assert RANK[layer] <= own, f"{_module_name(path)}:{line} imports {name}"


CORE = [p for p in LAYERED if _layer(_module_name(p)) == "core"]


@pytest.mark.parametrize("path", CORE, ids=lambda p: _module_name(p))
def test_core_imports_no_edge_library(path):
    """A core module imports neither I/O, plotting, CLI nor distributed libraries."""
    for name, line in imported_modules(path):
        assert name.split(".")[0] not in FORBIDDEN_IN_CORE, f"{path.name}:{line} imports {name}"


@pytest.mark.parametrize("path", CORE, ids=lambda p: _module_name(p))
def test_core_opens_no_file(path):
    """A core module never calls open()."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            assert node.func.id != "open", f"{path.name}:{node.lineno} calls open()"


def test_resolver_sees_every_import_form():
    """The resolver finds `from . import x` and `from .. import x` (they were missed once)."""
    src = "from . import x\nfrom .. import cli\nfrom ..io import y\nimport sagfit.report.z\n"
    names = {n for n, _ in resolve_imports(src, ["sagfit", "core"])}
    assert {"sagfit.core.x", "sagfit.cli", "sagfit.io.y", "sagfit.report.z"} <= names
    assert {_layer(n) for n in names} - {None} == {"core", "cli", "io", "report"}


def test_developers_map_matches_tree():
    """Each package named in DEVELOPERS.md's map exists, and each package is in the map."""
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    named = set(re.findall(r"`sagfit/([a-z_]+)/`", text))
    actual = {p.parent.name for p in PKG.glob("*/__init__.py")}
    assert named == actual


def test_developers_map_names_every_module():
    """Each module of a layer (``__init__`` aside) is named in DEVELOPERS.md, by its path
    under ``sagfit/`` or, in a list of siblings, by its file name."""
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    missing = [p.relative_to(PKG).as_posix() for p in LAYERED if p.name != "__init__.py"
               and f"`{p.relative_to(PKG).as_posix()}`" not in text and f"`{p.name}`" not in text]
    assert missing == []


def test_import_sagfit_does_not_import_typer():
    """`import sagfit` stays free of the CLI and of heavy optional libraries."""
    import subprocess
    import sys

    code = ("import sys, sagfit; bad=[m for m in ('typer','matplotlib','scipy.stats',"
            "'scipy.optimize','sqlite3','dask') if m in sys.modules]; print(','.join(bad))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == ""
