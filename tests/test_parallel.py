"""The large-batch helpers of sagfit._parallel (plumbing tests: behaviour, no reference)."""

import gc
import sys

import numpy as np
import pytest

from sagfit import fit
from sagfit.core._parallel import map_parallel


@pytest.fixture
def gc_on():
    was = gc.isenabled()
    gc.enable()
    yield
    (gc.enable if was else gc.disable)()  # as it was before the test


def test_fit_leaves_the_host_process_as_it_found_it(gc_on):
    """Regression: a library call must not switch the collector off or change the thread
    switch interval, not even while two large fits overlap in two threads of the host."""
    import threading

    from sagfit.core.simulate import simulate
    from sagfit.core.units import parse_accuracy

    run = simulate(12.0, 0.05, [np.inf, 10, 4.7, 2.2, 1.0], duts=25_000, seed=1,
                   voltage_accuracy=parse_accuracy("0.015%+2mV", "V"), load_tolerance=1.0)
    rd = run.to_readings(voltage_accuracy=parse_accuracy("0.015%+2mV", "V"),
                         load_tolerance=1.0)
    before = sys.getswitchinterval()
    seen = []

    def watch():
        while not done.is_set():
            seen.append((gc.isenabled(), sys.getswitchinterval()))
            done.wait(0.002)

    done = threading.Event()
    watcher = threading.Thread(target=watch)
    watcher.start()
    workers = [threading.Thread(target=fit, args=(rd,)) for _ in range(2)]
    for w in workers:
        w.start()
    for w in workers:
        w.join()
    done.set()
    watcher.join()
    assert gc.isenabled() and sys.getswitchinterval() == before
    assert all(on and si == before for on, si in seen)
    assert fit.__name__ == "fit" and "Thevenin" in fit.__doc__


def test_json_pieces_leave_the_collector_on_between_pieces(gc_on):
    """Regression: the JSON writer kept the collector off while paused between pieces."""
    from sagfit.io.outputs import JSON_BIG, document_pieces

    class Many:
        def __len__(self):
            return JSON_BIG + 10

        def to_dicts(self, rng):
            return [{"dut": str(i)} for i in rng]

    pieces = document_pieces({"tool": "t"}, Many())
    next(pieces)
    next(pieces)
    assert gc.isenabled()
    list(pieces)


def test_map_parallel_keeps_order():
    parts = [np.arange(k, k + 5) for k in range(0, 50, 5)]
    assert [int(p.sum()) for p in parts] == map_parallel(lambda p: int(p.sum()), parts)


def test_malloc_setting_is_the_console_program_s_only(monkeypatch):
    """The console program asks glibc to keep freed memory; elsewhere nothing happens,
    and importing sagfit as a library never does it (plumbing test)."""
    import ctypes

    import sagfit.cli as cli

    calls = []

    class FakeLibc:
        def __init__(self, _name):
            self.mallopt = lambda *a: calls.append(a) or 1
            self.gnu_get_libc_version = object()

    monkeypatch.setattr(ctypes, "CDLL", FakeLibc)
    monkeypatch.setattr(sys, "platform", "darwin")
    cli._keep_freed_memory()
    assert calls == []
    monkeypatch.setattr(sys, "platform", "linux")
    cli._keep_freed_memory()
    assert calls == [(cli._M_MMAP_THRESHOLD, cli._MMAP_THRESHOLD),
                     (cli._M_TRIM_THRESHOLD, cli._TRIM_THRESHOLD)]
