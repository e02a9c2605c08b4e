"""Benchmark of the readings readers, in-process, against peers timed in the same rounds.

  csv:      ``sagfit.read_readings`` on 100,000 DUTs × 8 readings (invented, from
            ``sagfit.simulate``, fixed seed) against
            (a) a bare ``pyarrow.csv.read_csv`` of the same file (target: within 1.5×),
            (b) the reader it replaced, the byte-level one of commit 4595481, loaded from
                the git history (skipped with --no-old or outside a git checkout);
  parquet:  ``read_readings`` of the same readings written as Parquet, against the CSV;
  workbook: an .xlsx of 20,000 DUTs × 8 readings read with python-calamine directly
            (what sagfit does) against pandas' calamine engine (``pd.read_excel``) doing
            the same sheet → columns step.

Beside the bare read, three parts of the reader's work are timed alone, to show where its
time goes: Arrow's read with the reader's column types (ids and loads dictionary-encoded,
numbers as float64), the SHA-256 of the file (every output names its input by it), and
``Readings.from_arrays`` (validation and the uncertainty model, shared by every reader).

Usage: python benchmarks/bench_read.py [--repeat N] [--duts N] [--no-old] [--no-workbook]
                                       [--console-malloc]
``--console-malloc``: glibc keeps freed memory in the process, as the ``sagfit`` console
program sets it (``sagfit.cli._keep_freed_memory``); without it, as a library in a host
program that leaves malloc alone.
Reported: minimum and median of each reader's runs, and ratios of both. Rounds alternate
the readers so that a slow spell of the machine falls on all of them.
"""

from __future__ import annotations

import argparse
import pathlib
import statistics
import subprocess
import sys
import tempfile
import time

HERE = pathlib.Path(__file__).resolve().parent
ROOT = HERE.parent
OLD_COMMIT = "4595481"
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(ROOT / "tests"))


def old_reader():
    """The byte-level reader of OLD_COMMIT: that commit's package, taken from the git
    history into a temporary folder and imported as ``sagfit_old`` (its imports are
    relative, so it runs beside the current ``sagfit`` with its own modules)."""
    tmp = pathlib.Path(tempfile.mkdtemp())
    try:
        archive = subprocess.run(["git", "archive", OLD_COMMIT, "sagfit"], cwd=ROOT,
                                 capture_output=True, check=True).stdout
        subprocess.run(["tar", "-x", "-C", str(tmp)], input=archive, check=True)
    except (OSError, subprocess.CalledProcessError):
        return None
    (tmp / "sagfit").rename(tmp / "sagfit_old")
    sys.path.insert(0, str(tmp))
    from sagfit_old.io.readings_csv import read_readings

    return read_readings


def rounds(fns: dict, repeat: int) -> dict:
    times = {k: [] for k in fns}
    for k, f in fns.items():  # warm-up: imports, page cache
        f()
    for _ in range(repeat):
        for k, f in fns.items():
            t = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t)
    return times


def report(title: str, times: dict, base: str) -> None:
    print(f"\n{title}")
    b_min, b_med = min(times[base]), statistics.median(times[base])
    for k, v in times.items():
        mn, md = min(v), statistics.median(v)
        ratio = "" if k == base else f"   {mn / b_min:5.2f}× (median {md / b_med:4.2f}×) {base}"
        print(f"  {k:34s} min {mn * 1e3:8.1f} ms  median {md * 1e3:8.1f} ms{ratio}")


