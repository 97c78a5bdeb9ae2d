"""Remainder bounds: the range of every row's quadratic part over a region.

For d = K w with |w| ≤ ω (elementwise) we need, for each row j of a
quadratic map, proven numbers lo_j ≤ dᵀ Q_j d ≤ hi_j.  Three bounds are
implemented; :class:`RemainderBound` takes the tightest valid one row by row.

``plain``     bounding box of the state, δ = |K| ω, then ±|Q_j| δδ
              (signed on the diagonal).
``eigen``     signed eigen-split: Q_j = Σ λ_i v_i v_iᵀ, and |v_iᵀ K w| ≤ |v_iᵀ K| ω
              exactly, so the positive eigenvalues bound from above and the
              negative ones from below.
``anchored``  the same split after taking out one direction u_j per row (the
              system's symmetry direction at the operating point, e.g. a common
              rotation of all voltage angles): q = q_u α² + 2 α (c_jᵀd) + Σ λ_i (v_iᵀd)²
              with α = u_jᵀd, so terms that cancel along u_j are not bounded apart.
``combined``  combine before taking absolute values: M_j = Kᵀ Q_j K and
              wᵀ M_j w ≤ Σ M_kk⁺ ω_k² + Σ_(k≠l) |M_kl| ω_k ω_l.  Dense m×m per
              row, so used only while rows·m² ≤ combined_max_size (5 million entries, 40 MB, by default).

All are evaluated with proven floating-point error bounds.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from .errors import CertificateError
from .quadratic import QuadraticMap
from . import rounding
from .rounding import TINY, gamma, inflate, matvec_upper, round_up_32

METHODS = ("plain", "eigen", "anchored", "combined")


@dataclass(frozen=True)
class RemainderOptions:
    """Which remainder bounds to use.

    ``methods``: any of "plain", "eigen", "anchored", "combined"; the tightest
    is taken row by row ("anchored" without a symmetry direction from the
    system is the plain eigen-split).  ``combined_max_size``: the combined
    bound stores an m×m matrix per row and is skipped when rows·m² exceeds
    this number.  For the (many) monitored rows the combined bound is left
    out unless ``combined_for_limits`` (it costs much more there than it
    gains), and the eigen-split is left out when the anchored one is used
    unless ``eigen_for_limits``: leaving it out changed no certified fraction
    by more than 0.1 % on the PGLib cases we compared (case30_as, case39_epri,
    case162_ieee_dtc, case300_ieee, both scenarios), while it dominates time
    and memory on large networks.
    """

    methods: tuple[str, ...] = METHODS
    combined_max_size: int = 5_000_000
    combined_for_limits: bool = False
    eigen_for_limits: bool = False

    def for_limits(self) -> "RemainderOptions":
        """The options for the monitored rows (see the class doc)."""
        drop = set() if self.combined_for_limits else {"combined"}
        if not self.eigen_for_limits and "anchored" in self.methods:
            drop.add("eigen")
        kept = tuple(m for m in self.methods if m not in drop) or self.methods
        return RemainderOptions(kept, self.combined_max_size, self.combined_for_limits, self.eigen_for_limits)


def _aggregate(split, mask: np.ndarray, n_rows: int) -> sp.csr_matrix:
    """Sparse rows × directions matrix of |λ_i| for the directions in ``mask``."""
    return sp.csr_matrix((np.abs(split.eigenvalues[mask]), (split.owner[mask], np.flatnonzero(mask))),
                         shape=(n_rows, len(split.eigenvalues)))


def _projection(directions: sp.csr_matrix, k_matrix: np.ndarray, abs_k: np.ndarray,
                chunk_entries: int = 4_000_000) -> np.ndarray:
    """Proven upper bound of |D K| for sparse directions D: |fl(DK)| + γ |D| |K| (Higham, Lemma 3.1).

    Computed in blocks of rows (about ``chunk_entries`` entries each) so that the temporaries stay
    small; a large bound is stored in single precision, rounded upward (see ``rounding.compact_upper``).
    """
    inner = int(np.diff(directions.indptr).max(initial=1))
    n_rows, m = directions.shape[0], k_matrix.shape[1]
    out = np.empty((n_rows, m), dtype=np.float32 if n_rows * m > rounding.COMPACT_ENTRIES else float)
    abs_d = abs(directions)
    factor = inflate(gamma(inner + 1), 1) * (1.0 + 3.0 * gamma(inner + 2))
    step = max(1, chunk_entries // max(m, 1))
    for a in range(0, n_rows, step):
        b = min(a + step, n_rows)
        block = np.asarray(directions[a:b] @ k_matrix)
        np.abs(block, out=block)
        err = abs_d[a:b] @ abs_k
        err *= factor
        err += (inner + 2) * TINY
        block += err
        block *= 1.0 + 3.0 * gamma(3)  # the rounding of the sum itself (as in `inflate`)
        block += 3 * TINY
        out[a:b] = round_up_32(block) if out.dtype == np.float32 else block
    return out


class _SplitBound:
    """Bounds from one split (plain eigen, or anchored) of every row."""

    def __init__(self, split, k_matrix: np.ndarray, abs_k: np.ndarray, n_rows: int) -> None:
        self.split, self.n_rows = split, n_rows
        self.proj = _projection(split.directions, k_matrix, abs_k)
        pos = split.eigenvalues > 0
        self.agg_pos, self.agg_neg = _aggregate(split, pos, n_rows), _aggregate(split, ~pos, n_rows)
        self.anchored = split.anchor.nnz > 0
        if self.anchored:
            self.u_proj = _projection(split.anchor, k_matrix, abs_k)
            self.c_proj = _projection(split.cross, k_matrix, abs_k)
            self.q_pos, self.q_neg = np.maximum(split.anchor_q, 0.0), np.maximum(-split.anchor_q, 0.0)

    def __call__(self, omega: np.ndarray, delta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        split = self.split
        rho2 = inflate(np.square(matvec_upper(self.proj, omega)), 1)
        res = split.residual_val * delta[split.residual_a] * delta[split.residual_b]
        res = np.where(split.residual_a == split.residual_b, res, 2.0 * res)
        resid = inflate(np.bincount(split.residual_row, weights=res, minlength=self.n_rows),
                        int(np.bincount(split.residual_row).max(initial=1)) + 2)
        hi = matvec_upper(self.agg_pos, rho2) + resid
        lo = matvec_upper(self.agg_neg, rho2) + resid
        if self.anchored:
            ru, rc = matvec_upper(self.u_proj, omega), matvec_upper(self.c_proj, omega)
            ru2, cross = inflate(ru * ru, 1), inflate(2.0 * ru * rc, 2)
            hi = hi + inflate(self.q_pos * ru2, 1) + cross
            lo = lo + inflate(self.q_neg * ru2, 1) + cross
        return -inflate(lo, 4), inflate(hi, 4)


class RemainderBound:
    """Proven bounds of dᵀ Q_j d over d = K w, |w| ≤ ω, for every row j."""

    def __init__(self, qmap: QuadraticMap, k_matrix: np.ndarray, abs_k: np.ndarray,
                 options: RemainderOptions = RemainderOptions(), anchor: np.ndarray | None = None) -> None:
        unknown = set(options.methods) - set(METHODS)
        if unknown or not options.methods:
            raise ValueError(f"remainder methods must be a non-empty subset of {METHODS}, got {options.methods}")
        self.qmap = qmap
        self.abs_k = abs_k
        self.methods = tuple(options.methods)
        m = k_matrix.shape[1]
        self._splits = []
        self._combined = None
        if qmap.n_rows and "eigen" in self.methods:
            self._splits.append(_SplitBound(qmap.eigen_split(), k_matrix, abs_k, qmap.n_rows))
        if qmap.n_rows and "anchored" in self.methods:
            if anchor is not None and np.any(anchor):
                self._splits.append(_SplitBound(qmap.eigen_split(anchor), k_matrix, abs_k, qmap.n_rows))
            elif "eigen" not in self.methods:  # no direction to anchor on: the plain eigen-split
                self._splits.append(_SplitBound(qmap.eigen_split(), k_matrix, abs_k, qmap.n_rows))
        if ("combined" in self.methods and qmap.n_rows
                and qmap.n_rows * m * m <= options.combined_max_size):
            self._combined = self._build_combined(k_matrix)
        if not ("plain" in self.methods or self._splits or self._combined is not None or not qmap.n_rows):
            raise CertificateError(f"none of the remainder methods {self.methods} applies here (the combined bound "
                             f"needs {qmap.n_rows * m * m} entries > combined_max_size); add 'plain' or 'eigen'")

    def _build_combined(self, k_matrix: np.ndarray) -> tuple[np.ndarray, ...]:
        """fl(K_jᵀ Q_j K_j) for every row: signed diagonal parts and |off-diagonal| (m×m per row), and
        γ_(2k+2) per row for its rounding error, |fl(KᵀQK) − KᵀQK| ≤ γ |K|ᵀ|Q||K| (Higham, Lemma 3.1,
        applied twice), which over |w| ≤ ω adds at most γ δᵀ|Q_j|δ with δ = |K| ω."""
        qm, m = self.qmap, k_matrix.shape[1]
        pos_diag, neg_diag = np.zeros((qm.n_rows, m)), np.zeros((qm.n_rows, m))
        off = np.zeros((qm.n_rows, m, m))
        err_factor = np.zeros(qm.n_rows)
        diag = np.arange(m)
        for rows, var, mats in qm.local_blocks():
            kl = k_matrix[var]  # (c, k, m)
            full = kl.transpose(0, 2, 1) @ (mats @ kl)
            d = full[:, diag, diag]
            pos_diag[rows], neg_diag[rows] = np.maximum(d, 0.0), np.maximum(-d, 0.0)
            np.abs(full, out=full)
            full[:, diag, diag] = 0.0
            off[rows] = full
            err_factor[rows] = inflate(gamma(2 * var.shape[1] + 2), 1)
        return pos_diag, neg_diag, off, err_factor

    def __call__(self, omega: np.ndarray, delta: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(lo, hi): proven bounds of each row's quadratic part; ``delta`` = |K|ω if known."""
        qm = self.qmap
        if delta is None:
            delta = matvec_upper(self.abs_k, omega)
        lo, hi = np.full(qm.n_rows, -np.inf), np.full(qm.n_rows, np.inf)
        if "plain" in self.methods:
            plo, phi = qm.plain_bounds(delta)
            lo, hi = np.maximum(lo, plo), np.minimum(hi, phi)
        for split in self._splits:
            slo, shi = split(omega, delta)
            lo, hi = np.maximum(lo, slo), np.minimum(hi, shi)
        if self._combined is not None:
            pos_diag, neg_diag, off, err_factor = self._combined
            m = off.shape[1]
            om2 = inflate(omega * omega, 1)
            cross = inflate((off.reshape(-1, m) @ omega).reshape(-1, m) @ omega, m * m + 2)
            mag = inflate(np.bincount(qm.q_row, weights=np.abs(qm.q_val) * delta[qm.q_a] * delta[qm.q_b],
                                      minlength=qm.n_rows), qm.max_terms + 2)
            err = inflate(err_factor * mag, 1)
            chi = inflate(cross + pos_diag @ om2 + err, m + 4)
            clo = -inflate(cross + neg_diag @ om2 + err, m + 4)
            lo, hi = np.maximum(lo, clo), np.minimum(hi, chi)
        return lo, hi
