"""Tests of sagfit.planning: proposed loads, their limits and the predicted uncertainties."""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sagfit.core import eseries
from sagfit.core.errors import InputError
from sagfit.core.fit import fit_lines
from sagfit.core.planning import plan
from sagfit.core.safety import DEFERRAL
from sagfit.core.simulate import simulate
from sagfit.core.units import parse_accuracy

VA = parse_accuracy("0.05%+2mV", "V")
IA = parse_accuracy("0.2%+1mA", "A")


class TestProposal:
    def test_series_plan_shape(self):
        """A series plan starts at open circuit, then goes from the lightest to the heaviest
        load, all values from the chosen IEC 60063 series."""
        p = plan(12.6, 0.05, max_current=10, max_power=100, series="E24", points=6,
                 voltage_accuracy=VA, load_tolerance=1.0)
        assert len(p) == 6 and math.isinf(p.load[0])
        assert np.all(np.diff(p.current) > 0)
        assert np.all(eseries.is_member(p.load[1:], "E24"))

    def test_expected_values_follow_the_rough_equivalent(self):
        """Each load's current, voltage and dissipations follow V = Vth − Rth·I = I·R."""
        p = plan(5.0, 0.2, max_current=2, max_power=10, voltage_accuracy=VA)
        r = p.load[1:]
        np.testing.assert_allclose(p.current[1:], 5.0 / (r + 0.2))
        np.testing.assert_allclose(p.voltage, 5.0 - 0.2 * p.current)
        np.testing.assert_allclose(p.power[1:], p.current[1:] ** 2 * r)
        np.testing.assert_allclose(p.source_power, p.current ** 2 * 0.2)
        assert p.current[0] == 0.0 and p.power[0] == 0.0

    def test_currents_spread_up_to_the_limit(self):
        """With a fine series the heaviest load comes close to the current limit and the
        interior currents are roughly evenly spaced."""
        p = plan(12.0, 0.1, max_current=5, series="E96", points=6, voltage_accuracy=VA)
        assert 0.95 * 5 <= p.current[-1] <= 5
        steps = np.diff(p.current)
        assert steps.max() / steps.min() < 1.3

    def test_own_resistors(self):
        """With --have the plan uses only the user's resistors and names the ones left out."""
        p = plan(12.6, 0.05, max_current=10, have=[1, 2.2, 4.7, 10, 0.1], voltage_accuracy=VA)
        assert p.load.tolist() == [math.inf, 10, 4.7, 2.2]
        assert any("1.00 Ω left out" in w and "above the current limit" in w
                   for w in p.warnings)
        assert any("only 3 load(s)" in w for w in p.warnings)

    def test_resistor_over_its_derated_rating_left_out(self):
        """A resistor that would dissipate more than the derated rating is left out, with
        the reason."""
        p = plan(12.0, 0.1, max_current=10, max_power=20, have=[100, 22, 10],
                 voltage_accuracy=VA)
        assert p.load.tolist() == [math.inf, 100, 22]  # 10 Ω: 14 W > 10 W
        assert any("10.0 Ω left out" in w and "50 % of its 20.0 W rating" in w
                   for w in p.warnings)

    def test_short_on_a_battery_refused(self):
        """A short-circuit step on a battery is refused with the reason."""
        p = plan(2.0, 0.5, max_current=10, have=[0, 1, 2], voltage_accuracy=VA,
                 current_accuracy=IA)
        assert 0.0 not in p.load.tolist()
        assert any("short left out" in w and "battery" in w for w in p.warnings)

    def test_short_allowed_on_a_current_limited_supply(self):
        """With --no-battery and a limit above Isc a short may be planned, with a caution."""
        p = plan(2.0, 0.5, max_current=10, have=[0, 1, 2], voltage_accuracy=VA,
                 current_accuracy=IA, battery=False)
        assert p.load.tolist() == [math.inf, 2, 1, 0]
        assert any("short-circuit step is planned" in c for c in p.cautions)
        assert math.isfinite(p.u_rth)

    def test_no_feasible_load_is_an_error(self):
        """When no resistor meets the limits the plan is refused, saying why."""
        with pytest.raises(InputError, match="no load from your resistors"):
            plan(12.0, 0.1, max_current=1, have=[1, 2], voltage_accuracy=VA)

    def test_default_current_limit_is_announced(self):
        """Without --max-current the plan stops at a 10 % sag and says so."""
        p = plan(10.0, 1.0, voltage_accuracy=VA)
        assert p.current_limit == pytest.approx(1.0)
        assert p.current.max() <= 1.0
        assert any("--max-current" in w for w in p.warnings)

    @pytest.mark.parametrize("kw, word", [
        (dict(voltage=0), "voltage"), (dict(resistance=-1), "resistance"),
        (dict(points=2), "points"), (dict(points=31), "points"), (dict(series="E7"), "E7"),
        (dict(derating=100), "derating"), (dict(max_current=0), "max_current"),
        (dict(have=[]), "empty"), (dict(have=[-1.0]), "have"),
        (dict(load_tolerance=150), "load_tolerance"),
    ])
    def test_bad_settings(self, kw, word):
        """An unusable setting raises InputError naming it."""
        args = dict(voltage=12.0, resistance=0.1, max_current=5)
        args.update(kw)
        with pytest.raises(InputError, match=word):
            plan(args.pop("voltage"), args.pop("resistance"), **args)


