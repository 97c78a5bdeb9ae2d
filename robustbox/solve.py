"""Solve a Pyomo QCQP with Ipopt through cyipopt (exact sparse derivatives).

Pyomo's own Ipopt interfaces need an ``ipopt`` executable or compiled
extensions; this bridge compiles the model (:mod:`robustbox.extract`) and
hands Ipopt exact sparse Jacobians and Hessians of the quadratic rows.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

import cyipopt
import numpy as np

from .errors import SolverError
from .extract import CompiledModel, compile_model

_IPOPT_OK = {0: "solved", 1: "solved to acceptable level"}


@dataclass(frozen=True)
class SolveResult:
    """Ipopt's outcome: objective in the model's units and sense, status text, wall time."""

    objective: float
    status: str
    success: bool
    time_s: float
    max_violation: float


class _Problem:
    """cyipopt callbacks over a :class:`CompiledModel`."""

    def __init__(self, cm: CompiledModel) -> None:
        self.cm = cm
        rows, obj = cm.rows, cm.objective
        # Jacobian pattern: every (row, var) that appears in a term
        jr = np.concatenate([rows.q_row, rows.q_row, rows.linear.tocoo().row])
        jc = np.concatenate([rows.q_a, rows.q_b, rows.linear.tocoo().col])
        key = jr * rows.n_vars + jc
        self.jkeys, inv = np.unique(key, return_inverse=True)
        nq = len(rows.q_row)
        self.pos_a, self.pos_b, self.pos_l = inv[:nq], inv[nq:2 * nq], inv[2 * nq:]
        self.lin_vals = rows.linear.tocoo().data
        # Hessian pattern (lower triangle) of constraints and objective
        ha = np.concatenate([rows.q_a, obj.q_a])
        hb = np.concatenate([rows.q_b, obj.q_b])
        hr, hc = np.maximum(ha, hb), np.minimum(ha, hb)
        self.hkeys, hinv = np.unique(hr * rows.n_vars + hc, return_inverse=True)
        self.hpos_c, self.hpos_o = hinv[:nq], hinv[nq:]

    def objective(self, x: np.ndarray) -> float:
        return float(self.cm.objective.evaluate(x)[0])

    def gradient(self, x: np.ndarray) -> np.ndarray:
        return np.asarray(self.cm.objective.jacobian(x).toarray()).ravel()

    def constraints(self, x: np.ndarray) -> np.ndarray:
        return self.cm.rows.evaluate(x)

    def jacobianstructure(self) -> tuple[np.ndarray, np.ndarray]:
        return np.divmod(self.jkeys, self.cm.rows.n_vars)

    def jacobian(self, x: np.ndarray) -> np.ndarray:
        r = self.cm.rows
        diag = r.q_a == r.q_b
        n = len(self.jkeys)
        va = np.where(diag, 2.0, 1.0) * r.q_val * x[r.q_b]
        vb = np.where(diag, 0.0, r.q_val * x[r.q_a])
        return (np.bincount(self.pos_a, weights=va, minlength=n) + np.bincount(self.pos_b, weights=vb, minlength=n)
                + np.bincount(self.pos_l, weights=self.lin_vals, minlength=n))

    def hessianstructure(self) -> tuple[np.ndarray, np.ndarray]:
        return np.divmod(self.hkeys, self.cm.rows.n_vars)

    def hessian(self, x: np.ndarray, lagrange: np.ndarray, obj_factor: float) -> np.ndarray:
        r, o = self.cm.rows, self.cm.objective
        n = len(self.hkeys)
        wc = lagrange[r.q_row] * r.q_val * np.where(r.q_a == r.q_b, 2.0, 1.0)
        wo = obj_factor * o.q_val * np.where(o.q_a == o.q_b, 2.0, 1.0)
        return np.bincount(self.hpos_c, weights=wc, minlength=n) + np.bincount(self.hpos_o, weights=wo, minlength=n)


def solve_compiled(cm: CompiledModel, x0: np.ndarray | None = None, tol: float = 1e-8, max_iter: int = 3000,
                   options: dict | None = None) -> tuple[np.ndarray, SolveResult]:
    """Run Ipopt on a compiled model from ``x0`` (default: current values, else projected zero)."""
    x0 = cm.values() if x0 is None else np.asarray(x0, dtype=float)
    x0 = np.where(np.isnan(x0), 0.0, x0)
    x0 = np.clip(x0, cm.var_lower, cm.var_upper)
    big = 1e20
    prob = cyipopt.Problem(n=len(x0), m=cm.rows.n_rows, problem_obj=_Problem(cm),
                           lb=np.where(np.isfinite(cm.var_lower), cm.var_lower, -big),
                           ub=np.where(np.isfinite(cm.var_upper), cm.var_upper, big),
                           cl=np.where(np.isfinite(cm.row_lower), cm.row_lower, -big),
                           cu=np.where(np.isfinite(cm.row_upper), cm.row_upper, big))
    for key, val in {"print_level": 0, "tol": tol, "max_iter": max_iter, "sb": "yes",
                     "mu_strategy": "adaptive", **(options or {})}.items():
        prob.add_option(key, val)
    t0 = time.perf_counter()
    x, info = prob.solve(x0)
    elapsed = time.perf_counter() - t0
    g = cm.rows.evaluate(x)
    viol = float(max(np.max(g - cm.row_upper, initial=0.0), np.max(cm.row_lower - g, initial=0.0)))
    status = info["status"]
    ok = status in _IPOPT_OK
    text = _IPOPT_OK.get(status, info["status_msg"].decode() if isinstance(info["status_msg"], bytes) else str(info["status_msg"]))
    return x, SolveResult(cm.objective_sign * float(info["obj_val"]), text, ok, elapsed, viol)


def solve_model(model, tol: float = 1e-8, options: dict | None = None, load: bool = True) -> SolveResult:
    """Solve a Pyomo QCQP with Ipopt (via cyipopt) and load the solution into the model.

    Raises SolverError naming the status when Ipopt does not converge.
    """
    cm = compile_model(model)
    x, res = solve_compiled(cm, tol=tol, options=options)
    if not res.success:
        raise SolverError(f"Ipopt did not solve the model: {res.status} (max constraint violation {res.max_violation:.3g})")
    if load:
        cm.load(x)
    return res
