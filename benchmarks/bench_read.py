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

Usage: python benchmarks/bench_read.py [--repeat N] [--duts N] [--no-old] [--no-workbook]
Reported: minimum and median of each reader's runs, and ratios of both. Rounds alternate
the readers so that a slow spell of the machine falls on all of them.
"""

from __future__ import annotations

import argparse
import importlib.util
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
    """The byte-level reader of OLD_COMMIT, imported from the git history."""
    try:
        src = subprocess.run(["git", "show", f"{OLD_COMMIT}:sagfit/io/readings_csv.py"],
                             cwd=ROOT, capture_output=True, text=True, check=True).stdout
    except (OSError, subprocess.CalledProcessError):
        return None
    import sagfit.io  # noqa: F401  (the package the old module is loaded into)

    tmp = pathlib.Path(tempfile.mkdtemp()) / "reader_old.py"
    tmp.write_text(src)
    spec = importlib.util.spec_from_file_location("sagfit.io._reader_old", tmp)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    return mod.read_readings


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


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--duts", type=int, default=100_000)
    ap.add_argument("--no-old", action="store_true")
    ap.add_argument("--no-workbook", action="store_true")
    args = ap.parse_args()

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
    report("Parquet against CSV:", {k: times[k] for k in times if "read_readings (" in k},
           "sagfit.read_readings (CSV)")

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
