"""The Pyomo transformation robustbox.injection_box.

Checked on a rectangular OPF written by hand here, on a non-power QCQP and on
PGLib networks; every rewritten model's downstream LP is solved with HiGHS and
its solution is validated with independent Newton power flows (or a root
search) at the box vertices and sampled points.

Numerical tolerances (1e-9) are common practice for double-precision solves, no source.
"""
from __future__ import annotations

import itertools

import numpy as np
import pyomo.environ as pyo
import pytest
from pyomo.common.collections import ComponentMap

from conftest import pglib_case
from robustbox import ModelStructureError, OperatingPointError
from robustbox.grid.casefile import read_case
from robustbox.grid.model import build_opf
from robustbox.grid.network import GEN_BUS, Network
from robustbox.grid.system import Injection, OperatingPoint
from robustbox.solve import solve_model
from robustbox.transform import InjectionBox, certificate_of, restore
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


def _three_bus_model() -> pyo.ConcreteModel:
    """A rectangular-coordinate OPF written directly with Pyomo (not robustbox's builder)."""
    y = _ybus()
    g, b = y.real, y.imag
    m = pyo.ConcreteModel()
    m.B = pyo.RangeSet(0, 2)
    m.e = pyo.Var(m.B, initialize=1.0, bounds=(-1.2, 1.2))
    m.f = pyo.Var(m.B, initialize=0.0, bounds=(-1.2, 1.2))
    m.e[0].fix(1.02)
    m.f[0].fix(0.0)
    m.pg1 = pyo.Var(bounds=(0.0, 2.0), initialize=0.5)
    m.qg1 = pyo.Var(bounds=QLIM, initialize=0.0)
    m.pg2 = pyo.Var(bounds=(0.0, 1.0), initialize=0.4)   # dispatch decided downstream
    m.qg2 = pyo.Var(bounds=QLIM, initialize=0.0)
    m.wind3 = pyo.Param(mutable=True, initialize=0.3)     # uncertain wind output at bus 3
    pg = {0: m.pg1, 1: m.pg2, 2: m.wind3}
    qg = {0: m.qg1, 1: m.qg2, 2: 0.0}
    pd = {0: 0.0, 1: 0.0, 2: LOAD3[0]}
    qd = {0: 0.0, 1: 0.0, 2: LOAD3[1]}

    def p_inj(mm, i):
        return sum(mm.e[i] * (g[i, k] * mm.e[k] - b[i, k] * mm.f[k]) + mm.f[i] * (g[i, k] * mm.f[k] + b[i, k] * mm.e[k])
                   for k in range(3))

    def q_inj(mm, i):
        return sum(mm.f[i] * (g[i, k] * mm.e[k] - b[i, k] * mm.f[k]) - mm.e[i] * (g[i, k] * mm.f[k] + b[i, k] * mm.e[k])
                   for k in range(3))

    m.pbal = pyo.Constraint(m.B, rule=lambda mm, i: p_inj(mm, i) == pg[i] - pd[i])
    m.qbal = pyo.Constraint(m.B, rule=lambda mm, i: q_inj(mm, i) == qg[i] - qd[i])
    m.vlim = pyo.Constraint([1, 2], rule=lambda mm, i: (0.94 ** 2, mm.e[i] ** 2 + mm.f[i] ** 2, 1.06 ** 2))
    m.v2set = pyo.Constraint(expr=m.e[1] ** 2 + m.f[1] ** 2 == 1.01 ** 2)
    m.cost = pyo.Objective(expr=10 * m.pg1 + 0.5 * m.pg1 ** 2 + 8 * m.pg2 + 10 * m.pg2 ** 2)
    return m


def _three_bus_network() -> Network:
    """The same data as MATPOWER tables, for the independent power-flow validator."""
    bus = np.array([[1, 3, 0, 0, 0, 0, 1, 1.02, 0, 100, 1, 1.06, 0.94],
                     [2, 2, 0, 0, 0, 0, 1, 1.01, 0, 100, 1, 1.06, 0.94],
                     [3, 1, LOAD3[0] * 100, LOAD3[1] * 100, 0, 0, 1, 1, 0, 100, 1, 1.06, 0.94]], dtype=float)
    gen = np.array([[1, 50, 0, QLIM[1] * 100, QLIM[0] * 100, 1.02, 100, 1, 200, 0],
                    [2, 40, 0, QLIM[1] * 100, QLIM[0] * 100, 1.01, 100, 1, 100, 0]], dtype=float)
    branch = np.array([[f + 1, t + 1, r, x, 0, 0, 0, 0, 0, 0, 1, -360, 360] for f, t, r, x in LINES], dtype=float)
    return Network.from_tables("three_bus", 100.0, bus, gen, branch)


