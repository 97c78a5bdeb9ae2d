"""Pyomo transformation ``robustbox.injection_box`` (registered by ``import robustbox``).

Replaces the nonconvex quadratic equalities of a model (the physics) by a certified box of
injections, and everything downstream that depends on the physics by proven bounds:

1. the *injections* (Vars: decisions such as a dispatch set-point; mutable Params: uncertain
   quantities such as wind output or a load) are held at their current values;
2. the scope rule (:mod:`robustbox.scope`) picks the *system*: the equalities reachable from the
   injections (or those inside ``targets``), their *state* variables, the *monitored limits*, and
   the *kept* rows (inequalities, bookkeeping definitions and the objective that use the state or
   an uncertain injection); the rest of the model is left alone;
3. the certificate (:func:`robustbox.certify.certify`) gives a box around the current values for
   which a solution of the system inside every limit provably exists, and the certified response
   of every kept row's state part (first-order response + proven remainder interval);
4. the system and the limits are deactivated (kept, not deleted); a Block holds
   ``lower ≤ injection ≤ upper`` (indexed by the injections' names), the certificate, and each
   kept row rewritten to its *worst case over the box*: the row's state part replaced by its
   affine response plus the remainder bound in the unfavourable direction, and every uncertain
   (Param) injection at its unfavourable end.  A rewritten inequality therefore holds for the true
   AC state at every point of the box, and a rewritten minimisation objective is a proven upper
   bound on the true objective (a lower bound when maximising).

``apply_to`` returns a reverse token: ``apply_to(model, reverse=token)`` undoes the rewrite, as
does :func:`restore`.  :func:`certificate_of` and :func:`box_of` read the result.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from pyomo.common.collections import ComponentMap
from pyomo.common.config import (ConfigDict, ConfigValue, In, IsInstance, PositiveFloat,
                                  document_kwargs_from_configdict)
from pyomo.core.base.transformation import (ReverseTransformationToken, Transformation,
                                            TransformationFactory)
from pyomo.core.expr.visitor import identify_mutable_parameters, identify_variables, replace_expressions
from pyomo.environ import Any, Block, Constraint, Objective, Param, Set, Suffix, Var, maximize, minimize, value
from pyomo.repn.standard_repn import generate_standard_repn
from scipy.sparse.csgraph import maximum_bipartite_matching

from .certify import Certificate, CertifyOptions, certify
from .errors import ModelStructureError, OperatingPointError
from .extract import compile_model, quadratic_repn
from .quadratic import QuadraticMap, QuadraticSystem, UncertainSet
from .scope import Scope, find_scope
from .solve import solve_model

NAME = "robustbox.injection_box"
SUFFIX = "robustbox_injection"


@dataclass
class _Record:
    """What the rewrite changed, so that :func:`restore` can undo it (names: survives clone/pickle)."""

    deactivated: list[str] = field(default_factory=list)
    fixed_state: list[str] = field(default_factory=list)
    certificate: Certificate | None = None
    injections: list[str] = field(default_factory=list)
    state: list[str] = field(default_factory=list)
    bounds: dict[str, str] = field(default_factory=dict)  # rewritten row → where it came from


@dataclass(eq=False)
class _Side:
    """One side of a kept row, read as  s·(body − bound) ≤ 0  (objective: s·expr, bounded above)."""

    key: str
    component: object
    sign: float
    bound: float  # value of the row's bound at the operating point (0 for an objective)
    body: object  # Pyomo expression


def _expand(items) -> list:
    out = []
    for item in items:
        if hasattr(item, "is_indexed") and item.is_indexed():
            out.extend(item.values())
        else:
            out.append(item)
    return out


def _as_list(raw, option: str) -> list:
    """An option that takes one component/expression or a list of them."""
    if raw is None:
        return []
    if isinstance(raw, (list, tuple)):
        return list(raw)
    if hasattr(raw, "is_expression_type") or hasattr(raw, "is_indexed"):
        return [raw]
    raise ModelStructureError(f"option '{option}' takes a Pyomo component or expression or a list of them, "
                              f"got {type(raw).__name__} {raw!r}")


def _band_value(raw, where: str) -> tuple[float, float] | None:
    """(below, above) from a number or a pair; None stays None."""
    if raw is None:
        return None
    try:
        lo, up = (raw, raw) if np.isscalar(raw) and not isinstance(raw, str) else tuple(raw)
        if isinstance(lo, str) or isinstance(up, str):
            raise TypeError
        lo, up = float(lo), float(up)
    except (TypeError, ValueError):
        raise ModelStructureError(f"{where}: a band is a nonnegative number or a pair (below, above) of "
                                  f"them, got {type(raw).__name__} {raw!r}") from None
    if not (np.isfinite(lo) and np.isfinite(up) and lo >= 0 and up >= 0):
        raise ModelStructureError(f"{where}: band must be nonnegative finite numbers, got {raw!r}")
    return lo, up


@TransformationFactory.register(NAME, doc="Replace nonconvex quadratic equalities by a certified box of injections")
@document_kwargs_from_configdict("CONFIG")
class InjectionBox(Transformation):
    """Replace the model's physics by a certified box of injections (see the module doc)."""

    CONFIG = ConfigDict(NAME)
    CONFIG.declare("injections", ConfigValue(
        default=None, description="The injections: Vars (decisions) or mutable Params (uncertain)",
        doc="Components (indexed or not) whose values move inside the box. A Var is a decision of the "
            "downstream model (it stays a variable, bounded by the box); a mutable Param is uncertain "
            "(every kept row is rewritten for its worst value in the box). If None, the model's "
            f"Suffix '{SUFFIX}' is read: each entry maps a component to its band."))
    CONFIG.declare("band", ConfigValue(
        default=None, description="Requested band (absolute, in each injection's units)",
        doc="A number b (each injection moves in [value − b, value + b]), a pair (below, above) of "
            "nonnegative numbers, or a pyomo ComponentMap (or a dict keyed by component name) from "
            "injections (or their indexed components) to such a number or pair."))
    CONFIG.declare("relative_band", ConfigValue(
        default=None, domain=PositiveFloat, description="Band as a fraction of |operating value|",
        doc="Each injection moves in value ± relative_band·|value| (values after solve_first). Not "
            "together with 'band'; an injection whose value is 0 needs 'band'."))
    CONFIG.declare("held", ConfigValue(
        default=(), description="Expressions held at their operating values (recourse policy)",
        doc="A Pyomo expression or variable of the state, or a list of them, that stays at its current "
            "value (e.g. |V|² at generator buses, a generator's P set-point). Each becomes an equation; "
            "the system must then be square (as many equations as state variables)."))
    CONFIG.declare("targets", ConfigValue(
        default=None, description="The system: constraints or blocks (default: the scope rule)",
        doc="Constraints and/or Blocks whose active equalities are the physics the certificate takes. "
            "Without it, the equalities reachable from the injections are taken, never through a "
            "bookkeeping definition (see robustbox.scope and the user guide)."))
    CONFIG.declare("objective", ConfigValue(
        default="uniform", domain=In(["uniform", "hosting", "widths", "volume"]),
        description="What to maximise: common fraction, one-sided upper ends, sum of widths or log-volume",
        doc="'uniform': the largest common fraction t of the band; 'hosting': the upper ends (lower ends at "
            "the largest fraction of the lower band that can be kept); 'widths': the sum of widths "
            "relative to the band; 'volume': the box's log-volume."))
    CONFIG.declare("max_fraction", ConfigValue(
        default=1.0, domain=PositiveFloat, description="Largest fraction of the band to look for"))
    CONFIG.declare("solve_first", ConfigValue(
        default=False, domain=bool, description="Solve the model with Ipopt (cyipopt bridge) first"))
    CONFIG.declare("residual_tolerance", ConfigValue(
        default=1e-6, domain=PositiveFloat, description="Largest equation residual accepted at the operating point"))
    CONFIG.declare("fix_state", ConfigValue(
        default=True, domain=bool, description="Fix the state variables at their operating values after the rewrite",
        doc="No active row uses them after the rewrite; their true values follow the recourse policy."))
    CONFIG.declare("block_name", ConfigValue(
        default="robustbox_box", domain=IsInstance(str), description="Name of the Block that holds the box"))
    CONFIG.declare("reverse", ConfigValue(
        default=None, domain=IsInstance(ReverseTransformationToken),
        description="The token returned by apply_to: undo that rewrite"))

    def _apply_to(self, model, **kwds) -> ReverseTransformationToken | None:
        try:
            config = self.CONFIG(kwds.pop("options", {}))
            config.set_value(kwds)
        except ValueError as err:  # Pyomo's domain checks name the option; keep the message, our error type
            raise ModelStructureError(f"{NAME}: {err}") from None
        if config.reverse is not None:
            config.reverse.check_token_valid(InjectionBox, model, [])
            restore(model, config.reverse.reverse_dict["block_name"])
            return None
        if config.band is not None and config.relative_band is not None:
            raise ModelStructureError("give either band= or relative_band=, not both")
        for blk in model.component_data_objects(Block, descend_into=True):
            if hasattr(blk, "_robustbox_record"):
                raise ModelStructureError(f"model '{model.name}' was transformed by {NAME} already (block "
                                          f"'{blk.name}'); call robustbox.transform.restore first")
        if model.component(config.block_name) is not None:
            raise ModelStructureError(f"model '{model.name}' already has a component '{config.block_name}': "
                                      "choose another block_name")
        injections, suffix_bands = _injections(model, config)
        if config.solve_first:
            solve_model(model)
        bands = _bands(injections, suffix_bands, config)
        held = _as_list(config.held, "held")
        _check_held(held, injections)
        # variables with equal finite bounds are constants, not state
        pinned = [v for v in model.component_data_objects(Var, active=True, descend_into=True)
                  if not v.fixed and v.lb is not None and v.lb == v.ub]
        for v in pinned:
            v.fix(v.lb)
        var_inj = [inj for inj in injections if inj.is_variable_type()]
        for inj in var_inj:
            inj.fix()
        try:
            var_ids = {id(v) for v in var_inj}
            param_ids = {id(p) for p in injections if not p.is_variable_type()}
            scope = find_scope(model, var_ids, param_ids, config.targets)
            _check_scope(model, scope, injections, param_ids)
            system, point, sides, n_monitored = _build_system(model, scope, held, injections, bands, param_ids)
            cert = certify(system, point, config.objective,
                           options=CertifyOptions(max_fraction=config.max_fraction,
                                                  residual_tolerance=config.residual_tolerance))
        finally:
            for inj in var_inj:
                inj.unfix()
            for v in pinned:
                v.unfix()
        _rewrite(model, config, scope, injections, cert, sides, n_monitored, param_ids)
        return ReverseTransformationToken(InjectionBox, model, [], {"block_name": config.block_name})


