"""Small TOML files (acceptance specs, bench profiles): read, parse, check the layout.

Edge module (reads one file). Every problem is a ``SpecFileError`` naming the file and,
where there is one, the key.
"""

from __future__ import annotations

import tomllib
from typing import Mapping

from ..core.errors import SpecFileError
from .files import read_input

__all__ = ["MAX_TOML_BYTES", "read_bytes", "read_toml", "parse_toml", "check_layout"]

MAX_TOML_BYTES = 1 << 20


def read_toml(path: str, what: str) -> dict:
    """Read and parse the TOML file at ``path`` (``what``: 'spec', 'bench profile')."""
    return parse_toml(read_bytes(path, what), str(path))


def read_bytes(path: str, what: str) -> bytes:
    """The bytes of a small file, with the usual one-line errors."""
    return read_input(path, SpecFileError, what=what, limit=MAX_TOML_BYTES,
                      too_large=lambda size: f"larger than 1 MiB; not a {what}")


def parse_toml(raw: bytes | str, path: str) -> dict:
    """Parse TOML text (UTF-8, BOM allowed)."""
    data = raw.encode("utf-8") if isinstance(raw, str) else raw
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise SpecFileError(path, "not UTF-8 text") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecFileError(path, f"not valid TOML ({exc})") from None


def check_layout(doc: Mapping, allowed: Mapping[str, set], path: str) -> None:
    """Refuse unknown sections, sections that are not tables, and unknown keys."""
    for section, body in doc.items():
        if section not in allowed:
            raise SpecFileError(path, f"unknown section (expected one of "
                                      f"{', '.join(sorted(allowed))})", key=section)
        if not isinstance(body, dict):
            raise SpecFileError(path, f"must be a table ([{section}])", key=section)
        for key in body:
            if key not in allowed[section]:
                raise SpecFileError(path, f"unknown key (allowed: "
                                          f"{', '.join(sorted(allowed[section]))})",
                                    key=f"{section}.{key}")
