"""N-1 security: contingency files, emergency ratings, post-outage points, secure boxes validated by sampling."""
from __future__ import annotations

import numpy as np
import pytest

from conftest import pglib_case
from robustbox.cli import main
from robustbox.contingency import certify_secure, validate_outages
from robustbox.errors import CaseFileError
from robustbox.fanout import FanOut
from robustbox.grid.casefile import read_case
from robustbox.grid.model import solve_opf
from robustbox.grid.network import BRANCH_LIMIT_A, BRANCH_LIMIT_B, BRANCH_LIMIT_C, BRANCH_ON
from robustbox.grid.security import all_outages, emergency_ratings, outage_network, read_contingencies
from robustbox.study import point_to_json

pypower = pytest.importorskip("pypower.api", reason="PYPOWER (test extra) is the reference library")


def test_contingency_file_names_rows_and_reports_errors_with_line(tmp_path):
    net = read_case(pglib_case("pglib_opf_case30_ieee"))
    good = tmp_path / "list.txt"
    good.write_text("# two outages\nbranch 1 2   # the first line\n\ngen row 2\nbranch row 7\n")
    labels = [o.label for o in read_contingencies(good, net)]
    # rows from the case file itself: mpc.branch row 1 is 1-2, row 7 is 4-6; mpc.gen row 2 is at bus 2
    assert labels == ["branch 1-2 (row 1)", "gen at bus 2 (row 2)", "branch 4-6 (row 7)"]
    for text, what in (("branch 1 99\n", "no branch joins"), ("gen 7\n", "no generator at bus 7"),
                       ("line 1 2\n", "starts with 'branch' or 'gen'"), ("branch row x\n", "whole numbers"),
                       ("branch 1 2\nbranch 2 1\n", "already listed on line 2")):
        bad = tmp_path / "bad.txt"
        bad.write_text("# header\n" + text)
        with pytest.raises(CaseFileError, match=what) as err:
            read_contingencies(bad, net)
        assert str(bad) in str(err.value) and (":2:" in str(err.value) or ":3:" in str(err.value))
    assert main(["certify", str(pglib_case("pglib_opf_case30_ieee")), "--contingencies", str(bad)]) == 2


def test_emergency_rating_rule():
    net = read_case(pglib_case("pglib_opf_case30_ieee"))
    net.branch[0, [BRANCH_LIMIT_A, BRANCH_LIMIT_B, BRANCH_LIMIT_C]] = [100, 120, 150]
    net.branch[1, [BRANCH_LIMIT_A, BRANCH_LIMIT_B, BRANCH_LIMIT_C]] = [100, 0, 150]
    net.branch[2, [BRANCH_LIMIT_A, BRANCH_LIMIT_B, BRANCH_LIMIT_C]] = [100, 0, 0]
    assert emergency_ratings(net)[:3].tolist() == [120, 150, 100]  # the rule as stated in the issue
    out = outage_network(net, all_outages(net)[5])
    assert out.branch[0, BRANCH_LIMIT_A] == 120 and out.branch[5, BRANCH_ON] == 0  # emergency rating set above; outage 5 takes row 5 out


def test_post_outage_flows_match_pypower():
    """Slack policy, branch outage: our post-outage point equals PYPOWER's runpf of the outaged case."""
    from robustbox.grid.network import Network
    from robustbox.grid.security import post_outage_point
    from robustbox.study import power_flow_point
    ppc = pypower.case30()
    net = Network.from_tables("case30", ppc["baseMVA"], ppc["bus"], ppc["gen"], ppc["branch"], ppc["gencost"])
    op = power_flow_point(net)
    outage = [o for o in all_outages(net) if o.label.startswith("branch 2-4 ")][0]
    post = post_outage_point(net, op, outage_network(net, outage), "slack").point
    ref = pypower.case30()
    ref["branch"][outage.row, BRANCH_ON] = 0  # the MATPOWER v2 layout: column 11 is the branch status
    res, ok = pypower.runpf(ref, pypower.ppoption(VERBOSE=0, OUT_ALL=0, PF_TOL=1e-12))
    assert ok
    # columns 8 and 9 of PYPOWER's bus table are |V| (pu) and the angle (degrees), MATPOWER v2 layout;
    # tolerances: common practice, no source (both Newton runs converge to 1e-12 pu mismatch)
    assert np.allclose(post.v_mag_pu, res["bus"][:, 7], atol=1e-7)
    assert np.allclose(np.degrees(post.v_ang_rad - post.v_ang_rad[0]), res["bus"][:, 8] - res["bus"][0, 8], atol=1e-6)


def _validated(res, samples: int = 50):
    reports = validate_outages(res, samples=samples)
    assert reports  # at least one post-outage network was checked
    for label, rep in reports.items():
        assert rep.points >= 100 and rep.passed, (label, rep.examples)
    return reports


def test_case30_n1_box_from_scopf_is_valid_on_every_post_outage_network():
    res = certify_secure(pglib_case("pglib_opf_case30_ieee"), "n-1", "loads", 0.05, margin=0.02,
                         fanout=FanOut(serial=True), skip_insecure=True)
    c = res.counts()
    assert res.fraction > 0 and c["islanding"] == 3  # buses 11, 13, 26 hang on one branch each in the case file
    assert res.scopf is not None and res.scopf.objective_per_h >= res.scopf.plain_objective_per_h
    assert res.fraction <= res.intact_fraction
    _validated(res)


def test_case118_branch_outages_box_is_valid_and_dask_equals_serial(tmp_path):
    path = pglib_case("pglib_opf_case118_ieee")
    net = read_case(path)
    point = point_to_json(net, solve_opf(net, 0.05).point)
    listing = tmp_path / "branches.txt"
    listing.write_text("".join(f"branch row {o.row + 1}\n" for o in all_outages(net) if o.kind == "branch"))
    runs = [certify_secure(path, listing, "loads", 0.05, point=point, fanout=how, skip_insecure=True)
            for how in (FanOut(workers=2), FanOut(serial=True))]
    strip = [[(r.label, r.status, r.binding) for r in res.outages] for res in runs]
    assert strip[0] == strip[1]
    # same computation; the last bits may differ with the BLAS thread count (1 per Dask worker)
    assert np.allclose([r.fraction for r in runs[0].outages], [r.fraction for r in runs[1].outages], rtol=1e-9, atol=0)
    assert runs[0].fraction == pytest.approx(runs[1].fraction, rel=1e-9)
    res = runs[0]
    assert res.fraction > 0 and res.counts()["screened"] + res.counts()["certified"] > 0
    _validated(res)
