"""The acceptance spec reader (sagfit.io_spec): the documented format and strict validation.

Plumbing tests of our own file format (no outside reference applies), except the unit
parsing, which follows the SI Brochure (9th ed., 2019) prefixes.
"""

import math

import pytest

from sagfit.core.errors import SpecFileError
from sagfit.io.spec import parse_spec, read_spec

MINIMAL = """
[limits.vth]
min = "4.75V"
max = "5.25V"
[limits.rth]
max = "0.1ohm"
[decision]
rule = "guarded"
"""

FULL = """
[spec]
name = "SH5 rev D 5 V rail"
revision = "A"
[limits.vth]
min = "4.75V"
max = "5250 mV"
[limits.rth]
max = "100 mohm"
[limits.isc]
min = "20A"
[limits.pmax]
min = "0.1kW"
[[limits.voltage]]
at = "1.5A"
min = "4.85V"
[[limits.voltage]]
at = "4k7"
min = "4.9V"
[[limits.voltage]]
at = "3.3Ω"
min = "4.8V"
name = "v_full_load"
[limits.regulation]
light = "open"
heavy = "2.2ohm"
max = "1.5%"
[decision]
rule = "risk"
k = 2
min_conformance = 0.99
cap_flagged = false
ignore_flags = ["scale-applied"]
"""


def err(text) -> SpecFileError:
    with pytest.raises(SpecFileError) as exc:
        parse_spec(text, "spec.toml")
    return exc.value


class TestValidSpecs:
    def test_minimal_form_of_the_issue(self):
        """The minimal spec of issue 4 reads as two checks under the guarded rule."""
        spec = parse_spec(MINIMAL, "spec.toml")
        assert [(c.name, c.lower, c.upper) for c in spec.checks] == [
            ("vth", 4.75, 5.25), ("rth", -math.inf, 0.1)]
        assert spec.decision.rule == "guarded" and spec.decision.k is None
        assert spec.decision.cap_flagged is True

    @pytest.mark.reference("BIPM, The International System of Units (SI Brochure, 9th ed., "
                           "2019), Table 7 prefixes; IEC 60062:2016 RKM code (4k7)")
    def test_full_form_with_prefixed_units(self):
        """SI-prefixed strings, RKM codes and per-cent limits are read into SI units."""
        spec = parse_spec(FULL, "spec.toml")
        c = {x.name: x for x in spec.checks}
        assert c["vth"].upper == pytest.approx(5.25)
        assert c["rth"].upper == pytest.approx(0.1)
        assert c["pmax"].lower == pytest.approx(100.0)
        assert c["v_at_1.5A"].at.kind == "current" and c["v_at_1.5A"].at.value == 1.5
        assert c["v_at_4k7"].at.kind == "load" and c["v_at_4k7"].at.value == pytest.approx(4700)
        assert c["v_full_load"].at.value == pytest.approx(3.3)
        reg = c["regulation_open_to_2.2ohm"]
        assert math.isinf(reg.light.value) and reg.heavy.value == pytest.approx(2.2)
        assert reg.upper == 1.5 and reg.unit == "%"
        d = spec.decision
        assert (d.rule, d.k, d.min_conformance, d.cap_flagged, d.ignore_flags) == (
            "risk", 2.0, 0.99, False, ("scale-applied",))
        assert spec.name == "SH5 rev D 5 V rail" and len(spec.sha256) == 64

    def test_ohm_sign_and_greek_omega(self):
        """Both the Greek capital omega and the OHM SIGN (U+2126) are read as ohms."""
        a = parse_spec('[limits.rth]\nmax = "40m\u03a9"\n')
        b = parse_spec('[limits.rth]\nmax = "40m\u2126"\n')
        assert a.checks[0].upper == pytest.approx(0.04) == b.checks[0].upper

    def test_sample_spec_reads(self):
        """The spec shipped in sample_runs/ is valid."""
        import pathlib

        path = pathlib.Path(__file__).resolve().parents[1] / "sample_runs" / "accept_spec.toml"
        spec = read_spec(str(path))
        assert spec.decision.confidence == 0.95 and len(spec.checks) == 4


