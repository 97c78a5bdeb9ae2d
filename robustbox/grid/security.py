"""N-1 security on a network: outages, post-outage networks and points, and a preventive SCOPF.

An *outage* takes one in-service branch or generator out.  The post-outage
network carries the emergency rating of every branch (rateB, else rateC where
that is nonzero, else rateA) in the rating column the rest of robustbox reads,
so the certificate, the OPF and the validator all see the post-outage limits.

The post-outage operating point is the power flow of the outaged network from
the pre-outage set-points (generator P, |V| at voltage-controlling buses) with
the recourse policy: the slack bus ("slack") or all generators in proportion
to their P range ("distributed") cover the change, including the output of a
lost generator.

The preventive security-constrained AC-OPF (:func:`solve_scopf`) is the
published formulation (one network copy per outage, shared pre-outage
set-points, recourse after the outage; e.g. F. Capitanescu et al.,
"State-of-the-art, challenges, and future trends in security constrained
optimal power flow", Electric Power Systems Research 81, 2011) with
contingency screening: solve with the outages found so far, check every
outage by power flow against its limits tightened by half the margin, add the violated ones
and solve again.
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Sequence

import numpy as np
import pyomo.environ as pyo
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from ..errors import CaseFileError, SolverError
from ..solve import solve_model
from .model import _tighten, build_opf, solve_opf
from .network import (BRANCH_ANGLE_HIGH, BRANCH_ANGLE_LOW, BRANCH_FROM, BRANCH_LIMIT_A, BRANCH_LIMIT_B, BRANCH_LIMIT_C,
                      BRANCH_ON, BRANCH_TO, BUS_KIND, BUS_NUMBER, BUS_V_HIGH, BUS_V_LOW, GEN_AT, GEN_ON, GEN_P_HIGH, GEN_P_LOW,
                      GEN_Q_HIGH, GEN_Q_LOW, KIND_SLACK, Network)
from .powerflow import newton_power_flow
from .system import OperatingPoint, Policy, recourse_roles, split_q


@dataclass(frozen=True)
class Outage:
    """One element out of service: ``kind`` "branch" or "gen", ``row`` its 0-based table row."""

    kind: Literal["branch", "gen"]
    row: int
    label: str


def _branch_label(net: Network, row: int) -> str:
    f, t = int(net.branch[row, BRANCH_FROM]), int(net.branch[row, BRANCH_TO])
    same = [r for r in range(len(net.branch)) if {int(net.branch[r, BRANCH_FROM]), int(net.branch[r, BRANCH_TO])} == {f, t}]
    circuit = f" circuit {same.index(row) + 1}" if len(same) > 1 else ""
    return f"branch {f}-{t}{circuit} (row {row + 1})"


def _gen_label(net: Network, row: int) -> str:
    return f"gen at bus {int(net.gen[row, GEN_AT])} (row {row + 1})"


def all_outages(net: Network) -> list[Outage]:
    """N-1: every in-service branch, then every in-service generator, in table order."""
    return ([Outage("branch", int(r), _branch_label(net, int(r))) for r in net.branch_on]
            + [Outage("gen", int(r), _gen_label(net, int(r))) for r in net.gen_on])


def read_contingencies(path: str | Path, net: Network) -> list[Outage]:
    """Read a contingency file (format in docs/file-format.md); errors name the file and line.

    One outage per line, ``#`` starts a comment:
    ``branch FROM TO [CIRCUIT]``, ``branch row R``, ``gen BUS [K]``, ``gen row R``
    (rows 1-based as in the case file's tables; CIRCUIT / K count the rows joining
    the two buses / at the bus in table order, default 1).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise CaseFileError(str(path), None, f"cannot read the contingency file ({exc})") from None
    out: list[Outage] = []
    seen: dict[tuple[str, int], int] = {}
    for number, raw in enumerate(text.splitlines(), start=1):
        words = raw.split("#", 1)[0].split()
        if not words:
            continue
        try:
            outage = _parse_outage(words, net)
        except ValueError as exc:
            raise CaseFileError(str(path), number, f"{exc} (line: '{raw.strip()}')") from None
        key = (outage.kind, outage.row)
        if key in seen:
            raise CaseFileError(str(path), number, f"{outage.label} is already listed on line {seen[key]}")
        seen[key] = number
        out.append(outage)
    if not out:
        raise CaseFileError(str(path), None, "the contingency file lists no outage")
    return out


