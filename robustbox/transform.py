"""Pyomo transformation ``robustbox.injection_box``.

Replaces the nonconvex quadratic equalities of a model (and the limits they
protect) by a certified box of injections:

1. the *injections* (Vars or mutable Params the user names, e.g. wind output,
   loads, dispatch set-points) are held at their current values, and every
   other unfixed variable that appears in an active equality is a *recourse*
   (state) variable;
2. active equalities become the system F(z) = ȳ + E Δy (E is read by moving
   each injection and must be constant: injections may not multiply recourse
   variables); active inequalities that involve recourse variables, and the
   recourse variables' bounds, become the monitored limits;
3. the certificate (:func:`robustbox.certify.certify`) gives a box of
   injections around the current values for which a solution of the
   equalities inside every limit provably exists;
4. the equalities and limits are deactivated (kept, not deleted), a Block
   with ``lower ≤ injection ≤ upper`` constraints is added, recourse
   variables are fixed at their operating values (their true values follow
   the recourse policy), and the certificate is attached to the block.

:func:`restore` undoes the rewrite; :func:`certificate_of` returns the
certificate.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from pyomo.common.collections import ComponentMap
from pyomo.common.config import (ConfigDict, ConfigValue, In, NonNegativeFloat, PositiveFloat,
                                  document_kwargs_from_configdict)
from pyomo.core.base.transformation import Transformation, TransformationFactory
from pyomo.core.expr.visitor import identify_mutable_parameters, identify_variables
from pyomo.environ import Block, Constraint, Param, RangeSet, Suffix, Var, value
from pyomo.repn.standard_repn import generate_standard_repn

from .certify import Certificate, CertifyOptions, certify
from .errors import ModelStructureError, OperatingPointError
from .extract import compile_model, quadratic_repn
from .quadratic import QuadraticMap, QuadraticSystem, UncertainSet
from .solve import solve_model

NAME = "robustbox.injection_box"
SUFFIX = "robustbox_injection"


@dataclass
class _Record:
    """What the rewrite changed, so that :func:`restore` can undo it."""

    deactivated: list = field(default_factory=list)
    fixed_recourse: list = field(default_factory=list)
    certificate: Certificate | None = None
    injections: list = field(default_factory=list)
    recourse: list = field(default_factory=list)


def _expand(items) -> list:
    out = []
    for item in items:
        if hasattr(item, "is_indexed") and item.is_indexed():
            out.extend(item.values())
        else:
            out.append(item)
    return out


@TransformationFactory.register(NAME, doc="Replace nonconvex quadratic equalities by a certified box of injections")
@document_kwargs_from_configdict("CONFIG")
class InjectionBox(Transformation):
    """Replace the model's quadratic equalities by a certified box of injections (see module doc)."""

    CONFIG = ConfigDict(NAME)
    CONFIG.declare("injections", ConfigValue(
        default=None, description="The injections: Vars or mutable Params (components or data)",
        doc="Components (indexed or not) whose values move inside the box. If None, the model's "
            f"Suffix '{SUFFIX}' is read: each entry maps a component to its band."))
    CONFIG.declare("band", ConfigValue(
        default=None, description="Requested band (absolute, in each injection's units)",
        doc="A number b (each injection moves in [value − b, value + b]), a pair (below, above) of "
            "nonnegative numbers, or a pyomo ComponentMap (or a dict keyed by component name) from "
            "injections (or their indexed components) to such a number or pair."))
    CONFIG.declare("relative_band", ConfigValue(
        default=None, domain=NonNegativeFloat, description="Band as a fraction of |operating value|",
        doc="Each injection moves in value ± relative_band·|value|; used when 'band' is None."))
    CONFIG.declare("held", ConfigValue(
        default=(), description="Expressions held at their operating values (recourse policy)",
        doc="Pyomo expressions or variables of the recourse that stay at their current values "
            "(e.g. |V|² at generator buses, a generator's P set-point). Each becomes an equation."))
    CONFIG.declare("recourse", ConfigValue(
        default=None, description="Recourse variables (default: all unfixed variables in active equalities)"))
    CONFIG.declare("objective", ConfigValue(
        default="uniform", domain=In(["uniform", "hosting", "widths", "volume"]),
        description="What to maximise: common fraction, one-sided upper ends, sum of widths or log-volume"))
    CONFIG.declare("max_fraction", ConfigValue(
        default=1.0, domain=PositiveFloat, description="Largest fraction of the band to look for"))
    CONFIG.declare("solve_first", ConfigValue(
        default=False, domain=bool, description="Solve the model with Ipopt (cyipopt bridge) first"))
    CONFIG.declare("residual_tolerance", ConfigValue(
        default=1e-6, domain=PositiveFloat, description="Largest equation residual accepted at the operating point"))
    CONFIG.declare("fix_recourse", ConfigValue(
        default=True, domain=bool, description="Fix recourse variables at their operating values after the rewrite",
        doc="Keeps downstream models bounded: the recourse variables' true values follow the policy."))
    CONFIG.declare("block_name", ConfigValue(
        default="robustbox_box", domain=str, description="Name of the Block that holds the box"))

    def _apply_to(self, model, **kwds) -> None:
        config = self.CONFIG(kwds.pop("options", {}))
        config.set_value(kwds)
        if model.component(config.block_name) is not None:
            raise ModelStructureError(f"model '{model.name}' already has a component '{config.block_name}': it was "
                                      f"transformed by {NAME} already (call robustbox.transform.restore first)")
        injections, bands = _injections(model, config)
        if config.solve_first:
            solve_model(model)
        # variables with equal finite bounds are constants, not recourse
        pinned = [v for v in model.component_data_objects(Var, active=True, descend_into=True)
                  if not v.fixed and v.lb is not None and v.lb == v.ub]
        for v in pinned:
            v.fix(v.lb)
        was_fixed = []
        for inj in injections:
            if inj.is_variable_type():
                was_fixed.append(inj.fixed)
                inj.fix()
            else:
                was_fixed.append(None)
        try:
            record, system, point = _build_system(model, config, injections, bands)
            cert = certify(system, point, config.objective,
                           options=CertifyOptions(max_fraction=config.max_fraction,
                                                  residual_tolerance=config.residual_tolerance))
        finally:
            for inj, fixed in zip(injections, was_fixed):
                if fixed is False:
                    inj.unfix()
            for v in pinned:
                v.unfix()
        record.certificate = cert
        _rewrite(model, config, record, injections, cert)


