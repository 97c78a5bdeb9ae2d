"""The Pyomo transformation robustbox.injection_box.

Five model families written by hand here (a rectangular AC grid, the same grid in nested Blocks, a
water network with quadratic head losses, a chemical equilibrium with bilinear equalities, the grid
with cost bookkeeping and an unrelated planning equality) and PGLib networks.  Every certified box
is checked by ``independent.check_box``, which shares no code with robustbox: it solves the original
equalities with SciPy from the operating point at the box's vertices and random points, checks every
inequality and bound, and checks that every rewritten row and objective bounds its true value.
The network tests also run the project's own validator (polar Newton power flow).

Numerical tolerances (1e-9) are common practice for double-precision solves, no source.
"""
from __future__ import annotations

import itertools
import pickle
import subprocess
import sys

import numpy as np
import pyomo.environ as pyo
import pytest
from pyomo.common.collections import ComponentMap

from conftest import pglib_case
from independent import check_box
from robustbox import ModelStructureError, OperatingPointError
from robustbox.grid.casefile import read_case
from robustbox.grid.model import build_opf
from robustbox.grid.network import GEN_AT, Network
from robustbox.grid.system import Injection, OperatingPoint
from robustbox.solve import solve_model
from robustbox.transform import InjectionBox, box_of, certificate_of, restore
from robustbox.validate import validate_box

XF = "robustbox.injection_box"

# Three buses, 100 MVA base: slack at bus 1 (1.02 pu), generator at bus 2 (PV, 1.01 pu), load and a
# wind farm at bus 3.  Lines: (from, to, r, x) in pu; no line charging.  Invented test data.
LINES = [(0, 1, 0.02, 0.08), (0, 2, 0.03, 0.12), (1, 2, 0.025, 0.10)]
LOAD3 = (0.9, 0.3)
QLIM = (-0.6, 0.6)


def _ybus() -> np.ndarray:
    y = np.zeros((3, 3), dtype=complex)
    for f, t, r, x in LINES:
        ys = 1 / complex(r, x)
        y[f, f] += ys; y[t, t] += ys; y[f, t] -= ys; y[t, f] -= ys  # noqa: E702
    return y


def _p_inj(e, f, i: int, scale: float = 1.0):
    y = _ybus()
    g, b = y.real, y.imag
    return scale * sum(e[i] * (g[i, k] * e[k] - b[i, k] * f[k]) + f[i] * (g[i, k] * f[k] + b[i, k] * e[k])
                       for k in range(3))


def _q_inj(e, f, i: int, scale: float = 1.0):
    y = _ybus()
    g, b = y.real, y.imag
    return scale * sum(f[i] * (g[i, k] * e[k] - b[i, k] * f[k]) - e[i] * (g[i, k] * f[k] + b[i, k] * e[k])
                       for k in range(3))


def _pg(m, i: int):
    return (m.pg1, m.pg2, m.wind3)[i]


def _qg(m, i: int):
    return (m.qg1, m.qg2, 0.0)[i]


def _pbal_rule(m, i: int):
    return _p_inj(m.e, m.f, i, m.base) == _pg(m, i) - (LOAD3[0] * m.base if i == 2 else 0.0)


def _qbal_rule(m, i: int):
    return _q_inj(m.e, m.f, i, m.base) == _qg(m, i) - (LOAD3[1] * m.base if i == 2 else 0.0)


def _vlim_rule(m, i: int):
    return 0.94 ** 2, m.e[i] ** 2 + m.f[i] ** 2, 1.06 ** 2


def _three_bus_model(base: float = 1.0) -> pyo.ConcreteModel:
    """A rectangular-coordinate OPF written directly with Pyomo (not robustbox's builder).

    ``base`` = 1: powers in per unit; ``base`` = 100: generator and wind variables in MW and the
    balances in MW (the same grid in other units).  Module-level rules: the model can be pickled."""
    m = pyo.ConcreteModel()
    m.base = float(base)
    m.B = pyo.RangeSet(0, 2)
    m.e = pyo.Var(m.B, initialize=1.0, bounds=(-1.2, 1.2))
    m.f = pyo.Var(m.B, initialize=0.0, bounds=(-1.2, 1.2))
    m.e[0].fix(1.02)
    m.f[0].fix(0.0)
    m.pg1 = pyo.Var(bounds=(0.0, 2.0 * base), initialize=0.5 * base)
    m.qg1 = pyo.Var(bounds=(QLIM[0] * base, QLIM[1] * base), initialize=0.0)
    m.pg2 = pyo.Var(bounds=(0.0, 1.0 * base), initialize=0.4 * base)   # dispatch decided downstream
    m.qg2 = pyo.Var(bounds=(QLIM[0] * base, QLIM[1] * base), initialize=0.0)
    m.wind3 = pyo.Param(mutable=True, initialize=0.3 * base)     # uncertain wind output at bus 3
    m.pbal = pyo.Constraint(m.B, rule=_pbal_rule)
    m.qbal = pyo.Constraint(m.B, rule=_qbal_rule)
    m.vlim = pyo.Constraint([1, 2], rule=_vlim_rule)
    m.v2set = pyo.Constraint(expr=m.e[1] ** 2 + m.f[1] ** 2 == 1.01 ** 2)
    m.cost = pyo.Objective(expr=(10 * m.pg1 + 0.5 * m.pg1 ** 2 / base + 8 * m.pg2 + 10 * m.pg2 ** 2 / base) / base)
    return m


