"""Two threads for the large-batch paths (the fit and checks, the results CSV).

numpy releases the GIL inside its array operations, so on a two-core machine two
independent parts of a batch run side by side. Pure stdlib; the core and the edges use it.
"""

from __future__ import annotations

import contextlib
import os
import sys

__all__ = ["WORKERS", "map_parallel", "quick_gil_handover"]

#: Worker threads: two where the machine has two cores or more, else none (one pass).
WORKERS = min(2, os.cpu_count() or 1)

#: Interpreter switch interval while the threads run (Python's default is 5 ms). Each
#: thread hands the GIL back and forth thousands of times; a thread that wants it back
#: waits up to this interval, so a shorter one makes the fit and checks of 100,000 DUTs
#: about 15 % faster (measured 0.5 ms against the default, minima of 6 runs; 0.2 ms was
#: slower again). The setting is process-wide while it lasts.
SWITCH_INTERVAL = 0.0005


@contextlib.contextmanager
def quick_gil_handover():
    """Shorten the interpreter's thread switch interval for a block, then restore it."""
    before = sys.getswitchinterval()
    sys.setswitchinterval(min(before, SWITCH_INTERVAL))
    try:
        yield
    finally:
        sys.setswitchinterval(before)


def map_parallel(fn, parts) -> list:
    """``[fn(p) for p in parts]``, in ``WORKERS`` threads (in order)."""
    if WORKERS < 2 or len(parts) < 2:
        return [fn(p) for p in parts]
    from concurrent.futures import ThreadPoolExecutor

    with quick_gil_handover(), ThreadPoolExecutor(WORKERS) as pool:
        return list(pool.map(fn, parts))
