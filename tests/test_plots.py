"""Tests of sagfit.plots: house style, SI axes, SVG/PNG output and the figures' content."""

from __future__ import annotations

import re
import subprocess
import sys

import numpy as np
import pytest

from sagfit.report import plots
from sagfit.core.fit import fit_lines
from sagfit.io.outputs import OutputError
from sagfit.core.readings import Readings
from sagfit.core.results import Flag
from sagfit.core.units import parse_accuracy


@pytest.fixture(scope="module")
def reg():
    """Invented 5 V regulator sweep, current and voltage both read back."""
    i = np.array([0.0, 0.1, 0.25, 0.5, 0.75, 1.0, 1.25, 1.5])
    rng = np.random.default_rng(4)
    v = 5.021 - 0.0383 * i + 0.0008 * rng.standard_normal(i.size)
    rd = Readings.from_arrays(voltage=v, current=i, line=np.arange(5, 13),
                              voltage_accuracy=parse_accuracy("0.015%+2mV", "V"),
                              current_accuracy=parse_accuracy("0.2%+1mA", "A"))
    return rd, fit_lines(rd)


def _draw(fig):
    fig.canvas.draw()
    return fig


class TestSiAxis:
    def test_linear_axis_shares_one_prefix_in_the_label(self):
        """Milliampere data get 'Load current (mA)' and plain tick numbers."""
        with plots.house_style():
            fig, ax = plots.new_figure()
            ax.plot([0.0, 0.012, 0.024], [1.0, 2.0, 3.0])
            plots.si_axis(ax, "x", "A", "Load current")
            _draw(fig)
        assert ax.get_xlabel() == "Load current (mA)"
        labels = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
        assert labels and all(re.fullmatch(r"−?\d+(\.\d+)?", t) for t in labels)
        assert "20" in labels or "20.0" in labels

    def test_log_axis_prefixes_each_tick(self):
        """A log resistance axis reads 100 mΩ, 1 Ω, 10 Ω …; the label keeps the quantity."""
        with plots.house_style():
            fig, ax = plots.new_figure()
            ax.set_xscale("log")
            ax.plot([0.1, 10.0], [1.0, 2.0])
            plots.si_axis(ax, "x", "Ω", "Load resistance")
            _draw(fig)
        labels = {t.get_text() for t in ax.get_xticklabels()}
        assert "100\u2009mΩ" in labels and "1\u2009Ω" in labels
        assert ax.get_xlabel() == "Load resistance"

    def test_house_style_restores_rcparams(self):
        """The style applies inside the block only."""
        import matplotlib

        before = matplotlib.rcParams["axes.spines.top"]
        with plots.house_style():
            assert matplotlib.rcParams["axes.spines.top"] is False
        assert matplotlib.rcParams["axes.spines.top"] == before


class TestOutput:
    def test_svg_is_inline_ready_with_unique_ids(self, reg):
        """No prolog or DOCTYPE; ids are prefixed per figure and every reference resolves."""
        rd, fits = reg
        a = plots.figure_svg(plots.fit_figure(rd, fits, 0), title="<b>x</b>")
        b = plots.figure_svg(plots.residual_figure(rd, fits, 0))
        assert a.startswith("<svg") and "<?xml" not in a and "DOCTYPE" not in a
        assert "<title>&lt;b&gt;x&lt;/b&gt;</title>" in a
        ids_a, ids_b = (set(re.findall(r'\bid="([^"]+)"', s)) for s in (a, b))
        assert ids_a and not ids_a & ids_b
        refs = set(re.findall(r'(?:href="|url\()#([^")]+)', a))
        assert refs <= ids_a

    def test_save_png_stays_inside_its_folder(self, reg, tmp_path):
        """A PNG is written inside the folder; a path outside it is refused."""
        rd, fits = reg
        fig = plots.power_figure(rd, fits, 0)
        p = plots.save_png(fig, tmp_path / "p.png", tmp_path)
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        (tmp_path / "sub").mkdir()
        with pytest.raises(OutputError):
            plots.save_png(fig, tmp_path / "x.png", tmp_path / "sub")

    def test_importing_plots_does_not_import_matplotlib(self):
        """matplotlib is imported only when a figure is drawn."""
        code = "import sys, sagfit.report.plots, sagfit.report.fit_report; print('matplotlib' in sys.modules)"
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             check=True, timeout=60).stdout.strip()
        assert out == "False"


