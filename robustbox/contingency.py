"""N-1 secure boxes: one box certified on the intact network and on every post-outage network.

A box inside a certified box is certified, so the joint box is the uniform
fraction t = min over networks of the certified fractions, times the requested
band.  Cheap screening first: the box certified on the intact network is
*verified* on each post-outage network (one fixed-point solve, no search); an
outage whose verification holds is proven not to bind the joint box.  Only the
others get a full uniform search.  Each outage is an independent item fanned
out with :func:`robustbox.fanout.run_all`; the result of an item depends only
on its inputs, so serial and Dask runs agree exactly.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from .certify import CertifyOptions, certify
from .errors import CertificateError, NetworkError, OperatingPointError, SolverError
from .fanout import FanOut, run_all
from .grid.casefile import read_case
from .grid.model import MARGIN_LADDER
from .grid.network import BRANCH_R, BUS_G_SHUNT, BUS_P_LOAD, GEN_P_HIGH, Network
from .grid.security import (Outage, SCOPFResult, all_outages, default_participation, islanded_buses, outage_network,
                            post_outage_point, read_contingencies, solve_scopf)
from .grid.system import Injection, OperatingPoint, Policy, build_system
from .study import CaseCertificate, point_from_json, result_to_json, scenario_injections
from .validate import ValidationReport, validate_box



@dataclass(frozen=True)
class OutageTask:
    """One post-outage certificate to compute (a pure function of these fields)."""

    network: Network
    point: OperatingPoint
    injections: tuple[Injection, ...]
    policy: Policy
    outage: Outage
    candidate_fraction: float
    options: CertifyOptions


@dataclass(frozen=True)
class OutageResult:
    """Outcome on one post-outage network.

    status: "screened" (the candidate box verified: cannot bind), "certified" (full search),
    "islanding" (skipped; ``detail`` names the cut-off buses), "uncoverable" (a generator outage after which
    the remaining capacity is below the load: skipped, ``detail`` gives both in MW) or "insecure" (no box;
    ``detail`` says why).
    fraction: certified fraction of the band (for "screened": at least the candidate), 0 otherwise.
    """

    label: str
    kind: str
    row: int
    status: str
    fraction: float
    binding: str
    detail: str
    time_s: float


def certify_outage(task: OutageTask) -> OutageResult:
    """Screen, then if needed certify, the box on the post-outage network of ``task.outage``."""
    t0 = time.perf_counter()
    o = task.outage
    out = outage_network(task.network, o)

    def done(status: str, fraction: float, binding: str, detail: str) -> OutageResult:
        return OutageResult(o.label, o.kind, o.row, status, fraction, binding, detail, time.perf_counter() - t0)

    post = post_outage_point(task.network, task.point, out, task.policy)
    if post.point is None:
        return done("insecure", 0.0, "", f"the post-outage power flow does not converge (mismatch {post.mismatch_pu:.3g} pu)")
    try:
        nsys = build_system(out, post.point, task.injections, task.policy)
        wl, wu = nsys.system.uncertain.band_lower, nsys.system.uncertain.band_upper
        t = task.candidate_fraction
        check = certify(nsys.system, nsys.point, "verify", box=(-t * wl, t * wu), options=task.options)
        if check.status == "certified":
            return done("screened", t, check.binding, "the candidate box is verified on this network")
        cert = certify(nsys.system, nsys.point, "uniform", options=task.options)
        return done("certified", float(cert.certified_fraction), cert.binding, cert.message)
    except (OperatingPointError, CertificateError, NetworkError) as exc:
        return done("insecure", 0.0, "", str(exc))


@dataclass(eq=False)
class SecureCertificate:
    """A box certified on the intact network and on every non-islanding post-outage network.

    ``intact`` holds the certificate of the joint box on the intact network (objective verify,
    its fraction the joint one); ``outages`` one result per outage: the studied ones in list order, then the skipped ones.
    """

    intact: CaseCertificate
    intact_fraction: float
    fraction: float
    outages: list[OutageResult]
    scopf: SCOPFResult | None
    limited_by: str
    limited_binding: str
    fanout: str
    timings_s: dict[str, float] = field(default_factory=dict)

    def counts(self) -> dict[str, int]:
        """Number of outages per status."""
        out = {"screened": 0, "certified": 0, "islanding": 0, "uncoverable": 0, "insecure": 0}
        for r in self.outages:
            out[r.status] += 1
        return out


def resolve_outages(net: Network, contingencies: str | Path) -> list[Outage]:
    """'n-1' (every in-service branch and generator) or a contingency file."""
    return all_outages(net) if str(contingencies).lower() == "n-1" else read_contingencies(contingencies, net)


def split_islanding(net: Network, outages: Sequence[Outage]) -> tuple[list[Outage], list[OutageResult]]:
    """(outages to study, results of the skipped ones): branch outages that island part of the grid, and
    generator outages whose loss leaves less generation capacity than load (with nonnegative branch
    resistances and shunt conductances the losses are ≥ 0, so no operating point can exist)."""
    keep, skipped = [], []
    load_mw = float(net.bus[:, BUS_P_LOAD].sum())
    passive = bool(np.all(net.branch[net.branch_on, BRANCH_R] >= 0) and np.all(net.bus[:, BUS_G_SHUNT] >= 0))
    for o in outages:
        cut = islanded_buses(outage_network(net, o)) if o.kind == "branch" else []
        left_mw = (float(net.gen[net.gen_on, GEN_P_HIGH].sum() - net.gen[o.row, GEN_P_HIGH])
                   if o.kind == "gen" else np.inf)
        if cut:
            skipped.append(OutageResult(o.label, o.kind, o.row, "islanding", 0.0, "",
                                        "cuts off bus(es) " + ", ".join(map(str, cut)), 0.0))
        elif passive and left_mw < load_mw:  # losses ≥ 0: generation must cover at least the load
            skipped.append(OutageResult(o.label, o.kind, o.row, "uncoverable", 0.0, "",
                                        f"leaves {left_mw:.1f} MW of generation capacity for {load_mw:.1f} MW of load: "
                                        "no operating point exists after it, whatever the dispatch", 0.0))
        else:
            keep.append(o)
    if len(net.gen_on) == 1:
        lone = [o for o in keep if o.kind == "gen"]
        if lone:
            raise NetworkError(f"{net.source}: {lone[0].label} is the only generator in service; no secure point exists")
    return keep, skipped


def secure_point(net: Network, outages: Sequence[Outage], policy: Policy, margin: float | None,
                 progress: Callable[[str], None] | None = None, skip_insecure: bool = False) -> SCOPFResult:
    """Preventive SCOPF point; without a ``margin`` the ladder MARGIN_LADDER is tried in turn."""
    ladder = (margin,) if margin is not None else MARGIN_LADDER
    for k, m in enumerate(ladder):
        try:
            return solve_scopf(net, outages, policy, m, progress=progress, name_culprits=k == len(ladder) - 1,
                               skip_insecure=skip_insecure)
        except SolverError:
            if k == len(ladder) - 1:
                raise
            if progress:
                progress(f"no secure point with margin {m:g}; trying {ladder[k + 1]:g}")
    raise AssertionError("unreachable: the ladder is not empty")


def certify_secure(case: str | Path | Network, contingencies: str | Path, uncertain="loads", band: float = 0.05,
                   margin: float | None = None, point: dict | None = None, policy: Policy = "distributed",
                   options: CertifyOptions = CertifyOptions(), fanout: FanOut = FanOut(),
                   point_source: str = "point file", progress: Callable[[str], None] | None = None,
                   bar: Callable[[int, int], None] | None = None, skip_insecure: bool = False) -> SecureCertificate:
    """The N-1 secure box (uniform objective) for the outages ``contingencies`` ('n-1' or a file).

    Operating point: ``point`` if given, else the preventive SCOPF.  Raises
    CertificateError naming every outage for which no box exists; with
    ``skip_insecure`` those outages are left out of the joint box and listed
    with status "insecure" and the reason.
    """
    t0 = time.perf_counter()
    net = case if isinstance(case, Network) else read_case(case)
    injections, scenario = scenario_injections(net, uncertain, band)
    outages, skipped = split_islanding(net, resolve_outages(net, contingencies))
    scopf = None
    if point is None:
        scopf = secure_point(net, outages, policy, margin, progress, skip_insecure)
        op = scopf.point
        gone = {label: why for label, why in scopf.excluded}
        skipped += [OutageResult(o.label, o.kind, o.row, "insecure", 0.0, "", gone[o.label], 0.0)
                    for o in outages if o.label in gone]
        outages = [o for o in outages if o.label not in gone]
    else:
        op = point_from_json(net, point, point_source)
    t1 = time.perf_counter()
    nsys = build_system(net, op, injections, policy)
    base = certify(nsys.system, nsys.point, "uniform", options=options)
    tasks = [OutageTask(net, op, tuple(injections), policy, o, float(base.certified_fraction), options) for o in outages]
    results = run_all(certify_outage, tasks, fanout, progress=bar, name="outage")
    t2 = time.perf_counter()
    bad = [r for r in results if r.status == "insecure"]
    if bad and not skip_insecure:
        raise CertificateError(f"no secure box: {len(bad)} outage(s) have no certified box at this operating point: "
                               + "; ".join(f"{r.label}: {r.detail}" for r in bad[:5]) + (" ..." if len(bad) > 5 else ""))
    fraction, limited_by, binding = float(base.certified_fraction), "intact network", base.binding
    for r in results:
        if r.status != "insecure" and r.fraction < fraction:
            fraction, limited_by, binding = r.fraction, r.label, r.binding
    joint = base
    if fraction < base.certified_fraction:  # the intact box shrunk to the joint fraction (recentring allowed)
        joint = certify(nsys.system, nsys.point, "uniform", options=replace(options, max_fraction=fraction))
        fraction = min(fraction, float(joint.certified_fraction))
    intact = CaseCertificate(net, nsys, joint, None, band, scenario)
    listed = list(results) + skipped
    return SecureCertificate(intact, float(base.certified_fraction), fraction, listed, scopf,
                             limited_by, binding, fanout.describe(),
                             {"operating_point_s": t1 - t0, "outages_s": t2 - t1, "total_s": time.perf_counter() - t0})


def secure_to_json(res: SecureCertificate) -> dict:
    """The result file with a "security" section (see docs/file-format.md)."""
    data = result_to_json(res.intact)
    data["certified_fraction"] = res.fraction
    for entry in data["box"]:
        entry["limited_by"] = res.limited_by
    data["binding_limit"] = f"{res.limited_by}: {res.limited_binding}"
    data["timings_s"] = dict(data["timings_s"], **res.timings_s)
    sec = {"intact_fraction": res.intact_fraction, "limited_by": res.limited_by, "limited_binding": res.limited_binding,
           "counts": res.counts(), "fanout": res.fanout,
           "emergency_ratings": "rateB, else rateC where nonzero, else rateA",
           "outages": [{"outage": r.label, "kind": r.kind, "row": r.row + 1, "status": r.status,
                        "certified_fraction": r.fraction, "binding": r.binding, "detail": r.detail,
                        "time_s": r.time_s} for r in res.outages]}
    if res.scopf is not None:
        s = res.scopf
        sec["scopf"] = {"objective_per_h": s.objective_per_h, "plain_objective_per_h": s.plain_objective_per_h,
                        "margin_objective_per_h": s.margin_objective_per_h, "margin": s.margin,
                        "cost_increase_per_h": s.cost_increase_per_h, "included_outages": list(s.included),
                        "rounds": s.rounds, "time_s": s.time_s}
    data["security"] = sec
    return data


def validate_outages(res: SecureCertificate, samples: int = 50, seed: int = 0, client=None
                     ) -> dict[str, ValidationReport]:
    """Independent sampling validation of the joint box on every post-outage network it is certified on
    (the islanding and skipped insecure outages carry no claim)."""
    net, nsys = res.intact.network, res.intact.nsys
    cert = res.intact.certificate
    out: dict[str, ValidationReport] = {}
    for r in res.outages:
        if r.status in ("islanding", "uncoverable", "insecure"):
            continue
        o = Outage(r.kind, r.row, r.label)  # type: ignore[arg-type]
        post_net = outage_network(net, o)
        post = post_outage_point(net, nsys.operating_point, post_net, nsys.policy)
        if post.point is None:
            raise CertificateError(f"{r.label}: the post-outage power flow does not converge")
        part = default_participation(post_net) if nsys.policy == "distributed" else None
        out[r.label] = validate_box(post_net, post.point, nsys.injections, cert.lower, cert.upper, nsys.policy, part,
                                    samples=samples, seed=seed, client=client)
    return out


def certify_secure_cli(args, point: dict | None, how: FanOut) -> tuple[dict, CaseCertificate]:
    """``robustbox certify ... --contingencies``: run and print the summary; returns the JSON and the intact certificate."""
    import sys

    from .fanout import progress_bar
    if args.objective != "uniform":
        raise NetworkError(f"--contingencies supports the uniform objective only, not '{args.objective}'")
    res = certify_secure(args.case, args.contingencies, args.uncertain, args.band, args.margin, point,
                         args.policy or "distributed", CertifyOptions(max_fraction=args.max_fraction), how,
                         args.point or "point file", progress=lambda text: print(text, file=sys.stderr),
                         bar=progress_bar("outages"), skip_insecure=args.skip_insecure)
    data = secure_to_json(res)
    print_secure_summary(data)
    return data, res.intact


def print_secure_summary(data: dict) -> None:
    """The command line's summary of an N-1 result file."""
    sec = data["security"]
    c = sec["counts"]
    print(f"case: {data['case']}")
    print(f"scenario: {data['scenario']}")
    if "scopf" in sec:
        s = sec["scopf"]
        print(f"operating point: preventive SCOPF, margin {s['margin']:g}, {len(s['included_outages'])} outage copies, "
              f"{s['rounds']} screening round(s), {s['time_s']:.1f} s")
        print(f"  cost {s['objective_per_h']:.2f} $/h; plain OPF {s['plain_objective_per_h']:.2f} $/h "
              f"(+{s['cost_increase_per_h']:.2f} $/h); OPF with the margin alone {s['margin_objective_per_h']:.2f} $/h")
    print(f"outages: {sum(c.values())} listed: {c['screened']} screened (cannot bind), {c['certified']} certified "
          f"in full, {c['islanding']} islanding (skipped), {c['uncoverable']} uncoverable (skipped), "
          f"{c['insecure']} insecure (skipped)")
    for r in sec["outages"]:
        if r["status"] in ("islanding", "uncoverable", "insecure"):
            print(f"  {r['status']}: {r['outage']}: {r['detail']}")
    print(f"status: {data['status']}   N-1 certified fraction of the band: {data['certified_fraction']:.4g} "
          f"(intact network alone: {sec['intact_fraction']:.4g})")
    print(f"every face limited by: {sec['limited_by']} ({sec['limited_binding']})")
    t = data["timings_s"]
    print(f"time: {t['operating_point_s']:.1f} s operating point, {t['outages_s']:.1f} s certificates "
          f"({sec['fanout']}), {t['total_s']:.1f} s total")