def _three_bus_network() -> Network:
    """The same data as MATPOWER tables, for the project's power-flow validator."""
    bus = np.array([[1, 3, 0, 0, 0, 0, 1, 1.02, 0, 100, 1, 1.06, 0.94],
                     [2, 2, 0, 0, 0, 0, 1, 1.01, 0, 100, 1, 1.06, 0.94],
                     [3, 1, LOAD3[0] * 100, LOAD3[1] * 100, 0, 0, 1, 1, 0, 100, 1, 1.06, 0.94]], dtype=float)
    gen = np.array([[1, 50, 0, QLIM[1] * 100, QLIM[0] * 100, 1.02, 100, 1, 200, 0],
                    [2, 40, 0, QLIM[1] * 100, QLIM[0] * 100, 1.01, 100, 1, 100, 0]], dtype=float)
    branch = np.array([[f + 1, t + 1, r, x, 0, 0, 0, 0, 0, 0, 1, -360, 360] for f, t, r, x in LINES], dtype=float)
    return Network.from_tables("three_bus", 100.0, bus, gen, branch)


def _grid_state(m) -> list:
    return [m.e[1], m.f[1], m.e[2], m.f[2], m.pg1, m.qg1, m.qg2]


def _solved_three_bus(base: float = 1.0) -> pyo.ConcreteModel:
    m = _three_bus_model(base)
    solve_model(m)
    m.v2set.deactivate()  # the voltage set-point becomes a held quantity of the recourse policy
    return m


# --------------------------------------------------------------- family 1: AC grid
def test_ac_grid_rewrite_qp_and_independent_check():
    m = _solved_three_bus()
    pristine = m.clone()
    pg2_0 = pyo.value(m.pg2)
    pyo.TransformationFactory(XF).apply_to(
        m, injections=[m.pg2, m.wind3], band=ComponentMap([(m.pg2, (0.3, 0.3)), (m.wind3, (0.3, 0.3))]),
        held=[m.e[1] ** 2 + m.f[1] ** 2])
    cert = certificate_of(m)
    assert cert.status == "certified" and cert.recheck().holds and cert.certified_fraction > 0
    assert not m.pbal[1].active and m.robustbox_box.box["pg2"].active and not m.cost.active
    # the cost's slack part (pg1, a state) follows its certified response: a QP in pg2 for HiGHS
    res = pyo.SolverFactory("highs").solve(m)
    assert "optimal" in str(res.solver.termination_condition).lower()
    lo, up = box_of(m)["pg2"]
    assert lo - 1e-9 <= pyo.value(m.pg2) <= up + 1e-9
    # independent check over the whole box (pg2 and wind3 both move), the objective bound included
    report = check_box(pristine, m, box_of(m), list(pristine.pbal.values()) + list(pristine.qbal.values()),
                       _grid_state(pristine), held=[pristine.e[1] ** 2 + pristine.f[1] ** 2], samples=100)
    assert report.points >= 104 and not report.failures, report.failures[:5]
    assert report.bound_checks >= report.points  # the objective was compared at every point
    # the project's validator too: pg2 at the QP's choice, wind over its certified range
    net = _three_bus_network()
    v = np.array([pyo.value(pristine.e[i]) + 1j * pyo.value(pristine.f[i]) for i in range(3)])
    op = OperatingPoint(np.abs(v), np.angle(v), np.array([pyo.value(pristine.pg1), pg2_0]),
                        np.array([pyo.value(pristine.qg1), pyo.value(pristine.qg2)]))
    chosen = pyo.value(m.pg2) - pg2_0
    inj = [Injection(2, "p", 0, 0), Injection(3, "p", 0, 0)]
    rep = validate_box(net, op, inj, np.array([chosen, cert.lower[1]]), np.array([chosen, cert.upper[1]]), samples=300)
    assert rep.passed and rep.points >= 300, rep.examples
    restore(m)
    assert m.pbal[1].active and m.cost.active and m.component("robustbox_box") is None and not m.pg1.fixed


