"""From a network and an operating point to the quadratic system to certify.

Recourse policy "slack" (the standard power-flow policy): the state is the
rectangular voltage of every non-slack bus; equations are P at non-slack
buses, Q at PQ buses and |V|² at PV buses (held at their operating values);
the slack bus keeps its voltage and absorbs the balance.  Policy
"distributed": in addition a scalar α shares the balance among generators
in proportion to participation factors (default: their P range), P is an
equation at every bus, and only the slack bus angle is fixed.  The complete
rule — which bus holds its voltage, which unit takes which share — is a
:class:`Roles` (see :func:`recourse_roles`); it is written into the box file.

Monitored limits: |V|² at PQ buses, every sharing unit's own P range (under
"distributed" the rows P_g = P̄_g + share_g α, linear; under "slack" the
slack-bus total with bounds that keep each of its units in range), Q at every
voltage-holding bus (the bus total: units share it in proportion to their
Q ranges, so the total is in range exactly when each unit is), branch P and
Q at both ends of rated branches, angle differences.  Held quantities (|V| at
voltage-holding buses, P of units without a share, Q of fixed-Q units) are
constant over the box; :func:`held_point` checks them at the operating point.  Branch apparent power is limited
by derived rows: the faces cos φ_k P + sin φ_k Q ≤ rate·cos(π/N) of an
inscribed regular N-gon (inside the polygon implies inside the circle, so the
representation is inner; N = ``flow_faces``, by default the smallest N ≥ 32 whose polygon keeps
half of the most loaded branch end's remaining room at the operating point (32 faces: 0.5 % of the rating
in the worst direction).  Uncertain injections enter the
equations (E) where the bus has that equation, and the generator limits of
their bus (A) where they change what the generators there must produce.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, Sequence

import numpy as np
import scipy.sparse as sp

from ..errors import NetworkError, OperatingPointError
from ..quadratic import QuadraticMap, QuadraticSystem, UncertainSet
from .forms import angle_forms, branch_flow_forms, injection_forms, voltage_forms
from .network import (BUS_NUMBER, BUS_P_LOAD, BUS_Q_LOAD, BRANCH_LIMIT_A, BUS_V_HIGH, BUS_V_LOW, BUS_KIND, FIXED_RANGE_MW,
                      GEN_AT, KIND_SLACK, Network)

Policy = Literal["slack", "distributed"]


@dataclass(frozen=True)
class OperatingPoint:
    """A full AC state: voltages at every bus, outputs of in-service generators (per unit)."""

    v_mag_pu: np.ndarray
    v_ang_rad: np.ndarray
    pg_pu: np.ndarray
    qg_pu: np.ndarray
    objective_per_h: float | None = None

    @property
    def voltage(self) -> np.ndarray:
        return self.v_mag_pu * np.exp(1j * self.v_ang_rad)


@dataclass(frozen=True)
class Injection:
    """An uncertain net injection at a bus: p (active) or q (reactive),
    moving from nominal − lower_pu to nominal + upper_pu (per unit, both ≥ 0)."""

    bus: int
    quantity: Literal["p", "q"]
    lower_pu: float
    upper_pu: float

    @property
    def name(self) -> str:
        return f"{self.quantity}[{self.bus}]"


SNAP_PU = 1e-7  # a held quantity this far (× max(1, |limit|)) outside its limit is on it: solver tolerance
# (Ipopt's default bound_relax_factor is 1e-8 relative, Ipopt 3.14 options reference, from memory)


@dataclass(frozen=True, eq=False)
class Roles:
    """The complete recourse rule: what every bus and every in-service unit does when injections move.

    ``slack``: bus index of the angle reference (under "slack" it also absorbs the balance).
    ``pv``: the other bus indices that hold |V|: they carry a unit with a reactive range.
    ``pq``: every other bus; a PQ bus may carry units with Qmin = Qmax, which hold that Q.
    ``share``: per in-service unit (``net.gen_on`` order), its share of the change ΔB of total
    generation (sums to 1): P_g = P̄_g + share_g ΔB.  Under "distributed" these are the
    participation factors; under "slack" the slack-bus units with a P range share in proportion
    to it.  Units with a fixed P (range ≤ FIXED_RANGE_MW) never share.
    ``q_role``: per unit, how its Q follows its bus (:func:`split_q`): "fixed" (Q range ≤
    FIXED_RANGE_MW: holds Qmin); "shares" (a share of the bus's Q beyond the others' in proportion to
    its Q range); at a bus where some unit's Q range is unbounded, one such unit "absorbs" the bus's
    Q and the other units with a range are "held" at their Q of the operating point (clipped into
    range).  Either way each unit is inside its own range exactly when its bus total is inside the
    total of the units' ranges (held units counted at their held value).
    """

    policy: Policy
    slack: int
    pv: np.ndarray
    pq: np.ndarray
    share: np.ndarray
    fixed_p: np.ndarray
    q_role: np.ndarray

    @property
    def fixed_q(self) -> np.ndarray:
        return self.q_role == "fixed"

    @property
    def voltage_buses(self) -> np.ndarray:
        """Bus indices that hold |V| (slack first)."""
        return np.concatenate([[self.slack], self.pv]).astype(np.int64)


def recourse_record(net: Network, roles: Roles, op: OperatingPoint) -> dict:
    """The complete policy in engineering units, as the box file states it (docs/file-format.md)."""
    number = net.bus[:, BUS_NUMBER]
    gb = net.gen_bus_idx()
    units = []
    for k, row in enumerate(net.gen_on):
        p_rule = ("fixed P (Pmin = Pmax)" if roles.fixed_p[k] else
                  "shares the balance" if roles.share[k] > 0 else "holds its P")
        units.append({"index": int(row), "bus": int(number[gb[k]]), "balance_share": float(roles.share[k]),
                      "p_rule": p_rule, "q_role": str(roles.q_role[k]), "q_rule": Q_RULES[str(roles.q_role[k])]})
    pq_with_units = sorted(set(gb[roles.fixed_q].tolist()) & set(roles.pq.tolist()))
    return {
        "policy": roles.policy,
        "angle_reference_bus": int(number[roles.slack]),
        "voltage_buses": [{"bus": int(number[b]), "voltage_pu": float(op.v_mag_pu[b]),
                           "why": _why_voltage(net, roles, b)}
                          for b in roles.voltage_buses],
        "pq_buses_with_units": [{"bus": int(number[b]), "why": "every unit here has Qmin = Qmax: the bus holds "
                                 "its Q, not its voltage"} for b in pq_with_units],
        "units": units,
        "rule": ("unit P = P at the point + balance_share × (change of total generation); under 'slack' only the "
                 "slack bus's units share, under 'distributed' all sharing units. Unit Q by q_role: 'fixed' "
                 "injects Qmin, 'held' keeps its Q of the point, 'absorbs' takes the bus's Q beyond the other "
                 "units, 'shares' takes Qmin plus a share of the bus's remaining Q in proportion to Qmax − Qmin"),
    }


def _why_voltage(net: Network, roles: Roles, b: int) -> str:
    if b != roles.slack:
        return "a unit with a reactive range holds it"
    if net.bus[b, BUS_KIND] == KIND_SLACK:
        return "slack bus"
    return ("slack bus (the case's type-3 bus has no unit in service with a reactive range: the first bus "
            "with one takes its place)")


def _proportional(weight: np.ndarray) -> np.ndarray:
    """Weights scaled to sum 1; infinite weights (unbounded units) share equally among themselves."""
    w = np.where(np.isinf(weight), 1.0, 0.0) if np.any(np.isinf(weight)) else weight
    return w / w.sum()


def recourse_roles(net: Network, policy: Policy = "slack", participation: np.ndarray | None = None) -> Roles:
    """The :class:`Roles` of every bus and unit of ``net`` under ``policy`` (see the class)."""
    if policy not in ("slack", "distributed"):
        raise NetworkError(f"unknown recourse policy '{policy}' (slack or distributed)")
    lim = net.gen_limits_pu()
    p_range = lim["pmax"] - lim["pmin"]
    fixed_p = p_range * net.base_mva <= FIXED_RANGE_MW
    fixed_q = (lim["qmax"] - lim["qmin"]) * net.base_mva <= FIXED_RANGE_MW
    gb = net.gen_bus_idx()
    s, pv, pq = net.bus_kinds()
    rows = net.gen_on
    if policy == "distributed":
        if participation is None:
            weight = np.where(fixed_p, 0.0, p_range)
        else:
            weight = np.asarray(participation, dtype=float).reshape(-1)
            if weight.shape != (len(rows),) or not np.all(weight >= 0) or np.any(np.isnan(weight)):
                raise NetworkError("participation factors: one nonnegative number per in-service generator")
            bad = np.flatnonzero((weight > 0) & fixed_p)
            if bad.size:
                raise NetworkError(f"participation factors: generator row {int(rows[bad[0]]) + 1} has a fixed P "
                                   "(Pmin = Pmax) and cannot take a share of the balance")
        if not weight.sum() > 0:
            raise NetworkError(f"{net.source}: no in-service generator has a P range to share the balance")
    else:
        weight = np.where((gb == s) & ~fixed_p, p_range, 0.0)
        if not weight.sum() > 0:
            raise NetworkError(f"{net.source}: no unit at the slack bus {int(net.bus[s, BUS_NUMBER])} has a P range, "
                               "so it cannot absorb the balance; use the distributed policy or another slack bus")
    q_role = np.where(fixed_q, "fixed", "shares").astype(object)
    q_width = lim["qmax"] - lim["qmin"]
    for b in np.unique(gb):
        free = np.flatnonzero((gb == b) & ~fixed_q)
        unbounded = free[~np.isfinite(q_width[free])]
        if unbounded.size:  # one unbounded unit takes the bus's Q; the others hold theirs
            q_role[free] = "held"
            both = unbounded[np.isinf(lim["qmin"][unbounded]) & np.isinf(lim["qmax"][unbounded])]
            q_role[both[0] if both.size else unbounded[0]] = "absorbs"
    return Roles(policy, s, pv, pq, _proportional(weight), fixed_p, q_role.astype(str))


Q_RULES = {"fixed": "fixed Q (Qmin = Qmax)",
           "shares": "shares its bus's Q beyond the others' Qmin in proportion to its Q range",
           "held": "holds its Q of the operating point (an unbounded unit at its bus absorbs the bus's Q)",
           "absorbs": "absorbs its bus's Q beyond the other units' (its Q range is unbounded)"}


def split_q(net: Network, roles: Roles, q_bus: np.ndarray, q_unit: np.ndarray) -> np.ndarray:
    """Per-unit Q (pu) from bus totals ``q_bus`` (pu, per bus index) by the rule of :class:`Roles`.

    ``q_unit`` (pu, per unit) gives the value a "held" unit keeps (clipped into its range).
    """
    lim = net.gen_limits_pu()
    gb = net.gen_bus_idx()
    role = roles.q_role
    qg = np.where(role == "fixed", lim["qmin"], 0.0)
    held = role == "held"
    qg[held] = np.clip(q_unit[held], lim["qmin"][held], lim["qmax"][held])
    for b in np.unique(gb):
        at = gb == b
        taker = np.flatnonzero(at & np.isin(role, ("shares", "absorbs")))
        if not taker.size:
            continue
        rest = q_bus[b] - qg[at & ~np.isin(role, ("shares", "absorbs"))].sum()
        if role[taker[0]] == "absorbs":
            qg[taker[0]] = rest
        else:
            qmin, width = lim["qmin"][taker], lim["qmax"][taker] - lim["qmin"][taker]
            qg[taker] = qmin + (rest - qmin.sum()) * _proportional(width)
    return qg


def q_bounds_per_bus(net: Network, roles: Roles, q_unit: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(lowest, highest) total Q per bus index (pu) that keeps every unit there inside its own range
    under the rule of :class:`Roles`; held units count at their held value ``q_unit``."""
    lim = net.gen_limits_pu()
    held = roles.q_role == "held"
    lo = np.where(held, np.clip(q_unit, lim["qmin"], lim["qmax"]), lim["qmin"])
    hi = np.where(held, lo, lim["qmax"])
    return _per_bus_sum(net, lo), _per_bus_sum(net, hi)


