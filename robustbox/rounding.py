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
UNIT_ROUNDOFF_32 = float(np.finfo(np.float32).eps) / 2.0
TINY_32 = float(np.finfo(np.float32).tiny)
COMPACT_ENTRIES = 20_000_000  # upper-bound matrices larger than this are stored in single precision


def gamma(n: int, unit: float = UNIT_ROUNDOFF) -> float:
    """γ_n = n u / (1 − n u) with u the unit roundoff (double precision unless ``unit`` is given; n ≥ 1)."""
    nu = max(int(n), 1) * unit
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


def round_up_32(x: np.ndarray) -> np.ndarray:
    """Single-precision copy of ``x`` with every entry ≥ the double value: rounded to nearest, then
    one step up (at most two units in the last place above x)."""
    y = np.asarray(x, dtype=float).astype(np.float32)
    return np.nextafter(y, np.float32(np.inf), out=y)


def compact_upper(upper: np.ndarray) -> np.ndarray:
    """A nonnegative upper-bound matrix as it is stored: unchanged up to ``COMPACT_ENTRIES``
    entries, above that in single precision rounded upward (half the memory)."""
    if upper.size <= COMPACT_ENTRIES:
        return upper
    out = np.empty(upper.shape, dtype=np.float32)
    step = max(1, 4_000_000 // max(upper.shape[1], 1))
    for a in range(0, upper.shape[0], step):
        out[a:a + step] = round_up_32(upper[a:a + step])
    return out


def matvec_upper(a: np.ndarray | sp.spmatrix, x: np.ndarray) -> np.ndarray:
    """Guaranteed upper bound of ``a @ x`` for elementwise nonnegative a and x.

    A single-precision ``a`` (an upper bound stored compactly, see :func:`round_up_32`) is
    multiplied in single precision with x rounded upward, and the bound uses that unit roundoff.
    """
    if sp.issparse(a):
        inner = int(np.diff(a.indptr).max(initial=1)) if a.format == "csr" else a.shape[1]
    else:
        inner = a.shape[1] if a.ndim == 2 else 1
    if a.dtype == np.float32:
        y = (a @ round_up_32(x)).astype(float)
        return y * (1.0 + 3.0 * gamma(inner + 2, UNIT_ROUNDOFF_32)) + (inner + 2) * TINY_32
    return inflate(a @ x, inner)


def sum_error(*terms: np.ndarray) -> np.ndarray:
    """Bound on the rounding error of adding ``terms`` elementwise.

    |fl(Σ t_i) − Σ t_i| ≤ γ_{k} Σ |t_i| for k terms (Higham, Lemma 3.1).
    """
    total = np.zeros(np.broadcast(*terms).shape)
    for t in terms:
        total = total + np.abs(t)
    return inflate(gamma(len(terms) + 1) * total, 2)