def test_reverse_token_and_create_using():
    m = _solved_three_bus()
    token = pyo.TransformationFactory(XF).apply_to(m, injections=[m.wind3], band=0.2,
                                                   held=[m.e[1] ** 2 + m.f[1] ** 2, m.pg2])
    assert not m.pbal[2].active and m.pg1.fixed
    pyo.TransformationFactory(XF).apply_to(m, reverse=token)
    assert m.pbal[2].active and m.component("robustbox_box") is None and not m.pg1.fixed
    new = pyo.TransformationFactory(XF).create_using(m, injections=[m.wind3], band=0.2,
                                                     held=[m.e[1] ** 2 + m.f[1] ** 2, m.pg2])
    assert m.pbal[2].active and m.component("robustbox_box") is None
    assert not new.pbal[2].active and certificate_of(new).status == "certified"


def test_clone_and_pickle_of_a_rewritten_model():
    m = _solved_three_bus()
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.wind3, m.pg2], band=0.2, held=[m.e[1] ** 2 + m.f[1] ** 2])
    box = box_of(m)
    for copy in (m.clone(), pickle.loads(pickle.dumps(m))):
        assert box_of(copy) == box
        assert certificate_of(copy).recheck().holds
        restore(copy)
        assert copy.pbal[2].active and copy.cost.active and not copy.pg1.fixed
    assert not m.pbal[2].active  # the original is untouched by restoring its copies


def test_import_registers_the_transformation():
    code = ("import pyomo.environ as pyo, robustbox; "
            "assert pyo.TransformationFactory('robustbox.injection_box') is not None")
    assert subprocess.run([sys.executable, "-c", code], capture_output=True).returncode == 0


def test_per_unit_and_mw_formulations_give_the_same_box():
    fractions = []
    for base in (1.0, 100.0):
        m = _solved_three_bus(base)
        pyo.TransformationFactory(XF).apply_to(
            m, injections=[m.pg2, m.wind3], band=ComponentMap([(m.pg2, 0.3 * base), (m.wind3, 0.3 * base)]),
            held=[m.e[1] ** 2 + m.f[1] ** 2])
        fractions.append(certificate_of(m).certified_fraction)
    assert fractions[0] > 0
    assert abs(fractions[1] - fractions[0]) <= 1e-6 * fractions[0], fractions


# ---------------------------------------------------- family 2: the grid in nested Blocks
def _block_grid() -> pyo.ConcreteModel:
    """The three-bus grid with one Block per bus inside an 'area' Block, generators in their own."""
    m = pyo.ConcreteModel()
    m.area = pyo.Block()
    a = m.area
    a.net = pyo.Block()
    a.net.e = pyo.Var(range(3), initialize=1.0, bounds=(-1.2, 1.2))
    a.net.f = pyo.Var(range(3), initialize=0.0, bounds=(-1.2, 1.2))
    a.net.e[0].fix(1.02)
    a.net.f[0].fix(0.0)
    a.gens = pyo.Block()
    a.gens.pg = pyo.Var([0, 1], initialize=0.5, bounds=(0.0, 2.0))
    a.gens.qg = pyo.Var([0, 1], initialize=0.0, bounds=QLIM)
    m.wind3 = pyo.Param(mutable=True, initialize=0.3)
    m.load3 = pyo.Param(mutable=True, initialize=LOAD3[0])
    e, f = a.net.e, a.net.f

    def bus_rule(blk, i):
        p = {0: a.gens.pg[0], 1: a.gens.pg[1], 2: m.wind3 - m.load3}[i]
        q = {0: a.gens.qg[0], 1: a.gens.qg[1], 2: -LOAD3[1]}[i]
        blk.p = pyo.Constraint(expr=_p_inj(e, f, i) == p)
        blk.q = pyo.Constraint(expr=_q_inj(e, f, i) == q)
        if i:
            blk.v = pyo.Constraint(expr=(0.94 ** 2, e[i] ** 2 + f[i] ** 2, 1.06 ** 2))
    a.bus = pyo.Block(range(3), rule=bus_rule)
    a.vset = pyo.Constraint(expr=e[1] ** 2 + f[1] ** 2 == 1.01 ** 2)
    a.pset = pyo.Constraint(expr=a.gens.pg[1] == 0.4)
    return m


def test_nested_blocks_default_scope_and_targets_agree():
    results = []
    for targets in (None, "blocks"):
        m = _block_grid()
        solve_model(m)
        pristine = m.clone()
        kw = {} if targets is None else {"targets": [m.area.bus, m.area.vset, m.area.pset]}
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.wind3, m.load3], band=0.25, **kw)
        cert = certificate_of(m)
        assert cert.status == "certified" and cert.certified_fraction > 0
        assert not m.area.bus[2].p.active and not m.area.bus[1].v.active
        net = pristine.area.net
        eqs = [c for c in pristine.area.component_data_objects(pyo.Constraint, active=True) if c.equality]
        unknowns = [net.e[1], net.f[1], net.e[2], net.f[2]] + list(pristine.area.gens.pg.values()) + \
            list(pristine.area.gens.qg.values())
        report = check_box(pristine, m, box_of(m), eqs, unknowns, samples=60)
        assert report.points >= 64 and not report.failures, report.failures[:5]
        results.append(box_of(m))
    assert results[0] == results[1]