class TestWarningsAndCautions:
    def test_hazardous_voltage(self):
        """An expected voltage above 60 V DC gives a warning and the hazard caution."""
        p = plan(400.0, 2.0, max_current=1, voltage_accuracy=VA)
        assert any("above 60 V DC" in w for w in p.warnings)
        assert any(c.startswith("Hazardous voltage") for c in p.cautions)

    def test_cautions_end_with_the_deferral(self):
        """Every plan ends its cautions with the deferral to codes, manuals and practice."""
        for kw in (dict(), dict(battery=False), dict(max_power=5.0)):
            p = plan(12.0, 0.1, max_current=3, voltage_accuracy=VA, **kw)
            assert p.cautions[-1] == DEFERRAL
            assert len(p.cautions) >= 4

    def test_missing_voltmeter_means_no_prediction(self):
        """Without a voltmeter accuracy the uncertainties are not predicted, and it says so."""
        p = plan(12.0, 0.1, max_current=3)
        assert math.isnan(p.u_rth) and math.isnan(p.u_vth)
        assert any("--voltage-accuracy" in w for w in p.warnings)
        assert p.to_dict()["predicted"] == {"u_vth": None, "u_rth": None,
                                            "u_rth_ends_only": None, "u_rth_meters_only": None}

    def test_poor_resolution_warned(self):
        """A plan whose sag is too small to resolve Rth says so."""
        p = plan(12.6, 0.005, max_current=1, voltage_accuracy=VA)
        assert any("poorly resolved" in w for w in p.warnings)

    def test_trade_off_explained(self):
        """The notes compare with an ends-only plan, which has the smaller u(Rth)."""
        p = plan(12.0, 0.1, max_current=5, voltage_accuracy=VA, load_tolerance=1.0)
        assert p.u_rth_ends < p.u_rth
        assert any("ends-only" in n for n in p.notes)
        assert any("curvature" in n for n in p.notes)

    def test_json_keys(self):
        """The JSON document has the documented keys (null load = open circuit)."""
        d = plan(12.0, 0.1, max_current=5, voltage_accuracy=VA).to_dict()
        assert {"loads", "predicted", "warnings", "cautions"} <= set(d)
        assert d["loads"][0]["load_ohm"] is None
        assert set(d["loads"][0]) >= {"load_ohm", "current_A", "voltage_V", "power_W"}
        assert set(d["predicted"]) >= {"u_vth", "u_rth"}


# meters with a stated noise: the plan then predicts with the shared-error model, and the
# simulation draws the same bench (gain and offset once per sweep, noise per reading)
VA_N = VA.with_noise(parse_accuracy("0.3mV", "V"))
IA_N = IA.with_noise(parse_accuracy("0.5mA", "A"))


def _scatter(p, runs, *, seed, measure_current, tol):
    run = simulate(p.vth, p.rth, p.load, duts=runs, seed=seed, voltage_accuracy=VA_N,
                   current_accuracy=IA_N if measure_current else None, load_tolerance=tol,
                   measure_current=measure_current, per_dut_loads=True)
    fits = fit_lines(run.to_readings(voltage_accuracy=VA_N,
                                     current_accuracy=IA_N if measure_current else None,
                                     load_tolerance=tol))
    return np.std(fits.vth, ddof=1), np.std(fits.rth, ddof=1)


class TestPrediction:
    @pytest.mark.slow
    @pytest.mark.reference("Monte Carlo propagation, JCGM 101:2008 (GUM Supplement 1) 7; "
                           "York et al. (2004) a-priori covariance")
    @pytest.mark.parametrize("measure_current", [False, True])
    def test_predicted_uncertainty_matches_simulated_scatter(self, measure_current):
        """The predicted u(Rth) and u(Vth) match the scatter of 2,000 simulated runs of the
        plan (resistors drawn per run) within Monte-Carlo error."""
        kw = dict(current_accuracy=IA_N) if measure_current else {}
        p = plan(12.6, 0.05, max_current=20, series="E24", points=7, voltage_accuracy=VA_N,
                 load_tolerance=2.0, **kw)
        sd_v, sd_r = _scatter(p, 2000, seed=61, measure_current=measure_current, tol=2.0)
        # the standard deviation of 2,000 draws has a relative standard error of 1.6 %;
        # ±8 % is five of them
        assert sd_r / p.u_rth == pytest.approx(1.0, abs=0.08)
        assert sd_v / p.u_vth == pytest.approx(1.0, abs=0.08)

    def test_resistor_share_reported(self):
        """With loose resistors and the current computed from the load, the notes say the
        tolerance dominates u(Rth), and exact resistors would predict less."""
        p = plan(5.0, 1.0, max_current=0.5, have=[100, 47, 22, 15, 10], voltage_accuracy=VA,
                 load_tolerance=10.0)
        assert p.u_rth_meters < p.u_rth
        assert any("resistor tolerance (10 %)" in n for n in p.notes)


