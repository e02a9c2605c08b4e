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
from typing import Iterable

from .errors import OptionError, SagfitError

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

    ``data``: text (written as UTF-8), bytes, or a list of bytes-like chunks written one
    after the other (a large CSV need not be joined into one copy first).
    ``within``: the folder the file must stay inside (checked after resolving links).
    """
    p = check_output_path(path, inputs, option=option)
    if within is not None:
        root = Path(within).resolve()
        if root != p.resolve().parent and root not in p.resolve().parents:
            raise OutputError(f"{path} is outside the output folder {within}")
    if isinstance(data, str):
        data = data.encode("utf-8")
    chunks = data if isinstance(data, list) else [data]
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
