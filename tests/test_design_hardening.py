"""`sagfit design` under hostile input (the guarantees of docs/hardening.md): random
netlists from the element grammar with broken fields, random bytes as a netlist, a
tolerance table and a measured-results file: exit status in {0, 1, 2}, one error line
naming the file, never a traceback or an internal error, inputs unchanged. Plumbing: no
numerical check here (the numbers are checked against ngspice and lcapy in
test_design_references.py)."""

from __future__ import annotations

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import digest
from test_hardening import check_run

FUZZ = settings(max_examples=60, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])
NODES = st.sampled_from(["0", "gnd", "a", "b", "c", "out", "A", "x y", "", "+", "-1"])
VALUES = st.one_of(
    st.sampled_from(["1k", "4k7", "1meg", "10m", "0", "-1", "1e400", "nan", "inf", "1e-300",
                     "1e300", "k", "DC", "tol=1%", "tol=x", "tol=150%", "2.2", "R47", "",
                     "∞", "=1+1"]),
    st.floats(-1e6, 1e6).map(lambda x: f"{x:.6g}"))
NAMES = st.sampled_from(["R1", "R2", "V1", "I1", "E1", "F1", "G1", "H1", "L1", "C1", "Q1",
                         "D1", "X1", ".port", ".end", ".tran", "*", "+", "V1", "VS"])


@st.composite
def netlists(draw):
    lines = []
    for _ in range(draw(st.integers(0, 8))):
        name = draw(NAMES)
        fields = draw(st.lists(st.one_of(NODES, VALUES), min_size=0, max_size=6))
        lines.append(" ".join([name, *fields]))
    if draw(st.booleans()):
        lines.append(f".port {draw(NODES)} {draw(NODES)}")
    return "\n".join(lines) + draw(st.sampled_from(["\n", "", "\r\n"]))


@FUZZ
@given(text=netlists())
def test_random_netlists(cli, tmp_path, text):
    path = tmp_path / "fuzz.cir"
    path.write_text(text, encoding="utf-8")
    before = digest(path)
    run = cli("design", path, "--draws", "200", "--json")
    check_run(run, path)
    assert run.code in (0, 2) and digest(path) == before


@FUZZ
@given(data=st.binary(max_size=300), which=st.sampled_from(["netlist", "tolerances",
                                                            "measured", "measured.json"]))
def test_random_bytes_anywhere(cli, tmp_path, data, which):
    net = tmp_path / "d.cir"
    net.write_text("V1 in 0 12 tol=1%\nR1 in tap 2k tol=1%\nR2 tap 0 2k tol=1%\n.port tap 0\n")
    junk = tmp_path / ("junk.json" if which == "measured.json" else "junk.csv")
    junk.write_bytes(data)
    args = {"netlist": [junk], "tolerances": [net, "--tolerances", junk],
            "measured": [net, "--measured", junk],
            "measured.json": [net, "--measured", junk]}[which]
    run = cli("design", *args, "--draws", "0")
    check_run(run, junk)
    assert junk.read_bytes() == data
