"""Read-only numpy fields for frozen result types (one helper for every such class)."""

from __future__ import annotations

import numpy as np

__all__ = ["freeze_arrays"]


def freeze_arrays(obj, names, *, copy: bool = True) -> None:
    """Make the numpy fields ``names`` of the frozen dataclass ``obj`` read-only.

    ``copy=True`` takes a private copy of any still-writeable array first, so that a
    caller's array is never frozen (or later changed) under it; ``copy=False`` is for
    arrays the class has just computed itself.
    """
    for name in names:
        a = getattr(obj, name)
        if isinstance(a, np.ndarray) and a.flags.writeable:
            a = np.array(a, copy=True) if copy else np.ascontiguousarray(a)
            a.setflags(write=False)
            object.__setattr__(obj, name, a)
