"""Tests of sagfit.report: the self-contained report of ``sagfit fit --report DIR``."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import pathlib
from html.parser import HTMLParser

import numpy as np
import pytest

from sagfit.report import fit_report as report
from sagfit.core.errors import ReadingsFileError
from sagfit.core.formatting import format_estimate
from sagfit.io.readings_csv import read_readings

ROOT = pathlib.Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "sample_runs"
BENCH = SAMPLES / "bench.toml"


def _readings_files():
    """Every *.csv under sample_runs/ that is a readings file."""
    out = []
    for p in sorted(SAMPLES.rglob("*.csv")):
        try:
            read_readings(p)
        except ReadingsFileError:
            continue
        out.append(p)
    return out


class Page(HTMLParser):
    """Collects what the tests look at: tags, attributes, visible text, svg count."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.attrs: list[tuple[str, str, str]] = []
        self.text: list[str] = []
        self.svg = 0
        self.depth_svg = 0
        self.ids: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            self.attrs.append((tag, k, v or ""))
            if k == "id" and self.depth_svg == 0:
                self.ids.append(v or "")
        if tag == "svg":
            if self.depth_svg == 0:
                self.svg += 1
            self.depth_svg += 1

    def handle_endtag(self, tag):
        if tag == "svg":
            self.depth_svg -= 1

    def handle_data(self, data):
        if self.depth_svg == 0:
            self.text.append(data)

    @property
    def visible(self) -> str:
        return " ".join(" ".join(self.text).split())


def parse(path) -> Page:
    p = Page()
    p.feed(pathlib.Path(path).read_text(encoding="utf-8"))
    p.close()
    return p


def _assert_self_contained(page: Page):
    assert "script" not in page.tags and "link" not in page.tags and "iframe" not in page.tags
    for tag, k, v in page.attrs:
        if k in ("src", "href", "xlink:href", "action"):
            assert not v.lower().startswith(("http:", "https:", "//", "ftp:", "javascript:")), v


@pytest.fixture
def few_sections(monkeypatch):
    """Cap the per-DUT sections at one, to keep the sample-run sweep fast."""
    monkeypatch.setattr(report, "MAX_DUT_SECTIONS", 1)


class TestSampleRuns:
    @pytest.mark.parametrize("path", _readings_files(), ids=lambda p: p.stem)
    def test_report_for_every_sample_run(self, path, cli, tmp_path, few_sections):
        """Every sample readings file gives a report with its figures, numbers and files."""
        out = tmp_path / "rep"
        run = cli("fit", path, "--bench", BENCH, "--report", out, "--json")
        assert run.code in (0, 3), run.err
        doc = json.loads(run.out)
        page = parse(out / "report.html")
        _assert_self_contained(page)
        pngs = sorted(p.name for p in out.glob("*.png"))
        assert page.svg == len(pngs) >= 1
        assert json.loads((out / "results.json").read_text(encoding="utf-8")) == doc
        csv_rows = (out / "results.csv").read_text(encoding="utf-8").strip().splitlines()
        assert len(csv_rows) == 1 + len(doc["results"])
        sha = hashlib.sha256(path.read_bytes()).hexdigest()
        assert sha in page.visible
        shown = [r for r in doc["results"] if r["vth"]["value"] is not None][:50]
        for r in shown[:report.MAX_TABLE_ROWS]:
            assert format_estimate(r["vth"]["value"], r["vth"]["u"], "V") in page.visible
            assert format_estimate(r["rth"]["value"], r["rth"]["u"], "Ω") in page.visible
        assert "York et al" in page.visible or "York, N. M. Evensen" in page.visible
        assert "JCGM 100:2008" in page.visible and "Wald" in page.visible

    def test_small_file_gets_every_dut_section(self, cli, tmp_path):
        """fleet_packs (six packs): three figures per DUT, a budget per DUT, traceability."""
        out = tmp_path / "rep"
        assert cli("fit", SAMPLES / "fleet_packs.csv", "--bench", BENCH, "--report",
                   out).code == 0
        page = parse(out / "report.html")
        assert page.svg == 18 + 1  # three per DUT, and the batch figure of every DUT
        assert len(list(out.glob("fig-PK-07-*.png"))) == 3
        text = page.visible
        assert text.count("combined standard uncertainty u(Vth)") == 6
        assert "DMM-T2" in text and "2027-05-01" in text and "current (+179 days)" in text
        assert "21.5 °C" in text
        assert "Compute Isc" in text or "compute Isc" in text
        assert "60 V DC" in text and "licensed practice" in text
        assert "0.015%+2mV" in text and "95 %" in text

    def test_figures_none_and_all(self, cli, tmp_path):
        """--figures none draws no per-DUT figure; --figures all draws them for every DUT."""
        a = tmp_path / "a"
        assert cli("fit", SAMPLES / "reg5v_board.csv", "--report", a, "--figures",
                   "none").code == 0
        assert parse(a / "report.html").svg == 0 and not list(a.glob("*.png"))
        assert "not requested" in parse(a / "report.html").visible
        b = tmp_path / "b"
        assert cli("fit", SAMPLES / "reg5v_board.csv", "--report", b, "--figures",
                   "all").code == 0
        assert parse(b / "report.html").svg == 3

    def test_bad_figures_choice_is_a_usage_error(self, cli, tmp_path):
        """An unknown --figures value is one error line and exit status 2."""
        run = cli("fit", SAMPLES / "pack_a.csv", "--report", tmp_path / "r", "--figures", "some")
        assert run.code == 2 and "--figures" in run.err and "Traceback" not in run.err


