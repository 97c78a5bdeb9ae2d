"""Compile a Pyomo model into the sparse quadratic representation.

Every active constraint body and the objective are read through Pyomo's
standard representation (``generate_standard_repn`` with quadratic terms);
anything that is not a polynomial of degree ≤ 2 in the model's variables is
rejected with the constraint's name.  Fixed variables become constants.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from pyomo.environ import Constraint, Objective, Var, maximize, value
from pyomo.repn.standard_repn import generate_standard_repn

from .errors import ModelStructureError
from .quadratic import QuadraticMap


@dataclass(frozen=True, eq=False)
class CompiledModel:
    """A Pyomo QCQP as arrays: constraints lower ≤ G(x) ≤ upper, objective f(x), bounds on x."""

    variables: list  # Pyomo VarData in column order
    constraints: list  # Pyomo ConstraintData in row order
    rows: QuadraticMap
    row_lower: np.ndarray
    row_upper: np.ndarray
    objective: QuadraticMap  # one row (minimisation sense; a maximisation objective is negated)
    objective_sign: float
    var_lower: np.ndarray
    var_upper: np.ndarray

    def values(self) -> np.ndarray:
        """Current values of the variables (NaN where a variable has none)."""
        return np.array([np.nan if v.value is None else float(v.value) for v in self.variables])

    def load(self, x: np.ndarray) -> None:
        """Write ``x`` back into the Pyomo variables."""
        for var, val in zip(self.variables, x):
            var.set_value(float(val), skip_validation=True)


def quadratic_repn(expr, name: str, index: dict[int, int], variables: list) -> tuple[list, list, float]:
    """(linear terms, quadratic terms, constant) of ``expr``, numbering new variables into ``index``.

    Raises ModelStructureError naming ``name`` when the expression is not quadratic.
    """
    repn = generate_standard_repn(expr, quadratic=True, compute_values=True)
    if repn.nonlinear_expr is not None:
        raise ModelStructureError(f"constraint or objective '{name}' is not quadratic in the variables "
                                  f"(nonlinear part: {str(repn.nonlinear_expr)[:80]})")
    def col(v) -> int:
        key = id(v)
        if key not in index:
            index[key] = len(variables)
            variables.append(v)
        return index[key]
    lin = [(col(v), float(c)) for v, c in zip(repn.linear_vars, repn.linear_coefs)]
    quad = [(col(a), col(b), float(c)) for (a, b), c in zip(repn.quadratic_vars, repn.quadratic_coefs)]
    return lin, quad, float(value(repn.constant))


def compile_model(model, *, constraints: list | None = None, objective: bool = True) -> CompiledModel:
    """Compile the active constraints (or the given ones) and, if ``objective``, the active objective."""
    index: dict[int, int] = {}
    variables: list = []
    cons = list(constraints) if constraints is not None else list(
        model.component_data_objects(Constraint, active=True, descend_into=True))
    q_r, q_a, q_b, q_v, l_r, l_c, l_v, const, lo, up, names = [], [], [], [], [], [], [], [], [], [], []
    for r, con in enumerate(cons):
        lin, quad, c = quadratic_repn(con.body, con.name, index, variables)
        for a, b, v in quad:
            q_r.append(r); q_a.append(a); q_b.append(b); q_v.append(v)  # noqa: E702
        for a, v in lin:
            l_r.append(r); l_c.append(a); l_v.append(v)  # noqa: E702
        const.append(c)
        lo.append(-np.inf if con.lower is None else float(value(con.lower)))
        up.append(np.inf if con.upper is None else float(value(con.upper)))
        names.append(con.name)
    objs = list(model.component_data_objects(Objective, active=True, descend_into=True)) if objective else []
    if len(objs) > 1:
        raise ModelStructureError(f"the model has {len(objs)} active objectives; deactivate all but one")
    obj_terms = ([], [], 0.0)
    sign = 1.0
    if objs:
        sign = -1.0 if objs[0].sense == maximize else 1.0
        obj_terms = quadratic_repn(objs[0].expr, objs[0].name, index, variables)
    for v in model.component_data_objects(Var, active=True, descend_into=True):
        if not v.fixed and id(v) not in index:
            index[id(v)] = len(variables)
            variables.append(v)
    n = len(variables)
    rows = QuadraticMap.from_terms(n, names, (q_r, q_a, q_b, q_v), (l_r, l_c, l_v), const)
    ol, oq, oc = obj_terms
    objective = QuadraticMap.from_terms(
        n, ["objective"], ([0] * len(oq), [a for a, _, _ in oq], [b for _, b, _ in oq], [sign * v for _, _, v in oq]),
        ([0] * len(ol), [a for a, _ in ol], [sign * v for _, v in ol]), [sign * oc])
    vlo = np.array([-np.inf if v.lb is None else float(v.lb) for v in variables])
    vup = np.array([np.inf if v.ub is None else float(v.ub) for v in variables])
    return CompiledModel(variables, cons, rows, np.array(lo), np.array(up), objective, sign, vlo, vup)

