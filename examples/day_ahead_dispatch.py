"""Day-ahead dispatch on the fictional Lakeholm grid with uncertain wind and solar output.

1. Build the AC-OPF of the demo grid as a Pyomo model (rectangular QCQP) and take an operating point
   with 10 % room on every limit (the margin OPF, solved with Ipopt through the cyipopt bridge).
2. Write the downstream objective: the linear generation cost of every unit, the slack unit included
   (its output is a state of the AC equations: it covers losses and whatever the others do not).
3. Apply the ``robustbox.injection_box`` transformation: the dispatch of the flexible plants
   (decision injections, Vars) and the output of the five wind/solar sites (uncertain, Params: up to
   60 % of capacity above the forecast) get a certified box; the nonconvex AC equations are deactivated
   and the objective is rewritten to a proven upper bound of the true cost over the whole box (the
   slack's output through its certified affine response plus the remainder interval, the sites at
   their worst values).
4. The rewritten model is a linear program: choose the cheapest dispatch inside the box (HiGHS).
5. Check the result with independent AC power flows at every vertex of the wind/solar box: no limit
   is violated and the true cost stays below the LP's bound.

Run: python examples/day_ahead_dispatch.py     (all data invented; see robustbox/data/demo_grid.m)
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyomo.environ as pyo
from pyomo.common.collections import ComponentMap

import robustbox  # noqa: F401  (registers the transformation)
from robustbox.cli import demo_case_path
from robustbox.grid.casefile import read_case
from robustbox.grid.model import build_opf
from robustbox.grid.network import BUS_NUMBER, GEN_AT
from robustbox.grid.powerflow import newton_power_flow
from robustbox.grid.system import Injection, OperatingPoint
from robustbox.solve import solve_model
from robustbox.transform import box_of, certificate_of
from robustbox.validate import ValidationReport, sample_points, validate_box


@dataclass
class DispatchStudy:
    """The rewritten dispatch model and what the example measured (costs in $/h, powers in pu)."""

    model: pyo.ConcreteModel
    net: object  # the demo grid (robustbox.grid.network.Network)
    operating_point: OperatingPoint  # the margin OPF's point the box is certified around
    flexible: list[int]  # generator positions whose P is decided by the LP
    sites: list[int]  # bus positions of the wind/solar sites
    chosen_pu: np.ndarray  # the LP's dispatch of the flexible units
    lp_bound: float  # the rewritten objective at the LP's choice: a bound on the true cost over the box
    report: ValidationReport  # AC check of the chosen dispatch over the wind/solar box
    ac_costs: np.ndarray  # true cost at the checked points (NaN where a power flow failed)
    linear_cost: dict[int, float]  # $/MWh of each unit


def build(margin: float = 0.1) -> tuple[pyo.ConcreteModel, object, list[int], list[int], dict[int, float]]:
    """The demo grid's OPF model at the margin operating point, with the downstream objective."""
    net = read_case(demo_case_path())
    model, tight = build_opf(net, 0.0), build_opf(net, margin)
    solve_model(tight)
    for var in tight.component_data_objects(pyo.Var):
        model.find_component(var.name).set_value(var.value)
    slack, _, _ = net.bus_kinds()
    gen_bus = net.gen_bus_idx()
    flexible = [g for g in model.G if gen_bus[g] != slack]
    sites = [net.bus_index[b] for b in net.sites[:, 0]]
    c1 = {g: float(net.gencost[net.gen_on[g], 5]) for g in model.G}
    model.cost.deactivate()
    model.dispatch_cost = pyo.Objective(expr=sum(c1[g] * net.base_mva * model.pg[g] for g in model.G))
    return model, net, flexible, sites, c1


