"""Writing output files safely: atomically, never over an input, never outside a folder.

Edge module (file system only). Every write goes to a temporary file in the target
folder, is flushed to disk, then renamed over the target (``os.replace`` is atomic on
POSIX and Windows), so an interrupted run never leaves a half-written file.
"""

from __future__ import annotations

import hashlib
import os
import re
import tempfile
from pathlib import Path
from typing import Iterable, Iterator

from ..core.errors import OptionError, SagfitError

__all__ = ["atomic_write", "check_output_path", "safe_filename", "OutputError", "prepare_folder"]


class OutputError(SagfitError):
    """An output that cannot be written (read-only folder, full disk, would overwrite an input)."""


_RESERVED = {"CON", "PRN", "AUX", "NUL", *(f"COM{i}" for i in range(1, 10)),
             *(f"LPT{i}" for i in range(1, 10))}


def safe_filename(name: str, *, max_len: int = 60) -> str:
    """A file-name fragment made from user text (a DUT id): no path separators, no
    dot-dot, no device names (``CON``), bounded length; a short hash keeps distinct
    names distinct."""
    base = re.sub(r"[^A-Za-z0-9_-]+", "_", str(name)).strip("_") or "dut"
    base = base[:max_len]
    if base.split(".")[0].upper() in _RESERVED:
        base = "_" + base
    if base != str(name):
        base += "-" + hashlib.sha1(str(name).encode("utf-8", "replace")).hexdigest()[:6]
    return base


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def check_output_path(path: str | os.PathLike, inputs: Iterable[str | os.PathLike] = (),
                      *, option: str = "--out") -> Path:
    """Refuse an output path that is an input file or whose folder does not exist."""
    p = Path(path)
    for src in inputs:
        s = Path(src)
        if _same_file(p, s) or p.resolve() == s.resolve():
            raise OptionError(option, f"{path} is an input file; refusing to overwrite it")
    if p.exists() and p.is_dir():
        raise OptionError(option, f"{path} is a folder; give a file name")
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise OptionError(option, f"folder {parent} does not exist")
    return p


def prepare_folder(path: str | os.PathLike, inputs: Iterable[str | os.PathLike] = (),
                   *, option: str = "--report") -> Path:
    """Create (if needed) an output folder; refuse one that is an input file."""
    p = Path(path)
    for src in inputs:
        if _same_file(p, Path(src)):
            raise OptionError(option, f"{path} is an input file")
    if p.exists() and not p.is_dir():
        raise OptionError(option, f"{path} exists and is not a folder")
    try:
        p.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create folder {path}: {exc.strerror or exc}") from None
    return p


def atomic_write(path: str | os.PathLike, data: bytes | str | list, *,
                 inputs: Iterable[str | os.PathLike] = (), option: str = "--out",
                 within: str | os.PathLike | None = None) -> Path:
    """Write ``data`` to ``path`` atomically (temporary file + rename in the same folder).

    ``data``: text (written as UTF-8), bytes, or a list or iterator of text or bytes-like
    chunks written one after the other as they come (a large CSV or JSON document need
    not be joined into one copy first). Should the iterator fail, no file is left.
    ``within``: the folder the file must stay inside (checked after resolving links).
    """
    p = check_output_path(path, inputs, option=option)
    if within is not None:
        root = Path(within).resolve()
        if root != p.resolve().parent and root not in p.resolve().parents:
            raise OutputError(f"{path} is outside the output folder {within}")
    if isinstance(data, (str, bytes, bytearray, memoryview)):
        data = [data]
    chunks = (c.encode("utf-8") if isinstance(c, str) else c for c in data)
    parent = p.parent if str(p.parent) else Path(".")
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(dir=parent, prefix=f".{p.name}.", suffix=".part")
        with os.fdopen(fd, "wb") as fh:
            for chunk in chunks:
                fh.write(chunk)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the user's usual mode
        os.replace(tmp, p)
        tmp = None
    except OSError as exc:
        reason = exc.strerror or str(exc)
        if getattr(exc, "errno", None) == 28:
            reason = "no space left on the device"
        raise OutputError(f"cannot write {path}: {reason}") from None
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass
    return p


#: Above this many DUTs, a results document is written compact and in pieces.
JSON_BIG = 2000
#: DUTs encoded per piece of a large results document.
JSON_PIECE_DUTS = 2000
_HOLE = "\ue000sagfit results\ue000"  # a private-use placeholder, never in a document


def document_text(doc, *, rows: int | None = None) -> str:
    """A JSON document as text, ending in a line end: indented for people, compact (the C
    encoder, about 10× faster) above ``JSON_BIG`` results (or ``rows``, the number of
    per-unit entries of a document that keeps them elsewhere). NaN and ±inf are refused,
    as JSON has no such numbers."""
    import json

    if rows is None:
        rows = len(doc.get("results", ())) if isinstance(doc, dict) else 0
    big = rows > JSON_BIG
    return json.dumps(doc, indent=None if big else 2, ensure_ascii=False,
                      allow_nan=False) + "\n"


def document_pieces(doc: dict, results=None) -> Iterator[str]:
    """:func:`document_text` of ``doc`` in pieces, with its results taken from ``results``.

    ``results`` (a :class:`~sagfit.results.Fits` or an
    :class:`~sagfit.acceptance.Acceptance`: anything with ``len()`` and
    ``to_dicts(range)``) replaces ``doc["results"]``. Above ``JSON_BIG`` DUTs its dicts are
    built and encoded ``JSON_PIECE_DUTS`` at a time, so the whole document is never held
    as Python objects (100,000 DUTs of ``sagfit fit`` took 2.8 GB that way); the text is
    the same as ``document_text`` of the whole document.
    """
    import json

    n = 0 if results is None else len(results)
    if n <= JSON_BIG:
        if results is not None:
            doc = {**doc, "results": results.to_dicts(range(n))}
        yield document_text(doc)
        return
    head, tail = json.dumps({**doc, "results": _HOLE}, ensure_ascii=False,
                            allow_nan=False).split(json.dumps(_HOLE, ensure_ascii=False))
    yield head + "["
    for lo in range(0, n, JSON_PIECE_DUTS):
        part = results.to_dicts(range(lo, min(lo + JSON_PIECE_DUTS, n)))
        yield (", " if lo else "") + json.dumps(part, ensure_ascii=False,
                                                allow_nan=False)[1:-1]
    yield "]" + tail + "\n"
