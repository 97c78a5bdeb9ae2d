"""How conservative, how fast: certified boxes against the empirical true region, PGLib-OPF cases.

For every case (TYP and API, up to --max-buses) and two uncertainty scenarios
  A: P and Q of every load within ± t × nominal,
  B: five sites at the five largest-load PQ buses, each injecting 0 .. t × 100 MW,
this prints side by side, in one run:
  - the operating point: margin AC-OPF (margin ladder 0.1, 0.05, 0.02, 0.01: the first that solves; then the
    same ladder with untightened generator P and Q limits, for congested cases; last the plain OPF, whose
    point sits on its limits, so that the box is empty),
    its cost increase over the published AC optimum (PGLib-OPF v23.07 BASELINE);
  - certified t, an empirical UPPER bound on the true t (bisection; Newton power flows at all vertices
    when ≤ 12 uncertain injections, else ≥ 300 random vertices plus the vertices worst for the
    linearised tightest limits, plus interior points), their ratio, per-axis ratios (median, min);
  - validation of the certified box (must show zero violations);
  - naive baselines: the linearised box (uncertified; share of its vertices that violate limits) and the
    linearised box shrunk by the worst-case linearisation error over the whole voltage region;
  - certificate wall time vs one plain AC-OPF solve with our Ipopt bridge (each the better of two runs),
    peak memory of the certificate (traced in a third run; bench/certificate_memory.py measures the resident
    peak of a certificate alone);
  - the binding limit class.
The recourse policy is the slack bus (--policy distributed: generators share the balance).
Results: bench/results/conservativeness.json (one record per case and scenario); render with
bench/render_benchmarks.py into docs/benchmarks.md.

Run: python bench/conservativeness.py [--max-buses 300] [--cases name ...] [--workers 2]
"""
from __future__ import annotations

import argparse
import csv
import json
import time
import tracemalloc
from pathlib import Path

import numpy as np
import scipy.sparse.linalg as spla

from robustbox.certify import CertifyOptions, certify
from robustbox.errors import RobustboxError
from robustbox.grid.casefile import read_case
from robustbox.grid.model import solve_opf
from robustbox.grid.system import build_system, largest_load_pq_buses, load_injections, site_injections
from robustbox.validate import validate_box

from pglib import DATA, case_path  # noqa: E402 - sibling module of the bench scripts

OUT = Path(__file__).resolve().parent / "results" / "conservativeness.json"
MARGINS = (0.1, 0.05, 0.02, 0.01)


def _commit() -> str | None:
    """The checked-out commit of this repository (None outside a git checkout)."""
    import subprocess

    try:
        return subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=Path(__file__).parent, capture_output=True,
                              text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return None


def published() -> dict[str, tuple[int, float]]:
    rows = csv.DictReader(line for line in (DATA / "baseline_ac_objective.csv").read_text().splitlines()
                          if not line.startswith("#"))
    return {r["case"]: (int(r["nodes"]), float(r["ac_objective"])) for r in rows}


def binding_class(text: str) -> str:
    for key, label in (("self-mapping", "self-mapping (solvability)"), ("V2[", "voltage"), ("Qgen", "generator Q"),
                       ("Pgen", "generator P"), ("@", "branch flow"), ("angle", "angle difference")):
        if key in text:
            return label
    return text