def _ints(words: Sequence[str], what: str) -> list[int]:
    try:
        return [int(w) for w in words]
    except ValueError:
        raise ValueError(f"{what}: expected whole numbers, got {' '.join(words)}") from None


def _parse_outage(words: list[str], net: Network) -> Outage:
    kind = words[0].lower()
    if kind not in ("branch", "gen"):
        raise ValueError(f"an outage starts with 'branch' or 'gen', not '{words[0]}'")
    table = net.branch if kind == "branch" else net.gen
    on_col = BRANCH_ON if kind == "branch" else GEN_ON
    if len(words) == 3 and words[1].lower() == "row":
        (row,) = _ints(words[2:], f"{kind} row")
        if not 1 <= row <= len(table):
            raise ValueError(f"mpc.{kind} has rows 1..{len(table)}, not {row}")
        row -= 1
    elif kind == "branch" and len(words) in (3, 4):
        nums = _ints(words[1:], "branch FROM TO [CIRCUIT]")
        f, t, circuit = nums[0], nums[1], nums[2] if len(nums) == 3 else 1
        rows = [r for r in range(len(table)) if {int(table[r, BRANCH_FROM]), int(table[r, BRANCH_TO])} == {f, t}]
        if not rows:
            raise ValueError(f"no branch joins buses {f} and {t}")
        if not 1 <= circuit <= len(rows):
            raise ValueError(f"buses {f} and {t} are joined by {len(rows)} branch(es), so there is no circuit {circuit}")
        row = rows[circuit - 1]
    elif kind == "gen" and len(words) in (2, 3):
        nums = _ints(words[1:], "gen BUS [K]")
        rows = [r for r in range(len(table)) if int(table[r, GEN_AT]) == nums[0]]
        if not rows:
            raise ValueError(f"no generator at bus {nums[0]}")
        if len(nums) == 1 and len(rows) > 1:
            raise ValueError(f"bus {nums[0]} has {len(rows)} generators: say which, 'gen {nums[0]} K' or 'gen row R'")
        k = nums[1] if len(nums) == 2 else 1
        if not 1 <= k <= len(rows):
            raise ValueError(f"bus {nums[0]} has {len(rows)} generator(s), so there is no generator {k}")
        row = rows[k - 1]
    else:
        raise ValueError("expected 'branch FROM TO [CIRCUIT]', 'branch row R', 'gen BUS [K]' or 'gen row R'")
    label = _branch_label(net, row) if kind == "branch" else _gen_label(net, row)
    if table[row, on_col] <= 0:
        raise ValueError(f"{label} is already out of service in the case")
    return Outage(kind, row, label)  # type: ignore[arg-type]


def emergency_ratings(net: Network) -> np.ndarray:
    """Post-outage rating per branch row, MVA: rateB, else rateC where nonzero, else rateA."""
    b, c, a = (net.branch[:, col] for col in (BRANCH_LIMIT_B, BRANCH_LIMIT_C, BRANCH_LIMIT_A))
    return np.where(b > 0, b, np.where(c > 0, c, a))


def outage_network(net: Network, outage: Outage) -> Network:
    """Copy of ``net`` with the element out and emergency ratings in the rating column."""
    out = net.copy()
    out.branch[:, BRANCH_LIMIT_A] = emergency_ratings(net)
    if outage.kind == "branch":
        out.branch[outage.row, BRANCH_ON] = 0.0
    else:
        out.gen[outage.row, GEN_ON] = 0.0
    out.name = f"{net.name} without {outage.label}"
    return out


