"""Day-ahead dispatch on the fictional Lakeholm grid with uncertain wind and solar output.

1. Build the AC-OPF of the demo grid as a Pyomo model (rectangular QCQP) and take an operating point
   with 10 % room on every limit (the margin OPF, solved with Ipopt through the cyipopt bridge).
2. Apply the ``robustbox.injection_box`` transformation: the dispatch of the two flexible plants
   (decision injections) and the output of the five wind/solar sites (uncertain, 0 .. 60 % of
   capacity above the forecast) get a certified box; the nonconvex AC equations are deactivated.
3. The rewritten model is a linear program: choose the cheapest dispatch inside the box (HiGHS).
4. Check the result with independent AC power flows at every vertex of the wind/solar box.

Run: python examples/day_ahead_dispatch.py     (all data invented; see robustbox/data/demo_grid.m)
"""
from __future__ import annotations

import numpy as np
import pyomo.environ as pyo
from pyomo.common.collections import ComponentMap

from robustbox.cli import demo_case_path
from robustbox.grid.casefile import read_case
from robustbox.grid.model import build_opf
from robustbox.grid.network import BUS_I, GEN_BUS
from robustbox.grid.system import Injection, OperatingPoint
from robustbox.solve import solve_model
from robustbox.transform import certificate_of
from robustbox.validate import validate_box


def main() -> int:
    net = read_case(demo_case_path())
    base = net.base_mva
    model, tight = build_opf(net, 0.0), build_opf(net, 0.1)
    solve_model(tight)
    for var in tight.component_data_objects(pyo.Var):
        model.find_component(var.name).set_value(var.value)
    n = net.n_bus
    slack, _, _ = net.bus_kinds()
    gen_bus = net.gen_bus_idx()
    index = net.bus_index
    flexible = [g for g in model.G if gen_bus[g] != slack]
    sites = [index[b] for b in net.sites[:, 0]]
    capacity = dict(zip(sites, net.sites[:, 2] / base))
    # a site injecting more is a smaller net load at its bus: pd moves down by up to 60 % of capacity
    band = ComponentMap([(model.pd[i], (0.6 * capacity[i], 0.0)) for i in sites])
    for g in flexible:
        band[model.pg[g]] = (0.5, 0.5)
    held = [model.x[i] ** 2 + model.x[n + i] ** 2 for i in sorted(set(gen_bus.tolist()))]
    op_voltage = np.array([pyo.value(model.x[i]) + 1j * pyo.value(model.x[n + i]) for i in range(n)])
    op_pg = np.array([pyo.value(model.pg[g]) for g in model.G])
    op_qg = np.array([pyo.value(model.qg[g]) for g in model.G])
    model.cost.deactivate()
    pyo.TransformationFactory("robustbox.injection_box").apply_to(
        model, injections=[model.pd[i] for i in sites] + [model.pg[g] for g in flexible], band=band, held=held)
    cert = certificate_of(model)
    print(cert.message)
    # the downstream dispatch LP: linear cost of the flexible plants, the slack covers the rest
    c1 = {g: net.gencost[net.gen_on[g], 5] for g in model.G}
    model.dispatch_cost = pyo.Objective(expr=sum(c1[g] * base * model.pg[g] for g in flexible))
    result = pyo.SolverFactory("appsi_highs").solve(model)
    print(f"dispatch LP (HiGHS): {result.solver.termination_condition}")
    for g in flexible:
        print(f"  plant at bus {int(net.gen[net.gen_on[g], GEN_BUS])}: {pyo.value(model.pg[g]) * base:8.2f} MW "
              f"(operating point {op_pg[g] * base:.2f} MW)")
    s_wind = len(sites)
    lower = np.zeros(s_wind + len(flexible))
    upper = np.zeros(s_wind + len(flexible))
    lower[:s_wind], upper[:s_wind] = -cert.upper[:s_wind], -cert.lower[:s_wind]  # injection = −Δload
    chosen = np.array([pyo.value(model.pg[g]) for g in flexible]) - op_pg[flexible]
    lower[s_wind:] = upper[s_wind:] = chosen
    injections = [Injection(int(net.bus[i, BUS_I]), "p", 0, 0) for i in sites]
    injections += [Injection(int(net.gen[net.gen_on[g], GEN_BUS]), "p", 0, 0) for g in flexible]
    op = OperatingPoint(np.abs(op_voltage), np.angle(op_voltage), op_pg, op_qg)
    report = validate_box(net, op, injections, lower, upper, samples=200)
    print(f"AC check of the chosen dispatch: {report.points} power flows ({report.vertices} vertices of the "
          f"wind/solar box), {report.violations} violations, {report.not_converged} not converged")
    for e in report.examples:
        print("  ", e)
    return 0 if report.passed else 1


if __name__ == "__main__":
    raise SystemExit(main())