def linear_sensitivities(ns) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(C, margins up, margins down) of every limit row (monitored, then derived) w.r.t. the injections."""
    sys_ = ns.system
    jac = sys_.equations.jacobian(ns.point)
    lu = spla.splu(jac.tocsc())
    grad = sys_.limits.jacobian(ns.point)
    e = sys_.uncertain.equation_map.toarray()
    c = np.asarray(grad @ lu.solve(e)) + sys_.uncertain.limit_map.toarray()
    h = sys_.limits.evaluate(ns.point)
    up, lo = sys_.limit_upper - h, h - sys_.limit_lower
    if sys_.derived is not None:
        w = sys_.derived
        c = np.vstack([c, w @ c])
        up = np.concatenate([up, sys_.derived_upper - w @ h])
        lo = np.concatenate([lo, np.full(w.shape[0], np.inf)])
    return c, up, lo


def linear_t(c: np.ndarray, up: np.ndarray, lo: np.ndarray, wl: np.ndarray, wu: np.ndarray,
             shrink: np.ndarray | None = None) -> float:
    """Largest t with the linearised limits satisfied on [−t wl, t wu] (margins less ``shrink``)."""
    cu = np.maximum(c, 0) @ wu + np.maximum(-c, 0) @ wl
    cl = np.maximum(-c, 0) @ wu + np.maximum(c, 0) @ wl
    s = np.zeros(len(up)) if shrink is None else shrink
    mu, ml = up - s, lo - s
    if np.any(mu < 0) or np.any(ml < 0):
        return 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.concatenate([np.where(cu > 0, mu / cu, np.inf), np.where(cl > 0, ml / cl, np.inf)])
    return float(np.nanmin(r))


def worst_vertices(c: np.ndarray, up: np.ndarray, lo: np.ndarray, wl: np.ndarray, wu: np.ndarray,
                   count: int = 20) -> np.ndarray:
    """Unit-band vertices (t = 1) that push the linearised tightest limits hardest."""
    cu = np.maximum(c, 0) @ wu + np.maximum(-c, 0) @ wl
    cl = np.maximum(-c, 0) @ wu + np.maximum(c, 0) @ wl
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio_u, ratio_l = np.where(cu > 0, up / cu, np.inf), np.where(cl > 0, lo / cl, np.inf)
    verts = []
    for t in np.argsort(ratio_u)[:count]:
        if np.isfinite(ratio_u[t]):
            verts.append(np.where(c[t] > 0, wu, -wl))
    for t in np.argsort(ratio_l)[:count]:
        if np.isfinite(ratio_l[t]):
            verts.append(np.where(c[t] < 0, wu, -wl))
    return np.array(verts) if verts else np.zeros((0, len(wl)))


def feasible(net, op, inj, wl, wu, t, extra, samples, client, policy="slack", part=None) -> bool:
    rep = validate_box(net, op, inj, -t * wl, t * wu, policy, part, samples=samples, max_vertices=12, seed=1,
                       client=client, extra_points=t * extra if len(extra) else None)
    return rep.passed


def true_t(net, op, inj, wl, wu, start, extra, samples, client, steps, policy="slack", part=None
           ) -> tuple[float, float]:
    """Bisection for the empirical upper bound of the true t: (largest t that passed, smallest that failed)."""
    ok_t, bad_t = 0.0, max(start, 1e-6)
    for _ in range(12):
        if not feasible(net, op, inj, wl, wu, bad_t, extra, samples, client, policy, part):
            break
        ok_t, bad_t = bad_t, bad_t * 2
    else:
        return ok_t, float("inf")
    for _ in range(steps):
        mid = 0.5 * (ok_t + bad_t)
        if feasible(net, op, inj, wl, wu, mid, extra, samples, client, policy, part):
            ok_t = mid
        else:
            bad_t = mid
    return ok_t, bad_t


def per_axis(net, op, inj, t_box, samples, client, axes=6) -> list[float]:
    """Certified / true extent along single injections (one-axis boxes)."""
    out = []
    for k in np.unique(np.linspace(0, len(inj) - 1, min(axes, len(inj))).astype(int)):
        one = [inj[k]]
        ns1 = build_system(net, op, one)
        try:
            c1 = certify(ns1.system, ns1.point, options=CertifyOptions(max_fraction=1e4)).certified_fraction
        except RobustboxError:
            c1 = 0.0
        wl1, wu1 = ns1.system.uncertain.band_lower, ns1.system.uncertain.band_upper
        _, bad = true_t(net, op, one, wl1, wu1, max(c1, t_box), np.zeros((0, 1)), 4, None, 8)
        if np.isfinite(bad) and bad > 0:
            out.append(c1 / bad)
    return out


def run_case(name: str, pub: dict, client, samples: int, steps: int, scenarios: str = "AB",
             policy: str = "slack") -> list[dict]:
    net = read_case(case_path(name))
    opf_time = np.inf
    for _ in range(2):  # both times are the better of two runs (the machine's noise hits both alike)
        t0 = time.perf_counter()
        plain = solve_opf(net)
        opf_time = min(opf_time, time.perf_counter() - t0)
    opf, margin_gen = None, None
    ladder = [(m, None) for m in MARGINS] + [(m, 0.0) for m in MARGINS] + [(0.0, None)]
    for margin, margin_gen in ladder:
        try:
            opf = solve_opf(net, margin, compare_base=False, margin_gen=margin_gen)
            break
        except RobustboxError:
            continue
    ref = pub.get(name, (net.n_bus, float("nan")))[1]
    records = []
    if opf is None:
        return [{"case": name, "buses": net.n_bus, "error": "no margin OPF solved (margins 0.1 to 0.01, also with "
                 "untightened generator P and Q limits)"}]
    op = opf.point
    for scen in scenarios:
        inj = load_injections(net, 1.0) if scen == "A" else site_injections(net, largest_load_pq_buses(net, 5), 1.0)
        if not inj:
            records.append({"case": name, "buses": net.n_bus, "scenario": scen, "error": "no uncertain injection"})
            continue
        rec = {"case": name, "buses": net.n_bus, "scenario": scen, "policy": policy, "uncertain": len(inj),
               "commit": _commit(),
               "margin": opf.margin, "margin_gen": opf.margin if margin_gen is None else margin_gen,
               "opf_cost": opf.objective_per_h, "published_ac": ref, "plain_opf_cost": plain.objective_per_h,
               "cost_increase_pct": 100 * (opf.objective_per_h - ref) / ref, "opf_time_s": opf_time}
        ns = build_system(net, op, inj, policy)
        part = ns.participation if policy == "distributed" else None
        wl, wu = ns.system.uncertain.band_lower, ns.system.uncertain.band_upper
        rec["cert_time_s"] = np.inf
        for _ in range(2):
            t1 = time.perf_counter()
            try:
                cert = certify(ns.system, ns.point, options=CertifyOptions(max_fraction=1e4))
                t_cert, binding = cert.certified_fraction, cert.binding
            except RobustboxError as exc:
                t_cert, binding = 0.0, f"no certificate: {exc}"
                cert = None
            rec["cert_time_s"] = min(rec["cert_time_s"], time.perf_counter() - t1)
        tracemalloc.start()  # a second run for the peak memory: tracing slows numpy down
        try:
            certify(ns.system, ns.point, options=CertifyOptions(max_fraction=1e4))
        except RobustboxError:
            pass
        rec["cert_peak_mb"] = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        rec.update({"certified_t": t_cert, "binding": binding, "binding_class": binding_class(binding),
                    "time_ratio": rec["cert_time_s"] / opf_time})
        if cert is not None and t_cert > 0:
            val = validate_box(net, op, inj, cert.lower, cert.upper, policy, part, samples=samples, max_vertices=12,
                               client=client)
            rec.update({"validation_points": val.points, "validation_violations": val.violations + val.not_converged})
        c, up, lo = linear_sensitivities(ns)
        t_lin = linear_t(c, up, lo, wl, wu)
        # worst-case linearisation error over the whole voltage region |e|, |f| ≤ Vmax
        vmax = float(net.bus[:, 11].max())
        delta = np.abs(ns.point) + vmax
        qlo, qhi = ns.system.limits.plain_bounds(delta)
        err = np.maximum(qhi, -qlo)
        if ns.system.derived is not None:
            err = np.concatenate([err, abs(ns.system.derived) @ err])
        t_naive = linear_t(c, up, lo, wl, wu, shrink=err)
        rec.update({"linear_t": t_lin, "naive_shrunk_t": t_naive, "naive_shrunk_empty": t_naive <= 0})
        extra = worst_vertices(c, up, lo, wl, wu)
        lin_rep = validate_box(net, op, inj, -t_lin * wl, t_lin * wu, policy, part, samples=samples, max_vertices=12,
                               client=client, extra_points=t_lin * extra if len(extra) else None
                               ) if np.isfinite(t_lin) else None
        if lin_rep is not None:
            rec["linear_box_violating_share"] = (lin_rep.violations + lin_rep.not_converged) / lin_rep.points
        ok_t, bad_t = true_t(net, op, inj, wl, wu, max(t_cert, min(t_lin, 1e3)), extra, samples, client, steps,
                             policy, part)
        rec.update({"true_t_upper": bad_t, "true_t_passed": ok_t,
                    "ratio": t_cert / bad_t if np.isfinite(bad_t) and bad_t > 0 else float("nan")})
        axes = per_axis(net, op, inj, t_cert, samples, client) if net.n_bus <= 1000 and policy == "slack" else []
        rec.update({"axis_ratio_median": float(np.median(axes)) if axes else float("nan"),
                    "axis_ratio_min": float(np.min(axes)) if axes else float("nan")})
        records.append(rec)
        print(f"{name:<30}{scen:>2}{len(inj):>5}{opf.margin:>6.2f}{rec['cost_increase_pct']:>8.2f}%"
              f"{t_cert:>11.4g}{bad_t:>11.4g}{rec['ratio']:>7.3f}{rec['axis_ratio_median']:>7.3f}"
              f"{t_lin:>11.4g}{rec.get('linear_box_violating_share', float('nan')):>7.2f}"
              f"{'empty' if t_naive <= 0 else format(t_naive, '.3g'):>9}"
              f"{rec['cert_time_s']:>8.2f}{rec['time_ratio']:>7.2f}{rec['cert_peak_mb']:>8.0f}"
              f"{rec.get('validation_violations', -1):>5}  {rec['binding_class']}", flush=True)
    return records


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-buses", type=int, default=300)
    ap.add_argument("--cases", nargs="*")
    ap.add_argument("--samples", type=int, default=300)
    ap.add_argument("--steps", type=int, default=8, help="bisection steps for the true t")
    ap.add_argument("--workers", type=int, default=2, help="Dask workers for the power flows (0: none)")
    ap.add_argument("--out", default=str(OUT))
    ap.add_argument("--scenarios", default="AB", help="A, B or AB")
    ap.add_argument("--policy", choices=["slack", "distributed"], default="slack")
    ap.add_argument("--append", action="store_true",
                    help="add to the records already in --out (replacing those of the same case, scenario, policy)")
    args = ap.parse_args()
    pub = published()
    names = args.cases or sorted((n for n, (b, _) in pub.items() if b <= args.max_buses), key=lambda n: (pub[n][0], n))
    client = None
    if args.workers:
        from dask.distributed import Client, LocalCluster
        client = Client(LocalCluster(n_workers=args.workers, threads_per_worker=1, dashboard_address=None))
    print(f"{'case':<30}{'sc':>2}{'s':>5}{'marg':>6}{'cost+':>9}{'cert t':>11}{'true t<=':>11}{'ratio':>7}"
          f"{'axis':>7}{'lin t':>11}{'viol':>7}{'naive':>9}{'cert s':>8}{'/OPF':>7}{'MB':>8}{'bad':>5}  binding")
    records = json.loads(Path(args.out).read_text()) if args.append and Path(args.out).exists() else []
    # a rerun replaces the earlier records of the same case, scenario and policy
    records = [r for r in records if not (r["case"] in names and r.get("policy", args.policy) == args.policy
                                          and r.get("scenario", "") in (*args.scenarios, ""))]
    for name in names:
        try:
            records.extend(run_case(name, pub, client, args.samples, args.steps, args.scenarios, args.policy))
        except RobustboxError as exc:
            records.append({"case": name, "error": str(exc)})
            print(f"{name:<30} error: {exc}", flush=True)
        Path(args.out).write_text(json.dumps(records, indent=1, default=float))
    print("cert t: certified fraction; true t<=: empirical upper bound of the true fraction (sampling); "
          "ratio = cert/true; axis: median one-axis ratio; lin t: uncertified linearised box, viol: share of its "
          "sampled points violating a limit; naive: linearised box shrunk by the worst linearisation error; "
          "/OPF: certificate time over one AC-OPF solve; bad: violations found when validating the certified box")
    if client is not None:
        client.close()


if __name__ == "__main__":
    main()