# -------------------------------------------------- family 3: water network, head losses
# A reservoir (head 60 m) feeds junction 1, which feeds junctions 2 and 3 (a tree, flows keep their
# direction).  Darcy–Weisbach-type head loss Δh = r·q² (q in m³/s, r in s²/m⁵); mass balance at each
# junction; demands are uncertain; pressure heads must stay above 30 m and pipe flows below capacity.
# Invented data.
PIPES = {(0, 1): 40.0, (1, 2): 120.0, (1, 3): 90.0}
DEMAND = {1: 0.10, 2: 0.12, 3: 0.08}


def _water_model() -> pyo.ConcreteModel:
    m = pyo.ConcreteModel()
    m.N = pyo.Set(initialize=[1, 2, 3])
    m.P = pyo.Set(initialize=list(PIPES), dimen=2)
    m.source_head = pyo.Var(initialize=60.0)
    m.source_head.fix()
    m.h = pyo.Var(m.N, initialize=55.0, bounds=(30.0, None))
    m.q = pyo.Var(m.P, initialize=0.1, bounds=(0.0, 0.5))
    m.demand = pyo.Param(m.N, mutable=True, initialize=DEMAND)
    head = {0: m.source_head, **{i: m.h[i] for i in m.N}}
    m.loss = pyo.Constraint(m.P, rule=lambda mm, a, b: head[a] - head[b] == PIPES[a, b] * mm.q[a, b] ** 2)
    m.balance = pyo.Constraint(m.N, rule=lambda mm, i: sum(mm.q[p] for p in mm.P if p[1] == i)
                               - sum(mm.q[p] for p in mm.P if p[0] == i) == mm.demand[i])
    m.pump_energy = pyo.Constraint(expr=m.q[0, 1] * 60.0 <= 40.0)  # a linear limit on the source outflow
    return m


def test_water_network_with_quadratic_head_losses():
    m = _water_model()
    # the operating point in closed form: flows from the balances, heads down the tree
    q = {(1, 2): DEMAND[2], (1, 3): DEMAND[3]}
    q[0, 1] = DEMAND[1] + q[1, 2] + q[1, 3]
    for p, val in q.items():
        m.q[p].set_value(val)
    m.h[1].set_value(60.0 - PIPES[0, 1] * q[0, 1] ** 2)
    m.h[2].set_value(m.h[1].value - PIPES[1, 2] * q[1, 2] ** 2)
    m.h[3].set_value(m.h[1].value - PIPES[1, 3] * q[1, 3] ** 2)
    pristine = m.clone()
    pyo.TransformationFactory(XF).apply_to(m, injections=m.demand, relative_band=0.5)
    cert = certificate_of(m)
    assert cert.status == "certified" and cert.certified_fraction > 0
    assert not m.loss[1, 2].active and not m.pump_energy.active
    report = check_box(pristine, m, box_of(m), list(pristine.loss.values()) + list(pristine.balance.values()),
                       list(pristine.h.values()) + list(pristine.q.values()), samples=100)
    assert report.points >= 108 and not report.failures, report.failures[:5]


# ------------------------------------------------- family 4: chemical equilibrium (bilinear)
# A + B ⇌ C with [C] = K1 [A][B] and 2A ⇌ D with [D] = K2 [A]² (mass-action law, dilute solution);
# total amounts of A and B are uncertain feeds; every concentration ≥ 0 and the product [C] ≥ 0.25
# (mol/L).  Invented constants.
K1, K2 = 4.0, 0.5


def _equilibrium_model() -> pyo.ConcreteModel:
    m = pyo.ConcreteModel()
    m.feed_a = pyo.Param(mutable=True, initialize=1.0)
    m.feed_b = pyo.Param(mutable=True, initialize=0.8)
    m.a = pyo.Var(initialize=0.5, bounds=(0, None))
    m.b = pyo.Var(initialize=0.5, bounds=(0, None))
    m.c = pyo.Var(initialize=0.3, bounds=(0, None))
    m.d = pyo.Var(initialize=0.1, bounds=(0, None))
    m.law1 = pyo.Constraint(expr=m.c == K1 * m.a * m.b)
    m.law2 = pyo.Constraint(expr=m.d == K2 * m.a ** 2)
    m.total_a = pyo.Constraint(expr=m.a + m.c + 2 * m.d == m.feed_a)
    m.total_b = pyo.Constraint(expr=m.b + m.c == m.feed_b)
    m.purity = pyo.Constraint(expr=m.c >= 0.25)
    return m


