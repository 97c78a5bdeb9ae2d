"""An independent checker for models rewritten by robustbox.injection_box.

It shares no code with robustbox: it solves the model's original equalities with SciPy
(``scipy.optimize.root``, MINPACK's hybrid Powell method, with the exact Jacobian read from Pyomo's
standard representation) from the operating point, then checks every active inequality and
variable bound of the original model, and compares the rewritten rows and objective with the
true values.  Tolerances: equation residual 1e-9 and limit slack 1e-7 (common practice for
double-precision solves, no source).
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass, field

import numpy as np
import pyomo.environ as pyo
from pyomo.core.expr.visitor import identify_variables
from pyomo.repn.standard_repn import generate_standard_repn
from scipy.optimize import root

RESIDUAL_TOL = 1e-9
LIMIT_TOL = 1e-7


def _rows(exprs: list, index: dict):
    """(constant, linear terms, quadratic terms) of each expression in the unknowns; every other
    variable counts as a constant at its current value."""
    out = []
    for expr in exprs:
        repn = generate_standard_repn(expr, quadratic=True, compute_values=True)
        assert repn.nonlinear_expr is None, f"the checker handles polynomials of degree ≤ 2, not {expr}"
        const = float(pyo.value(repn.constant))
        lin: list[tuple[int, float]] = []
        quad: list[tuple[int, int, float]] = []
        for v, c in zip(repn.linear_vars, repn.linear_coefs):  # variables that are not unknowns: constants
            if id(v) in index:
                lin.append((index[id(v)], float(c)))
            else:
                const += float(c) * float(v.value)
        for (a, b), c in zip(repn.quadratic_vars, repn.quadratic_coefs):
            known = [id(a) in index, id(b) in index]
            if all(known):
                quad.append((index[id(a)], index[id(b)], float(c)))
            elif known[0]:
                lin.append((index[id(a)], float(c) * float(b.value)))
            elif known[1]:
                lin.append((index[id(b)], float(c) * float(a.value)))
            else:
                const += float(c) * float(a.value) * float(b.value)
        out.append((const, lin, quad))
    return out


def solve_equalities(equalities: list, unknowns: list, held: list[tuple[object, float]] = ()) -> bool:
    """Solve ``equalities`` (ConstraintData, body == rhs) and ``held`` (expression == value) for
    ``unknowns`` from their current values; on success the solution is loaded into them."""
    index = {id(v): k for k, v in enumerate(unknowns)}
    exprs = [c.body for c in equalities] + [e for e, _ in held]
    rhs = np.array([pyo.value(c.upper) for c in equalities] + [v for _, v in held], dtype=float)
    rows = _rows(exprs, index)
    n = len(unknowns)
    assert len(rows) == n, f"{len(rows)} equations for {n} unknowns"

    def fun(x):
        out = np.empty(n)
        for r, (c, lin, quad) in enumerate(rows):
            out[r] = c + sum(v * x[a] for a, v in lin) + sum(v * x[a] * x[b] for a, b, v in quad) - rhs[r]
        return out

    def jac(x):
        out = np.zeros((n, n))
        for r, (_, lin, quad) in enumerate(rows):
            for a, v in lin:
                out[r, a] += v
            for a, b, v in quad:
                out[r, a] += v * x[b]
                out[r, b] += v * x[a]
        return out

    x0 = np.array([pyo.value(v) for v in unknowns], dtype=float)
    sol = root(fun, x0, jac=jac, method="hybr", options={"xtol": 1e-13})
    if not np.all(np.isfinite(sol.x)) or np.max(np.abs(fun(sol.x)), initial=0.0) > RESIDUAL_TOL:
        return False
    for v, val in zip(unknowns, sol.x):
        v.set_value(float(val), skip_validation=True)
    return True


def limit_violations(model, unknowns: list, skip: set[str] = frozenset()) -> list[str]:
    """Active inequalities of ``model`` that use an unknown (except those named in ``skip``) and
    bounds of the unknowns, violated by more than LIMIT_TOL."""
    ids = {id(v) for v in unknowns}
    bad = []
    for con in model.component_data_objects(pyo.Constraint, active=True, descend_into=True):
        if con.equality or con.name in skip or not any(id(v) in ids for v in identify_variables(con.body)):
            continue
        body = pyo.value(con.body)
        if con.upper is not None and body > pyo.value(con.upper) + LIMIT_TOL:
            bad.append(f"{con.name}: {body:.9g} > {pyo.value(con.upper):.9g}")
        if con.lower is not None and body < pyo.value(con.lower) - LIMIT_TOL:
            bad.append(f"{con.name}: {body:.9g} < {pyo.value(con.lower):.9g}")
    for v in unknowns:
        if v.ub is not None and v.value > v.ub + LIMIT_TOL:
            bad.append(f"bound of {v.name}: {v.value:.9g} > {v.ub:.9g}")
        if v.lb is not None and v.value < v.lb - LIMIT_TOL:
            bad.append(f"bound of {v.name}: {v.value:.9g} < {v.lb:.9g}")
    return bad


@dataclass
class BoxCheck:
    """What :func:`check_box` saw."""

    points: int = 0
    failures: list[str] = field(default_factory=list)
    bound_checks: int = 0


def box_points(box: dict[str, tuple[float, float]], samples: int, seed: int = 0) -> list[dict[str, float]]:
    """All vertices of the box (up to 2⁸) and ``samples`` uniform random points inside."""
    names = list(box)
    lo = np.array([box[k][0] for k in names])
    up = np.array([box[k][1] for k in names])
    corners = list(itertools.product((0.0, 1.0), repeat=len(names))) if len(names) <= 8 else []
    rng = np.random.default_rng(seed)
    pts = [lo + np.array(c) * (up - lo) for c in corners] + list(lo + rng.random((samples, len(names))) * (up - lo))
    return [dict(zip(names, p)) for p in pts]


def check_box(pristine, rewritten, box: dict[str, tuple[float, float]], equalities: list, unknowns: list,
              held: list = (), samples: int = 50, seed: int = 0, block: str = "robustbox_box") -> BoxCheck:
    """At every vertex and ``samples`` random points of ``box``: solve the original equalities of
    ``pristine`` (a copy of the model taken before the rewrite), check all its limits, and check
    that each rewritten row of ``rewritten`` bounds the true value of its original row, and the
    rewritten objective the true objective.  ``held``: expressions of ``pristine`` held at their
    operating values (the recourse policy)."""
    start = {v.name: v.value for v in unknowns}
    held_at = [(e, float(pyo.value(e))) for e in held]
    blk = rewritten.component(block)
    names = {v.name for v in unknowns}
    for v in rewritten.component_data_objects(pyo.Var, descend_into=True):
        if v.name not in names and v.value is not None and pristine.find_component(v.name) is not None:
            pristine.find_component(v.name).set_value(v.value, skip_validation=True)  # downstream values
    rewritten_rows = {str(k).split(":")[0] for k in blk.bounds.keys()} if blk.component("bounds") else set()
    out = BoxCheck()
    for point in box_points(box, samples, seed):
        for name, val in point.items():
            for mdl in (pristine, rewritten):
                comp = mdl.find_component(name)
                comp.set_value(float(val), **({"skip_validation": True} if comp.is_variable_type() else {}))
        for v in unknowns:
            v.set_value(start[v.name], skip_validation=True)
        out.points += 1
        where = ", ".join(f"{k}={v:.6g}" for k, v in point.items())
        if not solve_equalities(equalities, unknowns, held_at):
            out.failures.append(f"no solution found at {where}")
            continue
        out.failures.extend(f"{msg} at {where}" for msg in limit_violations(pristine, unknowns, rewritten_rows))
        for row in blk.component_data_objects(pyo.Constraint, descend_into=False):
            name = str(row.index()).split(":")[0] if row.parent_component().local_name == "bounds" else None
            if name is None:
                continue
            true = pyo.value(pristine.find_component(name).body)
            got = pyo.value(row.body)
            out.bound_checks += 1
            if row.upper is not None and got < true - LIMIT_TOL:
                out.failures.append(f"rewritten {row.name} = {got:.9g} is below the true {true:.9g} at {where}")
            if row.lower is not None and got > true + LIMIT_TOL:
                out.failures.append(f"rewritten {row.name} = {got:.9g} is above the true {true:.9g} at {where}")
        if blk.component("objective") is not None:
            obj = next(pristine.component_data_objects(pyo.Objective, active=True))
            true, got = pyo.value(obj.expr), pyo.value(blk.objective.expr)
            out.bound_checks += 1
            if (got < true - LIMIT_TOL) if blk.objective.sense == pyo.minimize else (got > true + LIMIT_TOL):
                out.failures.append(f"rewritten objective {got:.9g} does not bound the true {true:.9g} at {where}")
    return out