class TestStartUp:
    def test_fit_without_report_never_imports_matplotlib(self):
        """`sagfit fit` without --report leaves matplotlib unimported (start-up time)."""
        import subprocess
        import sys

        code = ("import sys\nfrom sagfit.cli import main\ntry:\n    main(['fit', %r, '--json'])\n"
                "except SystemExit:\n    pass\nsys.stderr.write(str('matplotlib' in sys.modules))"
                % str(SAMPLES / "pack_a.csv"))
        run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             timeout=120)
        assert run.stderr.strip().endswith("False"), run.stderr[-500:]


class TestSafety:
    def test_refuses_an_input_file_as_folder(self, cli, tmp_path):
        """--report naming the input file is refused and the file is left unchanged."""
        src = tmp_path / "in.csv"
        src.write_bytes((SAMPLES / "pack_a.csv").read_bytes())
        before = src.read_bytes()
        run = cli("fit", src, "--report", src)
        assert run.code == 2 and run.err.startswith("error:") and "input file" in run.err
        assert src.read_bytes() == before

    def test_hostile_dut_names_are_escaped_and_never_paths(self, cli, tmp_path):
        """DUT ids like <script>…, ../../x and CON are escaped in HTML and never become paths."""
        names = ["<script>alert(1)</script>", "../../x", "CON", 'q"uote&amp']
        lines = ["dut,load_ohm,voltage_V"]
        for k, n in enumerate(names):
            quoted = '"' + n.replace('"', '""') + '"'
            for r, v in (("open", 5.02), ("10", 4.99), ("4.7", 4.96), ("2.2", 4.90)):
                lines.append(f"{quoted},{r},{v - 0.001 * k}")
        src = tmp_path / "hostile.csv"
        src.write_text("\n".join(lines) + "\n", encoding="utf-8")
        out = tmp_path / "out"
        run = cli("fit", src, "--voltage-accuracy", "0.05%+2mV", "--load-tolerance", "1%",
                  "--report", out, "--figures", "all")
        assert run.code in (0, 3), run.err
        raw = (out / "report.html").read_text(encoding="utf-8")
        page = parse(out / "report.html")
        assert "script" not in page.tags
        assert "<script>alert(1)</script>" in page.visible      # shown as text
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in raw
        assert "../../x" in page.visible
        for p in tmp_path.rglob("*"):
            if p.is_file() and p.parent != tmp_path:
                assert p.parent == out, p
                assert ".." not in p.name and not p.name.startswith("fig-CON-")
        assert not (tmp_path.parent / "x").exists()
        assert len(list(out.glob("*.png"))) == page.svg == 12 + 1  # and the batch figure
        csv_text = (out / "results.csv").read_text(encoding="utf-8")
        assert "<script>" in csv_text  # kept as data, neutralised only if formula-like