def tricks(csv, parquet, repeat: int) -> None:
    """The reader's two tricks switched off one at a time (the project's rule: a trick
    stays only where it is worth more than about 5 % of what the user waits for)."""
    import contextlib
    import hashlib

    import sagfit
    from sagfit.io import readings_csv

    def inline(data):
        digest = hashlib.sha256(data).hexdigest()
        return lambda: digest

    @contextlib.contextmanager
    def patched(name, value):
        old = getattr(readings_csv, name)
        setattr(readings_csv, name, value)
        try:
            yield
        finally:
            setattr(readings_csv, name, old)

    def read_with(name=None, value=None, src=csv):
        def run():
            if name is None:
                return sagfit.read_readings(src)
            with patched(name, value):
                return sagfit.read_readings(src)
        return run

    fns = {"as shipped (CSV)": read_with(),
           "SHA-256 inline (CSV)": read_with("sha256_beside", inline),
           "line scan for every file (CSV)": read_with("_first_read", lambda roles: False),
           "as shipped (Parquet)": read_with(src=parquet),
           "SHA-256 inline (Parquet)": read_with("sha256_beside", inline, parquet)}
    times = rounds(fns, repeat)
    report("The reader's tricks switched off (ratio > 1: the trick saves time):",
           {k: v for k, v in times.items() if "CSV" in k}, "as shipped (CSV)")
    report("", {k: v for k, v in times.items() if "Parquet" in k}, "as shipped (Parquet)")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--duts", type=int, default=100_000)
    ap.add_argument("--no-old", action="store_true")
    ap.add_argument("--no-workbook", action="store_true")
    ap.add_argument("--console-malloc", action="store_true")
    args = ap.parse_args()
    if args.console_malloc:
        from sagfit.cli import _keep_freed_memory

        _keep_freed_memory()

    import pyarrow.csv as pa_csv
    import pyarrow.parquet as pq

    import sagfit
    from bench_fit import make

    tmp = pathlib.Path(tempfile.mkdtemp())
    csv = tmp / "readings.csv"
    make(csv, args.duts)
    table = pa_csv.read_csv(csv, read_options=pa_csv.ReadOptions(skip_rows=1))
    parquet = tmp / "readings.parquet"
    pq.write_table(table, parquet)
    print(f"{args.duts} DUTs × 8 readings: CSV {csv.stat().st_size / 1e6:.1f} MB, "
          f"Parquet {parquet.stat().st_size / 1e6:.1f} MB; {args.repeat} rounds")

    fns = {"sagfit.read_readings (CSV)": lambda: sagfit.read_readings(csv),
           "bare pyarrow.csv.read_csv": lambda: pa_csv.read_csv(
               csv, read_options=pa_csv.ReadOptions(skip_rows=1))}
    old = None if args.no_old else old_reader()
    if old is not None:
        fns[f"byte-level reader ({OLD_COMMIT})"] = lambda: old(csv)
    fns["sagfit.read_readings (Parquet)"] = lambda: sagfit.read_readings(parquet)
    import hashlib

    import pyarrow as pa

    label = pa.dictionary(pa.int32(), pa.string())
    typed = pa_csv.ConvertOptions(column_types={"dut": label, "load_ohm": label,
                                                "voltage_V": pa.float64(),
                                                "time_s": pa.float64()})
    fns["Arrow read, the reader's types"] = lambda: pa_csv.read_csv(
        csv, read_options=pa_csv.ReadOptions(skip_rows=1), convert_options=typed)
    fns["read and SHA-256 of the file"] = lambda: hashlib.sha256(csv.read_bytes()).hexdigest()
    # the part every reader shares and no peer does: validation and the uncertainty model
    # of each reading (core), on the arrays the reader hands over
    r = sagfit.read_readings(csv)
    arrays = dict(voltage=r.voltage.copy(), load=r.load.copy(), group=r.group.copy(),
                  duts=list(r.duts), time=r.time.copy(), line=r.line.copy())
    fns["Readings.from_arrays alone"] = lambda: sagfit.Readings.from_arrays(**arrays)
    times = rounds(fns, args.repeat)
    report("CSV readers (ratios to the bare Arrow read):", times, "bare pyarrow.csv.read_csv")
    own = [a - b for a, b in zip(times["sagfit.read_readings (CSV)"],
                                 times["Readings.from_arrays alone"])]
    bare = times["bare pyarrow.csv.read_csv"]
    print(f"  the reader's own part (read_readings − from_arrays, round by round): min "
          f"{min(own) * 1e3:.1f} ms, {min(own) / min(bare):.2f}× the bare read (median "
          f"{statistics.median(own) / statistics.median(bare):.2f}×)")
    rest = [a - b - c for a, b, c in zip(times["sagfit.read_readings (CSV)"],
                                         times["Readings.from_arrays alone"],
                                         times["Arrow read, the reader's types"])]
    print(f"  the rest (read_readings − from_arrays − typed Arrow read; the file's hash, ids "
          f"and loads into codes and names, line numbers): min {min(rest) * 1e3:.1f} ms, "
          f"median {statistics.median(rest) * 1e3:.1f} ms")
    report("Parquet against CSV:", {k: times[k] for k in times if "read_readings (" in k},
           "sagfit.read_readings (CSV)")

    tricks(csv, parquet, args.repeat)

    if not args.no_workbook:
        from python_calamine import CalamineWorkbook

        import pandas as pd
        from sagfit.io.readings_excel import _column
        from sheets import write_xlsx

        small = table.slice(0, 160_000).to_pylist()
        head = list(small[0])
        rows = [head] + [[r[h] if not isinstance(r[h], float) or r[h] == r[h] else None
                          for h in head] for r in small]
        book = tmp / "readings.xlsx"
        write_xlsx(book, {"Sweep": rows})

        def direct():
            sheet = CalamineWorkbook.from_path(str(book)).get_sheet_by_name("Sweep")
            data = sheet.to_python(skip_empty_area=False)
            return [_column([r[c] for r in data[1:]]) for c in range(len(head))]

        def via_pandas():
            frame = pd.read_excel(book, sheet_name="Sweep", engine="calamine", header=None)
            return [_column(frame[c].iloc[1:].tolist()) for c in frame.columns]

        w = rounds({"calamine directly": direct, "pandas read_excel(engine=calamine)":
                    via_pandas}, max(3, args.repeat // 2))
        report(f"Workbook, {len(rows) - 1} rows (sheet → columns):", w, "calamine directly")
        w = rounds({"sagfit.read_readings (xlsx)": lambda: sagfit.read_readings(book)},
                   max(3, args.repeat // 2))
        report("Workbook, whole read:", w, "sagfit.read_readings (xlsx)")


if __name__ == "__main__":
    main()