# ------------------------------------------------------------------ options
def _injections(model, config) -> tuple[list, dict]:
    items = config.injections
    suffix_bands = {}
    if items is None:
        suf = model.component(SUFFIX)
        if not isinstance(suf, Suffix) or not len(suf):
            raise ModelStructureError(f"no injections given and no Suffix '{SUFFIX}' on model '{model.name}'")
        items = []
        for comp, band in suf.items():
            for data in _expand([comp]):
                items.append(data)
                suffix_bands[id(data)] = band
    injections = _expand(items if isinstance(items, (list, tuple)) else [items])
    if not injections:
        raise ModelStructureError("the list of injections is empty")
    seen = set()
    for inj in injections:
        if not hasattr(inj, "is_variable_type"):
            raise ModelStructureError(f"injection {inj!r} is not a Pyomo component: give Vars or mutable Params")
        is_var = inj.is_variable_type()
        is_param = getattr(inj, "is_parameter_type", lambda: False)() and getattr(inj, "mutable", True)
        if not (is_var or is_param):
            raise ModelStructureError(f"injection '{getattr(inj, 'name', inj)}' must be a Var or a mutable Param")
        if id(inj) in seen:
            raise ModelStructureError(f"injection '{inj.name}' is listed twice")
        seen.add(id(inj))
        if is_var and inj.fixed:
            raise ModelStructureError(f"injection '{inj.name}' is a fixed variable: unfix it (a decision that "
                                      "moves in the box) or make it a mutable Param (an uncertain value)")
        if is_var and not inj.is_continuous():
            raise ModelStructureError(f"injection '{inj.name}' is an integer or binary variable: a box of "
                                      "injections needs continuous ones")
    return injections, suffix_bands