def _injections(model, config) -> tuple[list, list[tuple[float, float]]]:
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
    bands = []
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
        if inj.value is None:
            raise OperatingPointError(f"injection '{inj.name}' has no value (the operating point needs one)")
        raw = suffix_bands.get(id(inj), config.band)
        if isinstance(raw, ComponentMap):
            raw = raw[inj] if inj in raw else raw.get(inj.parent_component(), None)
        elif isinstance(raw, dict):
            raw = raw.get(inj.name, raw.get(inj.parent_component().name, None))
        if raw is None and config.relative_band is not None:
            raw = config.relative_band * abs(float(value(inj)))
        if raw is None:
            raise ModelStructureError(f"no band for injection '{inj.name}': give band=, relative_band= or a Suffix")
        lo, up = (raw, raw) if np.isscalar(raw) else tuple(raw)
        if not (np.isfinite(lo) and np.isfinite(up) and lo >= 0 and up >= 0):
            raise ModelStructureError(f"band of injection '{inj.name}' must be nonnegative finite numbers, got {raw}")
        bands.append((float(lo), float(up)))
    return injections, bands


def _build_system(model, config, injections: list, bands: list) -> tuple[_Record, QuadraticSystem, np.ndarray]:
    cons = list(model.component_data_objects(Constraint, active=True, descend_into=True))
    cm = compile_model(model, constraints=cons, objective=False)
    rows = cm.rows
    is_eq = (cm.row_lower == cm.row_upper) & np.isfinite(cm.row_lower)
    lin = rows.linear.tocoo()
    pattern = sp.csr_matrix((np.ones(2 * len(rows.q_row) + lin.nnz),
                             (np.concatenate([rows.q_row, rows.q_row, lin.row]),
                              np.concatenate([rows.q_a, rows.q_b, lin.col]))), shape=(rows.n_rows, rows.n_vars))
    pattern.data[:] = 1.0
    has_vars = np.diff(pattern.indptr) > 0
    if config.recourse is None:
        recourse_mask = np.asarray(pattern[np.flatnonzero(is_eq)].sum(axis=0)).ravel() > 0
    else:
        ids = {id(v) for v in _expand(config.recourse)}
        recourse_mask = np.array([id(v) in ids for v in cm.variables], dtype=bool)
    eq_rows = np.flatnonzero(is_eq & has_vars)
    lim_rows = np.flatnonzero(~is_eq & (np.asarray(pattern[:, recourse_mask].sum(axis=1)).ravel() > 0))
    both = np.concatenate([eq_rows, lim_rows])
    foreign = pattern[both][:, ~recourse_mask].tocoo()
    if foreign.nnz:
        r, c = both[foreign.row[0]], np.flatnonzero(~recourse_mask)[foreign.col[0]]
        raise ModelStructureError(f"constraint '{cons[r].name}' involves variable '{cm.variables[c].name}', "
                                  "which is neither an injection nor a recourse variable")
    in_eq = np.asarray(pattern[eq_rows].sum(axis=0)).ravel() > 0
    stray = np.flatnonzero(recourse_mask & ~in_eq)
    if stray.size:
        raise ModelStructureError(f"recourse variable '{cm.variables[stray[0]].name}' appears in no active equality, "
                                  "so nothing determines it (free/unbounded recourse variable)")
    recourse = [cm.variables[i] for i in np.flatnonzero(recourse_mask)]
    missing = [v.name for v in recourse if v.value is None]
    if missing:
        raise OperatingPointError(f"recourse variables without values: {', '.join(missing[:10])}"
                                  " (solve the model first, or use solve_first=True)")
    n = len(recourse)
    new_index = -np.ones(rows.n_vars, dtype=np.int64)
    new_index[recourse_mask] = np.arange(n)
    values = np.nan_to_num(cm.values())
    eq_map = rows.take(eq_rows).substitute(new_index, values, n)
    target = cm.row_lower[eq_rows]
    # held set-points: extra equations at their current values
    held_maps = []
    index = {id(v): k for k, v in enumerate(recourse)}
    for k, expr in enumerate(_expand(list(config.held))):
        variables = list(recourse)
        local = dict(index)
        name = getattr(expr, "name", f"held[{k}]")
        ln, qd, c = quadratic_repn(expr, name, local, variables)
        if len(variables) > n:
            raise ModelStructureError(f"held expression '{name}' involves '{variables[n].name}', not a recourse variable")
        if not ln and not qd:
            continue  # constant once pinned variables are fixed: nothing to hold
        held_maps.append(QuadraticMap.from_terms(n, [f"held:{name}"], ([0] * len(qd), [a for a, _, _ in qd],
                                                 [b for _, b, _ in qd], [v for _, _, v in qd]),
                                                 ([0] * len(ln), [a for a, _ in ln], [v for _, v in ln]), [c]))
    if held_maps:
        held = QuadraticMap.stack(held_maps)
        point = np.array([float(v.value) for v in recourse])
        target = np.concatenate([target, held.evaluate(point)])
        eq_map = QuadraticMap.stack([eq_map, held])
    # limits: inequality rows, then recourse variable bounds
    lim_map = rows.take(lim_rows).substitute(new_index, values, n)
    lo_b = np.array([-np.inf if v.lb is None else float(v.lb) for v in recourse])
    up_b = np.array([np.inf if v.ub is None else float(v.ub) for v in recourse])
    bounded = np.flatnonzero(np.isfinite(lo_b) | np.isfinite(up_b))
    bound_map = QuadraticMap.from_terms(n, [f"bounds of {recourse[i].name}" for i in bounded], ([], [], [], []),
                                        (np.arange(len(bounded)), bounded, np.ones(len(bounded))))
    limits = QuadraticMap.stack([lim_map, bound_map])
    lower = np.concatenate([cm.row_lower[lim_rows], lo_b[bounded]])
    upper = np.concatenate([cm.row_upper[lim_rows], up_b[bounded]])
    e_cols, a_cols = _injection_maps(cons, eq_rows, lim_rows, injections)
    e_mat = sp.csr_matrix(np.vstack([np.column_stack(e_cols) if e_cols else np.zeros((len(eq_rows), 0)),
                                     np.zeros((eq_map.n_rows - len(eq_rows), len(injections)))]))
    a_mat = sp.csr_matrix(np.vstack([np.column_stack(a_cols) if a_cols else np.zeros((len(lim_rows), 0)),
                                     np.zeros((len(bounded), len(injections)))]))
    unused = [inj.name for k, inj in enumerate(injections) if e_mat[:, k].nnz == 0 and a_mat[:, k].nnz == 0]
    if unused:
        raise ModelStructureError(f"injection '{unused[0]}' appears in no active equality or limit")
    unc = UncertainSet(tuple(inj.name for inj in injections), e_mat, a_mat,
                       np.array([b[0] for b in bands]), np.array([b[1] for b in bands]))
    system = QuadraticSystem(eq_map, target, limits, lower, upper, unc, tuple(v.name for v in recourse))
    record = _Record(deactivated=[cons[r] for r in np.concatenate([eq_rows, lim_rows])], recourse=recourse,
                     injections=list(injections))
    return record, system, np.array([float(v.value) for v in recourse])