def run(samples: int = 200, verbose: bool = True) -> DispatchStudy:
    """Steps 1–5 of the module doc."""
    model, net, flexible, sites, c1 = build()
    base, n = net.base_mva, net.n_bus
    gen_bus = net.gen_bus_idx()
    capacity = dict(zip(sites, net.sites[:, 2] / base))
    # a site injecting more is a smaller net load at its bus: pd moves down by up to 60 % of capacity
    band = ComponentMap([(model.pd[i], (0.6 * capacity[i], 0.0)) for i in sites])
    for g in flexible:
        band[model.pg[g]] = (0.5, 0.5)
    held = [model.x[i] ** 2 + model.x[n + i] ** 2 for i in sorted(set(gen_bus.tolist()))]
    op_voltage = np.array([pyo.value(model.x[i]) + 1j * pyo.value(model.x[n + i]) for i in range(n)])
    op_pg = np.array([pyo.value(model.pg[g]) for g in model.G])
    op_qg = np.array([pyo.value(model.qg[g]) for g in model.G])
    pd0 = {i: pyo.value(model.pd[i]) for i in sites}
    pyo.TransformationFactory("robustbox.injection_box").apply_to(
        model, injections=[model.pd[i] for i in sites] + [model.pg[g] for g in flexible], band=band, held=held)
    cert = certificate_of(model)
    box = box_of(model)
    result = pyo.SolverFactory("appsi_highs").solve(model)
    chosen = np.array([pyo.value(model.pg[g]) for g in flexible])
    lp_bound = float(pyo.value(model.robustbox_box.objective))
    if verbose:
        print(cert.message)
        print(f"dispatch LP (HiGHS): {result.solver.termination_condition}; proven cost bound over the box "
              f"{lp_bound:.2f} $/h")
        for g, p in zip(flexible, chosen):
            lo, up = box[model.pg[g].name]
            print(f"  plant at bus {int(net.gen[net.gen_on[g], GEN_AT])} ({c1[g]:.0f} $/MWh): {p * base:8.2f} MW "
                  f"(operating point {op_pg[g] * base:.2f} MW, box {lo * base:.2f} .. {up * base:.2f} MW)")
    # AC check: the chosen dispatch, wind/solar over their certified ranges (pd moves down = injection up)
    lower = np.array([pd0[i] - box[model.pd[i].name][1] for i in sites] + list(chosen - op_pg[flexible]))
    upper = np.array([pd0[i] - box[model.pd[i].name][0] for i in sites] + list(chosen - op_pg[flexible]))
    injections = [Injection(int(net.bus[i, BUS_NUMBER]), "p", 0, 0) for i in sites]
    injections += [Injection(int(net.gen[net.gen_on[g], GEN_AT]), "p", 0, 0) for g in flexible]
    op = OperatingPoint(np.abs(op_voltage), np.angle(op_voltage), op_pg, op_qg)
    report = validate_box(net, op, injections, lower, upper, samples=samples)
    points, _ = sample_points(lower, upper, samples)
    pg_chosen = op_pg.copy()
    pg_chosen[flexible] = chosen
    costs = ac_costs(net, op, injections, points, pg_chosen, c1)
    if verbose:
        print(f"AC check of the chosen dispatch: {report.points} power flows ({report.vertices} vertices of the "
              f"wind/solar box), {report.violations} violations, {report.not_converged} not converged; "
              f"true cost {np.nanmin(costs):.2f} .. {np.nanmax(costs):.2f} $/h ≤ bound {lp_bound:.2f}")
        for e in report.examples:
            print("  ", e)
    return DispatchStudy(model, net, op, flexible, sites, chosen, lp_bound, report, costs, c1)


def ac_costs(net, op: OperatingPoint, injections: list[Injection], points: np.ndarray, pg_pu: np.ndarray,
             c1: dict[int, float]) -> np.ndarray:
    """True linear generation cost ($/h) after a Newton power flow at each point.

    ``pg_pu``: every unit's output except the slack unit's, which the power flow sets (NaN where it fails).
    """
    ybus = net.admittance()[0]
    slack, pv, pq = net.bus_kinds()
    gb = net.gen_bus_idx()
    at_slack = [g for g in range(len(gb)) if gb[g] == slack]
    if len(at_slack) != 1:
        raise ValueError("the example expects exactly one unit at the slack bus")
    n = net.n_bus
    sg0 = np.zeros(n, dtype=complex)
    np.add.at(sg0, gb, op.pg_pu + 1j * op.qg_pu)
    rows = np.array([net.bus_index[i.bus] for i in injections])
    out = np.full(len(points), np.nan)
    for k, p in enumerate(points):
        delta = np.zeros(n, dtype=complex)
        np.add.at(delta, rows, p)
        res = newton_power_flow(ybus, sg0 - net.load_pu() + delta, op.voltage, slack, pv, pq, None, tol=1e-10)
        if res.converged:
            s_bus = complex((res.voltage[slack] * np.conj(ybus[slack] @ res.voltage)).item())
            pg = pg_pu.copy()
            pg[at_slack[0]] = s_bus.real + net.load_pu()[slack].real - delta[slack].real
            out[k] = sum(c1[g] * net.base_mva * pg[g] for g in range(len(gb)))
    return out


def main() -> int:
    study = run()
    ok = study.report.passed and bool(np.all(study.ac_costs <= study.lp_bound))
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