def _bands(injections: list, suffix_bands: dict, config) -> list[tuple[float, float]]:
    """(below, above) for every injection, from the Suffix, band= or relative_band= (current values)."""
    bands = []
    for inj in injections:
        if inj.value is None:
            raise OperatingPointError(f"injection '{inj.name}' has no value (the operating point needs one)")
        raw = suffix_bands.get(id(inj), config.band)
        if isinstance(raw, ComponentMap):
            raw = raw[inj] if inj in raw else raw.get(inj.parent_component(), None)
        elif isinstance(raw, dict):
            raw = raw.get(inj.name, raw.get(inj.parent_component().name, None))
        band = _band_value(raw, f"band of injection '{inj.name}'")
        if band is None and config.relative_band is not None:
            width = config.relative_band * abs(float(value(inj)))
            if width == 0.0:
                raise ModelStructureError(f"relative_band gives injection '{inj.name}' a zero-width band (its "
                                          "value is 0); give it an absolute band with band=")
            band = (width, width)
        if band is None:
            raise ModelStructureError(f"no band for injection '{inj.name}': give band=, relative_band= or a Suffix")
        if band[0] + band[1] == 0.0:
            raise ModelStructureError(f"band of injection '{inj.name}' is zero on both sides: nothing to certify "
                                      "(give it a band, or leave it out of the injections)")
        if inj.is_variable_type():  # a decision cannot leave its own bounds: the band stops there
            v0 = float(value(inj))
            below = band[0] if inj.lb is None else min(band[0], max(v0 - float(inj.lb), 0.0))
            above = band[1] if inj.ub is None else min(band[1], max(float(inj.ub) - v0, 0.0))
            if below + above == 0.0:
                raise ModelStructureError(f"injection '{inj.name}' sits at its bounds [{inj.lb}, {inj.ub}]: "
                                          "no room to move inside them")
            band = (below, above)
        bands.append(band)
    return bands


