"""Network data, admittances, power flow and the case-file reader against references.

Tolerances: 1e-8 as the acceptance asks (agreement with the reference library to 1e-8).
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from robustbox import CaseFileError, NetworkError
from robustbox.grid.casefile import read_case, write_case
from robustbox.grid.network import Network
from robustbox.grid.powerflow import case_power_flow

pypower = pytest.importorskip("pypower.api", reason="PYPOWER (test extra) is the reference library")
CASES = ["case9", "case14", "case30", "case118", "case300"]


def _net(name: str) -> Network:
    ppc = getattr(pypower, name)()
    return Network.from_tables(name, ppc["baseMVA"], ppc["bus"], ppc["gen"], ppc["branch"], ppc.get("gencost"))


@pytest.mark.parametrize("name", CASES)
def test_admittance_matches_pypower_makeybus(name):
    # Reference: PYPOWER 5.1.21 makeYbus (port of MATPOWER's makeYbus) on its bundled case data.
    ppc = pypower.ext2int(getattr(pypower, name)())
    ref, _, _ = pypower.makeYbus(ppc["baseMVA"], ppc["bus"], ppc["branch"])
    ours = _net(name).admittance()[0]
    assert abs(ours - ref).max() <= 1e-8


@pytest.mark.parametrize("name", CASES)
def test_rectangular_forms_match_pypower_flows(name):
    # Reference: PYPOWER 5.1.21 runpf branch flows (columns PF, QF, PT, QT of the branch table, MW/Mvar)
    # and makeYbus's Yf, Yt for the branch currents; our forms evaluated at PYPOWER's voltages.
    from robustbox.grid.forms import branch_flow_forms, current_forms, injection_forms, voltage_forms
    res, ok = pypower.runpf(getattr(pypower, name)(), pypower.ppoption(VERBOSE=0, OUT_ALL=0, PF_TOL=1e-12))
    assert ok
    net = _net(name)
    v = res["bus"][:, 7] * np.exp(1j * np.radians(res["bus"][:, 8]))
    x = np.concatenate([v.real, v.imag])
    on = net.branch_on
    flows = branch_flow_forms(net).evaluate(x).reshape(-1, 4) * net.base_mva
    assert np.max(np.abs(flows - res["branch"][on][:, 13:17])) <= 1e-8  # MW/Mvar
    ppc = pypower.ext2int(getattr(pypower, name)())
    _, yf, yt = pypower.makeYbus(ppc["baseMVA"], ppc["bus"], ppc["branch"])
    cur = current_forms(net).evaluate(x).reshape(-1, 2)
    assert np.max(np.abs(cur[:, 0] - np.abs(yf @ v) ** 2)) <= 1e-8
    assert np.max(np.abs(cur[:, 1] - np.abs(yt @ v) ** 2)) <= 1e-8
    assert np.max(np.abs(voltage_forms(net).evaluate(x) - np.abs(v) ** 2)) <= 1e-12
    ybus = pypower.makeYbus(ppc["baseMVA"], ppc["bus"], ppc["branch"])[0]
    s_bus = v * np.conj(ybus @ v)
    inj = injection_forms(net).evaluate(x)
    assert np.max(np.abs(inj - np.concatenate([s_bus.real, s_bus.imag]))) <= 1e-8


@pytest.mark.parametrize("name", CASES)
def test_power_flow_matches_pypower_runpf(name):
    # Reference: PYPOWER 5.1.21 runpf (Newton, MATPOWER's default) with PF_TOL = 1e-12.
    res, ok = pypower.runpf(getattr(pypower, name)(), pypower.ppoption(VERBOSE=0, OUT_ALL=0, PF_TOL=1e-12))
    assert ok
    ref = res["bus"][:, 7] * np.exp(1j * np.radians(res["bus"][:, 8]))
    ours = case_power_flow(_net(name))
    assert ours.converged
    assert np.max(np.abs(ours.voltage - ref)) <= 1e-8


@pytest.mark.parametrize("name", CASES)
def test_case_file_round_trip_is_lossless(name, tmp_path):
    net = _net(name)
    write_case(net, tmp_path / f"{name}.m")
    back = read_case(tmp_path / f"{name}.m")
    for a, b in ((net.bus, back.bus), (net.gen, back.gen), (net.branch, back.branch)):
        assert np.array_equal(a, b, equal_nan=True)
    assert back.base_mva == net.base_mva


CASE_TEXT = """function mpc = tiny
% a comment; with % signs
mpc.version = '2';
mpc.baseMVA = 100;
mpc.bus = [
\t1\t3\t0\t0\t0\t0\t1\t1\t0\t132\t1\t1.1\t0.9;
\t2\t1\t50, 10, 0 0 1 1 0 132 1 1.1 0.9
];
mpc.gen = [1 0 0 100 -100 1.0 100 1 200 0];
mpc.branch = [1 2 .01 1e-1 0 100 100 100 0 0 1 -30 30];
mpc.gencost = [2 0 0 3 0.01 10 0];
"""


def test_reader_accepts_format_variants(tmp_path):
    path = tmp_path / "tiny.m"
    path.write_text(CASE_TEXT)
    net = read_case(path)
    assert net.n_bus == 2 and net.bus[1, 2] == 50.0 and net.branch[0, 3] == 0.1  # values written in CASE_TEXT


@pytest.mark.parametrize("mutation, message", [
    (("mpc.baseMVA = 100;", "mpc.baseMVA = abc;"), r"tiny.m:4: expected a number"),
    (("50, 10, 0 0", "50, 10, x 0"), r"tiny.m:7: expected a number, found 'x'"),
    (("mpc.gen = [1 0", "mpc.gen = [7 0"), r"tiny.m:9 \(mpc.gen row 1\): generator at bus 7"),
    (("1 2 .01 1e-1", "1 9 .01 1e-1"), r"tiny.m:10 \(mpc.branch row 1\): branch end at bus 9"),
    (("mpc.bus = [", "mpc.bus = ["), None),
])
def test_reader_errors_name_file_and_line(tmp_path, mutation, message):
    path = tmp_path / "tiny.m"
    path.write_text(CASE_TEXT.replace(*mutation))
    if message is None:
        read_case(path)
        return
    with pytest.raises((CaseFileError, NetworkError), match=message):
        read_case(path)


def test_missing_file_is_a_clear_error(tmp_path):
    with pytest.raises(CaseFileError, match="cannot read the file"):
        read_case(tmp_path / "nope.m")


@settings(max_examples=1500, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_fuzzed_case_files_parse_or_raise_our_error(tmp_path, data):
    text = CASE_TEXT
    for _ in range(data.draw(st.integers(1, 4))):
        pos = data.draw(st.integers(0, len(text)))
        op = data.draw(st.sampled_from(["delete", "insert", "replace"]))
        chunk = data.draw(st.text(alphabet="0123456789.,;[]%=' -eE\nxInfNa", min_size=1, max_size=4))
        if op == "delete":
            text = text[:pos] + text[pos + len(chunk):]
        elif op == "insert":
            text = text[:pos] + chunk + text[pos:]
        else:
            text = text[:pos] + chunk + text[pos + len(chunk):]
    path = tmp_path / "fuzz.m"
    path.write_text(text)
    try:
        net = read_case(path)
    except (CaseFileError, NetworkError):
        return
    assert isinstance(net, Network)
