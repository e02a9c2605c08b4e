"""Run the console program with one performance trick switched off (bench_tricks.py).

Usage: python benchmarks/_trick_runner.py TRICK sagfit-arguments…
"""

from __future__ import annotations

import sys


def main() -> None:
    trick, args = sys.argv[1], sys.argv[2:]
    import sagfit.cli as cli

    if trick == "mallopt":
        cli._keep_freed_memory = lambda: None
    elif trick == "threads":
        from sagfit.core import analysis

        analysis.WORKERS = 1
    elif trick == "hash-beside":
        import hashlib

        from sagfit.io import readings_csv

        def inline(data):
            digest = hashlib.sha256(data).hexdigest()
            return lambda: digest

        readings_csv.sha256_beside = inline
    elif trick == "whole-file-rows":
        from sagfit.io import readings_csv

        readings_csv._first_read = lambda roles: False  # every file by the line scan
    elif trick != "none":
        raise SystemExit(f"unknown trick {trick!r}")
    sys.argv = ["sagfit", *args]
    cli.run_program()


if __name__ == "__main__":
    main()