def islanded_buses(net: Network) -> list[int]:
    """Bus numbers outside the slack bus's connected part (empty: the network is connected)."""
    f, t = net.branch_ends()
    n = net.n_bus
    graph = sp.csr_matrix((np.ones(len(f)), (f, t)), shape=(n, n))
    _, label = connected_components(graph, directed=False)
    ref = int(np.flatnonzero(net.bus[:, BUS_KIND] == KIND_SLACK)[0])
    return [int(b) for b in net.bus[label != label[ref], BUS_NUMBER]]


def default_participation(net: Network) -> np.ndarray:
    """Participation of the in-service generators in the distributed policy (their P range, summing to 1;
    fixed-P units take none): the shares of :func:`~robustbox.grid.system.recourse_roles`."""
    return recourse_roles(net, "distributed").share


def carried_point(net: Network, op: OperatingPoint, out: Network) -> OperatingPoint:
    """The pre-outage point with the outputs of the generators still in service in ``out``."""
    keep = np.isin(net.gen_on, out.gen_on)
    return OperatingPoint(op.v_mag_pu, op.v_ang_rad, op.pg_pu[keep], op.qg_pu[keep], op.objective_per_h)


@dataclass(frozen=True)
class PostOutagePoint:
    """The post-outage power flow: the point (None if it did not converge) and its mismatch, pu."""

    point: OperatingPoint | None
    mismatch_pu: float
    alpha_pu: float


def post_outage_point(net: Network, op: OperatingPoint, out: Network, policy: Policy) -> PostOutagePoint:
    """Power flow of ``out`` from the pre-outage set-points of ``op`` (on ``net``) with the recourse policy.

    Held: P of every generator (except the slack bus under "slack"; plus α × participation
    under "distributed"), |V| at voltage-controlling buses, Q of fixed-Q generators.
    """
    pre = carried_point(net, op, out)
    roles = recourse_roles(out, policy)
    gb = out.gen_bus_idx()
    sched = np.zeros(out.n_bus, dtype=complex)
    np.add.at(sched, gb, pre.pg_pu + 1j * pre.qg_pu)
    bus_part = None
    if policy == "distributed":
        bus_part = np.zeros(out.n_bus)
        np.add.at(bus_part, gb, roles.share)
    ybus = out.admittance()[0]
    res = newton_power_flow(ybus, sched - out.load_pu(), pre.voltage, roles.slack, roles.pv, roles.pq, bus_part)
    if not res.converged:
        return PostOutagePoint(None, res.mismatch_pu, res.alpha_pu)
    v = res.voltage
    s_bus = v * np.conj(ybus @ v) + out.load_pu()
    change = res.alpha_pu if bus_part is not None else s_bus[roles.slack].real - sched[roles.slack].real
    pg = pre.pg_pu + roles.share * change
    return PostOutagePoint(OperatingPoint(np.abs(v), np.angle(v), pg, split_q(out, roles, s_bus.imag, pre.qg_pu),
                                          op.objective_per_h), res.mismatch_pu, res.alpha_pu)


