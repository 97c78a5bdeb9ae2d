"""Sparse quadratic maps and the quadratic system the certificate works on.

A :class:`QuadraticMap` holds many rows at once,

    F_j(z) = Σ_(a≤b) Q_j[a, b] z_a z_b + b_jᵀ z + c_j,

stored as coordinate triples (row, a, b, value) with a ≤ b, a sparse linear
part and a constant.  A :class:`QuadraticSystem` bundles the equations
F(z) = ȳ + E p, the monitored quantities h(z) + A p ∈ [lower, upper] and the
uncertain injections p with their requested band.  Everything is in the
units the caller chose (per unit for power networks).

This module is pure numpy/scipy: no Pyomo import.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import scipy.sparse as sp

from .errors import QuadraticSystemError
from .rounding import gamma, inflate


def _int_array(x: Sequence[int] | np.ndarray) -> np.ndarray:
    return np.asarray(x, dtype=np.int64).reshape(-1)


@dataclass(frozen=True, eq=False)
class EigenSplit:
    """Signed split of every row's local quadratic form (see QuadraticMap.eigen_split).

    Row j's form is q_j (u_jᵀz)² + 2 (u_jᵀz)(c_jᵀz) + Σ_i λ_i (v_iᵀ z)² + a
    residual whose elementwise absolute value is bounded by ``residual``
    (triples row, a, b, value ≥ 0, one per unordered pair, for
    |zᵀ R_j z| ≤ Σ residual·|z_a||z_b|·(2 if a≠b)); u_j = c_j = 0 without anchor.
    """

    directions: sp.csr_matrix  # R × n, row i is v_iᵀ
    eigenvalues: np.ndarray  # R
    owner: np.ndarray  # R, the row j of the map each direction belongs to
    residual_row: np.ndarray
    residual_a: np.ndarray
    residual_b: np.ndarray
    residual_val: np.ndarray
    anchor: sp.csr_matrix  # rows × n, row j is u_j (empty rows without an anchor)
    cross: sp.csr_matrix  # rows × n, row j is c_j = (I − u uᵀ) Q_j u_j
    anchor_q: np.ndarray  # rows, u_jᵀ Q_j u_j


@dataclass(frozen=True, eq=False)
class QuadraticMap:
    """Rows of quadratic functions of ``n_vars`` variables (see module doc)."""

    n_vars: int
    n_rows: int
    q_row: np.ndarray
    q_a: np.ndarray
    q_b: np.ndarray
    q_val: np.ndarray
    linear: sp.csr_matrix
    constant: np.ndarray
    names: tuple[str, ...]
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    # ------------------------------------------------------------------ build
    @classmethod
    def from_terms(
        cls,
        n_vars: int,
        names: Sequence[str],
        quad: tuple[Sequence[int], Sequence[int], Sequence[int], Sequence[float]],
        lin: tuple[Sequence[int], Sequence[int], Sequence[float]],
        constant: Sequence[float] | np.ndarray | None = None,
    ) -> "QuadraticMap":
        """Build from term lists; duplicates are summed, (a, b) ordered a ≤ b.

        ``quad = (rows, a, b, values)`` means Σ values · z_a · z_b in each row;
        ``lin = (rows, cols, values)``.
        """
        names = tuple(str(n) for n in names)
        m = len(names)
        qr, qa, qb = (_int_array(x) for x in quad[:3])
        qv = np.asarray(quad[3], dtype=float).reshape(-1)
        lr, lc = _int_array(lin[0]), _int_array(lin[1])
        lv = np.asarray(lin[2], dtype=float).reshape(-1)
        c = np.zeros(m) if constant is None else np.asarray(constant, dtype=float).reshape(-1)
        if not (len(qr) == len(qa) == len(qb) == len(qv)) or not (len(lr) == len(lc) == len(lv)):
            raise QuadraticSystemError("quadratic map: term arrays have different lengths")
        if len(c) != m:
            raise QuadraticSystemError(f"quadratic map: {len(c)} constants for {m} rows")
        for label, arr, hi in (("row", qr, m), ("variable", qa, n_vars), ("variable", qb, n_vars),
                               ("row", lr, m), ("variable", lc, n_vars)):
            if arr.size and (arr.min() < 0 or arr.max() >= hi):
                raise QuadraticSystemError(f"quadratic map: {label} index outside 0..{hi - 1}")
        for label, arr in (("quadratic coefficient", qv), ("linear coefficient", lv), ("constant", c)):
            bad = np.flatnonzero(~np.isfinite(arr))
            if bad.size:
                raise QuadraticSystemError(f"quadratic map: non-finite {label} (entry {int(bad[0])})")
        lo, hi = np.minimum(qa, qb), np.maximum(qa, qb)
        key = (qr * n_vars + lo) * n_vars + hi
        uniq, inv = np.unique(key, return_inverse=True)
        val = np.bincount(inv, weights=qv, minlength=len(uniq))
        keep = val != 0.0
        uniq, val = uniq[keep], val[keep]
        rows, rest = np.divmod(uniq, n_vars * n_vars)
        a, b = np.divmod(rest, n_vars)
        linear = sp.csr_matrix((lv, (lr, lc)), shape=(m, n_vars))
        linear.sum_duplicates()
        linear.eliminate_zeros()
        return cls(n_vars, m, rows, a, b, val, linear, c.copy(), names)

    def take(self, rows: Sequence[int] | np.ndarray) -> "QuadraticMap":
        """The sub-map of the given rows, in the given order."""
        rows = _int_array(rows)
        pos = -np.ones(self.n_rows, dtype=np.int64)
        pos[rows] = np.arange(len(rows))
        sel = pos[self.q_row] >= 0
        lin = self.linear[rows].tocoo()
        return QuadraticMap.from_terms(
            self.n_vars, [self.names[i] for i in rows],
            (pos[self.q_row[sel]], self.q_a[sel], self.q_b[sel], self.q_val[sel]),
            (lin.row, lin.col, lin.data), self.constant[rows])

    def substitute(self, new_index: np.ndarray, values: np.ndarray, n_new: int,
                   extra_linear: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None) -> "QuadraticMap":
        """Fix some variables and renumber the rest.

        ``new_index[v]`` is the new number of variable v, or −1 when v is fixed
        at ``values[v]``; ``extra_linear = (rows, new_cols, values)`` adds linear
        terms in the new numbering (e.g. a distributed-slack variable).
        """
        ia, ib = new_index[self.q_a], new_index[self.q_b]
        fa, fb = ia < 0, ib < 0
        both = ~fa & ~fb
        lin = self.linear.tocoo()
        lfree = new_index[lin.col] >= 0
        lr = [self.q_row[~fa & fb], self.q_row[fa & ~fb], lin.row[lfree]]
        lc = [ia[~fa & fb], ib[fa & ~fb], new_index[lin.col[lfree]]]
        lv = [self.q_val[~fa & fb] * values[self.q_b[~fa & fb]], self.q_val[fa & ~fb] * values[self.q_a[fa & ~fb]],
              lin.data[lfree]]
        if extra_linear is not None:
            lr.append(np.asarray(extra_linear[0]))
            lc.append(np.asarray(extra_linear[1]))
            lv.append(np.asarray(extra_linear[2], dtype=float))
        const = self.constant.copy()
        const += np.bincount(self.q_row[fa & fb], weights=self.q_val[fa & fb] * values[self.q_a[fa & fb]]
                             * values[self.q_b[fa & fb]], minlength=self.n_rows)
        const += np.bincount(lin.row[~lfree], weights=lin.data[~lfree] * values[lin.col[~lfree]], minlength=self.n_rows)
        return QuadraticMap.from_terms(n_new, self.names, (self.q_row[both], ia[both], ib[both], self.q_val[both]),
                                       (np.concatenate(lr), np.concatenate(lc), np.concatenate(lv)), const)

    @staticmethod
    def stack(maps: Sequence["QuadraticMap"]) -> "QuadraticMap":
        """Rows of several maps over the same variables, one after another."""
        n = maps[0].n_vars
        if any(mp.n_vars != n for mp in maps):
            raise QuadraticSystemError("cannot stack quadratic maps over different variables")
        offs = np.cumsum([0] + [mp.n_rows for mp in maps])
        lins = [mp.linear.tocoo() for mp in maps]
        return QuadraticMap.from_terms(
            n, [nm for mp in maps for nm in mp.names],
            (np.concatenate([mp.q_row + o for mp, o in zip(maps, offs)]),
             np.concatenate([mp.q_a for mp in maps]), np.concatenate([mp.q_b for mp in maps]),
             np.concatenate([mp.q_val for mp in maps])),
            (np.concatenate([li.row + o for li, o in zip(lins, offs)]),
             np.concatenate([li.col for li in lins]), np.concatenate([li.data for li in lins])),
            np.concatenate([mp.constant for mp in maps]))

    # ------------------------------------------------------------- evaluate
    def _check_point(self, z: np.ndarray) -> np.ndarray:
        z = np.asarray(z, dtype=float).reshape(-1)
        if z.shape[0] != self.n_vars:
            raise QuadraticSystemError(f"point has {z.shape[0]} entries, the map has {self.n_vars} variables")
        if not np.all(np.isfinite(z)):
            raise QuadraticSystemError(f"point has a non-finite entry at index {int(np.flatnonzero(~np.isfinite(z))[0])}")
        return z

    def evaluate(self, z: np.ndarray) -> np.ndarray:
        """F(z) for all rows."""
        z = self._check_point(z)
        quad = np.bincount(self.q_row, weights=self.q_val * z[self.q_a] * z[self.q_b], minlength=self.n_rows)
        return quad + self.linear @ z + self.constant

    def evaluate_with_error(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """F(z) and a proven bound on its floating-point evaluation error."""
        z = self._check_point(z)
        value = self.evaluate(z)
        mag = (np.bincount(self.q_row, weights=np.abs(self.q_val * z[self.q_a] * z[self.q_b]), minlength=self.n_rows)
               + abs(self.linear) @ np.abs(z) + np.abs(self.constant))
        return value, inflate(gamma(self.max_terms + 3) * mag, 1)

    @property
    def max_terms(self) -> int:
        """Largest number of terms in one row (for rounding bounds)."""
        if "max_terms" not in self._cache:
            cnt = np.bincount(self.q_row, minlength=self.n_rows) + np.diff(self.linear.indptr) + 1
            self._cache["max_terms"] = int(cnt.max(initial=1))
        return self._cache["max_terms"]

    def jacobian(self, z: np.ndarray) -> sp.csr_matrix:
        """Sparse Jacobian DF(z) (rows × variables)."""
        return self.jacobian_with_error(z)[0]

    def jacobian_with_error(self, z: np.ndarray) -> tuple[sp.csr_matrix, sp.csr_matrix]:
        """DF(z) and an elementwise bound on its evaluation error (same shape)."""
        z = self._check_point(z)
        diag = self.q_a == self.q_b
        rows = np.concatenate([self.q_row, self.q_row[~diag]])
        cols = np.concatenate([self.q_a, self.q_b[~diag]])
        # d/dz_a (v z_a z_b) = v z_b ;  d/dz_a (v z_a²) = 2 v z_a
        vals = np.concatenate([np.where(diag, 2.0, 1.0) * self.q_val * z[self.q_b],
                               self.q_val[~diag] * z[self.q_a[~diag]]])
        lin = self.linear.tocoo()
        shape = (self.n_rows, self.n_vars)
        jac = sp.csr_matrix((np.concatenate([vals, lin.data]),
                             (np.concatenate([rows, lin.row]), np.concatenate([cols, lin.col]))), shape=shape)
        mag = sp.csr_matrix((np.concatenate([np.abs(vals), np.abs(lin.data)]),
                             (np.concatenate([rows, lin.row]), np.concatenate([cols, lin.col]))), shape=shape)
        jac.sum_duplicates()
        mag.sum_duplicates()
        err = mag * inflate(gamma(self.max_terms + 2), 1)
        return jac, sp.csr_matrix(err)

    def hessian_coo(self, weights: np.ndarray) -> sp.coo_matrix:
        """Σ_j weights_j ∇²F_j as a symmetric sparse matrix."""
        w = np.asarray(weights, dtype=float)[self.q_row] * self.q_val
        diag = self.q_a == self.q_b
        rows = np.concatenate([self.q_a, self.q_a[~diag], self.q_b[~diag]])
        cols = np.concatenate([self.q_a, self.q_b[~diag], self.q_a[~diag]])
        vals = np.concatenate([np.where(diag, 2.0 * w, 0.0), w[~diag], w[~diag]])
        return sp.coo_matrix((vals, (rows, cols)), shape=(self.n_vars, self.n_vars))

    # ---------------------------------------------------------- local forms
    def plain_bounds(self, delta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Signed bounds of the quadratic part over |d| ≤ delta (proven upper/lower).

        Diagonal terms keep their sign; cross terms count ±|v| δ_a δ_b.
        """
        prod = np.abs(self.q_val) * delta[self.q_a] * delta[self.q_b]
        diag = self.q_a == self.q_b
        pos = np.where(~diag | (self.q_val > 0), prod, 0.0)
        neg = np.where(~diag | (self.q_val < 0), prod, 0.0)
        n = self.max_terms + 2
        hi = inflate(np.bincount(self.q_row, weights=pos, minlength=self.n_rows), n)
        lo = -inflate(np.bincount(self.q_row, weights=neg, minlength=self.n_rows), n)
        return lo, hi

    def local_blocks(self) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """Rows grouped by the size k of their local form: (rows (c,), variables (c, k), Q_j (c, k, k)).

        Q_j is the dense symmetric matrix of row j on its own variables (zᵀQ_j z is the row's quadratic part).
        """
        if "blocks" in self._cache:
            return self._cache["blocks"]
        n = max(self.n_vars, 1)
        keys = np.unique(np.concatenate([self.q_row * n + self.q_a, self.q_row * n + self.q_b]))
        key_row = keys // n
        count = np.bincount(key_row, minlength=self.n_rows)
        start = np.concatenate([[0], np.cumsum(count)])
        ia = np.searchsorted(keys, self.q_row * n + self.q_a) - start[self.q_row]
        ib = np.searchsorted(keys, self.q_row * n + self.q_b) - start[self.q_row]
        diag = self.q_a == self.q_b
        groups = []
        for k in np.unique(count[count > 0]):
            rows = np.flatnonzero(count == k)
            slot = np.full(self.n_rows, -1)
            slot[rows] = np.arange(len(rows))
            var = (keys[start[rows][:, None] + np.arange(k)] % n).astype(np.int64)
            mats = np.zeros((len(rows), k, k))
            sel = slot[self.q_row] >= 0
            c, a, b, v, d = slot[self.q_row[sel]], ia[sel], ib[sel], self.q_val[sel], diag[sel]
            np.add.at(mats, (c, a, b), np.where(d, v, v / 2.0))
            np.add.at(mats, (c, b, a), np.where(d, 0.0, v / 2.0))
            groups.append((rows, var, mats))
        self._cache["blocks"] = groups
        return groups

    def eigen_split(self, anchor: np.ndarray | None = None, tol: float = 1e-13) -> EigenSplit:
        """Split of each local Q_j with a proven residual bound.

        Without ``anchor``: Q_j = Σ λ_i v_i v_iᵀ + R_j.  With an ``anchor``
        vector (length n_vars), u = anchor restricted to the row's variables
        and normalised, P = I − u uᵀ, c = P Q u, and

            Q_j = (uᵀQu) u uᵀ + u cᵀ + c uᵀ + Σ λ_i v_i v_iᵀ + R_j

        with (λ_i, v_i) the eigenpairs of P Q P.  For d = α u + P d this keeps
        the part of a displacement along u apart; with u a symmetry direction
        of the row (a rotation of all voltage angles), the large terms of
        opposite sign cancel exactly instead of being bounded separately.
        Directions with |λ_i| ≤ tol·max|λ| are dropped into the residual.
        """
        key = ("eigen", None if anchor is None else anchor.tobytes())
        if key in self._cache:
            return self._cache[key]
        d_rows, d_cols, d_vals, lam_all, owner = [], [], [], [], []
        r_row, r_a, r_b, r_val = [], [], [], []
        u_rows, u_cols, u_vals, c_vals, quu_all = [], [], [], [], np.zeros(self.n_rows)
        n_dir = 0
        for js, var, mats in self.local_blocks():
            c_n, k = var.shape
            u = np.zeros((c_n, k))
            if anchor is not None:
                u = anchor[var]
                norm = np.linalg.norm(u, axis=1)
                u = np.where(norm[:, None] > 0, u / np.where(norm > 0, norm, 1.0)[:, None], 0.0)
            qu = np.einsum("cij,cj->ci", mats, u)
            quu = np.einsum("ci,ci->c", u, qu)
            cross = qu - quu[:, None] * u
            proj = np.eye(k)[None] - np.einsum("ci,cj->cij", u, u)
            inner = proj @ mats @ proj
            lam, vec = np.linalg.eigh(0.5 * (inner + inner.transpose(0, 2, 1)))
            uu = np.einsum("ci,cj->cij", u, u)
            uc = np.einsum("ci,cj->cij", u, cross)
            recon = np.einsum("cik,ck,cjk->cij", vec, lam, vec) + quu[:, None, None] * uu + uc + uc.transpose(0, 2, 1)
            mag = (np.einsum("cik,ck,cjk->cij", np.abs(vec), np.abs(lam), np.abs(vec)) + np.abs(mats)
                   + np.abs(quu)[:, None, None] * np.abs(uu) + 2 * np.abs(uc) + np.abs(uc.transpose(0, 2, 1)))
            res = np.abs(mats - recon) + gamma(4 * k + 8) * mag
            keep = np.abs(lam) > tol * np.abs(lam).max(axis=1, initial=0.0)[:, None]
            # a dropped direction's whole contribution goes to the residual
            dropped = np.where(keep, 0.0, np.abs(lam)) * (1 + 4 * gamma(k + 2))
            res += np.einsum("cik,ck,cjk->cij", np.abs(vec), dropped, np.abs(vec))
            has = np.any(u != 0, axis=1)
            if anchor is not None and np.any(has):
                u_rows.append(np.repeat(js[has], k))
                u_cols.append(var[has].ravel())
                u_vals.append(u[has].ravel())
                c_vals.append(cross[has].ravel())
                quu_all[js[has]] = quu[has]
            cs, ks = np.nonzero(keep)
            d_rows.append(np.repeat(n_dir + np.arange(len(cs)), k))
            d_cols.append(var[cs].ravel())
            d_vals.append(vec[cs, :, ks].ravel())
            lam_all.append(lam[cs, ks])
            owner.append(js[cs])
            n_dir += len(cs)
            ia, ib = np.triu_indices(k)
            r_row.append(np.repeat(js, len(ia)))
            r_a.append(var[:, ia].ravel())
            r_b.append(var[:, ib].ravel())
            r_val.append(res[:, ia, ib].ravel())
        cat = (lambda xs, dt=float: np.concatenate(xs).astype(dt) if xs else np.zeros(0, dtype=dt))
        directions = sp.csr_matrix((cat(d_vals), (cat(d_rows, np.int64), cat(d_cols, np.int64))),
                                   shape=(n_dir, self.n_vars))
        shape = (self.n_rows, self.n_vars)
        ui, uj = cat(u_rows, np.int64), cat(u_cols, np.int64)
        split = EigenSplit(directions, cat(lam_all), cat(owner, np.int64),
                           cat(r_row, np.int64), cat(r_a, np.int64), cat(r_b, np.int64), cat(r_val),
                           sp.csr_matrix((cat(u_vals), (ui, uj)), shape=shape),
                           sp.csr_matrix((cat(c_vals), (ui, uj)), shape=shape), quu_all)
        self._cache[key] = split
        return split