class TestErrorsNameTheKey:
    @pytest.mark.parametrize("text,key,words", [
        ("[limits.vth]\nmin = \"5.3V\"\nmax = \"5.2V\"\n", "limits.vth.min", "above max"),
        ("[limits.vth]\nminimum = 5.3\n", "limits.vth.minimum", "unknown key"),
        ("[limit.vth]\nmin = \"5.3V\"\n", "limit", "unknown section"),
        ("[limits.vtH]\nmin = \"5.3V\"\n", "limits.vtH", "unknown key"),
        ("[limits.vth]\nmin = true\n", "limits.vth.min", "true/false"),
        ("[limits.vth]\nmin = [1, 2]\n", "limits.vth.min", "number"),
        ("[limits.vth]\nmin = \"4.75A\"\n", "limits.vth.min", "in V"),
        ("[limits.rth]\nmax = \"lots\"\n", "limits.rth.max", "cannot read"),
        ("[limits.vth]\nnote = \"x\"\n", "limits.vth", "min and/or max"),
        ("[limits.regulation]\nlight = \"open\"\nheavy = \"2ohm\"\nmax = 1.5\n",
         "limits.regulation.max", "ambiguous"),
        ("[limits.regulation]\nlight = \"open\"\nmax = \"1%\"\n", "limits.regulation.heavy",
         "missing"),
        ("[limits.regulation]\nlight = \"1ohm\"\nheavy = \"2ohm\"\nmax = \"1%\"\n",
         "limits.regulation.light", "less current"),
        ("[[limits.voltage]]\nat = 1.5\nmin = \"4.8V\"\n", "limits.voltage[0].at", "ambiguous"),
        ("[[limits.voltage]]\nat = \"1.5\"\nmin = \"4.8V\"\n", "limits.voltage[0].at", "ambiguous"),
        ("[[limits.voltage]]\nat = \"100m\"\nmin = \"4.8V\"\n", "limits.voltage[0].at", "ambiguous"),
        ("[[limits.voltage]]\nat = \"0ohm\"\nmin = \"4.8V\"\n", "limits.voltage[0].at", "short"),
        ("[[limits.voltage]]\nmin = \"4.8V\"\n", "limits.voltage[0].at", "missing"),
        ("[[limits.voltage]]\nat = \"1A\"\nmin = \"4.8V\"\n[[limits.voltage]]\nat = \"1A\"\n"
         "min = \"4.7V\"\n", "limits.voltage[1]", "used twice"),
        ("[limits.vth]\nmin = \"4.8V\"\n[decision]\nrule = \"lenient\"\n", "decision.rule",
         "one of"),
        ("[limits.vth]\nmin = \"4.8V\"\n[decision]\nk = 2\nconfidence = 0.95\n", "decision.k",
         "either"),
        ("[limits.vth]\nmin = \"4.8V\"\n[decision]\nconfidence = 95\n", "decision.confidence",
         "between 0 and 1"),
        ("[limits.vth]\nmin = \"4.8V\"\n[decision]\nmin_conformance = 0.4\n",
         "decision.min_conformance", "above 0.5"),
        ("[limits.vth]\nmin = \"4.8V\"\n[decision]\ncap_flagged = \"yes\"\n", "decision.cap_flagged",
         "true or false"),
        ("[limits.vth]\nmin = \"4.8V\"\n[decision]\nignore_flags = \"curvature\"\n",
         "decision.ignore_flags", "list"),
        ("[decision]\nrule = \"simple\"\n", "limits", "no limits"),
        ("[limits.vth]\nmin = inf\n", "limits.vth.min", "finite"),
    ])
    def test_error_names_key(self, text, key, words):
        """Each invalid spec raises SpecFileError naming the file and the key at fault."""
        e = err(text)
        assert e.key == key
        assert str(e).startswith(f"spec.toml, key {key}: ")
        assert words in str(e)

    def test_toml_syntax_error_names_line(self):
        """A TOML syntax error is reported with its line."""
        e = err("[limits.vth]\nmin = = 4\n")
        assert "line 2" in str(e)

    def test_missing_file_and_folder(self, tmp_path):
        """A missing file or a folder is a one-line SpecFileError."""
        with pytest.raises(SpecFileError, match="no such file"):
            read_spec(str(tmp_path / "nope.toml"))
        with pytest.raises(SpecFileError, match="folder"):
            read_spec(str(tmp_path))

    def test_not_utf8(self, tmp_path):
        """A binary file is refused."""
        p = tmp_path / "s.toml"
        p.write_bytes(b"\xff\xfe\x00garbage")
        with pytest.raises(SpecFileError):
            read_spec(str(p))


@pytest.mark.parametrize("body", ["[decision]\nk = " + "9" * 400,
                                  "[limits.vth]\nmin = " + "9" * 400])
def test_integer_too_large_for_a_float_is_a_clean_error(tmp_path, body):
    """A TOML integer beyond the float range is refused with a one-line error naming the
    key (not an internal error)."""
    from sagfit.core.errors import SpecFileError
    from sagfit.io.spec import read_spec

    p = tmp_path / "s.toml"
    p.write_text("[limits.rth]\nmax = \"40mohm\"\n" + body + "\n")
    with pytest.raises(SpecFileError) as exc:
        read_spec(str(p))
    assert "decision.k" in str(exc.value) or "limits.vth" in str(exc.value)
