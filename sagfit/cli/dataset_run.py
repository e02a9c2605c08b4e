"""``sagfit fit`` / ``sagfit accept`` on a partitioned data set (a directory or glob), on Dask.

Not a command of its own: ``fit_cmd`` and ``accept_cmd`` hand over here when their input is a
data set. Dask is imported only on this path.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import sys

from ..core.errors import InputError, OptionError


def _cluster(scheduler: str | None, workers: int | None):
    """A client on the given scheduler, or on local worker processes."""
    import logging

    # a failed task is reported once, as sagfit's own one-line error, not as worker logs
    for name in ("distributed", "distributed.worker", "distributed.scheduler",
                 "distributed.shuffle", "distributed.nanny"):
        logging.getLogger(name).setLevel(logging.CRITICAL)
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise InputError("fitting a data set needs Dask: pip install \"sagfit[dask]\"") from None
    if scheduler:
        if workers is not None:
            raise OptionError("--workers", "local worker processes only; with --scheduler "
                                           "the cluster's own workers are used")
        try:
            return contextlib.nullcontext(), Client(scheduler, timeout="10s")
        except OSError as exc:
            raise OptionError("--scheduler", f"cannot reach {scheduler}: {exc}") from None
    n = workers or max(1, min(4, os.cpu_count() or 1))
    if n < 1:
        raise OptionError("--workers", "must be at least 1")
    # a free port for the HTTP server: the default 8787 may belong to another cluster on
    # the machine (and dashboard_address=None still binds it, for the /metrics route)
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           dashboard_address=":0", silence_logs=logging.CRITICAL)
    return cluster, Client(cluster)


def dask_installed() -> bool:
    """Whether Dask's distributed scheduler can be imported (without importing it)."""
    import importlib.util

    return importlib.util.find_spec("distributed") is not None


def runs_on_dask(file: str, scheduler: str | None, workers: int | None) -> bool:
    """Whether ``fit`` / ``accept`` hand ``file`` to Dask: a scheduler given, or a data set
    (a folder or glob) with local workers asked for or Dask installed. Without Dask a set
    of Parquet files is read in this one process as one table, in name order, and goes
    the way of a single file (a set of CSV files still needs Dask)."""
    from pathlib import Path

    from ..io.dataset import dataset_files, is_dataset

    if scheduler:
        return True
    if not is_dataset(file) or (Path(file).is_file()):
        return False
    if workers is not None or dask_installed():
        return True
    return not all(Path(f).suffix.lower() in (".parquet", ".pq") for f in dataset_files(file))


def set_inputs(file: str, out: str | None) -> list[str]:
    """The inputs an ``--out`` file must not be, for a readings file or a Parquet set read
    in one process (the set's files too); an ``--out`` inside the set's folder is refused
    (it would be read with the set next time)."""
    from ..io.dataset import dataset_files, is_dataset

    if not is_dataset(file) or os.path.isfile(file):
        return [file]
    if out and os.path.isdir(file):
        if os.path.abspath(out).startswith(os.path.abspath(file) + os.sep):
            raise OptionError("--out", "the results file must not lie inside the data set's "
                                       "folder (it would be read with the set next time)")
    return [file] + dataset_files(file)


def refuse_single_file_options(given: dict) -> None:
    """Options of a single readings file that a data set run does not honour: refused,
    never silently dropped."""
    for name, value in given.items():
        if value:
            raise OptionError(name, "applies to a single readings file, not to a data set "
                                    "(see docs/cluster.md)")


def run_dataset_fit(path: str, settings: dict, level: float, out: str | None, json_out: bool,
                    scheduler: str | None, workers: int | None, spec=None, rule=None) -> int:
    """Fit (and with ``spec`` decide) every DUT of a data set; write the results as a Parquet
    data set into ``out``; print a summary. Returns the exit status."""
    from ..io.dataset import dataset_files, fit_dataset, read_dataset

    if not out:
        raise OptionError("--out", "a data set's results are a Parquet data set: give the "
                                   "folder to write, e.g. --out results/")
    if os.path.splitext(out)[1].lower() in (".csv", ".json"):
        raise OptionError("--out", f"{out}: for a data set give a folder, not a "
                                   f"{os.path.splitext(out)[1]} file")
    if os.path.exists(out) and (not os.path.isdir(out) or os.listdir(out)):
        raise OptionError("--out", f"{out} exists and is not an empty folder")
    files = dataset_files(path)
    out_abs = os.path.abspath(out)
    if any(os.path.abspath(f).startswith(out_abs + os.sep) for f in files):
        raise OptionError("--out", "the results folder must not lie inside the data set")
    cluster, client = _cluster(scheduler, workers)
    with cluster, client:
        readings = read_dataset(path, settings.get("columns"))
        results = fit_dataset(readings, {**settings, "level": level, "spec": spec,
                                         "rule": rule})
        # written beside the target, renamed when complete: a failed run leaves no part files
        partial = f"{out.rstrip(os.sep)}.partial-{os.getpid()}"
        job = results.to_parquet(partial, write_index=False, compute=False)
        future = client.compute(job)
        try:
            if sys.stderr.isatty() and not json_out:
                from distributed import progress

                progress(future)
            future.result()
        except BaseException:
            shutil.rmtree(partial, ignore_errors=True)
            raise
        if os.path.isdir(out):
            os.rmdir(out)  # checked empty above
        os.replace(partial, out)
    import pandas as pd

    table = pd.read_parquet(out)
    summary = {"input": path, "files": len(files), "duts": int(len(table)),
               "fitted": int(table["error"].isna().sum() + (table["error"] == "").sum()),
               "flagged": int((table["flags"].fillna("") != "").sum()),
               "output": out}
    if "decision" in table.columns:
        summary["decisions"] = {k: int((table["decision"] == k).sum())
                                for k in ("pass", "inconclusive", "fail", "error")}
    if json_out:
        print(json.dumps(summary, indent=2))
    else:
        print(f"{summary['duts']} DUT(s) from {len(files)} file(s): {summary['fitted']} "
              f"fitted, {summary['flagged']} flagged, "
              f"{summary['duts'] - summary['fitted']} not fitted")
        for k, v in summary.get("decisions", {}).items():
            print(f"  {k}: {v}")
        print(f"results: {out}/ (Parquet data set, one row per DUT)")
    if "decisions" in summary:  # the exit status of sagfit accept
        d = summary["decisions"]
        return 1 if d["fail"] else 3 if d["inconclusive"] or d["error"] else 0
    return 3 if summary["fitted"] < summary["duts"] else 0