def tightened_network(net: Network, margin: float, margin_gen: float | None = None) -> Network:
    """Copy of ``net`` with its limits tightened as the margin OPF tightens them (``build_opf``)."""
    margin_gen = margin if margin_gen is None else margin_gen
    out = net.copy()
    out.bus[:, BUS_V_LOW], out.bus[:, BUS_V_HIGH] = _tighten(net.bus[:, BUS_V_LOW], net.bus[:, BUS_V_HIGH], margin)
    for lo, hi in ((GEN_P_LOW, GEN_P_HIGH), (GEN_Q_LOW, GEN_Q_HIGH)):
        out.gen[:, lo], out.gen[:, hi] = _tighten(net.gen[:, lo], net.gen[:, hi], margin_gen)
    out.branch[:, BRANCH_LIMIT_A] = net.branch[:, BRANCH_LIMIT_A] * (1.0 - margin)
    lo_a, hi_a = net.branch[:, BRANCH_ANGLE_LOW], net.branch[:, BRANCH_ANGLE_HIGH]
    inside = (lo_a > -90) & (hi_a < 90)
    lo_t, hi_t = _tighten(lo_a, hi_a, margin)
    out.branch[:, BRANCH_ANGLE_LOW] = np.where(inside, lo_t, lo_a)
    out.branch[:, BRANCH_ANGLE_HIGH] = np.where(inside, hi_t, hi_a)
    return out


def outage_violation(net: Network, op: OperatingPoint, outage: Outage, policy: Policy, margin: float = 0.0,
                     margin_gen: float | None = None) -> tuple[float, str]:
    """Worst limit margin of the post-outage power flow against the (tightened) emergency limits.

    Returns (margin, where): negative means violated, in the limit's engineering unit
    (pu, MW/Mvar/MVA, degrees); −inf when the power flow does not converge.
    """
    from ..validate import evaluate_points  # the validator's limit checks, on one point

    out = outage_network(net, outage)
    post = post_outage_point(net, op, out, policy)
    if post.point is None:
        return -np.inf, f"post-outage power flow does not converge (mismatch {post.mismatch_pu:.3g} pu)"
    checked = tightened_network(out, margin, margin_gen)
    part = default_participation(out) if policy == "distributed" else None
    margins = evaluate_points(checked, post.point, [], np.zeros((1, 0)), policy, part)[0]
    if margins is None:
        return -np.inf, "post-outage power flow does not converge"
    key = min(margins, key=lambda k: margins[k][0])
    return margins[key][0], f"{key}: {margins[key][1]}"


# ------------------------------------------------------------------ SCOPF
@dataclass(frozen=True)
class SCOPFResult:
    """A preventive SCOPF solution: pre-outage point, costs in $/h, screening rounds, wall time in s.

    ``included``: the outages with a network copy; ``excluded``: (outage, reason) left out
    because no operating point exists after them (only with ``skip_insecure``).
    """

    point: OperatingPoint
    objective_per_h: float
    margin: float
    plain_objective_per_h: float
    margin_objective_per_h: float
    included: tuple[str, ...]
    excluded: tuple[tuple[str, str], ...]
    rounds: int
    time_s: float

    @property
    def cost_increase_per_h(self) -> float:
        """Cost of security and margin over the plain (untightened, intact) OPF, $/h."""
        return self.objective_per_h - self.plain_objective_per_h


def _gen_position(net: Network) -> dict[int, int]:
    return {int(r): k for k, r in enumerate(net.gen_on)}


def _scopf_model(net: Network, outages: Sequence[Outage], policy: Policy, margin: float,
                 margin_gen: float | None, start: OperatingPoint | None) -> pyo.ConcreteModel:
    """The base OPF plus one linked copy per outage (block ``outage_k``)."""
    m = build_opf(net, margin, margin_gen)
    n = net.n_bus
    base_pos = _gen_position(net)
    for k, outage in enumerate(outages):
        out = outage_network(net, outage)
        sub = build_opf(out, margin, margin_gen)
        sub.cost.deactivate()
        m.add_component(f"outage_{k}", sub)
        s, pv, _ = out.bus_kinds()
        gb = out.gen_bus_idx()
        pairs = [(kc, base_pos[int(r)]) for kc, r in enumerate(out.gen_on)]
        if policy == "distributed":
            part = default_participation(out)
            sub.alpha = pyo.Var(initialize=0.0)
            sub.p_link = pyo.Constraint(range(len(pairs)), rule=lambda b, j: b.pg[pairs[j][0]] == m.pg[pairs[j][1]]
                                        + float(part[pairs[j][0]]) * b.alpha)
        else:
            held = [p for p in pairs if gb[p[0]] != s]
            sub.p_link = pyo.Constraint(range(len(held)), rule=lambda b, j: b.pg[held[j][0]] == m.pg[held[j][1]])
        buses = np.union1d(pv, [s]).astype(int)
        sub.v_link = pyo.Constraint(list(buses), rule=lambda b, i: b.x[i] ** 2 + b.x[n + i] ** 2
                                    == m.x[i] ** 2 + m.x[n + i] ** 2)
    if start is not None:
        _warm(m, net, start)
        for k, outage in enumerate(outages):
            out = outage_network(net, outage)
            _warm(getattr(m, f"outage_{k}"), out, carried_point(net, start, out))
    return m


