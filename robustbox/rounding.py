"""Proven floating-point error bounds (outward rounding by a priori bounds).

For a dot product of n terms evaluated in IEEE double precision in any order
(with or without fused multiply-add) the classical bound is

    |fl(aᵀb) − aᵀb| ≤ γ_n |a|ᵀ|b|,   γ_n = n u / (1 − n u),  u = 2⁻⁵³

(N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed.,
SIAM 2002, §3.1, Lemma 3.1 and eq. (3.5)).  The helpers below turn computed
nonnegative quantities into guaranteed upper bounds.  Underflow is covered by
adding ``n * tiny`` (Higham §2.1: the absolute error of a subnormal result).
"""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp

UNIT_ROUNDOFF = float(np.finfo(float).eps) / 2.0
TINY = float(np.finfo(float).tiny)


def gamma(n: int) -> float:
    """γ_n = n u / (1 − n u) with u the unit roundoff (n ≥ 1)."""
    nu = max(int(n), 1) * UNIT_ROUNDOFF
    if nu >= 0.5:
        raise ValueError(f"gamma({n}): too many terms for a useful error bound")
    return nu / (1.0 - nu)


def inflate(x: np.ndarray | float, n: int) -> np.ndarray:
    """Upper bound of a true nonnegative value whose computed value is ``x``.

    ``x`` must come from a sum of at most ``n`` nonnegative products.  The true
    value t satisfies t ≤ x / (1 − γ_n); the factor 1 + 3γ_n also absorbs the
    rounding of this multiplication itself.
    """
    return np.asarray(x, dtype=float) * (1.0 + 3.0 * gamma(n + 2)) + (n + 2) * TINY


def matvec_upper(a: np.ndarray | sp.spmatrix, x: np.ndarray) -> np.ndarray:
    """Guaranteed upper bound of ``a @ x`` for elementwise nonnegative a and x."""
    if sp.issparse(a):
        inner = int(np.diff(a.indptr).max(initial=1)) if a.format == "csr" else a.shape[1]
    else:
        inner = a.shape[1] if a.ndim == 2 else 1
    return inflate(a @ x, inner)


def sum_error(*terms: np.ndarray) -> np.ndarray:
    """Bound on the rounding error of adding ``terms`` elementwise.

    |fl(Σ t_i) − Σ t_i| ≤ γ_{k} Σ |t_i| for k terms (Higham, Lemma 3.1).
    """
    total = np.zeros(np.broadcast(*terms).shape)
    for t in terms:
        total = total + np.abs(t)
    return inflate(gamma(len(terms) + 1) * total, 2)
