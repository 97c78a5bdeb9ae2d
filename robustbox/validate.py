"""Independent sampling validation of a box of injections on a network.

For box vertices and random points inside, run a Newton power flow (polar,
:mod:`robustbox.grid.powerflow`) from the operating point with the recourse
policy as the box file states it (which buses hold |V|, each unit's share of
the balance) and check every limit on the exact quantities: |V| at every bus,
every unit's own P range, every unit's own Q range (the bus's Q split among
its units by the record's ``q_role`` of each: fixed, held, shares, absorbs),
branch apparent power |S| ≤ rateA at both ends (the circle, not the polygon
the certificate uses) and angle differences.  It shares no code with the
certificate beyond the network data and the policy record; a non-converged
power flow counts as a violation.  The Newton tolerance is raised to the
rounding floor of the admittances (tiny impedances make |Y| large).
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from .grid.network import BRANCH_ANGLE_HIGH, BRANCH_ANGLE_LOW, BUS_NUMBER, GEN_AT, BRANCH_LIMIT_A, BUS_V_HIGH, BUS_V_LOW, Network
from .grid.powerflow import newton_power_flow
from .errors import OperatingPointError
from .grid.system import Injection, OperatingPoint, recourse_record, recourse_roles


@dataclass
class ValidationReport:
    """Outcome of sampling a box: counts, and the worst margin per limit class.

    Margins are in the limit's engineering unit (pu for voltage, MW/Mvar/MVA
    for power, degrees for angles); negative means violated.
    """

    points: int
    vertices: int
    violations: int
    not_converged: int
    worst_margin: dict[str, float] = field(default_factory=dict)
    examples: list[str] = field(default_factory=list)

    @property
    def passed(self) -> bool:
        return self.violations == 0 and self.not_converged == 0


@dataclass(frozen=True)
class Recourse:
    """The recourse policy read from a policy record (the box file's ``recourse``): bus indices, unit shares."""

    distributed: bool
    slack: int
    pv: np.ndarray
    pq: np.ndarray
    share: np.ndarray  # per in-service unit (net.gen_on order), sums to 1
    q_role: tuple[str, ...]  # per in-service unit: "fixed", "held", "shares" or "absorbs"


def read_recourse(net: Network, record: dict, source: str = "box file") -> Recourse:
    """Check a policy record against ``net`` and read it (errors name the entry at fault)."""
    try:
        kind = record["policy"]
        index = net.bus_index
        ref = record["angle_reference_bus"]
        holds = [e["bus"] for e in record["voltage_buses"]]
        shares = {int(u["index"]): float(u["balance_share"]) for u in record["units"]}
        roles = {int(u["index"]): str(u["q_role"]) for u in record["units"]}
    except (KeyError, TypeError, ValueError) as exc:
        raise OperatingPointError(f"{source}: the recourse record is incomplete (missing or bad field: {exc})") from None
    if kind not in ("slack", "distributed"):
        raise OperatingPointError(f"{source}: recourse policy '{kind}' is neither 'slack' nor 'distributed'")
    for b in [ref, *holds]:
        if b not in index:
            raise OperatingPointError(f"{source}: recourse names bus {b}, which is not in the network")
    missing = [int(g) for g in net.gen_on if int(g) not in shares]
    if missing:
        raise OperatingPointError(f"{source}: recourse lists no unit for in-service generator rows {missing[:10]} "
                                  "(the box was made for another case or another set of units in service)")
    share = np.array([shares[int(g)] for g in net.gen_on])
    q_role = tuple(roles[int(g)] for g in net.gen_on)
    if not set(q_role) <= {"fixed", "held", "shares", "absorbs"}:
        raise OperatingPointError(f"{source}: a unit's q_role is not one of fixed, held, shares, absorbs")
    if np.any(~np.isfinite(share)) or np.any(share < 0) or abs(share.sum() - 1.0) > 1e-9:
        raise OperatingPointError(f"{source}: the units' balance shares must be ≥ 0 and sum to 1 "
                                  f"(they sum to {share.sum():.12g})")
    slack = index[ref]
    held = np.zeros(net.n_bus, dtype=bool)
    held[[index[b] for b in holds]] = True
    if not held[slack]:
        raise OperatingPointError(f"{source}: the angle reference bus {ref} must hold its voltage")
    held[slack] = False
    return Recourse(kind == "distributed", slack, np.flatnonzero(held),
                    np.flatnonzero(~held & (np.arange(net.n_bus) != slack)), share, q_role)


class _Limits:
    """The network data the limit checks need, computed once per network."""

    def __init__(self, net: Network, q_role: tuple[str, ...], q_point: np.ndarray) -> None:
        self.net, self.base = net, net.base_mva
        self.lim = net.gen_limits_pu()
        gb = net.gen_bus_idx()
        role = np.array(q_role, dtype=object)
        # per bus with units: (bus, units taking the rest, how, Q of the units that do not)
        self.q_groups = []
        for b in np.unique(gb):
            mine = np.flatnonzero(gb == b)
            kept = np.where(role[mine] == "fixed", self.lim["qmin"][mine], q_point[mine])
            takes = np.isin(role[mine], ("shares", "absorbs"))
            kind = "absorbs" if np.any(role[mine] == "absorbs") else "shares"
            self.q_groups.append((b, mine[takes], kind, mine[~takes], kept[~takes]))
        self.units = [f"generator row {net.file_row('gen', int(g))} at bus {int(b)}"
                      for g, b in zip(net.gen_on, net.gen[net.gen_on, GEN_AT])]
        _, self.yf, self.yt = net.admittance()
        self.f, self.t = net.branch_ends()
        self.br = net.branch[net.branch_on]
        self.rated = self.br[:, BRANCH_LIMIT_A] > 0

    def unit_q(self, q_bus: np.ndarray) -> np.ndarray:
        """Each unit's Q (pu) from the bus totals by the record's roles."""
        q = np.zeros(len(self.units))
        lo, hi = self.lim["qmin"], self.lim["qmax"]
        for b, takers, kind, others, kept in self.q_groups:
            q[others] = kept
            rest = q_bus[b] - kept.sum()
            if not takers.size:
                continue
            if kind == "absorbs":
                q[takers] = rest  # one absorbing unit per bus
            else:
                width = hi[takers] - lo[takers]
                frac = width / width.sum() if width.sum() > 0 else np.full(len(takers), 1.0 / len(takers))
                q[takers] = lo[takers] + frac * (rest - lo[takers].sum())
        return q

    def margins(self, v: np.ndarray, sg_bus: np.ndarray, pg_unit: np.ndarray) -> dict[str, tuple[float, str]]:
        """Worst margin and the element that has it, per limit class, at one solved state."""
        net, base, br = self.net, self.base, self.br
        out: dict[str, tuple[float, str]] = {}
        vm = np.abs(v)
        mv = np.minimum(net.bus[:, BUS_V_HIGH] - vm, vm - net.bus[:, BUS_V_LOW])
        i = int(np.argmin(mv))
        out["voltage_pu"] = (float(mv[i]), f"bus {int(net.bus[i, BUS_NUMBER])} |V| = {vm[i]:.5f} pu")
        qg = self.unit_q(sg_bus.imag)
        mq = np.minimum(self.lim["qmax"] - qg, qg - self.lim["qmin"]) * base
        i = int(np.argmin(mq))
        out["gen_q_mvar"] = (float(mq[i]), f"{self.units[i]} Qgen = {qg[i] * base:.3f} Mvar")
        mp = np.minimum(self.lim["pmax"] - pg_unit, pg_unit - self.lim["pmin"]) * base
        i = int(np.argmin(mp))
        out["gen_p_mw"] = (float(mp[i]), f"{self.units[i]} Pgen = {pg_unit[i] * base:.3f} MW")
        f, t, rate = self.f, self.t, br[:, BRANCH_LIMIT_A]
        if np.any(self.rated):
            sf = np.abs(v[f] * np.conj(self.yf @ v)) * base
            st = np.abs(v[t] * np.conj(self.yt @ v)) * base
            ms = (rate - np.maximum(sf, st))[self.rated]
            i = int(np.argmin(ms))
            k = np.flatnonzero(self.rated)[i]
            out["flow_mva"] = (float(ms[i]), f"branch {int(br[k, 0])}-{int(br[k, 1])} |S| = {max(sf[k], st[k]):.3f} MVA "
                                             f"(rating {rate[k]:.1f})")
        dth = np.degrees(np.angle(v[f] * np.conj(v[t])))
        ma = np.minimum(br[:, BRANCH_ANGLE_HIGH] - dth, dth - br[:, BRANCH_ANGLE_LOW])
        if len(ma):
            i = int(np.argmin(ma))
            out["angle_deg"] = (float(ma[i]), f"branch {int(br[i, 0])}-{int(br[i, 1])} angle difference {dth[i]:.3f} deg")
        return out


def rounding_floor_pu(ybus) -> float:
    """Mismatch a converged power flow cannot go below: a few ulps of the largest |Y| row sum (|V| ≈ 1 pu)."""
    row_sum = np.asarray(abs(ybus).sum(axis=1)).max(initial=0.0)
    return float(100.0 * np.finfo(float).eps * row_sum)


def sample_points(lower: np.ndarray, upper: np.ndarray, samples: int, max_vertices: int = 10,
                  seed: int = 0) -> tuple[np.ndarray, int]:
    """All vertices (when ≤ ``max_vertices`` uncertain components) or random vertices, plus
    uniform random interior points; returns (points, number of vertices among them)."""
    rng = np.random.default_rng(seed)
    s = len(lower)
    if s == 0:
        return np.zeros((1, 0)), 1
    if s <= max_vertices:
        corners = np.array(list(itertools.product((0, 1), repeat=s)), dtype=float).reshape(-1, s)
    else:
        corners = rng.integers(0, 2, size=(samples, s)).astype(float)
    verts = lower + corners * (upper - lower)
    inner = lower + rng.random((samples, s)) * (upper - lower)
    return np.vstack([verts, inner]), len(verts)


def evaluate_points(net: Network, op: OperatingPoint, injections: Sequence[Injection], points: np.ndarray,
                    policy: str | dict = "slack", participation: np.ndarray | None = None, tol: float = 1e-9,
                    progress=None, client=None) -> list[dict[str, tuple[float, str]] | None]:
    """Power flow and limit margins at each point (rows: injection deviations, per unit).

    ``policy`` is a policy record (the box file's ``recourse``, see docs/file-format.md) or the name
    of a policy ("slack", "distributed" with ``participation``), whose record is then derived from
    the network.  Returns per point the worst margin per limit class, or None where the power flow
    did not converge.  With a Dask ``client`` the points are fanned out over its workers in chunks.
    """
    record = policy if isinstance(policy, dict) else recourse_record(net, recourse_roles(net, policy, participation), op)  # type: ignore[arg-type]
    if client is not None and len(points) > 1:
        chunks = np.array_split(np.atleast_2d(points), min(len(points), 4 * max(len(client.ncores()), 1)))
        futures = client.map(evaluate_points, [net] * len(chunks), [op] * len(chunks), [list(injections)] * len(chunks),
                             chunks, [record] * len(chunks), [None] * len(chunks), [tol] * len(chunks), pure=False)
        out = []
        for part in client.gather(futures):
            out.extend(part)
        return out
    rec = read_recourse(net, record)
    ybus = net.admittance()[0]
    tol = max(tol, rounding_floor_pu(ybus))
    index = net.bus_index
    gb = net.gen_bus_idx()
    sg0 = np.zeros(net.n_bus, dtype=complex)
    np.add.at(sg0, gb, op.pg_pu + 1j * op.qg_pu)
    sd0 = net.load_pu()
    bus_share = None
    if rec.distributed:
        bus_share = np.zeros(net.n_bus)
        np.add.at(bus_share, gb, rec.share)
    rows = np.array([index[i.bus] for i in injections], dtype=np.int64)
    is_q = np.array([i.quantity == "q" for i in injections], dtype=bool)
    limits = _Limits(net, rec.q_role, op.qg_pu)
    out: list[dict[str, tuple[float, str]] | None] = []
    for k, p in enumerate(np.atleast_2d(points)):
        delta = np.zeros(net.n_bus, dtype=complex)
        np.add.at(delta, rows, np.where(is_q, 1j * p, p))
        res = newton_power_flow(ybus, sg0 - sd0 + delta, op.voltage, rec.slack, rec.pv, rec.pq, bus_share, tol=tol)
        if progress is not None:
            progress(k + 1, len(points))
        if not res.converged:
            out.append(None)
            continue
        sg_bus = res.voltage * np.conj(ybus @ res.voltage) + sd0 - delta
        # the change of total generation: α, or what the slack bus produces beyond its scheduled P
        change = res.alpha_pu if rec.distributed else sg_bus.real[rec.slack] - sg0.real[rec.slack]
        out.append(limits.margins(res.voltage, sg_bus, op.pg_pu + rec.share * change))
    return out


VIOLATION_TOL = 1e-7  # numerical noise of a converged power flow (common practice, no source)


def validate_box(net: Network, op: OperatingPoint, injections: Sequence[Injection], lower_pu: np.ndarray,
                 upper_pu: np.ndarray, policy: str | dict = "slack", participation: np.ndarray | None = None,
                 samples: int = 300, max_vertices: int = 10, seed: int = 0, tol: float = 1e-9,
                 progress=None, client=None, extra_points: np.ndarray | None = None) -> ValidationReport:
    """Sample the box [lower_pu, upper_pu] of injection deviations and check every limit.

    All vertices when there are ≤ ``max_vertices`` uncertain injections (else
    ``samples`` random vertices), plus ``samples`` random interior points, plus
    any ``extra_points`` (counted as vertices; e.g. vertices chosen as worst
    for linearised limits).
    """
    points, n_vert = sample_points(np.asarray(lower_pu, float), np.asarray(upper_pu, float), samples, max_vertices, seed)
    if extra_points is not None and len(extra_points):
        points = np.vstack([np.asarray(extra_points, dtype=float), points])
        n_vert += len(extra_points)
    results = evaluate_points(net, op, injections, points, policy, participation, tol, progress, client)
    floor = rounding_floor_pu(net.admittance()[0])
    floor_note = (f" (tolerance raised to {floor:.2g} pu, the rounding floor of this network's admittances)"
                  if floor > tol else "")
    report = ValidationReport(len(points), n_vert, 0, 0)
    worst: dict[str, float] = {}
    for k, margins in enumerate(results):
        if margins is None:
            report.not_converged += 1
            if len(report.examples) < 10:
                report.examples.append(f"point {k}: power flow did not converge{floor_note}")
            continue
        bad = False
        for key, (m, where) in margins.items():
            worst[key] = min(worst.get(key, np.inf), m)
            if m < -VIOLATION_TOL:
                bad = True
                if len(report.examples) < 10:
                    report.examples.append(f"point {k}: {key} margin {m:.4g} at {where}")
        report.violations += int(bad)
    report.worst_margin = worst
    return report
