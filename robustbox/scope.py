"""Which part of a Pyomo model the certificate takes: the scope rule of ``robustbox.injection_box``.

The rule (documented in docs/user-guide.md, "For modellers"):

* A *bookkeeping variable* is a continuous variable without bounds that appears in exactly one
  active equality, and only linearly there, in an equality that is linear (e.g. ``total_cost ==
  Σ c·pg``).  That equality is its *definition*.
* The *system* (the physics) is, without ``targets``, every active equality reachable from the
  injections: an equality that contains an injection and some other unfixed variable, then every
  equality that shares an unfixed non-injection variable with the system, and so on — never
  through a definition.  With ``targets`` it is the active equalities inside the given
  constraints/blocks.  Its unfixed non-injection variables are the *state*.
* Active inequalities that use only state variables (and injections) are *monitored limits*,
  like the state variables' bounds.  Inequalities that mix state with other variables, that use
  an uncertain (Param) injection, definitions that use the state or an uncertain injection, and
  an objective that does, are *kept*: the rewrite turns them into proven bounds over the box.
* Everything else is left alone, whatever its degree.

A definition is kept as a one-sided bound chosen by how its variable is used (the objective and
the active inequalities): a variable that is worse when larger (a cost) must be at least the
largest value its definition takes over the box, one that is worse when smaller at most the
smallest; a variable used in both directions becomes state instead.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from pyomo.core.expr.visitor import identify_mutable_parameters, identify_variables
from pyomo.environ import Block, Constraint, Objective, maximize
from pyomo.repn.standard_repn import generate_standard_repn

from .errors import ModelStructureError


@dataclass(eq=False)
class RowRead:
    """One active constraint or objective as the scope rule sees it."""

    component: object
    equality: bool
    variables: list  # unfixed, non-injection VarData
    linear: dict  # id(var) → coefficient, for variables that enter only linearly
    nonlinear: set  # ids of variables in a quadratic term or a non-polynomial part
    mixed_pairs: list  # (var a, var b) of quadratic terms
    polynomial: bool  # degree ≤ 2 (no non-polynomial part)
    injections: set  # ids of injections (Var or Param) it uses


@dataclass(eq=False)
class Scope:
    """The parts of a model the rewrite touches (see the module doc)."""

    equations: list  # ConstraintData of the system
    state: list  # VarData
    limits: list  # ConstraintData monitored by the certificate
    kept: list  # ConstraintData (inequalities) rewritten to proven bounds
    definitions: list  # (ConstraintData, defined VarData, +1 bound from above / −1 from below)
    objective: object | None  # ObjectiveData rewritten to a proven bound, or None
    untouched_equalities: list = field(default_factory=list)


def read_row(component, body, injection_ids: set, equality: bool) -> RowRead:
    """Read a constraint body or an objective expression (injection Vars must be fixed)."""
    repn = generate_standard_repn(body, quadratic=True, compute_values=True)
    nonlinear: set = set()
    pairs = []
    for a, b in repn.quadratic_vars:
        nonlinear.update((id(a), id(b)))
        pairs.append((a, b))
    if repn.nonlinear_expr is not None:
        nonlinear.update(id(v) for v in identify_variables(repn.nonlinear_expr, include_fixed=False))
    linear: dict = {}
    for v, c in zip(repn.linear_vars, repn.linear_coefs):
        linear[id(v)] = linear.get(id(v), 0.0) + float(c)
    variables, seen = [], set()
    for v in identify_variables(body, include_fixed=False):
        if id(v) not in injection_ids and id(v) not in seen:
            seen.add(id(v))
            variables.append(v)
    expr = component.expr if hasattr(component, "expr") else body
    used = {id(v) for v in identify_variables(expr, include_fixed=True)}
    used |= {id(p) for p in identify_mutable_parameters(expr)}
    return RowRead(component, equality, variables, {k: c for k, c in linear.items() if k not in nonlinear},
                   nonlinear, pairs, repn.nonlinear_expr is None, used & injection_ids)


def _expand_targets(targets) -> list:
    """Active ConstraintData inside the given constraints or blocks."""
    out = []
    for item in targets if isinstance(targets, (list, tuple)) else [targets]:
        if isinstance(item, Block) or getattr(item, "ctype", None) is Block:
            blocks = item.values() if item.is_indexed() else [item]
            for blk in blocks:
                out.extend(blk.component_data_objects(Constraint, active=True, descend_into=True))
        elif getattr(item, "ctype", None) is Constraint:
            out.extend([c for c in (item.values() if item.is_indexed() else [item]) if c.active])
        else:
            raise ModelStructureError(f"targets: '{getattr(item, 'name', item)}' is not a Constraint or a Block")
    return out


def _bookkeeping(rows: list[RowRead], injection_ids: set, not_bookkeeping: set) -> dict[int, object]:
    """id(var) → var for the bookkeeping variables (see the module doc)."""
    count: dict[int, int] = {}
    for row in rows:
        if row.equality:
            for v in row.variables:
                count[id(v)] = count.get(id(v), 0) + 1
    out = {}
    for row in rows:
        if not row.equality or not row.polynomial or row.nonlinear:
            continue
        for v in row.variables:
            if (count[id(v)] == 1 and id(v) not in not_bookkeeping and v.is_continuous() and v.lb is None
                    and v.ub is None and row.linear.get(id(v), 0.0) != 0.0):
                out[id(v)] = v
    # a variable in a nonlinear term anywhere is physics, not bookkeeping
    for row in rows:
        for k in row.nonlinear:
            out.pop(k, None)
    return out


def _direction(var, rows: list[RowRead], objective: RowRead | None, sense) -> int:
    """+1 when ``var`` is worse larger (bound it from above), −1 worse smaller, 0 both or unknown."""
    wants: set[int] = set()
    uses = [(row, row.component.lower is not None, row.component.upper is not None)
            for row in rows if not row.equality and id(var) in {id(v) for v in row.variables}]
    if objective is not None and id(var) in {id(v) for v in objective.variables}:
        uses.append((objective, sense == maximize, sense != maximize))
    for row, has_lower, has_upper in uses:
        coef = row.linear.get(id(var))
        if coef is None:
            return 0
        if has_upper:
            wants.add(1 if coef > 0 else -1)
        if has_lower:
            wants.add(-1 if coef > 0 else 1)
    if len(wants) > 1:
        return 0
    return wants.pop() if wants else 1


def find_scope(model, var_ids: set, param_ids: set, targets=None) -> Scope:
    """Apply the scope rule to ``model``.

    ``var_ids``/``param_ids``: ids of the injection Vars (decisions, fixed during the call) and of the
    injection Params (uncertain); ``targets``: constraints/blocks that are the system, or None.
    """
    injection_ids = var_ids | param_ids
    cons = [c for c in model.component_data_objects(Constraint, active=True, descend_into=True) ]
    rows = [read_row(c, c.body, injection_ids, c.equality) for c in cons]
    objs = list(model.component_data_objects(Objective, active=True, descend_into=True))
    target_ids = None if targets is None else {id(c) for c in _expand_targets(targets)}
    not_bookkeeping: set = set()
    while True:
        scope = _scope_once(rows, objs, injection_ids, param_ids, target_ids, not_bookkeeping)
        if isinstance(scope, Scope):
            return scope
        not_bookkeeping.add(scope)  # a definition used in both directions: its variable is state


def _scope_once(rows: list[RowRead], objs: list, injection_ids: set, param_ids: set, target_ids: set | None,
                not_bookkeeping: set) -> Scope | int:
    books = _bookkeeping(rows, injection_ids, not_bookkeeping)
    definition_of = {}
    for k, row in enumerate(rows):
        defined = [v for v in row.variables if id(v) in books]
        if row.equality and len(defined) == 1:
            definition_of[k] = defined[0]
    eq_rows = [k for k, row in enumerate(rows) if row.equality]
    if target_ids is not None:
        system = [k for k in eq_rows if id(rows[k].component) in target_ids]
    else:
        members = {k for k in eq_rows if k not in definition_of and rows[k].injections and rows[k].variables}
        frontier = {id(v) for k in members for v in rows[k].variables}
        by_var: dict[int, list[int]] = {}
        for k in eq_rows:
            if k not in definition_of:
                for v in rows[k].variables:
                    by_var.setdefault(id(v), []).append(k)
        while frontier:
            new = {k for vid in frontier for k in by_var.get(vid, []) if k not in members}
            members |= new
            frontier = {id(v) for k in new for v in rows[k].variables}
        system = sorted(members)
    state, seen = [], set()
    for k in system:
        for v in rows[k].variables:
            if id(v) not in seen:
                seen.add(id(v))
                state.append(v)
    for k in system:
        if not rows[k].polynomial:
            raise ModelStructureError(f"constraint '{rows[k].component.name}' is not quadratic in the variables, "
                                      "but it belongs to the system the certificate takes (it shares variables "
                                      "with the injections' equations); name the system with targets= to leave it out")
    sense, objective = None, None
    if objs:
        obj_read = [read_row(o, o.expr, injection_ids, False) for o in objs]
        users = [r for r in obj_read if r.injections & param_ids or set(map(id, r.variables)) & seen]
        if len(users) > 1:
            raise ModelStructureError(f"{len(users)} active objectives use the state or an uncertain injection "
                                      "; deactivate all but one")
        if users:
            objective, sense = users[0], users[0].component.sense
    limits, kept, definitions, untouched = [], [], [], []
    system_set = set(system)
    for k, row in enumerate(rows):
        if k in system_set:
            continue
        uses_state = any(id(v) in seen for v in row.variables)
        others = [v for v in row.variables if id(v) not in seen]
        uncertain = bool(row.injections & param_ids)
        if row.equality:
            if k in definition_of and (uses_state or uncertain):
                var = definition_of[k]
                direction = _direction(var, rows, objective, sense)
                if direction == 0:
                    return id(var)
                definitions.append((row.component, var, direction))
            elif uses_state or uncertain:
                raise ModelStructureError(f"equality '{row.component.name}' uses "
                                          + (f"state variable '{next(v for v in row.variables if id(v) in seen).name}'"
                                             if uses_state else "an uncertain injection")
                                          + " but is not part of the system named by targets=; an equality cannot "
                                            "hold for every point of the box outside it")
            else:
                untouched.append(row.component)
        elif uses_state and not others:
            if not row.polynomial:
                raise ModelStructureError(f"constraint '{row.component.name}' is not quadratic in the variables, "
                                          "but it limits the state (monitored limits must be quadratic)")
            limits.append(row.component)
        elif uses_state or uncertain:
            kept.append(row.component)
    return Scope([rows[k].component for k in system], state, limits, kept, definitions,
                 None if objective is None else objective.component, untouched)