class TestBands:
    def test_confidence_band_is_the_propagated_line_variance(self, reg):
        """ci(I) = k·√(u²(Vth) + I²u²(Rth) − 2I·u(Vth, Rth)) (GUM 5.2.2); pi > ci."""
        rd, fits = reg
        cur = np.array([0.0, 0.7, 1.5])
        c = plots.dut_curves(rd, fits, 0, cur)
        k = fits.k[0]
        want = k * np.sqrt(fits.u_vth[0] ** 2 + cur ** 2 * fits.u_rth[0] ** 2
                           - 2 * cur * fits.cov_vr[0])
        np.testing.assert_allclose(c["ci"], want, rtol=1e-12)
        np.testing.assert_allclose(c["line"], fits.vth[0] - fits.rth[0] * cur)
        assert np.all(c["pi"] > c["ci"])

    def test_prediction_band_covers_new_readings(self):
        """Seeded simulation: the 95 % prediction band holds about 95 % of new readings."""
        rng = np.random.default_rng(12)
        i = np.linspace(0.0, 2.0, 8)
        u = 0.004
        hits = total = 0
        for _ in range(300):
            v = 5.0 - 0.05 * i + u * rng.standard_normal(i.size)
            rd = Readings.from_arrays(voltage=v, current=i, u_voltage=np.full(i.size, u))
            fits = fit_lines(rd)
            x_new = rng.uniform(0, 2, 5)
            band = plots.dut_curves(rd, fits, 0, x_new)
            v_new = 5.0 - 0.05 * x_new + u * rng.standard_normal(5)
            hits += int(np.sum(np.abs(v_new - band["line"]) <= band["pi"]))
            total += 5
        assert 0.92 < hits / total < 0.98


class TestFigures:
    def test_fit_figure_marks_flagged_lines_and_knee(self, reg):
        """Readings named in a flag are highlighted and the knee from diagnostics is drawn."""
        rd, fits = reg
        fl = fits.add_flags([[Flag("outlier", "warning", "reading at line 9 is 3.4 u off "
                                                         "the line")]])
        fl = fl.replace(diagnostics={"knee": {"current": np.array([1.0]),
                                              "voltage": np.array([4.98]),
                                              "p_value": np.array([0.001])}})
        fl = fl.add_flags([[Flag("knee", "warning", "knee at 1 A")]])
        fig = plots.fit_figure(rd, fl, 0)
        texts = [t.get_text() for t in fig.legends[0].get_texts()]
        assert any(t.startswith("flagged reading") for t in texts)
        assert any(t.startswith("knee at 1.00 A") for t in texts)
        assert any("Vth = " in t and "Rth = " in t for t in texts)
        assert "line 9" in [t.get_text() for t in fig.axes[0].texts]

    def test_knee_absent_or_unflagged_is_not_drawn(self, reg):
        """Without a knee flag or diagnostic no knee marker is drawn."""
        rd, fits = reg
        assert plots.knee_point(fits, 0) is None
        f2 = fits.replace(diagnostics={"knee": {"current": np.array([1.0]),
                                                "voltage": np.array([4.98])}})
        assert plots.knee_point(f2, 0) is None

    def test_flagged_lines_skips_counts(self):
        """'line(s) 12, 14 and 3 more' names lines 12 and 14, not 3."""
        fl = [Flag("load-mismatch", "warning", "V/I disagrees at line(s) 12, 14 and 3 more"),
              Flag("outlier", "warning", "line 7 and line 30 are far off")]
        assert plots.flagged_lines(fl) == {7, 12, 14, 30}
        assert plots.flagged_lines(fl, codes=["outlier"]) == {7, 30}

    def test_residuals_vs_time_when_present(self):
        """With reading times the residual figure has a second, time panel."""
        i = np.array([0.0, 0.5, 1.0, 1.5, 2.0])
        rd = Readings.from_arrays(voltage=5.0 - 0.1 * i + np.array([1, -1, 2, 0, -1]) * 1e-3,
                                  current=i, u_voltage=np.full(5, 1e-3),
                                  time=np.arange(5) * 60.0)
        fig = plots.residual_figure(rd, fit_lines(rd), 0)
        assert len(fig.axes) == 2
        _draw(fig)
        assert fig.axes[1].get_xlabel() == "Time since first reading (s)"

    def test_power_figure_needs_positive_rth(self):
        """No maximum-power figure for Rth ≤ 0; otherwise the peak is at R = Rth."""
        i = np.array([0.0, 0.5, 1.0])
        rising = Readings.from_arrays(voltage=[5.0, 5.1, 5.2], current=i, u_voltage=[0.01] * 3)
        assert plots.power_figure(rising, fit_lines(rising), 0) is None
        rd = Readings.from_arrays(voltage=[5.0, 4.9, 4.8], current=i, u_voltage=[0.01] * 3)
        fits = fit_lines(rd)
        fig = plots.power_figure(rd, fits, 0)
        star = [ln for ln in fig.axes[0].get_lines() if ln.get_marker() == "*"][0]
        assert star.get_xdata()[0] == pytest.approx(fits.rth[0])
        assert star.get_ydata()[0] == pytest.approx(fits.vth[0] ** 2 / (4 * fits.rth[0]))

    def test_histogram_counts_every_finite_value(self):
        """The bars of a histogram add up to the number of finite values."""
        v = np.r_[np.random.default_rng(1).normal(12.7, 0.05, 500), np.nan]
        fig = plots.histogram_figure(v, "V", "Vth", highlight=np.arange(501) < 20)
        heights = sum(p.get_height() for p in fig.axes[0].patches)
        assert heights == 500