def _set(component, val: float) -> None:
    """Set a Var or mutable Param value without bound validation (probing moves past bounds)."""
    if component.is_variable_type():
        component.set_value(val, skip_validation=True)
    else:
        component.set_value(val)


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
        if repn.nonlinear_expr is not None:
            raise ModelStructureError(f"constraint '{con.name}' is not quadratic")
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
                raise ModelStructureError(f"injection '{inj.name}' multiplies a recourse variable in constraint "
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


def _rewrite(model, config, record: _Record, injections: list, cert: Certificate) -> None:
    blk = Block(concrete=True)
    model.add_component(config.block_name, blk)
    s = len(injections)
    blk.injection = RangeSet(0, s - 1)
    nominal = [float(value(inj)) for inj in injections]
    blk.lower = Param(blk.injection, mutable=True, initialize={k: nominal[k] + float(cert.lower[k]) for k in range(s)})
    blk.upper = Param(blk.injection, mutable=True, initialize={k: nominal[k] + float(cert.upper[k]) for k in range(s)})
    var_idx = [k for k, inj in enumerate(injections) if inj.is_variable_type()]
    blk.box = Constraint(var_idx, rule=lambda b, k: (b.lower[k], injections[k], b.upper[k]))
    for con in record.deactivated:
        con.deactivate()
    if config.fix_recourse:
        for v in record.recourse:
            if not v.fixed:
                v.fix()
                record.fixed_recourse.append(v)
    object.__setattr__(blk, "_robustbox_record", record)


def _block(model, block_name: str):
    blk = model.component(block_name)
    if blk is None or not hasattr(blk, "_robustbox_record"):
        raise ModelStructureError(f"model '{model.name}' has no block '{block_name}' made by {NAME}")
    return blk


def certificate_of(model, block_name: str = "robustbox_box") -> Certificate:
    """The certificate attached by the transformation."""
    return _block(model, block_name)._robustbox_record.certificate


def restore(model, block_name: str = "robustbox_box") -> None:
    """Undo the rewrite: reactivate constraints, unfix recourse variables, remove the block."""
    blk = _block(model, block_name)
    record: _Record = blk._robustbox_record
    for con in record.deactivated:
        con.activate()
    for v in record.fixed_recourse:
        v.unfix()
    model.del_component(blk)


__all__ = ["InjectionBox", "certificate_of", "restore", "NAME", "SUFFIX"]