def _check_held(held: list, injections: list) -> None:
    ids = {id(i) for i in injections}
    for k, expr in enumerate(_expand(held)):
        name = getattr(expr, "name", f"held[{k}]")
        comps = list(identify_variables(expr, include_fixed=True)) if hasattr(expr, "is_expression_type") else []
        comps += list(identify_mutable_parameters(expr)) if hasattr(expr, "is_expression_type") else []
        inside = [c.name for c in comps if id(c) in ids]
        if inside:
            raise ModelStructureError(f"held expression '{name}' contains injection '{inside[0]}': a held "
                                      "quantity stays at its value, an injection moves")


def _check_scope(model, scope: Scope, injections: list, param_ids: set) -> None:
    """Integer state, injection-dependent bounds outside the state: named errors."""
    if not scope.equations:
        raise ModelStructureError("no active equality links the injections to other variables: there is no "
                                  "system to certify (give targets= or check the injections)")
    for v in scope.state:
        if not v.is_continuous():
            raise ModelStructureError(f"state variable '{v.name}' is integer or binary: the certificate needs "
                                      "continuous state (fix it, or leave its equalities out with targets=)")
    state_ids = {id(v) for v in scope.state}
    for v in model.component_data_objects(Var, active=True, descend_into=True):
        if v.fixed or id(v) in state_ids:
            continue
        moving = [p.name for b in (v.lower, v.upper) if b is not None and hasattr(b, "is_expression_type")
                  for p in identify_mutable_parameters(b) if id(p) in param_ids]
        if moving:
            raise ModelStructureError(f"the bounds of variable '{v.name}' depend on injection '{moving[0]}', which "
                                      "moves inside the box: write the bound as a constraint (it is then kept "
                                      "for every value in the box)")


# ------------------------------------------------------------------- system
def _build_system(model, scope: Scope, held: list, injections: list, bands: list, param_ids: set
                  ) -> tuple[QuadraticSystem, np.ndarray, list[_Side], int]:
    state = scope.state
    n = len(state)
    index = {id(v): k for k, v in enumerate(state)}
    missing = [v.name for v in state if v.value is None]
    if missing:
        raise OperatingPointError(f"state variables without values: {', '.join(missing[:10])}"
                                  " (solve the model first, or use solve_first=True)")
    point = np.array([float(v.value) for v in state])
    cons = scope.equations + scope.limits
    cm = compile_model(model, constraints=cons, objective=False)
    new_index = -np.ones(cm.rows.n_vars, dtype=np.int64)
    for col, v in enumerate(cm.variables):
        new_index[col] = index.get(id(v), -1)
    values = np.nan_to_num(cm.values())
    n_eq = len(scope.equations)
    eq_map = cm.rows.take(np.arange(n_eq)).substitute(new_index, values, n)
    target = cm.row_lower[:n_eq]
    held_maps = [_held_map(expr, k, index, state) for k, expr in enumerate(_expand(held))]
    held_maps = [h for h in held_maps if h is not None]
    if held_maps:
        held_map = QuadraticMap.stack(held_maps)
        target = np.concatenate([target, held_map.evaluate(point)])
        eq_map = QuadraticMap.stack([eq_map, held_map])
    _check_square(eq_map, state)
    lim_rows = np.arange(n_eq, len(cons))
    lim_map = cm.rows.take(lim_rows).substitute(new_index, values, n)
    e_cols, a_cols = _injection_maps(cons, np.arange(n_eq), lim_rows, injections)
    e_mat = np.vstack([np.column_stack(e_cols), np.zeros((eq_map.n_rows - n_eq, len(injections)))])
    bound_map, b_lower, b_upper, b_slopes = _bound_rows(state, injections, param_ids)
    sides = _sides(scope)
    resp_map, resp_slopes = _response_rows(sides, index, n, injections, param_ids)
    limits = QuadraticMap.stack([lim_map, bound_map, resp_map])
    lower = np.concatenate([cm.row_lower[lim_rows], b_lower, np.full(len(sides), -np.inf)])
    upper = np.concatenate([cm.row_upper[lim_rows], b_upper, np.full(len(sides), np.inf)])
    a_mat = np.vstack([np.column_stack(a_cols), b_slopes, resp_slopes])
    unused = [inj.name for k, inj in enumerate(injections) if not e_mat[:, k].any() and not a_mat[:, k].any()]
    if unused:
        raise ModelStructureError(f"injection '{unused[0]}' appears in no equality or limit of the system")
    unc = UncertainSet(tuple(inj.name for inj in injections), sp.csr_matrix(e_mat), sp.csr_matrix(a_mat),
                       np.array([b[0] for b in bands]), np.array([b[1] for b in bands]))
    system = QuadraticSystem(eq_map, target, limits, lower, upper, unc, tuple(v.name for v in state))
    return system, point, sides, lim_map.n_rows + bound_map.n_rows