def test_chemical_equilibrium_bilinear_equalities():
    m = _equilibrium_model()
    solve_model(m)
    pristine = m.clone()
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.feed_a, m.feed_b], band=(0.3, 0.3))
    cert = certificate_of(m)
    assert cert.status == "certified" and cert.certified_fraction > 0
    report = check_box(pristine, m, box_of(m), [pristine.law1, pristine.law2, pristine.total_a, pristine.total_b],
                       [pristine.a, pristine.b, pristine.c, pristine.d], samples=100)
    assert report.points >= 104 and not report.failures, report.failures[:5]
    # the box is inner: just beyond it the purity limit binds at some vertex (the certificate is not empty talk)
    assert cert.certified_fraction < 1.0


# ------------------------------- family 5: cost bookkeeping and an unrelated planning equality
def _planning_grid(bookkeeping: bool) -> pyo.ConcreteModel:
    m = _solved_three_bus()
    m.cost.deactivate()
    if bookkeeping:
        m.total_cost = pyo.Var(initialize=0.0)
        m.cost_def = pyo.Constraint(expr=m.total_cost == 10 * m.pg1 + 8 * m.pg2)
        m.capex = pyo.Var(initialize=0.0)
        m.build_new = pyo.Var(within=pyo.Binary, initialize=0)
        m.plan = pyo.Constraint(expr=m.capex == 100 * m.build_new)
        m.import_cap = pyo.Constraint(expr=m.pg1 <= 0.9 + 0.5 * m.build_new)  # state and a planning decision
        m.odd = pyo.Constraint(expr=pyo.exp(m.capex / 100) <= 3.0)  # not quadratic, not physics: left alone
        m.total = pyo.Objective(expr=m.total_cost + 0.01 * m.capex)
    return m


def test_cost_bookkeeping_and_planning_are_left_to_the_downstream_model():
    plain = _planning_grid(False)
    pyo.TransformationFactory(XF).apply_to(plain, injections=[plain.pg2, plain.wind3], band=0.3,
                                           held=[plain.e[1] ** 2 + plain.f[1] ** 2])
    m = _planning_grid(True)
    pristine = m.clone()
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.pg2, m.wind3], band=0.3,
                                           held=[m.e[1] ** 2 + m.f[1] ** 2])
    cert = certificate_of(m)
    # the physics is the same system: the same box as without any bookkeeping
    assert cert.certified_fraction == certificate_of(plain).certified_fraction > 0
    assert m.plan.active and m.odd.active and m.total.active and not m.total_cost.fixed and not m.capex.fixed
    assert not m.cost_def.active and not m.import_cap.active  # rewritten into the block
    assert set(m.robustbox_box.bounds.keys()) == {"cost_def:total_cost >= worst case", "import_cap:upper"}
    m.odd.deactivate()  # HiGHS takes linear models only; the exponential row is the modeller's business
    res = pyo.SolverFactory("appsi_highs").solve(m)
    assert str(res.solver.termination_condition) == "optimal"
    # the objective now moves with the decisions: the cost bound changes with pg2 (not a constant)
    lo, up = box_of(m)["pg2"]
    values = []
    for pg2 in (lo, up):
        m.pg2.set_value(pg2)
        m.total_cost.set_value(0.0)
        values.append(pyo.value(m.robustbox_box.bounds["cost_def:total_cost >= worst case"].body))
    assert values[0] != values[1]
    res = pyo.SolverFactory("appsi_highs").solve(m)
    report = check_box(pristine, m, box_of(m), list(pristine.pbal.values()) + list(pristine.qbal.values()),
                       _grid_state(pristine), held=[pristine.e[1] ** 2 + pristine.f[1] ** 2], samples=100)
    assert report.points >= 104 and not report.failures, report.failures[:5]
    assert report.bound_checks >= 2 * report.points


# ----------------------------------------------------------- the two soundness counterexamples
def test_bound_that_depends_on_an_injection_moves_with_it():
    # x + y² = 2, y = c, x ≤ c + 0.5  ⇒  c² + c − 1.5 ≥ 0  ⇒  c ≥ (−1 + √7)/2 = 0.8229 (closed form)
    m = pyo.ConcreteModel()
    m.c = pyo.Param(mutable=True, initialize=1.0)
    m.x = pyo.Var(bounds=(None, m.c + 0.5), initialize=1.0)
    m.y = pyo.Var(initialize=1.0)
    m.e1 = pyo.Constraint(expr=m.x + m.y ** 2 == 2.0)
    m.e2 = pyo.Constraint(expr=m.y == m.c)
    pristine = m.clone()
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.c], band=0.35)
    lo, up = box_of(m)["c"]
    assert lo >= (-1 + np.sqrt(7)) / 2 and up > 1.0
    report = check_box(pristine, m, box_of(m), [pristine.e1, pristine.e2], [pristine.x, pristine.y], samples=50)
    assert not report.failures, report.failures[:5]


