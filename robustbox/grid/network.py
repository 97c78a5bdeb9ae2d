"""Network data: the MATPOWER tables, checked, with per-unit views.

The tables keep the MATPOWER column layout (so a written case file is an
exact copy); properties give per-unit arrays for the in-service elements.
Engineering units (MW, Mvar, kV, degrees) live only in the tables.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from ..errors import NetworkError

# MATPOWER column indices (0-based), "MATPOWER User's Manual", Appendix B.
BUS_NUMBER, BUS_KIND, BUS_P_LOAD, BUS_Q_LOAD, BUS_G_SHUNT, BUS_B_SHUNT, BUS_REGION, BUS_V_MAG, BUS_V_ANG, BUS_KV, BUS_LOSS_ZONE, BUS_V_HIGH, BUS_V_LOW = range(13)
GEN_AT, GEN_P, GEN_Q, GEN_Q_HIGH, GEN_Q_LOW, GEN_V_SET, GEN_MVA, GEN_ON, GEN_P_HIGH, GEN_P_LOW = range(10)
BRANCH_FROM, BRANCH_TO, BRANCH_R, BRANCH_X, BRANCH_CHARGING, BRANCH_LIMIT_A, BRANCH_LIMIT_B, BRANCH_LIMIT_C, BRANCH_RATIO, BRANCH_SHIFT, BRANCH_ON, BRANCH_ANGLE_LOW, BRANCH_ANGLE_HIGH = range(13)
BUS_COLS, GEN_COLS, BRANCH_COLS = 13, 10, 11
KIND_PQ, KIND_PV, KIND_SLACK, KIND_ISOLATED = 1, 2, 3, 4


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

    # ------------------------------------------------------------ checking
    @classmethod
    def from_tables(cls, name: str, base_mva: float, bus: np.ndarray, gen: np.ndarray, branch: np.ndarray,
                    gencost: np.ndarray | None = None, source: str = "<memory>",
                    row_lines: dict[str, list[int]] | None = None, sites: np.ndarray | None = None) -> "Network":
        """Build and check a network; errors name the file line of the bad row."""
        bus = np.array(bus, dtype=float, ndmin=2)
        gen = np.array(gen, dtype=float, ndmin=2)
        branch = np.array(branch, dtype=float, ndmin=2)
        if branch.shape[0] and BRANCH_COLS <= branch.shape[1] < 13:
            # angle-difference columns are optional in the format; missing means unlimited
            pad = np.tile([-360.0, 360.0], (branch.shape[0], 1))[:, branch.shape[1] - BRANCH_ANGLE_LOW:]
            branch = np.hstack([branch, pad])
        net = cls(name, float(base_mva), bus, gen, branch,
                  None if gencost is None else np.array(gencost, dtype=float, ndmin=2), source, dict(row_lines or {}),
                  None if sites is None else np.array(sites, dtype=float, ndmin=2))
        net._check()
        return net

    def where(self, table: str, row: int) -> str:
        """'file:line (mpc.table row k)' for messages."""
        lines = self.row_lines.get(table, [])
        line = f":{lines[row]}" if row < len(lines) else ""
        return f"{self.source}{line} (mpc.{table} row {row + 1})"

    def _check(self) -> None:
        bus, gen, br = self.bus, self.gen, self.branch
        for table, mat, cols in (("bus", bus, BUS_COLS), ("gen", gen, GEN_COLS), ("branch", br, BRANCH_COLS)):
            if mat.size and mat.shape[1] < cols:
                raise NetworkError(f"{self.source}: mpc.{table} has {mat.shape[1]} columns, needs {cols}")
            bad = np.argwhere(~np.isfinite(mat[:, :cols]) & ~np.isinf(mat[:, :cols]))
            if bad.size:
                raise NetworkError(f"{self.where(table, int(bad[0, 0]))}: column {int(bad[0, 1]) + 1} is not a number")
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
            if t == KIND_ISOLATED:
                raise NetworkError(f"{self.where('bus', r)}: bus {int(nums[r])} is isolated (type 4); "
                                   "remove it and its branches before certification")
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
        """Index of the slack bus: the type-3 bus, or, when it has no generator in
        service, the first bus with one (MATPOWER's convention in ``bustypes``)."""
        ref = int(np.flatnonzero(self.bus[:, BUS_KIND] == KIND_SLACK)[0])
        gens = self.gen_bus_idx()
        return ref if ref in set(gens.tolist()) else int(np.sort(gens)[0])

    def bus_kinds(self, reactive_range: bool = True) -> tuple[int, np.ndarray, np.ndarray]:
        """(slack, PV buses, PQ buses) by index.

        A bus is PV when it has an in-service generator that can vary its reactive power
        (Qmin < Qmax); a generator with Qmin = Qmax cannot hold a voltage, so its bus is PQ with
        that fixed Q.  ``reactive_range=False`` gives MATPOWER's rule (any in-service generator).
        """
        has_gen = np.zeros(self.n_bus, dtype=bool)
        on = self.gen_on
        can = (self.gen[on, GEN_Q_HIGH] > self.gen[on, GEN_Q_LOW]) if reactive_range else np.ones(len(on), dtype=bool)
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

    def copy(self) -> "Network":
        return Network(self.name, self.base_mva, self.bus.copy(), self.gen.copy(), self.branch.copy(),
                       None if self.gencost is None else self.gencost.copy(), self.source, dict(self.row_lines),
                       None if self.sites is None else self.sites.copy())
