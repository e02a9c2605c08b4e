"""The trace report: figures of the trace and of each pulse, the HTML page and its files
(plumbing, no numerical check of its own: the numbers are checked against the
closed-form RC step response and the hand-computed IEC 61960-3 and HPPC examples in
test_trace_steps, test_trace_pulse and test_trace_rc)."""

import json

import numpy as np

from _trace_synth import rc_voltage, sample_times
from sagfit.core.pulse import find_pulses
from sagfit.core.rc_model import fit_pulses
from sagfit.core.trace import Trace, find_steps
from sagfit.report.trace_report import envelope, pulse_figure, trace_figure


def _trace(seed=1):
    rng = np.random.default_rng(seed)
    t = sample_times(200, 0.05, rng)
    v, i = rc_voltage(t, [60.0, 70.0, 120.0, 130.0], [0, 8.0, 0, -6.0, 0], 3.7, 0.02,
                      [(0.012, 2.0)])
    return Trace.from_arrays(time=t, current=i + rng.normal(0, 2e-3, t.size),
                             voltage=v + rng.normal(0, 2e-4, t.size))


def test_envelope_keeps_extremes():
    """The min/max envelope keeps every bin's extremes, so peaks survive the thinning."""
    t = np.arange(1_000_000) * 1e-3
    y = np.sin(t)
    y[123_457] = 5.0
    te, ye = envelope(t, y, 500)
    assert te.size <= 1000 and ye.max() == 5.0 and ye.min() == y.min()


def test_figures_have_their_axes():
    tr = _trace()
    steps = find_steps(tr)
    fig = trace_figure(tr, steps)
    labels = [ax.get_ylabel() for ax in fig.axes]
    assert labels[0].startswith("Current") and labels[1].startswith("Terminal voltage")
    pulses = find_pulses(tr, steps)
    fits = fit_pulses(tr, steps, pulses, branches=1)
    fig = pulse_figure(fits[0], 1)
    assert fig.axes[1].get_ylabel().startswith("Residual")


def test_pulses_report_files(tmp_path, cli):
    """`pulses --report DIR`: trace.html with inline figures, PNGs, trace.json; the
    cautions appear in the page."""
    tr = _trace()
    p = tmp_path / "t.csv"
    p.write_text("time_s,current_A,voltage_V\n" + "\n".join(
        f"{a:.4f},{b:.5f},{c:.6f}" for a, b, c in zip(tr.time, tr.current, tr.voltage)))
    run = cli("pulses", p, "--rc", "1", "--report", tmp_path / "rep", "--json")
    assert run.code == 0, run.err
    names = {f.name for f in (tmp_path / "rep").iterdir()}
    assert {"trace.html", "trace.json", "trace_1.png", "pulse_001.png",
            "pulse_002.png"} <= names
    page = (tmp_path / "rep" / "trace.html").read_text()
    assert page.count("<svg") == 3 and "cell maker" in page
    assert json.loads((tmp_path / "rep" / "trace.json").read_text())["method"] == "hppc"
    run = cli("steps", p, "--fit", "--keep-unsettled", "--report", tmp_path / "rep2")
    assert run.code == 0, run.err
    assert {"trace.html", "report.html"} <= {f.name for f in (tmp_path / "rep2").iterdir()}