def test_hand_written_opf_rewrite_lp_and_ac_validation():
    m = _three_bus_model()
    solve_model(m)
    m.v2set.deactivate()  # the voltage set-point becomes a held quantity of the recourse policy
    pg2_0, wind_0 = pyo.value(m.pg2), pyo.value(m.wind3)
    pyo.TransformationFactory(XF).apply_to(
        m, injections=[m.pg2, m.wind3], band=ComponentMap([(m.pg2, (0.3, 0.3)), (m.wind3, (0.3, 0.3))]),
        held=[m.e[1] ** 2 + m.f[1] ** 2])
    cert = certificate_of(m)
    assert cert.status == "certified" and cert.recheck().holds
    assert not m.pbal[1].active and m.robustbox_box.box[0].active
    # downstream: the dispatch LP over the box (gen 2 is cheaper than buying from the slack)
    m.cost.deactivate()
    m.dispatch = pyo.Objective(expr=-5 * m.pg2)
    res = pyo.SolverFactory("appsi_highs").solve(m)
    assert str(res.solver.termination_condition) == "optimal"
    pg2 = pyo.value(m.pg2)
    lo, up = pyo.value(m.robustbox_box.lower[0]), pyo.value(m.robustbox_box.upper[0])
    assert lo - 1e-9 <= pg2 <= up + 1e-9
    # independent AC check: pg2 at the LP's value, wind over its certified range (vertices + 500 samples)
    net = _three_bus_network()
    op_values = [pyo.value(v) for v in (m.e[0], m.f[0], m.e[1], m.f[1], m.e[2], m.f[2])]
    v = np.array(op_values[0::2]) + 1j * np.array(op_values[1::2])
    restore(m)
    op = OperatingPoint(np.abs(v), np.angle(v), np.array([pyo.value(m.pg1), pg2_0]),
                        np.array([pyo.value(m.qg1), pyo.value(m.qg2)]))
    w_lo, w_up = cert.lower[1], cert.upper[1]
    inj = [Injection(2, "p", 0, 0), Injection(3, "p", 0, 0)]
    rep = validate_box(net, op, inj, np.array([pg2 - pg2_0, w_lo]), np.array([pg2 - pg2_0, w_up]), samples=500)
    assert rep.passed and rep.points >= 500, rep.examples
    assert abs(pyo.value(m.wind3) - wind_0) == 0 and m.pbal[1].active  # restored


def test_create_using_leaves_the_original_untouched():
    m = _three_bus_model()
    solve_model(m)
    m.v2set.deactivate()
    new = pyo.TransformationFactory(XF).create_using(m, injections=[m.wind3], band=0.2,
                                                     held=[m.e[1] ** 2 + m.f[1] ** 2, m.pg2])
    assert m.pbal[2].active and m.component("robustbox_box") is None
    assert not new.pbal[2].active and certificate_of(new).status == "certified"