def _warm(model: pyo.Block, net: Network, op: OperatingPoint) -> None:
    v = op.voltage * np.exp(-1j * op.v_ang_rad[net.slack])
    n = net.n_bus
    for i in range(2 * n):
        var = model.x[i]
        if not var.fixed:
            val = v[i].real if i < n else v[i - n].imag
            var.set_value(float(np.clip(val, var.lb, var.ub)))
    for g in model.G:
        for var, val in ((model.pg[g], op.pg_pu[g]), (model.qg[g], op.qg_pu[g])):
            var.set_value(float(np.clip(val, var.lb, var.ub)))


def _solve_point(net: Network, model: pyo.ConcreteModel) -> tuple[OperatingPoint, float]:
    solve_model(model)
    n = net.n_bus
    x = np.array([pyo.value(model.x[i]) for i in range(2 * n)])
    v = x[:n] + 1j * x[n:]
    obj = float(pyo.value(model.cost))
    return OperatingPoint(np.abs(v), np.angle(v), np.array([pyo.value(model.pg[g]) for g in model.G]),
                          np.array([pyo.value(model.qg[g]) for g in model.G]), obj), obj


def no_point_after(net: Network, outage: Outage) -> bool:
    """True when the post-outage network's own AC-OPF (free re-dispatch, no margin) finds no feasible point.

    Then no pre-outage set-points can make the outage secure (as far as Ipopt, a local
    solver, can tell: it reports local infeasibility).
    """
    try:
        solve_opf(outage_network(net, outage), 0.0, compare_base=False)
    except SolverError:
        return True
    return False


