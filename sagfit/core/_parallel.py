"""Helpers for the large-batch paths (reading, the fit and checks, the results CSV).

- Two threads: numpy releases the GIL inside its array operations, so on a two-core
  machine two independent parts of a batch run side by side (:func:`map_parallel`), or
  one piece of work runs beside the caller (:class:`Background`).
- The cyclic garbage collector held off (:func:`gc_paused`): used only by the console
  program (``sagfit.cli``), never by a library call, since the collector is process-wide.

Pure stdlib; the core and the edges use it.
"""

from __future__ import annotations

import contextlib
import gc
import os
import sys

__all__ = ["WORKERS", "Background", "gc_paused", "map_parallel"]

#: Worker threads: two where the machine has two cores or more, else none (one pass).
WORKERS = min(2, os.cpu_count() or 1)

#: Interpreter switch interval the console program sets for its whole run (Python's
#: default is 5 ms): the two fit threads hand the GIL back and forth thousands of times,
#: and a thread that wants it back waits up to this interval (the fit and checks of
#: 100,000 DUTs measured about 15 % faster at 0.5 ms). A process-wide setting: the
#: library never changes it; only ``sagfit.cli.run_program`` does, for its own process.
SWITCH_INTERVAL = 0.0005


def map_parallel(fn, parts) -> list:
    """``[fn(p) for p in parts]``, in ``WORKERS`` threads (in order)."""
    if WORKERS < 2 or len(parts) < 2:
        return [fn(p) for p in parts]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(WORKERS) as pool:
        return list(pool.map(fn, parts))


class Background:
    """``fn(*args)`` started in a worker thread (run at once, in the caller, when ``inline``
    or on a one-core machine); :meth:`result` waits for it and returns its value or raises
    its exception. For work that releases the GIL (hashing, numpy array operations) while
    the caller does something else."""

    __slots__ = ("_thread", "_value", "_error")

    def __init__(self, fn, *args, inline: bool = False):
        self._thread = None
        self._value = self._error = None
        if inline or WORKERS < 2:
            self._run(fn, args)
            return
        import threading

        self._thread = threading.Thread(target=self._run, args=(fn, args), daemon=True)
        self._thread.start()

    def _run(self, fn, args):
        try:
            self._value = fn(*args)
        except BaseException as exc:  # handed to the caller by result()
            self._error = exc

    def result(self):
        if self._thread is not None:
            self._thread.join()
            self._thread = None
        if self._error is not None:
            raise self._error
        return self._value


@contextlib.contextmanager
def gc_paused():
    """Hold off Python's cyclic garbage collector for a block (or, as ``@gc_paused()``, a
    function), then restore it as it was.

    A batch builds a few large numpy arrays and lists of strings and of shared flag
    tuples, but no reference cycles; meanwhile each few hundred new tuples or lists
    trigger a collection, and now and then a full one that walks every object of the
    process (several hundred thousand once pandas and scipy are imported). On 100,000 DUTs
    those collections cost about 0.1 s. Nothing is lost by waiting: whatever cyclic garbage
    a block leaves is collected as usual after it. The collector is process-wide, so other
    threads of the process are held off too while the block runs.
    """
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()
