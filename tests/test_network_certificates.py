"""Certified boxes on benchmark networks survive independent sampling validation."""
from __future__ import annotations

import pytest

from conftest import pglib_case
from robustbox.certify import CertifyOptions
from robustbox.study import certify_case, check_box, result_to_json
from robustbox.validate import validate_box

# margin of the operating-point OPF per case: PGLib's case30_ieee has no feasible point with 5 % room on
# every limit (Ipopt reports local infeasibility), so it gets 2 %.
CASES = {"pglib_opf_case14_ieee": 0.05, "pglib_opf_case30_ieee": 0.02, "pglib_opf_case118_ieee": 0.05}


@pytest.mark.parametrize("name", CASES)
@pytest.mark.parametrize("uncertain, policy", [("loads", "slack"), ("renewables", "distributed")])
def test_certified_box_passes_sampling_validation(name, uncertain, policy):
    res = certify_case(pglib_case(name), uncertain, 0.2, "uniform", CASES[name], policy=policy,
                       options=CertifyOptions(max_fraction=1.0))
    cert = res.certificate
    assert cert.status == "certified" and cert.recheck().holds
    assert cert.certified_fraction > 0
    data = result_to_json(res)
    report = check_box(res.network, data, samples=250)
    assert report.passed, report.examples
    assert report.points >= 250  # the samples asked for above


def test_enlarged_box_is_caught_by_validation():
    res = certify_case(pglib_case("pglib_opf_case14_ieee"), "renewables", 1.0, "uniform", 0.1,
                       options=CertifyOptions(max_fraction=50.0))
    ns = res.nsys
    grow = 30.0
    rep = validate_box(res.network, ns.operating_point, ns.injections, res.certificate.lower * grow,
                       res.certificate.upper * grow, samples=100)
    assert not rep.passed


def test_dask_fan_out_matches_serial_validation():
    from dask.distributed import Client, LocalCluster

    res = certify_case(pglib_case("pglib_opf_case14_ieee"), "renewables", 0.5, "uniform", 0.1,
                       options=CertifyOptions(max_fraction=1.0))
    ns, cert = res.nsys, res.certificate
    serial = validate_box(res.network, ns.operating_point, ns.injections, cert.lower, cert.upper, samples=40)
    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        fanned = validate_box(res.network, ns.operating_point, ns.injections, cert.lower, cert.upper, samples=40,
                              client=client)
    assert fanned.points == serial.points and fanned.violations == serial.violations == 0
    assert fanned.worst_margin == serial.worst_margin