@dataclass(frozen=True, eq=False)
class UncertainSet:
    """The injections p that move, with the band the user asks for.

    ``equation_map`` (E, rows × s) says how p enters the equations
    F(z) = ȳ + E p; ``limit_map`` (A, limits × s) how it enters monitored
    quantities directly (e.g. a load at a generator bus changes the
    generator's output).  The requested band is p ∈ [−band_lower, band_upper].
    """

    names: tuple[str, ...]
    equation_map: sp.csr_matrix
    limit_map: sp.csr_matrix
    band_lower: np.ndarray
    band_upper: np.ndarray

    @property
    def size(self) -> int:
        return len(self.names)


@dataclass(frozen=True, eq=False)
class QuadraticSystem:
    """Equations F(z) = target + E p and limits lower ≤ h(z) + A p ≤ upper.

    Optional *derived limits* W (h + A p) ≤ derived_upper are combinations of
    monitored rows (e.g. the faces of a branch-flow polygon built from the
    branch's P and Q rows); they are bounded through the rows' own bounds.
    An optional ``symmetry`` S (n × n) is a linear vector field that leaves the
    rows (nearly) unchanged, e.g. a common rotation of all voltage angles; the
    anchored remainder bound uses the direction S z̄.  Any S gives valid bounds.
    """

    equations: QuadraticMap
    target: np.ndarray
    limits: QuadraticMap
    limit_lower: np.ndarray
    limit_upper: np.ndarray
    uncertain: UncertainSet
    variable_names: tuple[str, ...]
    derived: sp.csr_matrix | None = None
    derived_upper: np.ndarray | None = None
    derived_names: tuple[str, ...] = ()
    symmetry: sp.csr_matrix | None = None

    def __post_init__(self) -> None:
        eq, lim, unc = self.equations, self.limits, self.uncertain
        n = eq.n_vars
        checks = [
            (lim.n_vars == n, f"limits use {lim.n_vars} variables, equations {n}"),
            (len(self.variable_names) == n, f"{len(self.variable_names)} variable names for {n} variables"),
            (np.shape(self.target) == (eq.n_rows,), f"target has shape {np.shape(self.target)}, expected ({eq.n_rows},)"),
            (np.shape(self.limit_lower) == (lim.n_rows,) and np.shape(self.limit_upper) == (lim.n_rows,),
             f"limit bounds must have shape ({lim.n_rows},)"),
            (unc.equation_map.shape == (eq.n_rows, unc.size), f"equation map has shape {unc.equation_map.shape}, expected ({eq.n_rows}, {unc.size})"),
            (unc.limit_map.shape == (lim.n_rows, unc.size), f"limit map has shape {unc.limit_map.shape}, expected ({lim.n_rows}, {unc.size})"),
            (np.shape(unc.band_lower) == (unc.size,) and np.shape(unc.band_upper) == (unc.size,),
             f"band must have shape ({unc.size},)"),
        ]
        for ok, msg in checks:
            if not ok:
                raise QuadraticSystemError(f"quadratic system: {msg}")
        if not np.all(np.isfinite(self.target)):
            raise QuadraticSystemError(f"quadratic system: non-finite target for equation "
                                       f"'{eq.names[int(np.flatnonzero(~np.isfinite(self.target))[0])]}'")
        for arr, what in ((unc.band_lower, "lower"), (unc.band_upper, "upper")):
            bad = np.flatnonzero(~np.isfinite(arr) | (arr < 0))
            if bad.size:
                raise QuadraticSystemError(f"requested band {what} side for '{unc.names[int(bad[0])]}' "
                                           f"must be finite and ≥ 0, got {arr[bad[0]]}")
        bad = np.flatnonzero(np.isnan(self.limit_lower) | np.isnan(self.limit_upper) | (self.limit_lower > self.limit_upper))
        if bad.size:
            t = int(bad[0])
            raise QuadraticSystemError(f"limit '{lim.names[t]}': lower {self.limit_lower[t]} above upper {self.limit_upper[t]}")
        if self.derived is not None:
            d = self.derived
            if d.shape[1] != lim.n_rows or np.shape(self.derived_upper) != (d.shape[0],) or len(self.derived_names) != d.shape[0]:
                raise QuadraticSystemError(f"derived limits: matrix {d.shape}, {np.size(self.derived_upper)} bounds and "
                                           f"{len(self.derived_names)} names for {lim.n_rows} limit rows")
            if d.nnz and not np.all(np.isfinite(d.data)) or np.any(np.isnan(self.derived_upper)):
                raise QuadraticSystemError("derived limits have a non-finite weight or a NaN bound")
        if self.symmetry is not None and self.symmetry.shape != (n, n):
            raise QuadraticSystemError(f"symmetry has shape {self.symmetry.shape}, expected ({n}, {n})")
        for mat, what in ((unc.equation_map, "equation"), (unc.limit_map, "limit")):
            if mat.nnz and not np.all(np.isfinite(mat.data)):
                raise QuadraticSystemError(f"uncertain {what} map has a non-finite entry")

    @property
    def n_vars(self) -> int:
        return self.equations.n_vars
