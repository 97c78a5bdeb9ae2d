"""Network data: the MATPOWER tables, checked, with per-unit views.

The tables keep the MATPOWER column layout (so a written case file is an
exact copy); properties give per-unit arrays for the in-service elements.
Engineering units (MW, Mvar, kV, degrees) live only in the tables.
"""
from __future__ import annotations

import hashlib

import os
import sys
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from ..errors import NetworkError, RobustboxNote

# MATPOWER column indices (0-based), "MATPOWER User's Manual", Appendix B.
FIXED_RANGE_MW = 1e-6  # a unit whose P (Q) range in MW (Mvar) is at most this has a fixed P (Q): converters write ±1e-10
BUS_NUMBER, BUS_KIND, BUS_P_LOAD, BUS_Q_LOAD, BUS_G_SHUNT, BUS_B_SHUNT, BUS_REGION, BUS_V_MAG, BUS_V_ANG, BUS_KV, BUS_LOSS_ZONE, BUS_V_HIGH, BUS_V_LOW = range(13)
GEN_AT, GEN_P, GEN_Q, GEN_Q_HIGH, GEN_Q_LOW, GEN_V_SET, GEN_MVA, GEN_ON, GEN_P_HIGH, GEN_P_LOW = range(10)
BRANCH_FROM, BRANCH_TO, BRANCH_R, BRANCH_X, BRANCH_CHARGING, BRANCH_LIMIT_A, BRANCH_LIMIT_B, BRANCH_LIMIT_C, BRANCH_RATIO, BRANCH_SHIFT, BRANCH_ON, BRANCH_ANGLE_LOW, BRANCH_ANGLE_HIGH = range(13)
BUS_COLS, GEN_COLS, BRANCH_COLS = 13, 10, 11
KIND_PQ, KIND_PV, KIND_SLACK, KIND_ISOLATED = 1, 2, 3, 4
_CHECKED_COLS = {"bus": 13, "gen": 10, "branch": 13}  # every column of the format up to the angle limits

# What each column holds (for messages), MATPOWER User's Manual, Appendix B, Tables B-1 to B-3.
COLUMN_MEANING = {
    "bus": ("bus number", "bus type", "active load, MW", "reactive load, Mvar", "shunt conductance, MW",
            "shunt susceptance, Mvar", "area number", "voltage magnitude, pu", "voltage angle, degrees",
            "base voltage, kV", "loss zone", "maximum voltage, pu", "minimum voltage, pu"),
    "gen": ("bus number", "active output, MW", "reactive output, Mvar", "maximum reactive output, Mvar",
            "minimum reactive output, Mvar", "voltage set point, pu", "machine base, MVA", "status",
            "maximum active output, MW", "minimum active output, MW"),
    "branch": ("from bus", "to bus", "resistance, pu", "reactance, pu", "charging susceptance, pu",
               "long-term rating, MVA", "short-term rating, MVA", "emergency rating, MVA", "tap ratio",
               "phase shift, degrees", "status", "minimum angle difference, degrees",
               "maximum angle difference, degrees"),
}
# Columns that neither the power flow, the OPF, the certificate nor the validation reads: a NaN
# there is reported once per table and column and otherwise left alone (0-based indices).
UNUSED_COLS = {"bus": (BUS_REGION, BUS_KV, BUS_LOSS_ZONE), "gen": (GEN_MVA,), "branch": ()}


def _emit_notes(notes: list[str]) -> None:
    """Issue each note as a :class:`RobustboxNote`, attributed to the first caller outside this package
    directory (so Python's default filter shows each distinct note once)."""
    here, level, frame = os.path.dirname(os.path.abspath(__file__)), 1, sys._getframe(0)
    while frame is not None and os.path.dirname(os.path.abspath(frame.f_code.co_filename)) == here:
        frame, level = frame.f_back, level + 1
    for note in notes:
        warnings.warn(note, RobustboxNote, stacklevel=level)