def _unit(net: Network, k: int) -> str:
    row = int(net.gen_on[k])
    return f"generator row {net.file_row('gen', row)} at bus {int(net.gen[row, GEN_AT])}"


def held_point(net: Network, roles: Roles, op: OperatingPoint) -> OperatingPoint:
    """``op`` with its held quantities checked against their limits and put on the policy's rule.

    Checked: |V| at voltage-holding buses, every unit's P, the Q of fixed-Q units.  A value at most
    SNAP_PU × max(1, |limit|) outside its limit is read as on the limit (solver tolerance) and
    moved there, so is the P of a fixed-P unit; any larger violation raises OperatingPointError.
    Per-unit Q is re-split from the bus totals by :func:`split_q`.  The point then solves the
    equations only up to those tiny moves; the certificate carries that residual exactly.
    """
    def checked(values: np.ndarray, low: np.ndarray, high: np.ndarray, what) -> np.ndarray:
        tol_lo = SNAP_PU * np.maximum(1.0, np.abs(np.where(np.isfinite(low), low, 0.0)))
        tol_hi = SNAP_PU * np.maximum(1.0, np.abs(np.where(np.isfinite(high), high, 0.0)))
        bad = np.flatnonzero((values < low - tol_lo) | (values > high + tol_hi) | ~np.isfinite(values))
        if bad.size:
            raise OperatingPointError(what(int(bad[0])))
        return np.clip(values, low, high)

    base = net.base_mva
    vb = roles.voltage_buses
    vmin, vmax = net.bus[vb, BUS_V_LOW], net.bus[vb, BUS_V_HIGH]
    vm = op.v_mag_pu.copy()
    vm[vb] = checked(op.v_mag_pu[vb], vmin, vmax, lambda i: (
        f"the operating point violates a voltage limit: bus {int(net.bus[vb[i], BUS_NUMBER])} holds "
        f"|V| = {op.v_mag_pu[vb[i]]:.6g} pu, outside [{vmin[i]:.6g}, {vmax[i]:.6g}] pu"))
    lim = net.gen_limits_pu()
    pg = checked(op.pg_pu, lim["pmin"], lim["pmax"], lambda k: (
        f"the operating point violates a generator limit: {_unit(net, k)} produces "
        f"{op.pg_pu[k] * base:.6g} MW, outside [{lim['pmin'][k] * base:.6g}, {lim['pmax'][k] * base:.6g}] MW"))
    held = np.flatnonzero(roles.q_role == "held")
    checked(op.qg_pu[held], lim["qmin"][held], lim["qmax"][held], lambda i: (
        f"the operating point violates a generator limit: {_unit(net, int(held[i]))} produces "
        f"{op.qg_pu[held[i]] * base:.6g} Mvar, outside [{lim['qmin'][held[i]] * base:.6g}, "
        f"{lim['qmax'][held[i]] * base:.6g}] Mvar"))
    q_bus = np.zeros(net.n_bus)
    np.add.at(q_bus, net.gen_bus_idx(), op.qg_pu)
    fq = np.flatnonzero(roles.fixed_q)
    gb = net.gen_bus_idx()
    for b in np.unique(gb[fq]):
        if b in set(vb.tolist()):
            continue  # a fixed-Q unit next to a voltage-holding one: the bus total is monitored
        held = lim["qmin"][gb == b].sum()
        if abs(q_bus[b] - held) > SNAP_PU * max(1.0, abs(held)):
            raise OperatingPointError(
                f"the operating point violates a generator limit: the units at bus {int(net.bus[b, BUS_NUMBER])} "
                f"have a fixed Q (Qmin = Qmax) of {held * base:.6g} Mvar in total, the point gives "
                f"{q_bus[b] * base:.6g} Mvar")
        q_bus[b] = held
    return OperatingPoint(vm, op.v_ang_rad, pg, split_q(net, roles, q_bus, op.qg_pu), op.objective_per_h)