def solve_scopf(net: Network, outages: Sequence[Outage], policy: Policy = "slack", margin: float = 0.1,
                margin_gen: float | None = None, per_round: int = 10, max_rounds: int = 12,
                progress=None, name_culprits: bool = True, skip_insecure: bool = False) -> SCOPFResult:
    """Preventive SCOPF with contingency screening (see module doc); ``outages`` must not island.

    Each round adds up to ``per_round`` of the most violated outages; an outage counts
    as violated when its post-outage power flow breaks a limit tightened by half the
    margin (the copies use the whole margin, so every outage keeps some room).  When a
    round is infeasible: with ``skip_insecure`` the round's outages are added one at a
    time and those that make it infeasible are left out, each listed in ``excluded``
    with the reason (no point at all after it, :func:`no_point_after`; no preventive
    point alone; or none together with those kept); otherwise SolverError names the
    outages to blame (``name_culprits`` False skips that search: one solve per outage).
    Also raises when outages are still violated after ``max_rounds`` rounds.
    """
    t0 = time.perf_counter()
    plain = solve_opf(net, 0.0, compare_base=False)
    point = plain.point
    included: list[Outage] = []
    batch: list[Outage] = []  # the outages added in the last round
    good = (point, plain.objective_per_h)  # the last solved round's point and cost
    excluded: list[tuple[str, str]] = []
    margin_obj = None
    rounds = 0
    while rounds < max_rounds:
        try:
            point, obj = _solve_point(net, _scopf_model(net, included, policy, margin, margin_gen, point))
        except SolverError as exc:
            if not included:
                raise SolverError(f"{net.source}: no operating point with margin {margin:g} even before "
                                  f"any outage: {exc}") from None
            if not skip_insecure:
                hopeless = [o for o in included if no_point_after(net, o)]
                raise SolverError(_infeasible_message(net, included, hopeless, policy, margin, margin_gen, point, exc,
                                                      name_culprits)) from None
            # add the last batch one outage at a time; leave out (and list) those that do not fit
            included = [o for o in included if o not in batch]
            point, obj = good
            for o in batch:
                try:
                    point, obj = _solve_point(net, _scopf_model(net, [*included, o], policy, margin, margin_gen, point))
                    included.append(o)
                except SolverError:
                    why = NO_POINT if no_point_after(net, o) else (NO_JOINT if included else NO_PREVENTIVE)
                    excluded.append((o.label, why.format(margin=margin)))
        good = (point, obj)
        rounds += 1
        if margin_obj is None:
            margin_obj = obj
        if progress:
            progress(f"SCOPF round {rounds}: {len(included)} outage(s) included, cost {obj:.2f} $/h")
        done = {o.label for o in included} | {label for label, _ in excluded}
        worst = sorted((outage_violation(net, point, o, policy, margin / 2, margin_gen) + (o,) for o in outages
                        if o.label not in done), key=lambda item: item[0])
        violated = [(m_, where, o) for m_, where, o in worst if m_ < 0]
        if not violated:
            return SCOPFResult(point, obj, margin, plain.objective_per_h, margin_obj,
                               tuple(o.label for o in included), tuple(excluded), rounds, time.perf_counter() - t0)
        batch = [o for _, _, o in violated[:per_round]]
        included += batch
    names = ", ".join(f"{o.label} ({where})" for _, where, o in violated[:5])
    raise SolverError(f"{net.source}: after {max_rounds} SCOPF rounds these outages still violate their limits "
                      f"with margin {margin:g}: {names}; try a smaller --margin")


NO_POINT = "no feasible operating point after this outage (its own AC-OPF, free re-dispatch, is infeasible)"
NO_PREVENTIVE = ("no preventive secure point with margin {margin:g}: the SCOPF with this outage alone is infeasible "
                 "(a point exists after it, but not from shared pre-outage set-points)")


NO_JOINT = ("no preventive secure point with margin {margin:g} together with the outages already included "
            "(feasible alone; outages are added in order of their violation)")


def _feasible_alone(net: Network, outage: Outage, policy: Policy, margin: float, margin_gen: float | None,
                    start: OperatingPoint, others: Sequence[Outage] = ()) -> bool:
    """Whether the SCOPF with this outage (and ``others``) solves."""
    try:
        _solve_point(net, _scopf_model(net, [*others, outage], policy, margin, margin_gen, start))
    except SolverError:
        return False
    return True


def _infeasible_message(net: Network, included: list[Outage], hopeless: list[Outage], policy: Policy, margin: float,
                        margin_gen: float | None, start: OperatingPoint, exc: Exception, name_culprits: bool) -> str:
    """Name the outages to blame: those with no point at all after them, else those infeasible alone with the base."""
    culprits = [f"{o.label} ({NO_POINT})" for o in hopeless]
    culprits += [o.label for o in (included if name_culprits and not hopeless else [])
                 if not _feasible_alone(net, o, policy, margin, margin_gen, start)]
    if culprits:
        which = "these outages, each on its own: " + "; ".join(culprits)
    else:
        which = "the outages " + ", ".join(o.label for o in included) + (" together" if name_culprits else "")
    return (f"{net.source}: no secure operating point found with margin {margin:g} under the '{policy}' policy: "
            f"Ipopt finds the SCOPF locally infeasible with {which} ({exc})"
            + "; --skip-insecure leaves such outages out (and lists them)")
