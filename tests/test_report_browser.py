"""The report in a real browser: headless Chromium opens report.html from disk, logs no
console message, and renders every figure visibly."""

from __future__ import annotations

import json
import os
import pathlib
import re
import shutil
import subprocess

import pytest

pytestmark = pytest.mark.browser

ROOT = pathlib.Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "sample_runs"
TIMEOUT_S = 90  # per browser run; a hung browser fails the test instead of the suite


def _browser() -> str | None:
    for name in (os.environ.get("SAGFIT_CHROMIUM"), "chromium", "chromium-browser"):
        if name and shutil.which(name):
            return shutil.which(name)
    return None


@pytest.fixture(scope="module")
def chromium():
    exe = _browser()
    if exe is None:
        if os.environ.get("CI"):
            pytest.fail("CI is set but no Chromium is installed (apt-get install chromium)")
        pytest.skip("no Chromium installed (apt-get install chromium); CI is not set")
    return exe


def _run(exe, url, profile, *extra) -> subprocess.CompletedProcess:
    """One headless run with a fresh profile and no network."""
    args = [exe, "--headless", "--no-sandbox", "--disable-gpu",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--no-first-run", "--no-default-browser-check", "--disable-extensions",
            "--proxy-server=127.0.0.1:9", "--proxy-bypass-list=<-loopback>",
            f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0", *extra, url]
    return subprocess.run(args, capture_output=True, text=True, timeout=TIMEOUT_S)


_MEASURE = r"""<script nonce="sagfit-test">
(function () {
  var out = {errors: [], figures: []};
  window.addEventListener("error", function (e) { out.errors.push(String(e.message)); });
  document.addEventListener("securitypolicyviolation", function (e) {
    out.errors.push("blocked by CSP: " + e.violatedDirective + " " + e.blockedURI); });
  function done() {
    var pre = document.createElement("pre"); pre.id = "sagfit-measure";
    pre.textContent = JSON.stringify(out); document.body.appendChild(pre); }
  window.addEventListener("load", function () {
    var svgs = Array.prototype.filter.call(document.querySelectorAll("svg"),
      function (s) { return !s.parentElement.closest("svg"); });
    var pending = svgs.length;
    if (!pending) { done(); return; }
    svgs.forEach(function (svg, k) {
      var box = svg.getBoundingClientRect();
      var rec = {index: k, width: box.width, height: box.height, ink: -1};
      out.figures.push(rec);
      var img = new Image();
      img.onload = function () {
        var c = document.createElement("canvas");
        c.width = 320;
        c.height = Math.max(1, Math.round(320 * box.height / Math.max(box.width, 1)));
        var g = c.getContext("2d"); g.fillStyle = "#fff"; g.fillRect(0, 0, c.width, c.height);
        g.drawImage(img, 0, 0, c.width, c.height);
        var d = g.getImageData(0, 0, c.width, c.height).data, ink = 0;
        for (var i = 0; i < d.length; i += 4) {
          if (d[i] < 200 || d[i + 1] < 200 || d[i + 2] < 200) ink++; }
        rec.ink = ink / (c.width * c.height);
        if (--pending === 0) done(); };
      img.onerror = function () { rec.ink = -2; if (--pending === 0) done(); };
      img.src = "data:image/svg+xml;charset=utf-8," +
        encodeURIComponent(new XMLSerializer().serializeToString(svg));
    });
  });
})();
</script>"""


def _harness(report: pathlib.Path) -> pathlib.Path:
    """A copy of the report with one measuring script, allowed by a nonce in its CSP."""
    text = report.read_text(encoding="utf-8")
    csp = re.search(r'<meta http-equiv="Content-Security-Policy" content="([^"]*)">', text)
    assert csp, "the report declares a Content-Security-Policy"
    new = csp.group(1) + "; script-src 'nonce-sagfit-test'; img-src data:"
    text = text.replace(csp.group(0), csp.group(0).replace(csp.group(1), new), 1)
    text = text.replace("</title>", "</title>\n" + _MEASURE, 1)
    path = report.with_name("harness.html")
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    """Reports of two sample runs and of a file with hostile DUT names."""
    from sagfit.cli import main

    base = tmp_path_factory.mktemp("browser")
    hostile = base / "hostile.csv"
    rows = ["dut,load_ohm,voltage_V"]
    for k, name in enumerate(['"<script>alert(1)</script>"', "../../x"]):
        for r, v in (("open", 5.02), ("10", 4.99), ("4.7", 4.96), ("2.2", 4.90)):
            rows.append(f"{name},{r},{v - 0.002 * k}")
    hostile.write_text("\n".join(rows) + "\n", encoding="utf-8")
    jobs = {"pack_a": [SAMPLES / "pack_a.csv", "--bench", SAMPLES / "bench.toml"],
            "accept_reel": [SAMPLES / "accept_reel.csv"],
            "hostile": [hostile, "--voltage-accuracy", "0.05%+2mV", "--load-tolerance", "1%",
                        "--figures", "all"]}
    out = {}
    for key, args in jobs.items():
        folder = base / key
        try:
            main(["fit", *map(str, args), "--report", str(folder)])
        except SystemExit as exc:
            assert exc.code in (0, 3, None), (key, exc.code)
        out[key] = folder / "report.html"
    return out


@pytest.mark.parametrize("key", ["pack_a", "accept_reel", "hostile"])
class TestInChromium:
    def test_no_console_message(self, chromium, reports, key, tmp_path):
        """Opening report.html from disk logs nothing to the console (no script, no blocked
        or missing resource)."""
        run = _run(chromium, reports[key].as_uri(), tmp_path / "profile", "--dump-dom")
        assert run.returncode == 0, run.stderr[-2000:]
        console = [ln for ln in run.stderr.splitlines() if ":CONSOLE" in ln]
        assert console == []
        assert "<h1>" in run.stdout and "sagfit-measure" not in run.stdout

    def test_every_figure_renders(self, chromium, reports, key, tmp_path):
        """Each inline figure has a real size and ink on it when drawn by the browser."""
        harness = _harness(reports[key])
        run = _run(chromium, harness.as_uri(), tmp_path / "profile",
                   "--virtual-time-budget=20000", "--dump-dom")
        assert run.returncode == 0, run.stderr[-2000:]
        m = re.search(r'<pre id="sagfit-measure">(.*?)</pre>', run.stdout, re.S)
        assert m, "the measuring script did not finish"
        import html

        data = json.loads(html.unescape(m.group(1)))
        assert data["errors"] == []
        n_svg = reports[key].read_text(encoding="utf-8").count("<svg")
        assert len(data["figures"]) == n_svg > 0
        for fig in data["figures"]:
            assert fig["width"] > 200 and fig["height"] > 100, fig
            assert fig["ink"] > 0.01, fig