@st.composite
def _cases(draw):
    vth = draw(st.floats(0.5, 500.0))
    rth = draw(st.floats(1e-3, 50.0))
    isc = vth / rth
    return dict(
        voltage=vth, resistance=rth,
        max_current=draw(st.floats(1e-3, 2.0)) * isc,
        max_power=draw(st.one_of(st.none(), st.floats(0.05, 500.0))),
        derating=draw(st.floats(0.0, 90.0)),
        series=draw(st.sampled_from(["E6", "E12", "E24", "E48", "E96"])),
        points=draw(st.integers(3, 12)),
        battery=draw(st.booleans()),
        have=draw(st.one_of(st.none(), st.lists(st.one_of(
            st.just(0.0), st.just(math.inf), st.floats(1e-3, 1e5)), min_size=1, max_size=10))),
    )


class TestLimitsProperty:
    @settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(_cases())
    def test_limits_never_exceeded(self, case):
        """No proposed plan exceeds the current limit or the derated power rating, or puts a
        short on a battery; an impossible plan is refused instead."""
        try:
            p = plan(case.pop("voltage"), case.pop("resistance"), voltage_accuracy=VA,
                     current_accuracy=IA, **case)
        except InputError as exc:
            assert "no load" in str(exc)
            return
        assert math.isinf(p.load[0]) and len(p) >= 2
        assert np.all(p.current <= case["max_current"] * (1 + 1e-9))
        if case["max_power"] is not None:
            allowed = case["max_power"] * (1 - case["derating"] / 100)
            assert np.all(p.power <= allowed * (1 + 1e-9))
        if case["battery"]:
            assert not np.any(p.load == 0)
        assert len(set(p.load.tolist())) == len(p)
        assert p.cautions[-1] == DEFERRAL


def _cli(argv, capsys):
    from sagfit.cli import main

    with pytest.raises(SystemExit) as exc:
        main(argv)
    out = capsys.readouterr()
    return exc.value.code, out.out, out.err


class TestPlanCommand:
    ARGS = ["plan", "--voltage", "12.6V", "--resistance", "50mohm", "--max-current", "10A",
            "--max-power", "100W", "--voltage-accuracy", "0.05%+2mV", "--load-tolerance", "1%"]

    def test_terminal_output(self, capsys):
        """The terminal plan lists the loads, the prediction, and ends with the deferral."""
        code, out, err = _cli(self.ARGS, capsys)
        assert code == 0 and err == ""
        assert "open" in out and "predicted standard uncertainties" in out
        assert out.rstrip().splitlines()[-1] == "caution: " + DEFERRAL

    def test_json_document(self, capsys):
        """--json prints only the JSON document with the documented keys."""
        import json

        code, out, _ = _cli(self.ARGS + ["--json"], capsys)
        doc = json.loads(out)
        assert code == 0 and doc["loads"][0]["load_ohm"] is None
        assert doc["predicted"]["u_rth"] > 0 and doc["cautions"][-1] == DEFERRAL
        assert all(l["power_W"] <= 50.0 for l in doc["loads"])

    def test_own_list_with_a_short_on_a_battery(self, capsys):
        """A short in --have on a battery is refused in the warnings, not planned."""
        import json

        code, out, _ = _cli(["plan", "--voltage", "12.6", "--resistance", "0.05", "--have",
                             "1,2.2,4.7,10,short", "--json"], capsys)
        doc = json.loads(out)
        assert code == 0 and all(l["load_ohm"] != 0 for l in doc["loads"])
        assert any("short left out" in w for w in doc["warnings"])

    @pytest.mark.parametrize("extra, option", [
        (["--series", "E7"], "--series"), (["--points", "2"], "--points"),
        (["--derating", "50"], "--derating"), (["--max-power", "3V"], "--max-power"),
        (["--have", "1,x"], "--have"), (["--resistance", "0"], "--resistance"),
    ])
    def test_bad_option_is_one_error_line(self, capsys, extra, option):
        """A bad option value gives one `error:` line naming the option, exit status 2."""
        code, out, err = _cli(self.ARGS + extra, capsys)
        assert code == 2 and out == ""
        assert err.startswith(f"error: option {option}") and err.count("\n") == 1

    def test_impossible_plan_refused(self, capsys):
        """A plan no resistor can meet is refused with the reason, exit status 2."""
        code, _, err = _cli(["plan", "--voltage", "12", "--resistance", "1", "--max-current",
                             "1mA", "--have", "1,2"], capsys)
        assert code == 2 and err.startswith("error: plan refused: no load")