def _held_map(expr, k: int, index: dict, state: list) -> QuadraticMap | None:
    n = len(state)
    variables, local = list(state), dict(index)
    name = getattr(expr, "name", f"held[{k}]")
    ln, qd, c = quadratic_repn(expr, name, local, variables)
    if len(variables) > n:
        raise ModelStructureError(f"held expression '{name}' involves '{variables[n].name}', not a state variable")
    if not ln and not qd:
        return None  # constant once pinned variables are fixed: nothing to hold
    return QuadraticMap.from_terms(n, [f"held:{name}"], ([0] * len(qd), [a for a, _, _ in qd],
                                   [b for _, b, _ in qd], [v for _, _, v in qd]),
                                   ([0] * len(ln), [a for a, _ in ln], [v for _, v in ln]), [c])


def _check_square(eq_map: QuadraticMap, state: list) -> None:
    """The default recourse is the inverse Jacobian: the system must be square (structurally too)."""
    m, n = eq_map.n_rows, len(state)
    if m == n:
        return
    pattern = sp.csr_matrix((np.ones(len(eq_map.q_row) * 2 + eq_map.linear.nnz),
                             (np.concatenate([eq_map.q_row, eq_map.q_row, eq_map.linear.tocoo().row]),
                              np.concatenate([eq_map.q_a, eq_map.q_b, eq_map.linear.tocoo().col]))), shape=(m, n))
    match = maximum_bipartite_matching(pattern, perm_type="row")  # for each state column: its row or −1
    free = [state[j].name for j in np.flatnonzero(match < 0)]
    if n > m:
        raise ModelStructureError(
            f"the system has {m} equations (held ones included) for {n} state variables: hold {n - m} more "
            f"quantities with held= (e.g. generator voltage magnitudes or set-points), name them as injections, "
            f"or fix them. State variables no equation determines on its own: {', '.join(free[:10])}")
    raise ModelStructureError(f"the system has {m} equations (held ones included) for only {n} state variables: "
                              "remove held expressions or name the system with targets=")


def _bound_rows(state: list, injections: list, param_ids: set
                ) -> tuple[QuadraticMap, np.ndarray, np.ndarray, np.ndarray]:
    """Rows for the state variables' bounds; a bound that depends on an injection moves with it."""
    rows, lower, upper, slopes = [], [], [], []
    for j, v in enumerate(state):
        lb, ub = v.lower, v.upper
        moving = [b for b in (lb, ub) if b is not None and hasattr(b, "is_expression_type")
                  and any(id(p) in param_ids for p in identify_mutable_parameters(b))]
        if not moving:
            if v.lb is not None or v.ub is not None:
                rows.append((j, f"bounds of {v.name}"))
                lower.append(-np.inf if v.lb is None else float(v.lb))
                upper.append(np.inf if v.ub is None else float(v.ub))
                slopes.append(np.zeros(len(injections)))
            continue
        for side, bound in (("lower", lb), ("upper", ub)):
            if bound is None:
                continue
            rows.append((j, f"{side} bound of {v.name}"))
            b0 = float(value(bound))
            # x ≥ b(p) reads x − (b(p) − b0) ≥ b0: the row's injection term is −slope·Δp
            slopes.append(-np.array([_slope(lambda bd=bound: float(value(bd)), inj, f"the {side} bound of '{v.name}'")
                                     if not inj.is_variable_type() else 0.0 for inj in injections]))
            lower.append(b0 if side == "lower" else -np.inf)
            upper.append(b0 if side == "upper" else np.inf)
    k = len(rows)
    bound_map = QuadraticMap.from_terms(len(state), [nm for _, nm in rows], ([], [], [], []),
                                        (np.arange(k), [j for j, _ in rows], np.ones(k)))
    return bound_map, np.array(lower), np.array(upper), np.array(slopes).reshape(k, len(injections))


def _set(component, val: float) -> None:
    """Set a Var or mutable Param value without bound validation (probing moves past bounds)."""
    if component.is_variable_type():
        component.set_value(val, skip_validation=True)
    else:
        component.set_value(val)


def _slope(evaluate, inj, what: str) -> float:
    """d evaluate / d inj, checked to be constant (the injection must enter affinely)."""
    v0 = float(value(inj))
    vals = []
    for step in (0.0, 1.0, 2.0):
        _set(inj, v0 + step)
        vals.append(evaluate())
    _set(inj, v0)
    slope = vals[1] - vals[0]
    if abs((vals[2] - vals[0]) - 2.0 * slope) > 1e-9 * (1.0 + abs(slope)):
        raise ModelStructureError(f"injection '{inj.name}' enters {what} nonlinearly")
    return slope