def _column(mat: np.ndarray, col: int) -> np.ndarray:
    """Column ``col`` of a table, or NaN where the table is too narrow (the check reports that later)."""
    if mat.ndim == 2 and mat.shape[1] > col:
        return mat[:, col]
    return np.full(len(mat) if mat.ndim == 2 else 0, np.nan)


def _listing(items: list[str], limit: int = 6) -> str:
    if len(items) > limit:
        items = items[:limit] + [f"{len(items) - limit} more"]
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " and " + items[-1]


def _normalise_angle_limits(branch: np.ndarray) -> None:
    """In place: angmin = angmax = 0 means "no limit", as do angmin ≤ −360 and angmax ≥ 360
    (MATPOWER User's Manual, Table B-3 notes); all of these become −360 / 360, which every
    consumer (forms.angle_forms, model.build_opf, validate) treats as no limit."""
    if branch.ndim != 2 or branch.shape[1] <= BRANCH_ANGLE_HIGH or not len(branch):
        return
    lo, hi = branch[:, BRANCH_ANGLE_LOW].copy(), branch[:, BRANCH_ANGLE_HIGH].copy()
    free = (lo == 0) & (hi == 0)
    branch[free | (lo <= -360), BRANCH_ANGLE_LOW] = -360.0
    branch[free | (hi >= 360), BRANCH_ANGLE_HIGH] = 360.0


@dataclass
class _Reduced:
    """Tables with the isolated buses and everything at them removed."""

    bus: np.ndarray
    gen: np.ndarray
    branch: np.ndarray
    gencost: np.ndarray | None
    sites: np.ndarray | None
    row_lines: dict[str, list[int]]
    file_rows: dict[str, list[int]]
    notes: list[str]
    dropped: list[float]  # bus numbers


