"""Tests of sagfit.predict and `sagfit predict`: divider values, delta method, PI coverage."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from sagfit.core.analysis import fit
from sagfit.core.errors import InputError
from sagfit.core.predict import models_from_document, predict
from sagfit.core.readings import Readings

from conftest import SAMPLES


def document(fits, **settings):
    """The part of the `sagfit fit --json` document that predict reads."""
    return json.loads(json.dumps({"confidence": fits.confidence,
                                  "settings": {"load_tolerance_pct": None, **settings},
                                  "results": fits.to_dicts()}, allow_nan=False))


def pack(stated=True, seed=0):
    rng = np.random.default_rng(seed)
    loads = np.array([np.inf, 10, 4.7, 2.2, 1.0, 0.47])
    with np.errstate(invalid="ignore"):
        v = np.where(np.isinf(loads), 12.7, 12.7 * loads / (loads + 0.022))
    v = v + rng.normal(0, 1e-3, v.size)
    return Readings.from_arrays(voltage=v, load=loads,
                                u_voltage=np.full(v.size, 1e-3) if stated else None)


class TestDivider:
    @pytest.mark.reference("Thevenin voltage divider (textbook: Alexander & Sadiku, "
                           "Fundamentals of Electric Circuits)")
    def test_closed_form_values(self):
        """I, V and P equal Vth/(R+Rth), Vth·R/(R+Rth) and Vth²R/(R+Rth)²."""
        f = fit(pack())
        vth, rth = f.vth[0], f.rth[0]
        preds = predict(models_from_document(document(f)), loads=[3.3, 4.7, 10, math.inf, 0])
        for p, R in zip(preds, [3.3, 4.7, 10]):
            assert p.current.value == pytest.approx(vth / (R + rth), rel=1e-14)
            assert p.voltage.value == pytest.approx(vth * R / (R + rth), rel=1e-14)
            assert p.power.value == pytest.approx(vth ** 2 * R / (R + rth) ** 2, rel=1e-14)
        assert preds[3].voltage.value == vth and preds[3].current.value == 0
        assert preds[4].current.value == pytest.approx(vth / rth) and preds[4].voltage.value == 0

    def test_set_current(self):
        """At a set current V = Vth − Rth·I and the load is V/I."""
        f = fit(pack())
        (p,) = predict(models_from_document(document(f)), currents=[2.0])
        assert p.voltage.value == pytest.approx(f.vth[0] - 2.0 * f.rth[0], rel=1e-14)
        assert p.load_ohm == pytest.approx(p.voltage.value / 2.0)
        assert p.power.value == pytest.approx(2.0 * p.voltage.value)


class TestUncertainty:
    @pytest.mark.reference("JCGM 100:2008 (GUM) 5.2.2, law of propagation with a "
                           "finite-difference Jacobian (refit-free delta method)")
    def test_matches_finite_difference_delta_method(self):
        """u(I), u(V), u(P) equal √(J·C·Jᵀ) with a numerical Jacobian of the divider."""
        f = fit(pack())
        (m,) = models_from_document(document(f))
        C = np.array(m.cov)
        R = 2.2
        funcs = {"current": lambda a, b: a / (R + b), "voltage": lambda a, b: a * R / (R + b),
                 "power": lambda a, b: a * a * R / (R + b) ** 2}
        (p,) = predict([m], loads=[R])
        for name, fn in funcs.items():
            h = 1e-6
            J = np.array([(fn(m.vth + h, m.rth) - fn(m.vth - h, m.rth)) / (2 * h),
                          (fn(m.vth, m.rth + h * 1e-3) - fn(m.vth, m.rth - h * 1e-3)) / (2e-3 * h)])
            assert getattr(p, name).u == pytest.approx(math.sqrt(J @ C @ J), rel=1e-5), name

    def test_monte_carlo_agrees(self):
        """Sampling (Vth, Rth) from their covariance gives the same u(V) at a load."""
        f = fit(pack())
        (m,) = models_from_document(document(f))
        rng = np.random.default_rng(1)
        s = rng.multivariate_normal([m.vth, m.rth], np.array(m.cov), size=200_000)
        v = s[:, 0] * 1.0 / (1.0 + s[:, 1])
        (p,) = predict([m], loads=[1.0])
        assert p.voltage.u == pytest.approx(v.std(), rel=0.02)

    def test_pi_wider_than_ci(self):
        """The one-reading interval contains the interval of the mean."""
        f = fit(pack())
        for p in predict(models_from_document(document(f, load_tolerance_pct=1.0)),
                         loads=[1.0, 10.0]):
            assert p.voltage.pi[0] < p.voltage.ci[0] < p.voltage.ci[1] < p.voltage.pi[1]

    @pytest.mark.slow
    @pytest.mark.parametrize("stated", [True, False])
    def test_prediction_interval_coverage(self, stated):
        """Over 2 000 simulated sources the 95 % PI holds a new reading 93.5–96.5 % of the time."""
        rng = np.random.default_rng(2 + stated)
        m, sig = 2000, 1e-3
        i = np.tile(np.linspace(0, 3, 8), m)
        v = 12.0 - 0.05 * i + rng.normal(0, sig, i.size)
        g = np.repeat(np.arange(m), 8)
        r = Readings.from_arrays(voltage=v, current=i, group=g,
                                 duts=[f"S{k}" for k in range(m)],
                                 u_voltage=np.full(i.size, sig) if stated else None)
        f = fit(r)
        preds = predict(models_from_document(document(f)), loads=[2.0])
        true_v = 12.0 * 2.0 / 2.05
        new = true_v + rng.normal(0, sig, m)
        lo = np.array([p.voltage.pi[0] for p in preds])
        hi = np.array([p.voltage.pi[1] for p in preds])
        cover = np.mean((lo <= new) & (new <= hi))
        assert 0.935 <= cover <= 0.965
        ci_lo = np.array([p.voltage.ci[0] for p in preds])
        ci_hi = np.array([p.voltage.ci[1] for p in preds])
        assert 0.93 <= np.mean((ci_lo <= true_v) & (true_v <= ci_hi)) <= 0.97

    def test_confidence_override(self):
        """A different confidence level changes k and the interval width accordingly."""
        f = fit(pack())
        ms = models_from_document(document(f))
        (a,) = predict(ms, loads=[1.0])
        (b,) = predict(ms, loads=[1.0], confidence=0.99)
        assert (b.voltage.ci[1] - b.voltage.ci[0]) / (a.voltage.ci[1] - a.voltage.ci[0]) == \
            pytest.approx(2.5758293 / 1.9599640, rel=1e-6)


class TestExtrapolation:
    def test_marks_loads_beyond_the_tested_currents(self):
        """A load drawing more current than any fitted reading is marked extrapolated."""
        (m,) = models_from_document(document(fit(pack())))
        near, far = predict([m], loads=[1.0, 0.05])
        assert not near.extrapolated and far.extrapolated
        assert far.to_dict()["extrapolated"] is True

    def test_knee_warning_in_terminal(self, cli, tmp_path):
        """Predicting from a fit that found a knee warns that it does not hold past it."""
        out = tmp_path / "bs.json"
        cli("fit", SAMPLES / "bench_supply_limit.csv", "--bench", SAMPLES / "bench.toml",
            "--out", out)
        res = cli("predict", out, "--load", "2.2")
        assert res.code == 0 and "found a knee" in res.out


class TestDocument:
    def test_older_document_without_model_gives_no_pi(self):
        """A results document without the prediction block still predicts, with pi = null."""
        doc = document(fit(pack()))
        for r in doc["results"]:
            del r["prediction"]
        (p,) = predict(models_from_document(doc), loads=[1.0])
        assert p.voltage.pi is None and p.to_dict()["voltage_V"]["pi"] is None

    @pytest.mark.parametrize("doc,text", [
        ([], "expected a JSON object"),
        ({"x": 1}, "key 'results'"),
        ({"results": [{"dut": "a"}]}, "key 'vth'"),
        ({"results": [{"dut": "a", "vth": {"value": "x"}}]}, "unexpected value"),
    ])
    def test_malformed_documents(self, doc, text):
        """A malformed document is an InputError naming the key."""
        with pytest.raises(InputError, match=text):
            models_from_document(doc, "r.json")

    def test_unknown_dut(self):
        """Asking for a DUT the document does not hold names the DUTs it has."""
        with pytest.raises(InputError, match="no DUT named 'zz'"):
            models_from_document(document(fit(pack())), "r.json", ["zz"])


class TestPredictCommand:
    @pytest.fixture
    def results(self, cli, tmp_path):
        out = tmp_path / "pack.json"
        res = cli("fit", SAMPLES / "pack_a.csv", "--bench", SAMPLES / "bench.toml", "--out", out)
        assert res.code == 0
        return out

    def test_json_shape(self, cli, results):
        """--json gives the documented shape, one entry per load, RKM codes and 'open' read."""
        res = cli("predict", results, "--load", "3.3,4k7,R47,open", "--json")
        assert res.code == 0
        preds = json.loads(res.out)["predictions"]
        assert [p["load_ohm"] for p in preds] == [3.3, 4700.0, 0.47, "open"]
        for p in preds:
            assert set(p) >= {"dut", "load_ohm", "current_A", "voltage_V", "power_W"}
            assert set(p["current_A"]) >= {"value", "ci"} and set(p["power_W"]) >= {"value", "ci"}
            assert set(p["voltage_V"]) >= {"value", "ci", "pi"}
            assert p["voltage_V"]["pi"][0] <= p["voltage_V"]["ci"][0]

    def test_terminal_table(self, cli, results):
        """The terminal output lists each load with units and both intervals."""
        res = cli("predict", results, "--load", "1,open", "--current", "2A")
        assert res.code == 0
        assert "open" in res.out and "1.000 Ω" in res.out and "one reading" in res.out

    @pytest.mark.parametrize("args,text", [
        (["missing.json", "--load", "1"], "missing.json"),
        (["RESULTS", "--load", "4q"], "option --load"),
        (["RESULTS"], "give at least one load"),
        (["RESULTS", "--load", "1", "--dut", "nope"], "no DUT named 'nope'"),
        (["BAD", "--load", "1"], "not valid JSON"),
    ])
    def test_errors_are_one_line_exit_2(self, cli, results, tmp_path, args, text):
        """Bad or missing results and bad options give one error line and exit 2."""
        bad = tmp_path / "bad.json"
        bad.write_text("{\"results\": [", encoding="utf-8")
        args = [str(results) if a == "RESULTS" else str(bad) if a == "BAD"
                else str(tmp_path / a) if a.endswith(".json") else a for a in args]
        res = cli("predict", *args)
        assert res.code == 2
        assert res.err.startswith("error:") and res.err.count("\n") == 1 and text in res.err
        assert "Traceback" not in res.err


class TestPredictCautions:
    def test_beyond_short_circuit_current_and_cautions(self, tmp_path):
        """A set current beyond Isc is flagged (no passive load draws it), and a short on a
        high-current pack brings the usual caution (safety practice: compute Isc, never
        measure it; common practice)."""
        import json as _json

        from sagfit.cli import main

        saved = tmp_path / "fit.json"
        with pytest.raises(SystemExit):
            main(["fit", str(SAMPLES / "pack_a.csv"), "--out", str(saved)])
        out = tmp_path / "p.json"
        import contextlib
        import io as _io

        buf = _io.StringIO()
        with contextlib.redirect_stdout(buf), pytest.raises(SystemExit) as e:
            main(["predict", str(saved), "--load", "short", "--current", "1e6", "--json"])
        assert e.value.code == 0
        doc = _json.loads(buf.getvalue())
        assert any("negative" in w for w in doc["warnings"])
        assert any("Compute Isc" in c for c in doc["cautions"])
        assert not out.exists()
