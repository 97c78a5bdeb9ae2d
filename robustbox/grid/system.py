"""From a network and an operating point to the quadratic system to certify.

Recourse policy "slack" (the standard power-flow policy): the state is the
rectangular voltage of every non-slack bus; equations are P at non-slack
buses, Q at PQ buses and |V|² at PV buses (held at their operating values);
the slack bus keeps its voltage and absorbs the balance.  Policy
"distributed": in addition a scalar α shares the balance among generators
in proportion to participation factors (default: their P range), P is an
equation at every bus, and only the slack bus angle is fixed.

Monitored limits: |V|² at PQ buses, generator P (slack, or every
participating generator) and Q (every generator bus), branch P and Q at both
ends of rated branches, angle differences.  Branch apparent power is limited
by derived rows: the faces cos φ_k P + sin φ_k Q ≤ rate·cos(π/N) of an
inscribed regular N-gon (inside the polygon implies inside the circle, so the
representation is inner; N = ``flow_faces``, default 32: 0.5 % of the rating
in the worst direction).  Uncertain injections enter the
equations (E) where the bus has that equation, and the generator limits of
their bus (A) where they change what the generators there must produce.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, Sequence

import numpy as np
import scipy.sparse as sp

from ..errors import NetworkError
from ..quadratic import QuadraticMap, QuadraticSystem, UncertainSet
from .forms import angle_forms, branch_flow_forms, injection_forms, voltage_forms
from .network import BUS_NUMBER, BUS_P_LOAD, BUS_Q_LOAD, BRANCH_LIMIT_A, BUS_V_HIGH, BUS_V_LOW, Network

Policy = Literal["slack", "distributed"]


@dataclass(frozen=True)
class OperatingPoint:
    """A full AC state: voltages at every bus, outputs of in-service generators (per unit)."""

    vm_pu: np.ndarray
    va_rad: np.ndarray
    pg_pu: np.ndarray
    qg_pu: np.ndarray
    objective_per_h: float | None = None

    @property
    def voltage(self) -> np.ndarray:
        return self.vm_pu * np.exp(1j * self.va_rad)


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


@dataclass(frozen=True, eq=False)
class NetworkSystem:
    """The certification system of a network, with its variable layout."""

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

    def describe_policy(self) -> str:
        if self.policy == "slack":
            return (f"slack bus {int(self.network.bus[self.slack, BUS_NUMBER])} absorbs the balance; "
                    "PV-bus voltage magnitudes and generator P set-points are held")
        return ("distributed slack: generators share the balance by participation factors; "
                "PV-bus voltage magnitudes are held")


def _per_bus_sum(net: Network, values: np.ndarray) -> np.ndarray:
    out = np.zeros(net.n_bus)
    np.add.at(out, net.gen_bus_idx(), values)
    return out


def build_system(net: Network, op: OperatingPoint, injections: Sequence[Injection], policy: Policy = "slack",
                 participation: np.ndarray | None = None, flow_faces: int = 32) -> NetworkSystem:
    """Build the :class:`NetworkSystem` for ``injections`` around the operating point ``op``."""
    n = net.n_bus
    s, pv, pq = net.bus_kinds()
    index = net.bus_index
    gen_on = net.gen_on
    if len(op.vm_pu) != n or len(op.pg_pu) != len(gen_on):
        raise NetworkError(f"operating point has {len(op.vm_pu)} bus voltages and {len(op.pg_pu)} generator outputs; "
                           f"the network has {n} buses and {len(gen_on)} generators in service")
    volt = op.voltage * np.exp(-1j * op.va_rad[s])  # slack angle 0
    x_full = np.concatenate([volt.real, volt.imag])
    free = np.ones(2 * n, dtype=bool)
    free[[s, n + s]] = False
    n_state = int(free.sum())
    new_index = -np.ones(2 * n, dtype=np.int64)
    new_index[free] = np.arange(n_state)
    dist = policy == "distributed"
    if policy not in ("slack", "distributed"):
        raise NetworkError(f"unknown recourse policy '{policy}' (slack or distributed)")
    lim = net.gen_limits_pu()
    if dist:
        part = (lim["pmax"] - lim["pmin"]) if participation is None else np.asarray(participation, dtype=float)
        if part.shape != (len(gen_on),) or np.any(part < 0) or part.sum() <= 0:
            raise NetworkError("participation factors: one nonnegative number per in-service generator, not all zero")
        part = part / part.sum()
    else:
        part = np.zeros(len(gen_on))
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
    target = np.concatenate([pg_bus[p_buses] - load.real[p_buses], qg_bus[pq] - load.imag[pq], op.vm_pu[pv] ** 2])
    # ------------------------------------------------------------ limits
    gen_bus = np.union1d(pv, [s])  # buses whose generators' Q follows the voltage set-point
    pmin_b, pmax_b = _per_bus_sum(net, lim["pmin"]), _per_bus_sum(net, lim["pmax"])
    qmin_b, qmax_b = _per_bus_sum(net, lim["qmin"]), _per_bus_sum(net, lim["qmax"])
    all_gen_bus = np.unique(net.gen_bus_idx())
    p_lim_bus = all_gen_bus[bus_part[all_gen_bus] > 0] if dist else np.array([s])
    maps = [vol.take(pq), inj.take(p_lim_bus), inj.take(n + gen_bus)]
    lower = [net.bus[pq, BUS_V_LOW] ** 2, pmin_b[p_lim_bus] - load.real[p_lim_bus], qmin_b[gen_bus] - load.imag[gen_bus]]
    upper = [net.bus[pq, BUS_V_HIGH] ** 2, pmax_b[p_lim_bus] - load.real[p_lim_bus], qmax_b[gen_bus] - load.imag[gen_bus]]
    flows = branch_flow_forms(net)
    rated = np.flatnonzero(net.branch[net.branch_on, BRANCH_LIMIT_A] > 0)
    flow_rows = (4 * rated[:, None] + np.arange(4)[None, :]).reshape(-1)
    ang = angle_forms(net)
    maps += [flows.take(flow_rows), ang]
    lower += [np.full(len(flow_rows), -np.inf), np.full(ang.n_rows, -np.inf)]
    upper += [np.full(len(flow_rows), np.inf), np.zeros(ang.n_rows)]
    lim_full = QuadraticMap.stack(maps)
    first_flow = sum(len(x) for x in lower[:3])
    derived, derived_up, derived_names = _flow_polygon(net, rated, first_flow, lim_full.n_rows, flow_faces)
    names = list(lim_full.names)
    n_v, n_p = len(pq), len(p_lim_bus)
    for k, b in enumerate(p_lim_bus):
        names[n_v + k] = f"Pgen[{int(net.bus[b, BUS_NUMBER])}]"
    for k, b in enumerate(gen_bus):
        names[n_v + n_p + k] = f"Qgen[{int(net.bus[b, BUS_NUMBER])}]"
    lim_map = lim_full.substitute(new_index, x_full, n_vars)
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
    return NetworkSystem(system, point, net, op, tuple(injections), policy, part, s, pv, pq, flow_faces)


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
        tag = f"{int(net.branch[r, 0])}-{int(net.branch[r, 1])}#{r + 1}"
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