def _drop_isolated(source: str, bus: np.ndarray, gen: np.ndarray, branch: np.ndarray, gencost: np.ndarray | None,
                   sites: np.ndarray | None, row_lines: dict[str, list[int]]) -> _Reduced:
    """Remove isolated buses (type 4), every branch touching one and every generator (and its cost
    rows) and injection site at one; one note per group of isolated buses joined by branches.
    ``row_lines`` and the 1-based file row numbers follow the kept rows."""
    kinds = _column(bus, BUS_KIND)
    iso_rows = np.flatnonzero(kinds == KIND_ISOLATED)
    if not len(iso_rows):
        return _Reduced(bus, gen, branch, gencost, sites, row_lines, {}, [], [])
    nums = _column(bus, BUS_NUMBER)
    iso = {float(b): r for r, b in zip(iso_rows, nums[iso_rows])}

    def at(table: str, row: int) -> str:
        lines = row_lines.get(table, [])
        return f"{source}:{lines[row]}" if row < len(lines) else f"{source} (mpc.{table} row {row + 1})"

    def line_of(table: str, row: int) -> str:
        lines = row_lines.get(table, [])
        return f"line {lines[row]}" if row < len(lines) else f"row {row + 1}"

    # groups: isolated buses joined by branches between them (union-find on bus numbers)
    parent = {b: b for b in iso}

    def root(b: float) -> float:
        while parent[b] != b:
            parent[b] = parent[parent[b]]
            b = parent[b]
        return b
    fb, tb, br_on = _column(branch, BRANCH_FROM), _column(branch, BRANCH_TO), _column(branch, BRANCH_ON)
    for f, t in zip(fb, tb):
        if f in iso and t in iso:
            parent[root(float(f))] = root(float(t))
    groups: dict[float, list[float]] = {}
    for b in sorted(iso, key=lambda b: iso[b]):
        groups.setdefault(root(b), []).append(b)

    keep_bus = kinds != KIND_ISOLATED
    keep_branch = np.array([not (f in iso or t in iso) for f, t in zip(fb, tb)], dtype=bool)
    gat, gon = _column(gen, GEN_AT), _column(gen, GEN_ON)
    keep_gen = np.array([b not in iso for b in gat], dtype=bool)
    sat = _column(sites, 0) if sites is not None else np.zeros(0)
    keep_site = np.array([b not in iso for b in sat], dtype=bool)

    notes = []
    for members in groups.values():
        rows = [iso[b] for b in members]
        names = ", ".join(f"{b:g}" for b in members)
        head = (f"{at('bus', rows[0])}: isolated bus {names} (type 4) dropped" if len(rows) == 1 else
                f"{at('bus', rows[0])}: isolated buses {names} (type 4; {', '.join(line_of('bus', r) for r in rows)}) dropped")
        mine = set(members)
        listed, off = [], {"branch": 0, "generator": 0}
        dropped = [("branch", "branch", r, fb[r] in mine or tb[r] in mine, br_on[r] > 0,
                    f"branch {fb[r]:g}-{tb[r]:g}") for r in np.flatnonzero(~keep_branch)]
        dropped += [("generator", "gen", r, gat[r] in mine, gon[r] > 0, f"generator at bus {gat[r]:g}")
                    for r in np.flatnonzero(~keep_gen)]
        for what, table, r, touches, on, label in dropped:
            if touches and on:
                listed.append(f"in-service {label} ({line_of(table, int(r))})")
            elif touches:
                off[what] += 1
        for r in np.flatnonzero(~keep_site):
            if sat[r] in mine:
                listed.append(f"injection site at bus {sat[r]:g} ({line_of('injection_site', int(r))})")
        listed += [f"{k} out-of-service {what if k == 1 else what + ('es' if what == 'branch' else 's')}"
                   for what, k in off.items() if k]
        notes.append(head + (f" with {_listing(listed)}" if listed else ""))

    keep = {"bus": keep_bus, "branch": keep_branch, "gen": keep_gen, "injection_site": keep_site}
    if gencost is not None and not keep_gen.all():
        ng = len(gen)
        if len(gencost) < ng:
            raise NetworkError(f"{source}: mpc.gencost has {len(gencost)} rows for {ng} generators")
        keep_cost = np.ones(len(gencost), dtype=bool)
        keep_cost[:ng] = keep_gen
        if len(gencost) >= 2 * ng:  # reactive-power cost rows follow the active ones
            keep_cost[ng:2 * ng] = keep_gen
        keep["gencost"] = keep_cost
        gencost = gencost[keep_cost]
    new_lines, file_rows = dict(row_lines), {}
    for table, mask in keep.items():
        if mask.all():
            continue
        kept = np.flatnonzero(mask).tolist()
        lines = row_lines.get(table)
        if lines is not None:
            new_lines[table] = [lines[i] for i in kept if i < len(lines)]
        file_rows[table] = [i + 1 for i in kept]
    return _Reduced(bus[keep_bus], gen[keep_gen], branch[keep_branch],
                    gencost, None if sites is None else sites[keep_site], new_lines, file_rows, notes,
                    list(iso))