@dataclass(frozen=True, eq=False)
class NetworkSystem:
    """The certification system of a network, with its variable layout.

    ``operating_point`` is the point after :func:`held_point` (held quantities on their rule).
    """

    system: QuadraticSystem
    point: np.ndarray
    network: Network
    operating_point: OperatingPoint
    injections: tuple[Injection, ...]
    policy: Policy
    participation: np.ndarray  # per in-service generator, sums to 1 (zeros for "slack")
    slack: int
    pv: np.ndarray
    pq: np.ndarray
    flow_faces: int
    roles: Roles

    def describe_policy(self) -> str:
        if self.policy == "slack":
            return (f"slack bus {int(self.network.bus[self.slack, BUS_NUMBER])} absorbs the balance (its units in "
                    "proportion to their P ranges); voltage magnitudes at generator buses and the other units' P "
                    "are held")
        return ("distributed slack: units share the balance by participation factors; voltage magnitudes at "
                "generator buses are held")


def _per_bus_sum(net: Network, values: np.ndarray) -> np.ndarray:
    out = np.zeros(net.n_bus)
    np.add.at(out, net.gen_bus_idx(), values)
    return out


def build_system(net: Network, op: OperatingPoint, injections: Sequence[Injection], policy: Policy = "slack",
                 participation: np.ndarray | None = None, flow_faces: int | None = None) -> NetworkSystem:
    """Build the :class:`NetworkSystem` for ``injections`` around the operating point ``op``."""
    n = net.n_bus
    roles = recourse_roles(net, policy, participation)
    s, pv, pq = roles.slack, roles.pv, roles.pq
    index = net.bus_index
    gen_on = net.gen_on
    if len(op.v_mag_pu) != n or len(op.pg_pu) != len(gen_on):
        raise NetworkError(f"operating point has {len(op.v_mag_pu)} bus voltages and {len(op.pg_pu)} generator outputs; "
                           f"the network has {n} buses and {len(gen_on)} generators in service")
    op = held_point(net, roles, op)
    volt = op.voltage * np.exp(-1j * op.v_ang_rad[s])  # slack angle 0
    x_full = np.concatenate([volt.real, volt.imag])
    free = np.ones(2 * n, dtype=bool)
    free[[s, n + s]] = False
    n_state = int(free.sum())
    new_index = -np.ones(2 * n, dtype=np.int64)
    new_index[free] = np.arange(n_state)
    dist = policy == "distributed"
    lim = net.gen_limits_pu()
    part = roles.share if dist else np.zeros(len(gen_on))
    bus_part = _per_bus_sum(net, part)
    inj = injection_forms(net)
    load = net.load_pu()
    pg_bus, qg_bus = _per_bus_sum(net, op.pg_pu), _per_bus_sum(net, op.qg_pu)
    n_vars = n_state + (1 if dist else 0)
    p_buses = np.arange(n) if dist else np.setdiff1d(np.arange(n), [s])
    eq_rows = np.concatenate([p_buses, n + pq])
    eq_map = inj.take(eq_rows)
    extra = None
    if dist:
        extra = (np.arange(len(p_buses)), np.full(len(p_buses), n_state), -bus_part[p_buses])
    eq_map = eq_map.substitute(new_index, x_full, n_vars, extra)
    vol = voltage_forms(net)
    eq_map = QuadraticMap.stack([eq_map, vol.take(pv).substitute(new_index, x_full, n_vars)])
    # a PQ bus may carry generators with a fixed reactive output (Qmin = Qmax)
    target = np.concatenate([pg_bus[p_buses] - load.real[p_buses], qg_bus[pq] - load.imag[pq], op.v_mag_pu[pv] ** 2])
    # ------------------------------------------------------------ limits
    gen_bus = np.union1d(pv, [s])  # buses whose generators' Q follows the voltage set-point
    qmin_b, qmax_b = q_bounds_per_bus(net, roles, op.qg_pu)
    sharing = np.flatnonzero(roles.share > 0)
    if dist:  # every sharing unit's own range: P_g = P̄_g + share_g α, a row linear in α
        p_rows = QuadraticMap.from_terms(2 * n, [f"Pgen[{_unit(net, int(k))}]" for k in sharing],
                                         ([], [], [], []), ([], [], []), op.pg_pu[sharing])
        p_lo, p_up = lim["pmin"][sharing], lim["pmax"][sharing]
        p_lim_bus = np.zeros(0, dtype=np.int64)
    else:  # the slack-bus total T, with the bounds that keep each of its sharing units in range
        p_lim_bus = np.array([s])
        p_rows = inj.take(p_lim_bus)
        # unit g: P̄_g + share_g (T + load − P̄_bus) ∈ [Pmin_g, Pmax_g]
        offset = pg_bus[s] - load.real[s]
        p_lo = np.array([offset + np.max((lim["pmin"][sharing] - op.pg_pu[sharing]) / roles.share[sharing])])
        p_up = np.array([offset + np.min((lim["pmax"][sharing] - op.pg_pu[sharing]) / roles.share[sharing])])
    maps = [vol.take(pq), p_rows, inj.take(n + gen_bus)]
    lower = [net.bus[pq, BUS_V_LOW] ** 2, p_lo, qmin_b[gen_bus] - load.imag[gen_bus]]
    upper = [net.bus[pq, BUS_V_HIGH] ** 2, p_up, qmax_b[gen_bus] - load.imag[gen_bus]]
    flows = branch_flow_forms(net)
    rated = np.flatnonzero(net.branch[net.branch_on, BRANCH_LIMIT_A] > 0)
    flow_rows = (4 * rated[:, None] + np.arange(4)[None, :]).reshape(-1)
    ang = angle_forms(net)
    maps += [flows.take(flow_rows), ang]
    lower += [np.full(len(flow_rows), -np.inf), np.full(ang.n_rows, -np.inf)]
    upper += [np.full(len(flow_rows), np.inf), np.zeros(ang.n_rows)]
    lim_full = QuadraticMap.stack(maps)
    first_flow = sum(len(x) for x in lower[:3])
    if flow_faces is None:
        flow_faces = _faces_for(net, op, rated)
    derived, derived_up, derived_names = _flow_polygon(net, rated, first_flow, lim_full.n_rows, flow_faces)
    names = list(lim_full.names)
    n_v, n_p = len(pq), p_rows.n_rows
    if not dist:
        names[n_v] = f"Pgen[{int(net.bus[s, BUS_NUMBER])}]"
    for k, b in enumerate(gen_bus):
        names[n_v + n_p + k] = f"Qgen[{int(net.bus[b, BUS_NUMBER])}]"
    alpha_terms = (n_v + np.arange(len(sharing)), np.full(len(sharing), n_state), roles.share[sharing]) if dist else None
    lim_map = lim_full.substitute(new_index, x_full, n_vars, alpha_terms)
    lim_map = QuadraticMap(lim_map.n_vars, lim_map.n_rows, lim_map.q_row, lim_map.q_a, lim_map.q_b, lim_map.q_val,
                           lim_map.linear, lim_map.constant, tuple(names))
    # ------------------------------------------------------- uncertainty
    eq_pos = {("p", int(b)): r for r, b in enumerate(p_buses)}
    eq_pos.update({("q", int(b)): len(p_buses) + r for r, b in enumerate(pq)})
    plim_pos = {int(b): n_v + k for k, b in enumerate(p_lim_bus)}
    qlim_pos = {int(b): n_v + n_p + k for k, b in enumerate(gen_bus)}
    e_r, e_c, a_r, a_c = [], [], [], []
    seen = set()
    for k, item in enumerate(injections):
        if item.bus not in index:
            raise NetworkError(f"uncertain injection '{item.name}': bus {item.bus} is not in the network")
        if item.quantity not in ("p", "q"):
            raise NetworkError(f"uncertain injection at bus {item.bus}: quantity must be 'p' or 'q', got '{item.quantity}'")
        if (item.bus, item.quantity) in seen:
            raise NetworkError(f"uncertain injection '{item.name}' is listed twice")
        seen.add((item.bus, item.quantity))
        b = index[item.bus]
        row = eq_pos.get((item.quantity, b))
        if row is not None:
            e_r.append(row)
            e_c.append(k)
        lrow = (plim_pos if item.quantity == "p" else qlim_pos).get(b)
        if lrow is not None:
            a_r.append(lrow)
            a_c.append(k)
        if row is None and lrow is None:
            raise NetworkError(f"uncertain injection '{item.name}' enters no equation and no limit under the "
                               f"'{policy}' policy (a {item.quantity.upper()} change at a PV bus with no generator limit)")
    n_unc = len(injections)
    unc = UncertainSet(tuple(i.name for i in injections),
                       sp.csr_matrix((np.ones(len(e_r)), (e_r, e_c)), shape=(eq_map.n_rows, n_unc)),
                       sp.csr_matrix((-np.ones(len(a_r)), (a_r, a_c)), shape=(lim_map.n_rows, n_unc)),
                       np.array([i.lower_pu for i in injections], dtype=float),
                       np.array([i.upper_pu for i in injections], dtype=float))
    var_names = [f"e[{int(net.bus[i, BUS_NUMBER])}]" for i in range(n) if i != s]
    var_names += [f"f[{int(net.bus[i, BUS_NUMBER])}]" for i in range(n) if i != s]
    if dist:
        var_names.append("alpha")
    point = np.concatenate([x_full[free], [0.0]]) if dist else x_full[free]
    # a common rotation of all voltages leaves every row unchanged: e → −f, f → e
    half = n - 1
    rot = sp.csr_matrix((np.concatenate([-np.ones(half), np.ones(half)]),
                         (np.arange(n_state), np.concatenate([np.arange(half, n_state), np.arange(half)]))),
                        shape=(n_vars, n_vars))
    system = QuadraticSystem(eq_map, target, lim_map, np.concatenate(lower), np.concatenate(upper), unc, tuple(var_names),
                             derived, derived_up, derived_names, rot)
    return NetworkSystem(system, point, net, op, tuple(injections), policy, part, s, pv, pq, flow_faces, roles)