def _injection_maps(cons: list, eq_rows: np.ndarray, lim_rows: np.ndarray, injections: list
                    ) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Columns of E (equalities) and A (limits): how each injection enters each row.

    Each injection is moved by +1 and +2; the rows' constants must change by c
    and 2c with unchanged variable coefficients (an affine, separate entry).
    """
    owners: dict[int, list[int]] = {}
    for r, con in enumerate(cons):
        comps = list(identify_mutable_parameters(con.expr)) + list(identify_variables(con.expr, include_fixed=True))
        for comp in comps:
            owners.setdefault(id(comp), []).append(r)
    eq_pos = {int(r): k for k, r in enumerate(eq_rows)}
    lim_pos = {int(r): k for k, r in enumerate(lim_rows)}

    def signature(con) -> tuple[dict, float, float, float]:
        repn = generate_standard_repn(con.body, quadratic=True, compute_values=True)
        coefs = {("l", id(v)): float(c) for v, c in zip(repn.linear_vars, repn.linear_coefs)}
        coefs.update({("q", id(a), id(b)): float(c) for (a, b), c in zip(repn.quadratic_vars, repn.quadratic_coefs)})
        lo = -np.inf if con.lower is None else float(value(con.lower))
        up = np.inf if con.upper is None else float(value(con.upper))
        return coefs, float(value(repn.constant)), lo, up

    e_cols, a_cols = [], []
    for inj in injections:
        e_col, a_col = np.zeros(len(eq_rows)), np.zeros(len(lim_rows))
        v0 = float(value(inj))
        for r in owners.get(id(inj), []):
            con = cons[r]
            sig = [signature(con)]
            for step in (1.0, 2.0):
                _set(inj, v0 + step)
                sig.append(signature(con))
            _set(inj, v0)
            (c0, k0, lo0, up0), (c1, k1, lo1, up1), (c2, k2, lo2, up2) = sig
            same = set(c1) == set(c0) == set(c2) and all(
                abs(c1[key] - val) <= 1e-12 * (1 + abs(val)) and abs(c2[key] - val) <= 1e-12 * (1 + abs(val))
                for key, val in c0.items())
            if not same:
                raise ModelStructureError(f"injection '{inj.name}' multiplies a state variable in constraint "
                                          f"'{con.name}'; injections must enter additively")
            # the row reads  lower(y) ≤ body(z) + k(y) ≤ upper(y); what matters is k − bound
            with np.errstate(invalid="ignore"):
                moves = [(k1 - k0) - (b1 - b0) for b0, b1 in ((lo0, lo1), (up0, up1)) if np.isfinite(b0)]
                moves2 = [(k2 - k0) - (b2 - b0) for b0, b2 in ((lo0, lo2), (up0, up2)) if np.isfinite(b0)]
            if not moves:
                continue
            slope = moves[0]
            if any(abs(mv - slope) > 1e-9 * (1 + abs(slope)) for mv in moves) or \
                    any(abs(m2 - 2.0 * slope) > 1e-9 * (1 + abs(slope)) for m2 in moves2):
                raise ModelStructureError(f"injection '{inj.name}' enters constraint '{con.name}' nonlinearly or "
                                          "moves its two bounds differently")
            if r in eq_pos:
                # body(z) + slope·Δy = rhs  →  F(z) = rhs − slope·Δy
                e_col[eq_pos[r]] = -slope
            elif r in lim_pos:
                a_col[lim_pos[r]] = slope
        e_cols.append(e_col)
        a_cols.append(a_col)
    return e_cols, a_cols


# ---------------------------------------------------------------- kept rows
def _sides(scope: Scope) -> list[_Side]:
    """Every kept row as one or two sides  s·(body − bound) ≤ 0."""
    sides = []
    for con in scope.kept:
        if con.upper is not None:
            sides.append(_Side(f"{con.name}:upper", con, 1.0, float(value(con.upper)), con.body))
        if con.lower is not None:
            sides.append(_Side(f"{con.name}:lower", con, -1.0, float(value(con.lower)), con.body))
    for con, var, direction in scope.definitions:
        # body = a·d + rest == rhs; d ≥ its true value ⇔ sign(a)·(body − rhs) ≥ 0
        coef = generate_standard_repn(con.body, quadratic=False, compute_values=True)
        a = dict(zip(map(id, coef.linear_vars), coef.linear_coefs))[id(var)]
        sides.append(_Side(f"{con.name}:{var.name} {'>=' if direction > 0 else '<='} worst case", con,
                           -direction * float(np.sign(a)), float(value(con.upper)), con.body))
    if scope.objective is not None:
        obj = scope.objective
        sides.append(_Side(f"{obj.name}:objective", obj, -1.0 if obj.sense == maximize else 1.0, 0.0, obj.expr))
    return sides


def _state_terms(body, index: dict) -> dict:
    """Coefficients of the terms of ``body`` that contain a state variable (injection Vars fixed)."""
    repn = generate_standard_repn(body, quadratic=True, compute_values=True)
    out = {("l", id(v)): float(c) for v, c in zip(repn.linear_vars, repn.linear_coefs) if id(v) in index}
    out.update({("q", id(a), id(b)): float(c) for (a, b), c in zip(repn.quadratic_vars, repn.quadratic_coefs)
                if id(a) in index or id(b) in index})
    return out


def _check_state_terms_fixed(body, inj, index: dict, name: str) -> None:
    """A kept row's state terms must not depend on an injection (a product of an injection and a
    state variable has no bound that is linear in the downstream decisions)."""
    v0 = float(value(inj))
    sigs = []
    for step in (0.0, 1.0, 2.0):
        _set(inj, v0 + step)
        sigs.append(_state_terms(body, index))
    _set(inj, v0)
    base = sigs[0]
    for sig in sigs[1:]:
        if set(sig) != set(base) or any(abs(sig[k] - c) > 1e-12 * (1.0 + abs(c)) for k, c in base.items()):
            raise ModelStructureError(f"injection '{inj.name}' multiplies a state variable in '{name}'; "
                                      "injections must enter the rows that use the state additively")


def _response_rows(sides: list[_Side], index: dict, n: int, injections: list, param_ids: set
                   ) -> tuple[QuadraticMap, np.ndarray]:
    """Unbounded monitored rows  s·(state part of the body) + s·(uncertain part) Δp, one per side."""
    q_r, q_a, q_b, q_v, l_r, l_c, l_v = [], [], [], [], [], [], []
    slopes = np.zeros((len(sides), len(injections)))
    for r, side in enumerate(sides):
        name = side.component.name
        repn = generate_standard_repn(side.body, quadratic=True, compute_values=True)
        sym = generate_standard_repn(side.body, quadratic=True, compute_values=False)
        for v, c in zip(repn.linear_vars, repn.linear_coefs):
            if id(v) in index:
                l_r.append(r); l_c.append(index[id(v)]); l_v.append(side.sign * float(c))  # noqa: E702
        for (a, b), c in zip(repn.quadratic_vars, repn.quadratic_coefs):
            ina, inb = id(a) in index, id(b) in index
            if ina and inb:
                q_r.append(r); q_a.append(index[id(a)]); q_b.append(index[id(b)]); q_v.append(side.sign * float(c))  # noqa: E702
            elif ina or inb:
                raise ModelStructureError(f"'{name}' multiplies state variable '{(a if ina else b).name}' by "
                                          f"'{(b if ina else a).name}', which is not state: its bound over the "
                                          "box is not linear in the downstream variables")
        if repn.nonlinear_expr is not None:
            inside = [v.name for v in identify_variables(repn.nonlinear_expr) if id(v) in index]
            if inside:
                raise ModelStructureError(f"'{name}' uses state variable '{inside[0]}' in a non-polynomial term")
        coefs = list(sym.linear_coefs) + list(sym.quadratic_coefs)
        if sym.nonlinear_expr is not None:
            coefs.append(sym.nonlinear_expr)
        for c in coefs:
            if hasattr(c, "is_expression_type"):
                mult = [p.name for p in identify_mutable_parameters(c) if id(p) in param_ids]
                mult += [p.name for p in identify_variables(c, include_fixed=True) if id(p) in index]
                if mult:
                    raise ModelStructureError(f"uncertain injection '{mult[0]}' multiplies a variable in '{name}' "
                                              "(or enters it nonlinearly); injections must enter additively")
        used = {id(c) for c in identify_mutable_parameters(side.component.expr)}
        used |= {id(c) for c in identify_variables(side.component.expr, include_fixed=True)}
        for inj in injections:
            if id(inj) in used:
                _check_state_terms_fixed(side.body, inj, index, name)
        for k, inj in enumerate(injections):
            if id(inj) in param_ids and id(inj) in used:
                con = side.component

                def offset(body=side.body, con=con, sg=side.sign) -> float:
                    const = float(value(generate_standard_repn(body, quadratic=True, compute_values=True).constant))
                    bound = 0.0
                    if con.ctype is Constraint:
                        bound = float(value(con.upper if sg > 0 or con.equality else con.lower))
                    return sg * (const - bound)
                slopes[r, k] = _slope(offset, inj, f"'{name}'")
    resp = QuadraticMap.from_terms(n, [f"response of {s.key}" for s in sides], (q_r, q_a, q_b, q_v), (l_r, l_c, l_v))
    return resp, slopes


def _robust_upper(side: _Side, response, r: int, cert: Certificate, injections: list, nominal: list,
                  state_zero: dict, param_ids: set):
    """Proven upper bound of s·(body − bound) over the box, as an expression of the downstream variables:
    the state part at its affine response plus the remainder bound, uncertain injections at their worst end."""
    subst = dict(state_zero)
    for inj, v0 in zip(injections, nominal):
        if id(inj) in param_ids:
            subst[id(inj)] = v0
    rest = replace_expressions(side.body, subst, remove_named_expressions=True)
    gain = response.gain[r]
    worst = float(response.above[r])
    expr = side.sign * rest - side.sign * side.bound + float(response.value[r])
    for k, (inj, v0) in enumerate(zip(injections, nominal)):
        if id(inj) in param_ids:
            worst += max(gain[k] * cert.lower[k], gain[k] * cert.upper[k])
        elif gain[k] != 0.0:
            expr = expr + float(gain[k]) * (inj - v0)
    return expr + worst


# ------------------------------------------------------------------ rewrite
def _rewrite(model, config, scope: Scope, injections: list, cert: Certificate, sides: list[_Side],
             n_monitored: int, param_ids: set) -> None:
    blk = Block(concrete=True)
    model.add_component(config.block_name, blk)
    names = [inj.name for inj in injections]
    nominal = [float(value(inj)) for inj in injections]
    blk.injections = Set(initialize=names, ordered=True, doc="the injections, by name")
    blk.lower = Param(blk.injections, mutable=True, doc="certified lower end (injection units)",
                      initialize={nm: v0 + float(cert.lower[k]) for k, (nm, v0) in enumerate(zip(names, nominal))})
    blk.upper = Param(blk.injections, mutable=True, doc="certified upper end (injection units)",
                      initialize={nm: v0 + float(cert.upper[k]) for k, (nm, v0) in enumerate(zip(names, nominal))})
    blk.box = Constraint(Any, doc="lower ≤ injection ≤ upper for the injection Vars")
    for nm, inj in zip(names, injections):
        if inj.is_variable_type():
            blk.box[nm] = (blk.lower[nm], inj, blk.upper[nm])
    record = _Record(certificate=cert, injections=names, state=[v.name for v in scope.state])
    blk.bounds = Constraint(Any, doc="kept rows, rewritten to hold for the true state over the whole box")
    response = cert.limit_response(np.arange(n_monitored, n_monitored + len(sides))) if sides else None
    state_zero = {id(v): 0.0 for v in scope.state}
    for r, side in enumerate(sides):
        expr = _robust_upper(side, response, r, cert, injections, nominal, state_zero, param_ids)
        if side.component.ctype is Objective:
            sense = side.component.sense
            blk.objective = Objective(expr=expr if sense == minimize else -expr, sense=sense,
                                      doc=f"proven {'upper' if sense == minimize else 'lower'} bound of "
                                          f"'{side.component.name}' over the box (worst case)")
            record.bounds["objective"] = side.component.name
        else:
            # body ≤ bound + U (s = +1) or body ≥ bound − U (s = −1): the row in its own orientation
            body = side.bound + side.sign * expr
            blk.bounds[side.key] = (None, body, side.bound) if side.sign > 0 else (side.bound, body, None)
            record.bounds[side.key] = side.component.name
    deactivate = scope.equations + scope.limits + scope.kept + [c for c, _, _ in scope.definitions]
    if scope.objective is not None:
        deactivate.append(scope.objective)
    for comp in deactivate:
        comp.deactivate()
        record.deactivated.append(comp.name)
    if config.fix_state:
        for v in scope.state:
            if not v.fixed:
                v.fix()
                record.fixed_state.append(v.name)
    object.__setattr__(blk, "_robustbox_record", record)


def _block(model, block_name: str):
    blk = model.component(block_name)
    if blk is None or not hasattr(blk, "_robustbox_record"):
        made = [b.name for b in model.component_data_objects(Block, descend_into=True)
                if hasattr(b, "_robustbox_record")]
        raise ModelStructureError(f"model '{model.name}' has no block '{block_name}' made by {NAME}"
                                  + (f" (blocks it made here: {', '.join(made)}; pass block_name=)" if made else ""))
    return blk


def certificate_of(model, block_name: str = "robustbox_box") -> Certificate:
    """The certificate attached by the transformation."""
    return _block(model, block_name)._robustbox_record.certificate


def box_of(model, block_name: str = "robustbox_box") -> dict[str, tuple[float, float]]:
    """The certified box: injection name → (lower, upper), in the injection's own units."""
    blk = _block(model, block_name)
    return {nm: (float(value(blk.lower[nm])), float(value(blk.upper[nm]))) for nm in blk.injections}


def restore(model, block_name: str = "robustbox_box") -> None:
    """Undo the rewrite: reactivate constraints and the objective, unfix the state, remove the block."""
    blk = _block(model, block_name)
    record: _Record = blk._robustbox_record
    for name in record.deactivated:
        model.find_component(name).activate()
    for name in record.fixed_state:
        model.find_component(name).unfix()
    model.del_component(blk)


__all__ = ["InjectionBox", "box_of", "certificate_of", "restore", "NAME", "SUFFIX"]