@dataclass(eq=False)
class Network:
    """A power network in MATPOWER table layout (see module doc)."""

    name: str
    base_mva: float
    bus: np.ndarray
    gen: np.ndarray
    branch: np.ndarray
    gencost: np.ndarray | None
    source: str = "<memory>"
    row_lines: dict[str, list[int]] = field(default_factory=dict)
    sites: np.ndarray | None = None  # optional [bus, kind (1 wind, 2 solar), capacity MW] rows
    # 1-based row numbers in the source of each kept row, for the tables that lost rows when
    # isolated buses were dropped (absent table: row k is the source's row k)
    file_rows: dict[str, list[int]] = field(default_factory=dict)

    # ------------------------------------------------------------ checking
    @classmethod
    def from_tables(cls, name: str, base_mva: float, bus: np.ndarray, gen: np.ndarray, branch: np.ndarray,
                    gencost: np.ndarray | None = None, source: str = "<memory>",
                    row_lines: dict[str, list[int]] | None = None, sites: np.ndarray | None = None) -> "Network":
        """Build and check a network; errors name the file line of the bad row.

        As the case format defines them: isolated buses (type 4) are dropped with every branch
        touching them and every generator (with its cost rows) and injection site at them, one
        :class:`RobustboxNote` per group of isolated buses; angle-difference limits
        angmin = angmax = 0, angmin ≤ −360 and angmax ≥ 360 become −360 / 360 (no limit); a NaN in
        a column robustbox never reads (:data:`UNUSED_COLS`) is noted once per table and column.
        The input arrays are not modified.
        """
        bus = np.array(bus, dtype=float, ndmin=2)
        gen = np.array(gen, dtype=float, ndmin=2)
        branch = np.array(branch, dtype=float, ndmin=2)
        if branch.shape[0] and BRANCH_COLS <= branch.shape[1] < 13:
            # angle-difference columns are optional in the format; missing means unlimited
            pad = np.tile([-360.0, 360.0], (branch.shape[0], 1))[:, branch.shape[1] - BRANCH_ANGLE_LOW:]
            branch = np.hstack([branch, pad])
        _normalise_angle_limits(branch)
        red = _drop_isolated(source, bus, gen, branch, None if gencost is None else np.array(gencost, dtype=float, ndmin=2),
                             None if sites is None else np.array(sites, dtype=float, ndmin=2), dict(row_lines or {}))
        net = cls(name, float(base_mva), red.bus, red.gen, red.branch, red.gencost, source, red.row_lines, red.sites,
                  red.file_rows)
        notes = net._check()
        if red.dropped:
            net._check_slack_connected(red.dropped)
        _emit_notes(red.notes + notes)
        return net

    def where(self, table: str, row: int) -> str:
        """'file:line (mpc.table row k)' for messages; k is the row in the source even after
        isolated buses and their branches and generators were dropped."""
        lines = self.row_lines.get(table, [])
        line = f":{lines[row]}" if row < len(lines) else ""
        return f"{self.source}{line} (mpc.{table} row {self.file_row(table, row)})"

    def file_row(self, table: str, row: int) -> int:
        """1-based row number in the source of row ``row`` (0-based) of ``table`` here; differs from
        ``row + 1`` after rows at isolated buses were dropped."""
        ids = self.file_rows.get(table)
        return ids[row] if ids is not None and row < len(ids) else row + 1

    def _check(self) -> list[str]:
        """Raise NetworkError at the first bad datum; return the notes (NaN in unused columns)."""
        bus, gen, br = self.bus, self.gen, self.branch
        notes: list[str] = []
        for table, mat, cols in (("bus", bus, BUS_COLS), ("gen", gen, GEN_COLS), ("branch", br, BRANCH_COLS)):
            if mat.size and mat.shape[1] < cols:
                raise NetworkError(f"{self.source}: mpc.{table} has {mat.shape[1]} columns, needs {cols}")
            nan = np.isnan(mat[:, :_CHECKED_COLS[table]])
            if not nan.any():
                continue
            unused = np.zeros(nan.shape[1], dtype=bool)
            unused[[c for c in UNUSED_COLS[table] if c < nan.shape[1]]] = True
            bad = np.argwhere(nan & ~unused)
            if bad.size:
                r, c = int(bad[0, 0]), int(bad[0, 1])
                raise NetworkError(f"{self.where(table, r)}: column {c + 1} is not a number "
                                   f"({COLUMN_MEANING[table][c]}; robustbox needs it)")
            for c in np.flatnonzero(nan.any(axis=0)):
                rows = np.flatnonzero(nan[:, c])
                more = f" and {len(rows) - 1} more row{'s' if len(rows) > 2 else ''}" if len(rows) > 1 else ""
                notes.append(f"{self.where(table, int(rows[0]))}{more}: column {c + 1} is not a number "
                             f"({COLUMN_MEANING[table][c]}); robustbox does not use this column, so it is ignored")
        if not len(bus):
            raise NetworkError(f"{self.source}: the network has no buses")
        nums = bus[:, BUS_NUMBER]
        if np.any(nums != np.round(nums)) or np.any(nums <= 0):
            r = int(np.flatnonzero((nums != np.round(nums)) | (nums <= 0))[0])
            raise NetworkError(f"{self.where('bus', r)}: bus number {nums[r]} must be a positive integer")
        uniq, counts = np.unique(nums, return_counts=True)
        if np.any(counts > 1):
            dup = uniq[counts > 1][0]
            raise NetworkError(f"{self.where('bus', int(np.flatnonzero(nums == dup)[1]))}: bus number {int(dup)} appears twice")
        for r, t in enumerate(bus[:, BUS_KIND]):
            if t not in (KIND_PQ, KIND_PV, KIND_SLACK, KIND_ISOLATED):
                raise NetworkError(f"{self.where('bus', r)}: bus type {t} is not 1 (PQ), 2 (PV), 3 (slack) or 4 (isolated)")
            if t == KIND_ISOLATED:  # from_tables drops these; a Network built field by field may not have
                raise NetworkError(f"{self.where('bus', r)}: bus {int(nums[r])} is isolated (type 4); "
                                   "build the network with Network.from_tables, which drops isolated buses")
            if bus[r, BUS_V_LOW] > bus[r, BUS_V_HIGH] or bus[r, BUS_V_HIGH] <= 0:
                raise NetworkError(f"{self.where('bus', r)}: voltage limits Vmin={bus[r, BUS_V_LOW]} > Vmax={bus[r, BUS_V_HIGH]} "
                                   f"at bus {int(nums[r])}")
        index = self.bus_index
        for r, b in enumerate(gen[:, GEN_AT]):
            if b not in index:
                raise NetworkError(f"{self.where('gen', r)}: generator at bus {b:g}, no such bus")
            if gen[r, GEN_ON] > 0 and (gen[r, GEN_P_LOW] > gen[r, GEN_P_HIGH] or gen[r, GEN_Q_LOW] > gen[r, GEN_Q_HIGH]):
                raise NetworkError(f"{self.where('gen', r)}: generator at bus {int(b)} has min above max "
                                   f"(P {gen[r, GEN_P_LOW]}..{gen[r, GEN_P_HIGH]} MW, Q {gen[r, GEN_Q_LOW]}..{gen[r, GEN_Q_HIGH]} Mvar)")
        for r in range(len(br)):
            for col in (BRANCH_FROM, BRANCH_TO):
                if br[r, col] not in index:
                    raise NetworkError(f"{self.where('branch', r)}: branch end at bus {br[r, col]:g}, no such bus")
            if br[r, BRANCH_ON] > 0 and br[r, BRANCH_R] == 0 and br[r, BRANCH_X] == 0:
                raise NetworkError(f"{self.where('branch', r)}: branch {int(br[r, BRANCH_FROM])}-{int(br[r, BRANCH_TO])} "
                                   "has zero impedance (r = x = 0)")
        refs = np.flatnonzero(bus[:, BUS_KIND] == KIND_SLACK)
        if len(refs) != 1:
            raise NetworkError(f"{self.source}: the network needs exactly one slack bus (type 3), found {len(refs)}")
        if not len(self.gen_on):
            raise NetworkError(f"{self.source}: no generator is in service")
        if self.sites is not None:
            for r, (b, kind, cap) in enumerate(self.sites[:, :3]):
                if b not in index or kind not in (1, 2) or not cap > 0:
                    raise NetworkError(f"{self.where('injection_site', r)}: site needs an existing bus, kind 1 "
                                       f"(wind) or 2 (solar) and a positive capacity; got {b:g}, {kind:g}, {cap:g}")
        if self.gencost is not None and len(self.gencost) < len(gen):
            raise NetworkError(f"{self.source}: mpc.gencost has {len(self.gencost)} rows for {len(gen)} generators")
        if self.gencost is not None:
            for r in range(len(gen)):
                model, ncost = self.gencost[r, 0], self.gencost[r, 3] if self.gencost.shape[1] > 3 else np.nan
                ok = model in (1, 2) and np.isfinite(ncost) and ncost >= 1 and ncost == int(ncost)
                need = 4 + int(ncost) * (2 if model == 1 else 1) if ok else 0
                if not ok or need > self.gencost.shape[1] or np.any(np.isnan(self.gencost[r, :need])):
                    raise NetworkError(f"{self.where('gencost', r)}: cost model {model:g} with {ncost:g} "
                                       f"coefficients does not fit the row")
        return notes

    def _check_slack_connected(self, dropped: list[float]) -> None:
        """After dropping isolated buses the slack bus must still reach the network."""
        if self.n_bus < 2:
            return
        ref = int(np.flatnonzero(self.bus[:, BUS_KIND] == KIND_SLACK)[0])
        f, t = self.branch_ends()
        if ref not in set(f.tolist()) | set(t.tolist()):
            names = ", ".join(f"{b:g}" for b in dropped[:6]) + (" ..." if len(dropped) > 6 else "")
            raise NetworkError(f"{self.where('bus', ref)}: the slack bus {int(self.bus[ref, BUS_NUMBER])} is isolated: "
                               f"it has no in-service branch once the isolated buses (type 4: {names}) and their "
                               "branches are dropped")

    # ----------------------------------------------------------- indexing
    @property
    def bus_index(self) -> dict[float, int]:
        """Bus number → row index in the bus table."""
        return {b: i for i, b in enumerate(self.bus[:, BUS_NUMBER])}

    @property
    def n_bus(self) -> int:
        return len(self.bus)

    @property
    def gen_on(self) -> np.ndarray:
        """Indices of in-service generators."""
        return np.flatnonzero(self.gen[:, GEN_ON] > 0)

    @property
    def branch_on(self) -> np.ndarray:
        """Indices of in-service branches."""
        return np.flatnonzero(self.branch[:, BRANCH_ON] > 0)

    def gen_bus_idx(self, rows: np.ndarray | None = None) -> np.ndarray:
        rows = self.gen_on if rows is None else rows
        idx = self.bus_index
        return np.array([idx[b] for b in self.gen[rows, GEN_AT]], dtype=np.int64)

    def branch_ends(self, rows: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        rows = self.branch_on if rows is None else rows
        idx = self.bus_index
        return (np.array([idx[b] for b in self.branch[rows, BRANCH_FROM]], dtype=np.int64),
                np.array([idx[b] for b in self.branch[rows, BRANCH_TO]], dtype=np.int64))

    @property
    def slack(self) -> int:
        """Index of the slack bus: the type-3 bus if one of its in-service units has a reactive range
        (it must hold the voltage and take up Q); else the first bus with such a unit; else the type-3
        bus if it has any unit in service, else the first bus with one (the usual reading of the case
        format for a type-3 bus without a generator, from memory)."""
        ref = int(np.flatnonzero(self.bus[:, BUS_KIND] == KIND_SLACK)[0])
        gens = self.gen_bus_idx()
        on = self.gen_on
        reactive = gens[self.gen[on, GEN_Q_HIGH] - self.gen[on, GEN_Q_LOW] > FIXED_RANGE_MW]
        for candidates in (reactive, gens):
            if ref in set(candidates.tolist()):
                return ref
            if candidates.size:
                return int(np.sort(candidates)[0])
        return ref

    def bus_kinds(self, reactive_range: bool = True) -> tuple[int, np.ndarray, np.ndarray]:
        """(slack, PV buses, PQ buses) by index.

        A bus is PV when it has an in-service generator that can vary its reactive power
        (Qmax − Qmin > FIXED_RANGE_MW); a generator with Qmin = Qmax cannot hold a voltage, so its bus is PQ with
        that fixed Q.  ``reactive_range=False`` gives the case format's usual reading (any in-service generator).
        """
        has_gen = np.zeros(self.n_bus, dtype=bool)
        on = self.gen_on
        can = ((self.gen[on, GEN_Q_HIGH] - self.gen[on, GEN_Q_LOW] > FIXED_RANGE_MW) if reactive_range
               else np.ones(len(on), dtype=bool))
        has_gen[self.gen_bus_idx()[can]] = True
        s = self.slack
        pv = np.flatnonzero(has_gen & (np.arange(self.n_bus) != s))
        pq = np.flatnonzero(~has_gen & (np.arange(self.n_bus) != s))
        return s, pv, pq

    # -------------------------------------------------------- admittances
    def branch_admittances(self) -> tuple[np.ndarray, ...]:
        """(Yff, Yft, Ytf, Ytt) per in-service branch, per unit (π model with tap and shift)."""
        br = self.branch[self.branch_on]
        ys = 1.0 / (br[:, BRANCH_R] + 1j * br[:, BRANCH_X])
        bc = br[:, BRANCH_CHARGING]
        tap = np.where(br[:, BRANCH_RATIO] == 0, 1.0, br[:, BRANCH_RATIO]) * np.exp(1j * np.pi / 180.0 * br[:, BRANCH_SHIFT])
        ytt = ys + 1j * bc / 2.0
        yff = ytt / (tap * np.conj(tap))
        return yff, -ys / np.conj(tap), -ys / tap, ytt

    def admittance(self) -> tuple[sp.csr_matrix, sp.csr_matrix, sp.csr_matrix]:
        """(Ybus, Yf, Yt): bus admittance and branch-end current matrices, per unit."""
        yff, yft, ytf, ytt = self.branch_admittances()
        f, t = self.branch_ends()
        nl, n = len(f), self.n_bus
        rows = np.arange(nl)
        yf = sp.csr_matrix((np.concatenate([yff, yft]), (np.concatenate([rows, rows]), np.concatenate([f, t]))), (nl, n))
        yt = sp.csr_matrix((np.concatenate([ytf, ytt]), (np.concatenate([rows, rows]), np.concatenate([f, t]))), (nl, n))
        ysh = (self.bus[:, BUS_G_SHUNT] + 1j * self.bus[:, BUS_B_SHUNT]) / self.base_mva
        cf = sp.csr_matrix((np.ones(nl), (rows, f)), (nl, n))
        ct = sp.csr_matrix((np.ones(nl), (rows, t)), (nl, n))
        ybus = cf.T @ yf + ct.T @ yt + sp.diags(ysh)
        return sp.csr_matrix(ybus), yf, yt

    # ----------------------------------------------------------- per unit
    def load_pu(self) -> np.ndarray:
        """Complex load per bus (Pd + j Qd) in per unit."""
        return (self.bus[:, BUS_P_LOAD] + 1j * self.bus[:, BUS_Q_LOAD]) / self.base_mva

    def gen_limits_pu(self) -> dict[str, np.ndarray]:
        """Per-unit limits of the in-service generators (keys pmin, pmax, qmin, qmax)."""
        g = self.gen[self.gen_on]
        return {"pmin": g[:, GEN_P_LOW] / self.base_mva, "pmax": g[:, GEN_P_HIGH] / self.base_mva,
                "qmin": g[:, GEN_Q_LOW] / self.base_mva, "qmax": g[:, GEN_Q_HIGH] / self.base_mva}

    def fingerprint(self) -> str:
        """SHA-256 of the bus, generator and branch tables (base MVA included): same data, same text."""
        digest = hashlib.sha256(np.float64(self.base_mva).tobytes())
        for table in (self.bus, self.gen, self.branch):
            digest.update(np.ascontiguousarray(table, dtype=np.float64).tobytes())
        return digest.hexdigest()

    def copy(self) -> "Network":
        return Network(self.name, self.base_mva, self.bus.copy(), self.gen.copy(), self.branch.copy(),
                       None if self.gencost is None else self.gencost.copy(), self.source, dict(self.row_lines),
                       None if self.sites is None else self.sites.copy(), dict(self.file_rows))
