"""Partitioned data sets on Dask (sagfit.io.dataset, ``sagfit fit DIR``) against the
single-process fit, on a LocalCluster of two worker processes.

The readings are invented (seeded simulation of cells with Vth ≈ 3.7 V, Rth ≈ 40 mΩ); the
reference is sagfit's own single-process fit of the same readings in file order, which the
rest of the suite checks against outside references.
"""

from __future__ import annotations

import logging
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

pytest.importorskip("dask.dataframe")
distributed = pytest.importorskip("distributed")

import pandas as pd  # noqa: E402

from sagfit.core.analysis import fit  # noqa: E402
from sagfit.core.readings import Readings  # noqa: E402
from sagfit.io.dataset import DatasetError, fit_dataset, read_dataset  # noqa: E402
from sagfit.io.readings_csv import fits_table  # noqa: E402

N_FILES, DUTS_PER_FILE, PER_DUT = 6, 4_000, 10   # 240,000 readings in the data set
NUMERIC = ["n", "vth", "vth_u", "rth", "rth_u", "isc", "isc_u", "pmax", "pmax_u", "chi2",
           "dof", "p_value", "coverage_factor"]


def _frames(seed=18):
    """Six files of readings; the last DUT of file 0 continues in file 1 (split across two
    partitions), and one more file is empty."""
    rng = np.random.default_rng(seed)
    frames = []
    for f in range(N_FILES):
        names = np.array([f"F{f}-{k:05d}" for k in range(DUTS_PER_FILE)])
        vth = rng.normal(3.7, 0.05, DUTS_PER_FILE)
        rth = rng.normal(0.040, 0.004, DUTS_PER_FILE)
        cur = np.tile(np.linspace(0.0, 2.0, PER_DUT), DUTS_PER_FILE)
        dut = np.repeat(names, PER_DUT)
        v = np.repeat(vth, PER_DUT) - np.repeat(rth, PER_DUT) * cur
        v = v + rng.normal(0, 1e-3, v.size)
        frames.append(pd.DataFrame({"dut": dut, "voltage": v, "current": cur,
                                    "u_voltage": 1e-3, "u_current": 1e-3}))
    split = frames[0]["dut"].iloc[-1]
    moved = frames[0].iloc[-4:].copy()          # 4 of its 10 readings go to file 1
    frames[0] = frames[0].iloc[:-4]
    frames[1] = pd.concat([moved, frames[1]], ignore_index=True)
    frames.append(frames[0].iloc[:0])           # an empty partition
    return frames, split


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    root = tmp_path_factory.mktemp("lot")
    frames, split = _frames()
    for i, fr in enumerate(frames):
        fr.to_parquet(root / f"part-{i:02d}.parquet", index=False)
    return root, frames, split


@pytest.fixture(scope="module")
def client():
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=":0", silence_logs=logging.ERROR) as cluster, \
            Client(cluster) as c:
        yield c


def _single_process(frames):
    whole = pd.concat(frames, ignore_index=True)
    r = Readings.from_arrays(dut=whole["dut"].to_numpy(dtype=str),
                             voltage=whole["voltage"].to_numpy(),
                             current=whole["current"].to_numpy(),
                             u_voltage=whole["u_voltage"].to_numpy(),
                             u_current=whole["u_current"].to_numpy())
    return fits_table(fit(r)).set_index("dut").sort_index()


def test_same_results_as_single_process(dataset, client):
    root, frames, split = dataset
    ref = _single_process(frames)
    got = fit_dataset(read_dataset(str(root))).compute().set_index("dut").sort_index()
    assert got.index.is_unique                   # no DUT fitted twice
    assert list(got.index) == list(ref.index)    # nor lost
    assert got.loc[split, "n"] == PER_DUT        # the split DUT fitted whole
    for col in NUMERIC:
        np.testing.assert_allclose(got[col].to_numpy(float), ref[col].to_numpy(float),
                                   rtol=1e-9, atol=1e-15, err_msg=col)
    assert (got["method"] == ref["method"]).all()
    assert (got["flags"] == ref["flags"]).all()


def test_bad_cell_named_by_file_row_and_column(tmp_path, client):
    frames, _ = _frames()
    for i, fr in enumerate(frames[:3]):
        fr = fr.astype({"voltage": str}) if i == 2 else fr
        if i == 2:
            fr.loc[fr.index[1234], "voltage"] = "3.7O"   # letter O typed for a zero
        fr.to_csv(tmp_path / f"part-{i}.csv", index=False)
    with pytest.raises(DatasetError) as info:
        fit_dataset(read_dataset(str(tmp_path / "*.csv"))).compute()
    err = info.value
    assert err.path.endswith("part-2.csv")
    assert err.line == 1234 + 2                  # header is line 1
    assert err.column == "voltage"
    assert "3.7O" in str(err)


