"""AC optimal power flow as a Pyomo QCQP in rectangular coordinates, and its solution.

The model follows the published PGLib-OPF AC model: minimise generator cost
(polynomial up to degree 2, or piecewise linear through epigraph variables);
power balance at every bus with shunts; |V| bounds as e² + f² bounds;
generator P/Q bounds; slack angle zero; branch apparent power ≤ rateA at both
ends (exact: auxiliary flow variables with p² + q² ≤ rate²); angle-difference
bounds in tangent form.  ``margin`` tightens every limit by that fraction of
its range (flows: of the rating) to obtain an operating point with room to
move; the result reports the cost increase over the untightened optimum.
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pyomo.environ as pyo

from ..errors import NetworkError, SolverError
from ..quadratic import QuadraticMap
from ..solve import SolveResult, solve_model
from .forms import angle_forms, branch_flow_forms, injection_forms
from .network import BRANCH_ANGLE_HIGH, BRANCH_ANGLE_LOW, BUS_NUMBER, BUS_P_LOAD, BUS_Q_LOAD, BRANCH_LIMIT_A, BUS_V_ANG, BUS_V_MAG, BUS_V_HIGH, BUS_V_LOW, Network
from .system import OperatingPoint


def _bounds(lo: float, hi: float) -> tuple[float | None, float | None]:
    """Pyomo bounds: None where the case gives an infinite limit."""
    return (float(lo) if np.isfinite(lo) else None, float(hi) if np.isfinite(hi) else None)


def _middle(lo: float, hi: float) -> float:
    """A starting value inside [lo, hi]: the midpoint, or 0 moved inside when a side is unbounded."""
    return float(0.5 * (lo + hi)) if np.isfinite(lo) and np.isfinite(hi) else float(np.clip(0.0, lo, hi))


def _row_exprs(qmap: QuadraticMap, x) -> list:
    """Pyomo expressions of every row of a quadratic map over variables x[0..n−1]."""
    terms: list[list] = [[] for _ in range(qmap.n_rows)]
    for r, a, b, v in zip(qmap.q_row, qmap.q_a, qmap.q_b, qmap.q_val):
        terms[r].append(float(v) * x[int(a)] * x[int(b)])
    lin = qmap.linear.tocoo()
    for r, c, v in zip(lin.row, lin.col, lin.data):
        terms[r].append(float(v) * x[int(c)])
    return [sum(t) + float(c) if t else float(c) for t, c in zip(terms, qmap.constant)]


def _tighten(lo: np.ndarray, hi: np.ndarray, margin: float) -> tuple[np.ndarray, np.ndarray]:
    width = np.where(np.isfinite(hi - lo), hi - lo, 0.0)
    return lo + margin * width, hi - margin * width


def build_opf(net: Network, margin: float = 0.0, margin_gen: float | None = None) -> pyo.ConcreteModel:
    """The AC-OPF of ``net`` as a Pyomo model (per unit; cost in $/h).

    ``margin`` tightens every limit by that fraction of its range; ``margin_gen``
    (default: ``margin``) is used for the generators' P and Q limits instead,
    e.g. 0 for congested cases whose load needs the full generation range.
    """
    margin_gen = margin if margin_gen is None else margin_gen
    if not (0.0 <= margin < 0.5 and 0.0 <= margin_gen < 0.5):
        raise NetworkError(f"margin must be in [0, 0.5), got {margin} (active power {margin_gen})")
    if net.gencost is None:
        raise NetworkError(f"{net.source}: no mpc.gencost table, so there is no OPF objective")
    n, base = net.n_bus, net.base_mva
    on = net.gen_on
    gb = net.gen_bus_idx()
    s = net.slack
    m = pyo.ConcreteModel(name=f"acopf_{net.name}")
    m.B = pyo.RangeSet(0, n - 1)
    m.G = pyo.RangeSet(0, len(on) - 1)
    vmin, vmax = _tighten(net.bus[:, BUS_V_LOW], net.bus[:, BUS_V_HIGH], margin)
    lim = net.gen_limits_pu()
    pmin, pmax = _tighten(lim["pmin"], lim["pmax"], margin_gen)
    qmin, qmax = _tighten(lim["qmin"], lim["qmax"], margin_gen)
    vm0, va0 = net.bus[:, BUS_V_MAG], np.radians(net.bus[:, BUS_V_ANG] - net.bus[s, BUS_V_ANG])
    m.x = pyo.Var(pyo.RangeSet(0, 2 * n - 1), initialize=lambda _, i: float(
        vm0[i] * np.cos(va0[i]) if i < n else vm0[i - n] * np.sin(va0[i - n])))
    for i in range(n):
        m.x[i].setlb(-vmax[i]); m.x[i].setub(vmax[i])  # noqa: E702
        m.x[n + i].setlb(-vmax[i]); m.x[n + i].setub(vmax[i])  # noqa: E702
    m.x[s].setlb(0.0)
    m.x[n + s].fix(0.0)
    m.pg = pyo.Var(m.G, bounds=lambda _, g: _bounds(pmin[g], pmax[g]), initialize=lambda _, g: _middle(pmin[g], pmax[g]))
    m.qg = pyo.Var(m.G, bounds=lambda _, g: _bounds(qmin[g], qmax[g]), initialize=lambda _, g: _middle(qmin[g], qmax[g]))
    inj = _row_exprs(injection_forms(net), m.x)
    gens_at = [[] for _ in range(n)]
    for g, b in enumerate(gb):
        gens_at[b].append(g)
    # loads are mutable parameters (per unit) so that a model user can move them
    m.pd = pyo.Param(m.B, mutable=True, initialize=lambda _, i: float(net.bus[i, BUS_P_LOAD] / base))
    m.qd = pyo.Param(m.B, mutable=True, initialize=lambda _, i: float(net.bus[i, BUS_Q_LOAD] / base))
    m.p_balance = pyo.Constraint(m.B, rule=lambda mm, i: sum(mm.pg[g] for g in gens_at[i]) - mm.pd[i] == inj[i])
    m.q_balance = pyo.Constraint(m.B, rule=lambda mm, i: sum(mm.qg[g] for g in gens_at[i]) - mm.qd[i] == inj[n + i])
    m.voltage = pyo.Constraint(m.B, rule=lambda mm, i: (vmin[i] ** 2, mm.x[i] ** 2 + mm.x[n + i] ** 2, vmax[i] ** 2))
    # branch flows (exact circle through auxiliary variables)
    br = net.branch[net.branch_on]
    rated = np.flatnonzero(br[:, BRANCH_LIMIT_A] > 0)
    flows = _row_exprs(branch_flow_forms(net), m.x)
    m.R = pyo.RangeSet(0, 2 * len(rated) - 1) if len(rated) else pyo.Set(initialize=[])
    m.fp = pyo.Var(m.R, initialize=0.0)
    m.fq = pyo.Var(m.R, initialize=0.0)
    rate = br[rated, BRANCH_LIMIT_A] / base * (1.0 - margin)
    m.fp_def = pyo.Constraint(m.R, rule=lambda mm, r: mm.fp[r] == flows[4 * rated[r // 2] + 2 * (r % 2)])
    m.fq_def = pyo.Constraint(m.R, rule=lambda mm, r: mm.fq[r] == flows[4 * rated[r // 2] + 2 * (r % 2) + 1])
    m.flow_limit = pyo.Constraint(m.R, rule=lambda mm, r: mm.fp[r] ** 2 + mm.fq[r] ** 2 <= rate[r // 2] ** 2)
    # angle differences, tightened by the margin
    tight = net.copy()
    lo_a, hi_a = tight.branch[:, BRANCH_ANGLE_LOW].copy(), tight.branch[:, BRANCH_ANGLE_HIGH].copy()
    inside = (lo_a > -90) & (hi_a < 90)
    lo_t, hi_t = _tighten(lo_a, hi_a, margin)
    tight.branch[:, BRANCH_ANGLE_LOW] = np.where(inside, lo_t, lo_a)
    tight.branch[:, BRANCH_ANGLE_HIGH] = np.where(inside, hi_t, hi_a)
    ang = _row_exprs(angle_forms(tight), m.x)
    m.A = pyo.RangeSet(0, len(ang) - 1) if ang else pyo.Set(initialize=[])
    m.angle = pyo.Constraint(m.A, rule=lambda mm, r: ang[r] <= 0.0)
    # cost
    cost_terms = []
    m.cost_pwl = pyo.Var(m.G, initialize=0.0)
    pwl_rows = []
    for g, row in enumerate(on):
        c = net.gencost[row]
        model, ncost = int(c[0]), int(c[3])
        if model == 2:
            coef = c[4:4 + ncost][::-1]  # c0, c1, c2 ...
            if np.any(coef[3:] != 0):
                raise NetworkError(f"{net.where('gencost', int(row))}: polynomial cost of degree {ncost - 1} is "
                                   "not quadratic; the OPF supports degree ≤ 2")
            pmw = m.pg[g] * base
            cost_terms.append(sum(float(coef[k]) * pmw ** k for k in range(min(len(coef), 3)) if coef[k] != 0))
            m.cost_pwl[g].fix(0.0)
        else:
            pts = c[4:4 + 2 * ncost].reshape(-1, 2)
            pwl_rows.append((g, pts))
            cost_terms.append(m.cost_pwl[g])
    m.PW = pyo.Set(initialize=[(g, k) for g, pts in pwl_rows for k in range(len(pts) - 1)], dimen=2)
    pwl = dict(pwl_rows)

    def _segment(mm, g, k):
        (x0, y0), (x1, y1) = pwl[g][k], pwl[g][k + 1]
        slope = (y1 - y0) / (x1 - x0)
        return mm.cost_pwl[g] >= y0 + slope * (mm.pg[g] * base - x0)
    m.pwl_segment = pyo.Constraint(m.PW, rule=_segment)
    m.cost = pyo.Objective(expr=sum(cost_terms), sense=pyo.minimize)
    return m


@dataclass(frozen=True)
class OPFResult:
    """An AC-OPF solution; costs in $/h.  ``cost_increase_per_h`` is the price of the margin."""

    point: OperatingPoint
    objective_per_h: float
    margin: float
    base_objective_per_h: float | None
    cost_increase_per_h: float | None
    status: str
    time_s: float
    solve: SolveResult

    @property
    def cost_increase_pct(self) -> float | None:
        if self.cost_increase_per_h is None or not self.base_objective_per_h:
            return None
        return 100.0 * self.cost_increase_per_h / abs(self.base_objective_per_h)


def _point_of(net: Network, model: pyo.ConcreteModel, objective: float) -> OperatingPoint:
    n = net.n_bus
    x = np.array([pyo.value(model.x[i]) for i in range(2 * n)])
    v = x[:n] + 1j * x[n:]
    pg = np.array([pyo.value(model.pg[g]) for g in model.G])
    qg = np.array([pyo.value(model.qg[g]) for g in model.G])
    return OperatingPoint(np.abs(v), np.angle(v), pg, qg, objective)


def solve_opf(net: Network, margin: float = 0.0, tol: float = 1e-8, compare_base: bool = True,
              margin_gen: float | None = None, start: OperatingPoint | None = None,
              base: "OPFResult | None" = None, max_iter: int = 3000) -> OPFResult:
    """Solve the AC-OPF (tightened by ``margin``; ``margin_gen`` for generator P and Q, see build_opf) with Ipopt.

    With a margin and ``compare_base``, the untightened OPF is solved first (or ``base`` is used)
    and its optimum is reported beside the tightened one (the price of security); its solution is
    then Ipopt's starting point, else ``start`` if given (e.g. the previous interval of a time
    series), else a flat start.  ``max_iter`` caps Ipopt's iterations (a cap reached is a failure).
    """
    t0 = time.perf_counter()
    base_obj = None
    warm = start
    if margin > 0 and compare_base:
        base = base or solve_opf(net, 0.0, tol, compare_base=False)
        base_obj, warm = base.objective_per_h, base.point
    model = build_opf(net, margin, margin_gen)
    if warm is not None:
        v = warm.voltage
        for i in range(2 * net.n_bus):
            var = model.x[i]
            if not var.fixed:
                var.set_value(float(np.clip(v[i].real if i < net.n_bus else v[i - net.n_bus].imag, var.lb, var.ub)))
        for g in model.G:
            model.pg[g].set_value(float(np.clip(warm.pg_pu[g], model.pg[g].lb, model.pg[g].ub)))
            model.qg[g].set_value(float(np.clip(warm.qg_pu[g], model.qg[g].lb, model.qg[g].ub)))
    try:
        res = solve_model(model, tol=tol, options={"max_iter": max_iter})
    except SolverError as exc:
        what = f"with margin {margin:g}" if margin else "without margin"
        raise SolverError(f"{net.source}: AC-OPF {what}: {exc}") from None
    obj = float(pyo.value(model.cost))
    point = _point_of(net, model, obj)
    inc = None if base_obj is None else obj - base_obj
    return OPFResult(point, obj, margin, base_obj if margin > 0 else obj, inc, res.status,
                     time.perf_counter() - t0, res)


MARGIN_LADDER = (0.1, 0.05, 0.02, 0.01, 0.005, 0.002, 0.001)  # tried in turn when no margin is given (common practice, no source)
LADDER_MAX_ITER = 400  # Ipopt iterations per rung: a rung that needs more is treated as failed (fail fast)


def find_operating_point(net: Network, margin: float | None = None,
                         say: Callable[[str], None] | None = None) -> OPFResult:
    """The operating point for a certificate: the AC-OPF with the largest margin of MARGIN_LADDER that solves.

    With ``margin`` given, exactly that margin.  Otherwise the untightened OPF is solved first (its
    optimum is the cost reference and the warm start), then each margin in turn, each capped at
    LADDER_MAX_ITER iterations; ``say`` receives one line per attempt.  When no margin solves, the
    SolverError names the limits that leave no room at the untightened optimum (in MW, Mvar, pu, MVA).
    """
    if margin is not None:
        return solve_opf(net, margin)
    say = say or (lambda _line: None)
    try:
        base = solve_opf(net, 0.0, compare_base=False)
    except SolverError as exc:
        raise SolverError(f"{exc}. No operating point at all: check the case's limits and loads") from None
    say(f"operating point: untightened AC-OPF {base.objective_per_h:.2f} $/h ({base.time_s:.1f} s)")
    for m in MARGIN_LADDER:
        try:
            res = solve_opf(net, m, base=base, max_iter=LADDER_MAX_ITER)
        except SolverError as exc:
            say(f"operating point: margin {m:g} not found ({str(exc).split(': ', 2)[-1]})")
            continue
        say(f"operating point: margin {m:g}, {res.objective_per_h:.2f} $/h, +{res.cost_increase_pct:.3g} % over the "
            f"untightened optimum ({res.time_s:.1f} s)")
        return res
    tight = limits_without_room(net, base.point)
    lim = net.gen_limits_pu()
    load_mw, cap_mw = net.load_pu().real.sum() * net.base_mva, lim["pmax"].sum() * net.base_mva
    raise SolverError(f"{net.source}: no operating point keeps even {MARGIN_LADDER[-1]:g} of every limit's range in "
                      f"reserve, so no box can be certified around one (load {load_mw:.1f} MW against "
                      f"{cap_mw:.1f} MW of generation capacity in service). At the least-cost point these limits "
                      f"have no room: {'; '.join(tight) if tight else '(none at its bound: the margin OPF failed numerically)'}. "
                      "Give a point with --point, or relax those limits if the data allow")


def limits_without_room(net: Network, op: OperatingPoint, rel: float = 1e-4, count: int = 8) -> list[str]:
    """Limits at (within ``rel`` of the range from) their bounds at ``op``, in engineering units, tightest first."""
    base = net.base_mva
    out: list[tuple[float, str]] = []
    vm = op.v_mag_pu
    lo, hi = net.bus[:, BUS_V_LOW], net.bus[:, BUS_V_HIGH]
    width = np.maximum(hi - lo, 1e-9)
    for i in range(net.n_bus):
        for gap, side, bound in ((hi[i] - vm[i], "upper", hi[i]), (vm[i] - lo[i], "lower", lo[i])):
            if gap <= rel * width[i]:
                out.append((gap / width[i], f"|V| at bus {int(net.bus[i, BUS_NUMBER])} = {vm[i]:.4f} pu at its "
                                            f"{side} limit {bound:.4f} pu"))
    lim = net.gen_limits_pu()
    for k, row in enumerate(net.gen_on):
        for key, val, unit in (("p", op.pg_pu[k], "MW"), ("q", op.qg_pu[k], "Mvar")):
            a, b = lim[f"{key}min"][k], lim[f"{key}max"][k]
            w = b - a if np.isfinite(b - a) and b > a else 0.0
            if w <= 0:
                continue
            for gap, side, bound in ((b - val, "upper", b), (val - a, "lower", a)):
                if gap <= rel * w:
                    out.append((gap / w, f"{key.upper()} of generator row {net.file_row('gen', int(row))} at bus "
                                         f"{int(net.gen[row, 0])} = {val * base:.2f} {unit} at its {side} limit "
                                         f"{bound * base:.2f} {unit}"))
    _, yf, yt = net.admittance()
    v = op.voltage
    f, t = net.branch_ends()
    rate = net.branch[net.branch_on, BRANCH_LIMIT_A]
    flow = np.maximum(np.abs(v[f] * np.conj(yf @ v)), np.abs(v[t] * np.conj(yt @ v))) * base
    for k in np.flatnonzero((rate > 0) & (flow >= rate * (1 - rel))):
        br = net.branch[net.branch_on[k]]
        out.append(((rate[k] - flow[k]) / rate[k], f"flow on branch {int(br[0])}-{int(br[1])} = {flow[k]:.1f} MVA at "
                                                   f"its rating {rate[k]:.1f} MVA"))
    out.sort(key=lambda x: x[0])
    return [text for _, text in out[:count]]