def test_bound_of_a_downstream_variable_on_an_injection_is_rejected_by_name():
    m = pyo.ConcreteModel()
    m.avail = pyo.Param(mutable=True, initialize=1.0)
    m.y = pyo.Var(initialize=1.0)
    m.curtail = pyo.Var(bounds=(0, m.avail), initialize=0.0)
    m.e = pyo.Constraint(expr=m.y ** 2 == m.avail)
    m.use = pyo.Constraint(expr=m.curtail <= 2.0)
    with pytest.raises(ModelStructureError, match="bounds of variable 'curtail' depend on injection 'avail'"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.avail], band=0.1)


def test_integer_state_and_injections_are_rejected_by_name():
    m = pyo.ConcreteModel()
    m.s = pyo.Param(mutable=True, initialize=2.0)
    m.x = pyo.Var(within=pyo.Integers, initialize=1.0)
    m.y = pyo.Var(initialize=1.0)
    m.e1 = pyo.Constraint(expr=m.x ** 2 + m.y == m.s)
    m.e2 = pyo.Constraint(expr=m.x - m.y == 0)
    with pytest.raises(ModelStructureError, match="state variable 'x' is integer or binary"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.s], band=0.5)
    m.x.fix(1.0)  # fixed: a constant
    m.e2.deactivate()
    m.y.setlb(0.0)  # bounded, so a physical state (an unbounded y alone in one linear row is bookkeeping)
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.s], band=0.5)
    assert certificate_of(m).status == "certified"
    restore(m)
    m.k = pyo.Var(within=pyo.Binary, initialize=1)
    m.e3 = pyo.Constraint(expr=m.y + m.k == 2.0)
    with pytest.raises(ModelStructureError, match="injection 'k' is an integer or binary variable"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.s, m.k], band=0.5)


def _product_model() -> pyo.ConcreteModel:
    """x = u + 1 with u a decision injection: the smallest model where u·x would appear in a kept row."""
    m = pyo.ConcreteModel()
    m.u = pyo.Var(bounds=(0, 10), initialize=1.0)
    m.x = pyo.Var(bounds=(-100, 100), initialize=2.0)
    m.y = pyo.Var(bounds=(0, 100), initialize=0.0)
    m.phys = pyo.Constraint(expr=m.x == m.u + 1.0)
    return m


@pytest.mark.parametrize("where", ["objective", "kept row", "definition"])
def test_product_of_an_injection_and_the_state_in_a_kept_row_is_rejected(where):
    # u·x = u(u + 1) over u ∈ [0.5, 1.5] is not bounded by any expression linear in u that the rewrite
    # could write from x's response alone (it once claimed 2.5 at u = 1.5, true 3.75): rejected by name
    m = _product_model()
    if where == "objective":
        m.obj = pyo.Objective(expr=m.u * m.x)
    elif where == "kept row":
        m.row = pyo.Constraint(expr=m.u * m.x + m.y <= 10.0)
    else:
        m.cost = pyo.Var(initialize=8.0)
        m.cdef = pyo.Constraint(expr=m.cost == 4 * m.u * m.x)
        m.obj = pyo.Objective(expr=m.cost)
    name = {"objective": "obj", "kept row": "row", "definition": "cdef"}[where]
    with pytest.raises(ModelStructureError, match=f"injection 'u' multiplies a state variable in '{name}'"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.u], band=0.5)


def test_injection_added_to_the_state_in_a_kept_row_is_exact():
    # u + x = 2u + 1 exactly: the rewritten objective equals the true one at every u of the box
    m = _product_model()
    m.obj = pyo.Objective(expr=m.u + m.x + m.u ** 2)
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.u], band=0.5)
    for u in np.linspace(*box_of(m)["u"], 5):
        m.u.set_value(float(u))
        true = u + (u + 1.0) + u ** 2
        assert true - 1e-9 <= pyo.value(m.robustbox_box.objective.expr) <= true + 1e-6


def test_zero_band_and_band_beyond_a_decisions_bounds():
    m = _product_model()
    with pytest.raises(ModelStructureError, match="band of injection 'u' is zero on both sides"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.u], band=0.0)
    m.u.setub(1.2)  # the decision cannot go above 1.2: the band stops at its bound
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.u], band=0.5)
    assert box_of(m)["u"] == pytest.approx((0.5, 1.2), abs=1e-9)
    restore(m)
    m.u.setlb(1.0)
    m.u.setub(1.0)
    with pytest.raises(ModelStructureError, match="injection 'u' sits at its bounds"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.u], band=0.5)