class TestManyDuts:
    def _many(self, n, seed=0):
        from sagfit.core.readings import Readings
        from sagfit.core.units import parse_accuracy

        rng = np.random.default_rng(seed)
        loads = np.array([np.inf, 10.0, 4.7, 2.2])
        vth = 12.7 + 0.05 * rng.standard_normal(n)
        rth = 0.02 * (1 + 0.3 * rng.random(n))
        vv = np.where(np.isinf(loads)[None, :], vth[:, None],
                      vth[:, None] * loads[None, :] / (np.where(np.isinf(loads), 1, loads)
                                                       + rth[:, None]))
        vv = np.where(np.isinf(loads)[None, :], vth[:, None], vv)
        vv = vv + 0.001 * rng.standard_normal(vv.shape)
        duts = np.repeat([f"U{k:05d}" for k in range(n)], loads.size)
        return Readings.from_arrays(voltage=vv.ravel(), load=np.tile(loads, n), dut=duts,
                                    load_tolerance=1.0,
                                    voltage_accuracy=parse_accuracy("0.015%+2mV", "V"),
                                    meta={"date": "2026-11-03", "sha256": "ab" * 32})

    def test_many_duts_table_is_capped_with_histograms(self, tmp_path, monkeypatch):
        """A file of many DUTs gets a capped summary table, histograms and a capped, stated
        number of per-DUT sections."""
        from sagfit.core.analysis import fit
        from sagfit.core.results import Flag

        monkeypatch.setattr(report, "MAX_TABLE_ROWS", 50)
        monkeypatch.setattr(report, "MAX_DUT_SECTIONS", 2)
        rd = self._many(400)
        fits = fit(rd)
        extra = [[Flag("outlier", "warning", "line 3 is far off")] if k % 50 == 7 else []
                 for k in range(len(fits))]
        fits = fits.add_flags(extra)
        doc = {"tool": "sagfit", "version": "test", "settings": {"confidence": 0.95},
               "input": {"file": "many.csv"}, "results": []}
        path = report.write_report(tmp_path / "r", fits, rd, doc, {}, figures="flagged",
                                   now=dt.datetime(2026, 11, 3, 12, 0, tzinfo=dt.timezone.utc))
        page = parse(path)
        rows = [v for t, k, v in page.attrs if t == "a" and k == "href" and v.startswith("#dut-")]
        assert len(rows) == 2
        assert "Showing 50 of 400 DUTs" in page.visible
        assert "the first 2 of" in page.visible
        assert page.svg == 1 + 2 + 2 * 3  # batch figure, histograms, two flagged DUTs
        assert (tmp_path / "r" / "fig-histogram-vth.png").exists()
        assert json.loads((tmp_path / "r" / "results.json").read_text()) == \
            json.loads(json.dumps({**doc, "results": fits.to_dicts()}))
        assert "Largest contribution to the uncertainty" in page.visible

    def test_past_due_calibration_is_a_warning(self, tmp_path):
        """An instrument past its calibration date on the test date is a warning."""
        from sagfit.core.analysis import fit
        from sagfit.io.bench import Instrument

        rd = self._many(3)
        fits = fit(rd)
        inst = (Instrument("voltage", "DMM-<7>", "0.015%+2mV", dt.date(2026, 10, 1)),)
        doc = {"settings": {"confidence": 0.95}, "input": {"file": "x.csv"}, "results": []}
        page = parse(report.write_report(tmp_path / "r", fits, rd, doc,
                                         {"instruments": inst}, figures="none"))
        assert "Warning: calibration of the voltmeter DMM-<7> was due on 2026-10-01" \
               in page.visible
        assert "past due (-33 days)" in page.visible

    def test_temperature_column_is_summarised(self, tmp_path):
        """A temperature column is carried into the report as its range and median."""
        from sagfit.core.analysis import fit
        from sagfit.core.readings import Readings

        rd = self._many(2)
        meta = dict(rd.meta, temperature_C=np.array([21.0, 21.4, 22.0, 21.2] * 2))
        rd = Readings(**{f: getattr(rd, f) for f in rd.__dataclass_fields__ if f != "meta"},
                      meta=meta)
        page = parse(report.write_report(tmp_path / "r", fit(rd), rd,
                                         {"settings": {}, "input": {}}, {}, figures="none"))
        assert "21.0 … 22.0 °C, median 21.3 °C (temperature column)" in page.visible
