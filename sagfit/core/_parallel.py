"""Two threads for the large-batch fit: numpy releases the GIL inside its array
operations, so on a two-core machine two independent slices of a batch run side by side
(:func:`map_parallel`; on 100,000 DUTs the whole ``sagfit fit`` is 1.17× slower in one
pass, benchmarks/bench_tricks.py, 2026-12-05).

Pure stdlib; the core uses it.
"""

from __future__ import annotations

import os

__all__ = ["WORKERS", "map_parallel"]

#: Worker threads: two where the machine has two cores or more, else none (one pass).
WORKERS = min(2, os.cpu_count() or 1)


def map_parallel(fn, parts) -> list:
    """``[fn(p) for p in parts]``, in ``WORKERS`` threads (in order)."""
    if WORKERS < 2 or len(parts) < 2:
        return [fn(p) for p in parts]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(WORKERS) as pool:
        return list(pool.map(fn, parts))
