"""Run the console program with one performance trick switched off (bench_tricks.py).

Usage: python benchmarks/_trick_runner.py TRICK sagfit-arguments…
"""

from __future__ import annotations

import contextlib
import sys


def main() -> None:
    trick, args = sys.argv[1], sys.argv[2:]
    import sagfit.cli as cli
    from sagfit.core import _parallel

    if trick == "gc-thresholds":
        import gc

        def tune():
            sys.setswitchinterval(_parallel.SWITCH_INTERVAL)
        cli._tune_interpreter = tune
        del gc
    elif trick == "switch-interval":
        import gc

        def tune():
            gc.set_threshold(200_000, 50, 1_000)
        cli._tune_interpreter = tune
    elif trick == "gc-freeze":
        cli.settle_long_lived = lambda: None
    elif trick == "gc-pause-read":
        _parallel.gc_paused = contextlib.nullcontext
    elif trick == "mallopt":
        cli._keep_freed_memory = lambda: None
    elif trick == "threads":
        from sagfit.core import analysis

        analysis.WORKERS = 1
    elif trick != "none":
        raise SystemExit(f"unknown trick {trick!r}")
    sys.argv = ["sagfit", *args]
    cli.run_program()


if __name__ == "__main__":
    main()
