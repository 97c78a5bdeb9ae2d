"""Box objectives beyond the uniform one: per-site hosting capacity, widths and volume never below uniform.

Networks: PGLib-OPF v23.07 case118_ieee (skipped when the shared data is absent) and PYPOWER 5.1.21's
classic case9/case14/case30.  Every box is checked through its box file by the independent validator
(robustbox.study.check_box; its power flow is checked against PYPOWER runpf in tests/test_grid.py).
The 1e-9 allowances in the comparisons are floating-point rounding of sums of MW values, and 1e-3 MW the
smallest spread counted as "distinct" (both common practice, no source).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from conftest import pglib_case
from robustbox.certify import CertifyOptions
from robustbox.grid.network import Network
from robustbox.study import certify_case, check_box, result_to_json

pypower = pytest.importorskip("pypower.api", reason="PYPOWER (test extra) carries the classic IEEE cases")


def _checked(res, samples: int = 120) -> dict:
    data = json.loads(json.dumps(result_to_json(res)))
    rep = check_box(res.network, data, samples=samples)
    assert data["status"] == "certified" and rep.passed, rep.examples
    return data


def _width_mw(data: dict) -> np.ndarray:
    return np.array([e["upper"] - e["lower"] for e in data["box"]])


def test_hosting_gives_each_site_its_own_upper_end_on_case118():
    case = pglib_case("pglib_opf_case118_ieee")
    reach = CertifyOptions(max_fraction=10.0)  # the command's default reach for hosting
    hosting = _checked(certify_case(case, "renewables", 0.05, "hosting", options=reach))
    uniform = _checked(certify_case(case, "renewables", 0.05, "uniform", options=reach))
    up_h, up_u = _width_mw(hosting), _width_mw(uniform)  # sites: lower end = nominal, so width = hosting MW
    assert up_h.sum() >= up_u.sum() - 1e-9
    assert np.ptp(up_h) > 1e-3  # not one common value for every site
    assert all(e["lower"] == pytest.approx(e["nominal"]) for e in hosting["box"])


@pytest.mark.parametrize("name", ["case9", "case14", "case30"])
@pytest.mark.parametrize("objective", ["widths", "volume"])
def test_widths_and_volume_never_do_worse_than_uniform(name, objective):
    ppc = getattr(pypower, name)()
    net = Network.from_tables(name, ppc["baseMVA"], ppc["bus"], ppc["gen"], ppc["branch"], ppc.get("gencost"))
    uniform = _checked(certify_case(net, "loads", 0.2, "uniform"))
    other = _checked(certify_case(net, "loads", 0.2, objective))
    band = np.array([e["requested_upper"] - e["requested_lower"] for e in uniform["box"]])
    rel_u, rel_o = _width_mw(uniform) / band, _width_mw(other) / band
    if objective == "widths":
        assert rel_o.sum() >= rel_u.sum() * (1 - 1e-9)
    else:
        assert np.log(rel_o).sum() >= np.log(rel_u).sum() - 1e-9