MAX_FACES = 512  # the polygon's inner radius is then 99.998 % of the rating


def _faces_for(net: Network, op: OperatingPoint, rated: np.ndarray) -> int:
    """Smallest N ≥ 32 with cos(π/N) ≥ (1 + loading)/2 for the most loaded rated branch end at ``op``."""
    if not rated.size:
        return 32
    _, yf, yt = net.admittance()
    v = op.voltage
    f, t = net.branch_ends()
    flow = np.maximum(np.abs(v[f] * np.conj(yf @ v)), np.abs(v[t] * np.conj(yt @ v)))[rated]
    loading = float(np.max(flow / (net.branch[net.branch_on[rated], BRANCH_LIMIT_A] / net.base_mva)))
    if loading >= 1.0:
        return MAX_FACES
    need = np.pi / np.arccos(min((1.0 + loading) / 2.0, 1.0 - 1e-12))
    return int(min(MAX_FACES, max(32, np.ceil(need))))


def _flow_polygon(net: Network, rated: np.ndarray, first: int, n_rows: int, faces: int
                  ) -> tuple[sp.csr_matrix, np.ndarray, tuple[str, ...]]:
    """Faces of the inscribed regular polygon of every rated branch end, on the P/Q limit rows.

    Rows ``first + 4k + (0, 1, 2, 3)`` hold Pf, Qf, Pt, Qt of the k-th rated branch.
    """
    if faces < 4:
        raise NetworkError(f"flow_faces must be at least 4, got {faces}")
    phis = 2.0 * np.pi * np.arange(faces) / faces
    n_ends = 2 * len(rated)
    out = np.arange(n_ends * faces)
    end = out // faces
    p_row = first + 2 * end  # Pf/Pt row of that end; Q is the next row
    w = sp.csr_matrix((np.concatenate([np.cos(phis)[out % faces], np.sin(phis)[out % faces]]),
                       (np.concatenate([out, out]), np.concatenate([p_row, p_row + 1]))), shape=(len(out), n_rows))
    rate = net.branch[net.branch_on[rated], BRANCH_LIMIT_A] / net.base_mva
    upper = np.repeat(np.repeat(rate, 2), faces) * np.cos(np.pi / faces)
    names = []
    for k in rated:
        r = int(net.branch_on[k])
        tag = f"{int(net.branch[r, 0])}-{int(net.branch[r, 1])}#{net.file_row('branch', r)}"
        for side in "ft":
            names += [f"S{side}[{tag}]@{np.degrees(phi):.0f}deg" for phi in phis]
    return w, upper, tuple(names)


def load_injections(net: Network, band: float) -> list[Injection]:
    """P and Q of every load may deviate by ± band × nominal (loads with nonzero P or Q)."""
    out = []
    for r in range(net.n_bus):
        for quantity, col in (("p", BUS_P_LOAD), ("q", BUS_Q_LOAD)):
            val = abs(net.bus[r, col]) / net.base_mva * band
            if val > 0:
                out.append(Injection(int(net.bus[r, BUS_NUMBER]), quantity, val, val))
    return out


def site_injections(net: Network, buses: Sequence[int], band: float, size_mw: float = 100.0) -> list[Injection]:
    """Injection sites at the given buses, each injecting from 0 up to band × size_mw MW."""
    return [Injection(int(b), "p", 0.0, band * size_mw / net.base_mva) for b in buses]


def largest_load_pq_buses(net: Network, count: int = 5) -> list[int]:
    """Bus numbers of the ``count`` PQ buses with the largest active load."""
    _, _, pq = net.bus_kinds()
    order = pq[np.argsort(-net.bus[pq, BUS_P_LOAD], kind="stable")]
    return [int(net.bus[i, BUS_NUMBER]) for i in order[:count]]