# ------------------------------------------------------------------- scope and input handling
def test_scope_errors_are_named():
    m = _solved_three_bus()
    xf = pyo.TransformationFactory(XF)
    m.cubic = pyo.Constraint(expr=m.e[1] ** 3 <= 2.0)
    with pytest.raises(ModelStructureError, match="'cubic' is not quadratic"):
        xf.apply_to(m, injections=[m.wind3], band=0.1, held=[m.e[1] ** 2 + m.f[1] ** 2, m.pg2])
    m.cubic.deactivate()
    with pytest.raises(ModelStructureError, match="7 equations .* for 8 state variables: hold 1 more"):
        xf.apply_to(m, injections=[m.wind3], band=0.1, held=[m.e[1] ** 2 + m.f[1] ** 2])
    m.qg2.set_value(None)
    with pytest.raises(OperatingPointError, match="without values: qg2"):
        xf.apply_to(m, injections=[m.wind3], band=0.1, held=[m.e[1] ** 2 + m.f[1] ** 2, m.pg2])
    solve_model(m)
    m.unused = pyo.Param(mutable=True, initialize=1.0)
    with pytest.raises(ModelStructureError, match="injection 'unused' appears in no equality or limit of the system"):
        xf.apply_to(m, injections=[m.unused], band=0.1, targets=[m.pbal, m.qbal],
                    held=[m.e[1] ** 2 + m.f[1] ** 2, m.pg2])


def test_option_domains_are_checked():
    m = _solved_three_bus()
    xf = pyo.TransformationFactory(XF)
    held = [m.e[1] ** 2 + m.f[1] ** 2, m.pg2]
    with pytest.raises(ModelStructureError, match="band of injection 'wind3': a band is a nonnegative number"):
        xf.apply_to(m, injections=[m.wind3], band="0.1", held=held)
    with pytest.raises(ModelStructureError, match="either band= or relative_band="):
        xf.apply_to(m, injections=[m.wind3], band=0.1, relative_band=0.1, held=held)
    m.zero = pyo.Param(mutable=True, initialize=0.0)
    with pytest.raises(ModelStructureError, match="zero-width band"):
        xf.apply_to(m, injections=[m.zero], relative_band=0.1, held=held)
    m.pg2.fix()
    with pytest.raises(ModelStructureError, match="injection 'pg2' is a fixed variable"):
        xf.apply_to(m, injections=[m.pg2], band=0.1, held=held[:1])
    m.pg2.unfix()
    with pytest.raises(ModelStructureError, match="held expression .* contains injection 'pg2'"):
        xf.apply_to(m, injections=[m.pg2], band=0.1, held=held)
    with pytest.raises(ModelStructureError, match="not a Pyomo component"):
        xf.apply_to(m, injections=[0.3], band=0.1)
    # a single expression for held is one held quantity
    xf.apply_to(m, injections=[m.wind3, m.pg2], band=0.1, held=m.e[1] ** 2 + m.f[1] ** 2)
    with pytest.raises(ModelStructureError, match="transformed by robustbox.injection_box already"):
        xf.apply_to(m, injections=[m.wind3], band=0.1, held=held, block_name="second_box")
    with pytest.raises(ModelStructureError, match="has no block 'other' .*blocks it made here: robustbox_box"):
        box_of(m, "other")
    restore(m)
    with pytest.raises(ModelStructureError, match="block_name"):
        xf.apply_to(m, injections=[m.wind3], band=0.1, held=held, block_name=5)
    with pytest.raises(ModelStructureError, match="relative_band"):
        xf.apply_to(m, injections=[m.wind3], relative_band=-0.1, held=held)
    with pytest.raises(ModelStructureError, match="objective"):
        xf.apply_to(m, injections=[m.wind3], band=0.1, held=held, objective="largest")


def test_relative_band_uses_the_values_after_solve_first():
    m = _three_bus_model()
    m.v2set.deactivate()
    m.pg2.set_value(0.9)  # not the OPF value; solve_first moves it
    m.v2set.activate()
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.pg2], relative_band=0.1, solve_first=True,
                                           targets=[m.pbal, m.qbal, m.v2set])
    cert = certificate_of(m)
    solved = m.pg2.value
    assert solved != 0.9
    assert cert.lower[0] >= -0.1 * abs(solved) - 1e-12 and cert.upper[0] <= 0.1 * abs(solved) + 1e-12


def test_options_are_documented():
    doc = InjectionBox.CONFIG.generate_documentation()
    for key in ("injections", "band", "relative_band", "held", "targets", "objective", "solve_first",
                "fix_state", "block_name", "reverse"):
        assert key in doc
    for objective in ("uniform", "hosting", "widths", "volume"):
        assert f"'{objective}'" in doc