def test_worker_killed_mid_run_loses_and_duplicates_nothing(dataset, client, tmp_path):
    root, frames, _ = dataset
    out = tmp_path / "results"
    job = fit_dataset(read_dataset(str(root))).to_parquet(str(out), write_index=False,
                                                          compute=False)
    future = client.compute(job)
    pids = client.run(os.getpid)
    deadline = time.monotonic() + 20
    while not any(client.processing().values()) and time.monotonic() < deadline:
        time.sleep(0.05)
    victim = sorted(pids)[0]
    os.kill(pids[victim], signal.SIGKILL)        # the nanny starts a fresh worker
    future.result(timeout=120)
    assert not future.cancelled()
    got = pd.read_parquet(out)
    ref = _single_process(frames)
    assert got["dut"].is_unique
    assert sorted(got["dut"]) == list(ref.index)
    np.testing.assert_allclose(got.set_index("dut").sort_index()["vth"].to_numpy(),
                               ref["vth"].to_numpy(), rtol=1e-9)


def test_cli_fit_on_a_folder(dataset, tmp_path):
    root, frames, _ = dataset
    out = tmp_path / "res"
    run = subprocess.run([sys.executable, "-m", "sagfit", "fit", str(root), "--out", str(out),
                          "--workers", "2"], capture_output=True, text=True, timeout=120)
    n = N_FILES * DUTS_PER_FILE
    assert run.returncode == 0, run.stderr
    assert f"{n} DUT(s) from {N_FILES + 1} file(s)" in run.stdout
    assert len(pd.read_parquet(out)) == n


def test_cli_bad_cell_is_one_error_line(tmp_path):
    (tmp_path / "a.csv").write_text("dut,voltage,current\nA,3.7,0\nA,3.6,1\nA,3.5,2\n")
    (tmp_path / "b.csv").write_text("dut,voltage,current\nB,3.7,0\nB,3.6,1\nB,x3.5,2\n")
    run = subprocess.run([sys.executable, "-m", "sagfit", "fit", str(tmp_path / "*.csv"),
                          "--out", str(tmp_path / "res"), "--workers", "1"],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 2
    lines = run.stderr.strip().splitlines()
    assert lines[-1].startswith("error:") and "Traceback" not in run.stderr
    assert "b.csv, line 4, column voltage" in lines[-1]
    assert not (tmp_path / "res").exists() or not os.listdir(tmp_path / "res")


def test_plain_fit_and_help_import_no_dask():
    code = ("import sys, sagfit, sagfit.cli, sagfit.io.dataset; "
            "assert not any(m == 'dask' or m.startswith(('dask.', 'distributed')) "
            "for m in sys.modules), sorted(m for m in sys.modules if 'dask' in m)")
    subprocess.run([sys.executable, "-c", code], check=True, timeout=60)


def test_cli_accept_on_a_split_csv_data_set_matches_one_file(tmp_path):
    """The invented demo reel (sample_runs/accept_reel.csv, comment lines inside) cut in two
    CSV files, one DUT across the cut: the same decisions as ``sagfit accept`` on one file."""
    from tests.conftest import SAMPLES

    lines = (SAMPLES / "accept_reel.csv").read_text().splitlines(keepends=True)
    (tmp_path / "ds").mkdir()
    (tmp_path / "ds" / "a.csv").write_text("".join(lines[:40]))
    (tmp_path / "ds" / "b.csv").write_text("".join(lines[:7] + lines[40:]))
    spec = str(SAMPLES / "accept_spec.toml")
    one = subprocess.run([sys.executable, "-m", "sagfit", "accept", str(SAMPLES /
                          "accept_reel.csv"), "--spec", spec, "--out", str(tmp_path / "one.csv")],
                         capture_output=True, text=True, timeout=120)
    many = subprocess.run([sys.executable, "-m", "sagfit", "accept", str(tmp_path / "ds"),
                           "--spec", spec, "--out", str(tmp_path / "res"), "--workers", "1"],
                          capture_output=True, text=True, timeout=120)
    assert many.returncode == one.returncode == 1, many.stderr   # a board failed
    a = pd.read_parquet(tmp_path / "res").set_index("dut").sort_index()
    b = pd.read_csv(tmp_path / "one.csv").set_index("dut").sort_index()
    assert list(a.index) == list(b.index)
    assert (a["decision"] == b["decision"]).all()
    assert "fail: 2" in many.stdout


def test_cli_refuses_single_file_options_on_a_data_set(tmp_path):
    (tmp_path / "a.csv").write_text("dut,voltage,current\nA,3.7,0\nA,3.6,1\nA,3.5,2\n")
    run = subprocess.run([sys.executable, "-m", "sagfit", "fit", str(tmp_path), "--robust",
                          "--out", str(tmp_path / "res")], capture_output=True, text=True,
                         timeout=60)
    assert run.returncode == 2
    assert run.stderr.startswith("error:") and "--robust" in run.stderr
