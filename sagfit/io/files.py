"""Reading an input file whole, with the usual one-line errors (edge module).

Used by the CSV reader and the TOML reader, so that a folder, a missing, unreadable or
oversized file is reported the same way whatever the file is for.
"""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["read_input"]


def read_input(path: str | os.PathLike, error, *, what: str, limit: int,
               too_large) -> bytes:
    """The bytes of ``path``; every problem raises ``error(str(path), message)``.

    ``what`` names the kind of file ("readings file", "spec file"); ``too_large(size)``
    gives the message for a file above ``limit`` bytes (refused before it is read).
    """
    name = str(path)
    p = Path(path)
    try:
        if p.is_dir():
            raise error(name, f"is a folder, not a {what}")
        size = p.stat().st_size
        if size > limit:
            raise error(name, too_large(size))
        with open(p, "rb") as fh:
            # ask for the size found (a read of ``limit + 1`` would set aside that much
            # memory first: 15 ms on a 27 MB file), then for what a growing file added
            data = fh.read(min(size, limit) + 1)
            if len(data) > size:
                data += fh.read(limit + 1 - len(data))
            return data
    except FileNotFoundError:
        raise error(name, "no such file") from None
    except PermissionError:
        raise error(name, "permission denied") from None
    except OSError as exc:
        raise error(name, f"cannot read the file ({exc.strerror or exc})") from None