def test_hosting_keeps_the_largest_lower_side_it_can():
    # x² + y² = r, x·y = s (the closed form of the former non-power test): a wide lower band on s
    m = pyo.ConcreteModel()
    m.x = pyo.Var(initialize=1.5, bounds=(0.5, None))
    m.y = pyo.Var(initialize=1.0, bounds=(None, 2.0))
    m.r = pyo.Param(mutable=True, initialize=1.5 ** 2 + 1.0)
    m.s = pyo.Param(mutable=True, initialize=1.5)
    m.circle = pyo.Constraint(expr=m.x ** 2 + m.y ** 2 == m.r)
    m.hyper = pyo.Constraint(expr=m.x * m.y == m.s)
    pristine = m.clone()
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.r, m.s], band=(5.0, 0.5), objective="hosting")
    cert = certificate_of(m)
    assert cert.status == "certified" and "lower side of the band cannot be kept" in cert.message
    assert np.all(cert.upper > 0)
    report = check_box(pristine, m, box_of(m), [pristine.circle, pristine.hyper], [pristine.x, pristine.y], samples=50)
    assert not report.failures, report.failures[:5]
    for corner in itertools.product((0, 1), repeat=2):
        r = 3.25 + (cert.lower[0] if corner[0] == 0 else cert.upper[0])
        s = 1.5 + (cert.lower[1] if corner[1] == 0 else cert.upper[1])
        assert r - 2 * s >= 0  # real solutions exist (closed form: (x − y)² = r − 2s)


def test_widths_message_reports_the_widths():
    m = _equilibrium_model()
    solve_model(m)
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.feed_a, m.feed_b], band=0.3, objective="widths")
    cert = certificate_of(m)
    assert cert.status == "certified" and np.any(cert.upper > cert.lower)
    assert "widths" in cert.message and "certified: 0 of" not in cert.message


# --------------------------------------------------------------------------- PGLib networks
def _network_model(name: str, margin: float) -> tuple[Network, pyo.ConcreteModel]:
    net = read_case(pglib_case(name))
    model, tight = build_opf(net, 0.0), build_opf(net, margin)
    solve_model(tight)
    for var in tight.component_data_objects(pyo.Var):
        model.find_component(var.name).set_value(var.value)
    return net, model


@pytest.mark.parametrize("name, margin", [("pglib_opf_case14_ieee", 0.05), ("pglib_opf_case30_ieee", 0.02)])
def test_pglib_network_rewrite_lp_and_ac_validation(name, margin):
    """Loads (uncertain, ±20 %) and the dispatch of the non-slack generators (decided by an LP) get a box."""
    net, m = _network_model(name, margin)
    n = net.n_bus
    s, _, _ = net.bus_kinds()
    gb = net.gen_bus_idx()
    flexible = [g for g in m.G if gb[g] != s and m.pg[g].ub > m.pg[g].lb]
    held = [m.x[i] ** 2 + m.x[n + i] ** 2 for i in sorted(set(gb.tolist()))]
    loads = [m.pd[i] for i in range(n) if pyo.value(m.pd[i]) > 0]
    band = ComponentMap([(p, 0.2 * pyo.value(p)) for p in loads] + [(m.pg[g], 0.2) for g in flexible])
    x = np.array([pyo.value(m.x[i]) for i in range(2 * n)])
    pg0 = np.array([pyo.value(m.pg[g]) for g in m.G])
    qg0 = np.array([pyo.value(m.qg[g]) for g in m.G])
    m.cost.deactivate()
    c1 = {g: net.gencost[net.gen_on[g], 5] for g in m.G}
    m.dispatch = pyo.Objective(expr=sum(c1[g] * m.pg[g] for g in m.G))  # the slack's cost included
    pyo.TransformationFactory(XF).apply_to(m, injections=loads + [m.pg[g] for g in flexible], band=band, held=held)
    cert = certificate_of(m)
    assert cert.status == "certified" and cert.certified_fraction > 0
    res = pyo.SolverFactory("appsi_highs").solve(m)
    assert str(res.solver.termination_condition) == "optimal"
    chosen = np.array([pyo.value(m.pg[g]) for g in flexible]) - pg0[flexible]
    v = x[:n] + 1j * x[n:]
    op = OperatingPoint(np.abs(v), np.angle(v), pg0, qg0)
    inj = [Injection(int(net.bus[int(p.index()), 0]), "p", 0, 0) for p in loads]
    inj += [Injection(int(net.gen[net.gen_on[g], GEN_AT]), "p", 0, 0) for g in flexible]
    k = len(loads)
    # a load increase is a net-injection decrease; the dispatch sits at the LP's choice
    lower = np.concatenate([-cert.upper[:k], chosen])
    upper = np.concatenate([-cert.lower[:k], chosen])
    rep = validate_box(net, op, inj, lower, upper, samples=500)
    assert rep.passed and rep.points >= 500, rep.examples