def test_non_power_qcqp():
    # x² + y² = r (r uncertain), x·y = s (uncertain), limits x ≥ 0.5, y ≤ 2.
    m = pyo.ConcreteModel()
    m.x = pyo.Var(initialize=1.5, bounds=(0.5, None))
    m.y = pyo.Var(initialize=1.0, bounds=(None, 2.0))
    m.r = pyo.Param(mutable=True, initialize=1.5 ** 2 + 1.0)
    m.s = pyo.Param(mutable=True, initialize=1.5)
    m.circle = pyo.Constraint(expr=m.x ** 2 + m.y ** 2 == m.r)
    m.hyper = pyo.Constraint(expr=m.x * m.y == m.s)
    pyo.TransformationFactory(XF).apply_to(m, injections=[m.r, m.s], band=1.0)
    cert = certificate_of(m)
    assert cert.certified_fraction > 0
    lo, up = cert.lower, cert.upper
    for corner in itertools.product((0, 1), repeat=2):
        r = 3.25 + (lo[0] if corner[0] == 0 else up[0])
        s = 1.5 + (lo[1] if corner[1] == 0 else up[1])
        # closed form: (x + y)² = r + 2s, (x − y)² = r − 2s; the branch with x ≥ y > 0
        assert r - 2 * s >= 0, "the certified box reaches beyond the real solutions"
        x = (np.sqrt(r + 2 * s) + np.sqrt(r - 2 * s)) / 2
        y = (np.sqrt(r + 2 * s) - np.sqrt(r - 2 * s)) / 2
        assert cert.state_lower[0] - 1e-9 <= x <= cert.state_upper[0] + 1e-9
        assert cert.state_lower[1] - 1e-9 <= y <= cert.state_upper[1] + 1e-9
        assert x >= 0.5 and y <= 2.0  # the model's variable bounds


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
    pyo.TransformationFactory(XF).apply_to(m, injections=loads + [m.pg[g] for g in flexible], band=band, held=held)
    cert = certificate_of(m)
    assert cert.status == "certified" and cert.certified_fraction > 0
    # downstream LP: linear generation cost of the flexible units (coefficients from the case's gencost)
    c1 = {g: net.gencost[net.gen_on[g], 5] for g in m.G}
    m.dispatch = pyo.Objective(expr=sum(c1[g] * m.pg[g] for g in flexible))
    res = pyo.SolverFactory("appsi_highs").solve(m)
    assert str(res.solver.termination_condition) == "optimal"
    chosen = np.array([pyo.value(m.pg[g]) for g in flexible]) - pg0[flexible]
    v = x[:n] + 1j * x[n:]
    op = OperatingPoint(np.abs(v), np.angle(v), pg0, qg0)
    inj = [Injection(int(net.bus[int(p.index()), 0]), "p", 0, 0) for p in loads]
    inj += [Injection(int(net.gen[net.gen_on[g], GEN_BUS]), "p", 0, 0) for g in flexible]
    k = len(loads)
    # a load increase is a net-injection decrease; the dispatch sits at the LP's choice
    lower = np.concatenate([-cert.upper[:k], chosen])
    upper = np.concatenate([-cert.lower[:k], chosen])
    rep = validate_box(net, op, inj, lower, upper, samples=500)
    assert rep.passed and rep.points >= 500, rep.examples


def test_errors_are_named():
    m = _three_bus_model()
    solve_model(m)
    m.v2set.deactivate()
    xf = pyo.TransformationFactory(XF)
    m.cubic = pyo.Constraint(expr=m.e[1] ** 3 <= 2.0)
    with pytest.raises(ModelStructureError, match="'cubic' is not quadratic"):
        xf.apply_to(m, injections=[m.wind3], band=0.1)
    m.cubic.deactivate()
    m.loose = pyo.Var(initialize=0.0)
    m.loose_limit = pyo.Constraint(expr=m.loose + m.e[2] <= 3.0)
    with pytest.raises(ModelStructureError, match="'loose_limit' involves variable 'loose'"):
        xf.apply_to(m, injections=[m.wind3], band=0.1)
    m.loose_limit.deactivate()
    m.qg2.set_value(None)
    with pytest.raises(OperatingPointError, match="without values: qg2"):
        xf.apply_to(m, injections=[m.wind3], band=0.1, held=[m.e[1] ** 2 + m.f[1] ** 2])
    solve_model(m)
    m.unused = pyo.Param(mutable=True, initialize=1.0)
    with pytest.raises(ModelStructureError, match="'unused' appears in no active equality"):
        xf.apply_to(m, injections=[m.wind3, m.unused], band=0.1, held=[m.e[1] ** 2 + m.f[1] ** 2, m.pg2])
    xf.apply_to(m, injections=[m.wind3], band=0.1, held=[m.e[1] ** 2 + m.f[1] ** 2, m.pg2])
    with pytest.raises(ModelStructureError, match="already"):
        xf.apply_to(m, injections=[m.wind3], band=0.1)


def test_non_component_injection_is_named():
    m = _three_bus_model()
    with pytest.raises(ModelStructureError, match="not a Pyomo component"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[0.3], band=0.1)


def test_free_recourse_variable_is_named():
    m = pyo.ConcreteModel()
    m.x = pyo.Var(initialize=1.0)
    m.z = pyo.Var(initialize=0.0)
    m.p = pyo.Param(mutable=True, initialize=1.0)
    m.eq = pyo.Constraint(expr=m.x ** 2 == m.p)
    m.lim = pyo.Constraint(expr=m.x + m.z <= 3)
    with pytest.raises(ModelStructureError, match="'lim' involves variable 'z'"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.p], band=0.1)
    with pytest.raises(ModelStructureError, match="recourse variable 'z' appears in no active equality"):
        pyo.TransformationFactory(XF).apply_to(m, injections=[m.p], band=0.1, recourse=[m.x, m.z])


def test_options_are_documented():
    doc = InjectionBox.CONFIG.generate_documentation()
    for key in ("injections", "band", "relative_band", "held", "objective", "solve_first", "block_name"):
        assert key in doc
