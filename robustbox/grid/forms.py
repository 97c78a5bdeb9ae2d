"""Quadratic forms of a network in rectangular voltage coordinates.

Variables x = (e_0 … e_(n−1), f_0 … f_(n−1)) with V_i = e_i + j f_i, per unit.
For a complex admittance y = g + j b and buses a, b,

    V_a conj(y V_b) = e_a(g e_b − b f_b) + f_a(g f_b + b e_b)
                    + j [ f_a(g e_b − b f_b) − e_a(g f_b + b e_b) ],

so bus injections S_i = Σ_k V_i conj(Y_ik V_k), branch-end flows
S_f = V_f conj(Yff V_f + Yft V_t), branch-end currents |I_f|² = |Yff V_f + Yft V_t|²
and |V_i|² = e_i² + f_i² are all quadratic.
Branch apparent-power limits are represented (in :mod:`robustbox.grid.system`)
by an inscribed regular polygon in the (P, Q) plane built on these flow rows.
Angle-difference
limits use the tangent form Im(V_f V̄_t) − tan(θmax) Re(V_f V̄_t) ≤ 0, valid
for limits inside (−90°, 90°) with Re(V_f V̄_t) > 0 (wider limits are not
represented, as in MATPOWER where ±360° means "no limit").
"""
from __future__ import annotations

import numpy as np

from ..quadratic import QuadraticMap
from .network import BRANCH_ANGLE_HIGH, BRANCH_ANGLE_LOW, Network


def pair_terms(y: np.ndarray, a: np.ndarray, b: np.ndarray, n: int) -> tuple[tuple[np.ndarray, ...], tuple[np.ndarray, ...]]:
    """Quadratic terms (a-var, b-var, value) of Re and Im of V_a conj(y V_b), vectorised."""
    g, bb = np.real(y), np.imag(y)
    ea, fa, eb, fb = a, n + a, b, n + b
    re = (np.concatenate([ea, ea, fa, fa]), np.concatenate([eb, fb, fb, eb]), np.concatenate([g, -bb, g, bb]))
    im = (np.concatenate([fa, fa, ea, ea]), np.concatenate([eb, fb, fb, eb]), np.concatenate([g, -bb, -g, -bb]))
    return re, im


def _rows(k: np.ndarray, copies: int) -> np.ndarray:
    return np.tile(k, copies)


def injection_forms(net: Network) -> QuadraticMap:
    """Rows P_0..P_(n−1), Q_0..Q_(n−1): net bus injections (per unit) of the bus voltages."""
    n = net.n_bus
    ybus = net.admittance()[0].tocoo()
    re, im = pair_terms(ybus.data, ybus.row, ybus.col, n)
    rows = np.concatenate([_rows(ybus.row, 4), _rows(ybus.row, 4) + n])
    quad = (rows, np.concatenate([re[0], im[0]]), np.concatenate([re[1], im[1]]), np.concatenate([re[2], im[2]]))
    names = [f"P[{int(b)}]" for b in net.bus[:, 0]] + [f"Q[{int(b)}]" for b in net.bus[:, 0]]
    return QuadraticMap.from_terms(2 * n, names, quad, ([], [], []))


def voltage_forms(net: Network) -> QuadraticMap:
    """Rows |V_i|² = e_i² + f_i² (per unit squared)."""
    n = net.n_bus
    i = np.arange(n)
    return QuadraticMap.from_terms(2 * n, [f"V2[{int(b)}]" for b in net.bus[:, 0]],
                                   (np.concatenate([i, i]), np.concatenate([i, i + n]), np.concatenate([i, i + n]),
                                    np.ones(2 * n)), ([], [], []))


def branch_flow_forms(net: Network) -> QuadraticMap:
    """Rows Pf, Qf, Pt, Qt for every in-service branch (4 rows per branch, per unit)."""
    n = net.n_bus
    yff, yft, ytf, ytt = net.branch_admittances()
    f, t = net.branch_ends()
    nl = len(f)
    k = np.arange(nl)
    parts = []
    for end, (y_self, y_other, a, b) in enumerate(((yff, yft, f, t), (ytt, ytf, t, f))):
        re1, im1 = pair_terms(y_self, a, a, n)
        re2, im2 = pair_terms(y_other, a, b, n)
        for q, (t1, t2) in enumerate(((re1, re2), (im1, im2))):
            row = 4 * k + 2 * end + q
            parts.append((np.concatenate([_rows(row, 4), _rows(row, 4)]),
                          np.concatenate([t1[0], t2[0]]), np.concatenate([t1[1], t2[1]]), np.concatenate([t1[2], t2[2]])))
    quad = tuple(np.concatenate([p[i] for p in parts]) for i in range(4))
    names = []
    for r in net.branch_on:
        fb, tb = int(net.branch[r, 0]), int(net.branch[r, 1])
        tag = f"{fb}-{tb}#{net.file_row('branch', int(r))}"
        names += [f"Pf[{tag}]", f"Qf[{tag}]", f"Pt[{tag}]", f"Qt[{tag}]"]
    return QuadraticMap.from_terms(2 * n, names, quad, ([], [], []))


def current_forms(net: Network) -> QuadraticMap:
    """Rows |I_f|², |I_t|² of the branch-end currents (per unit squared), 2 rows per in-service branch.

    I_f = Yff V_f + Yft V_t is linear in x, with Re I = Σ (g e − b f) and Im I = Σ (g f + b e),
    so |I_f|² = (Re I_f)² + (Im I_f)² is quadratic.
    """
    n = net.n_bus
    yff, yft, ytf, ytt = net.branch_admittances()
    f, t = net.branch_ends()
    rows_q, a_q, b_q, v_q, names = [], [], [], [], []
    for end, (y_self, y_other, a, b) in enumerate(((yff, yft, f, t), (ytt, ytf, t, f))):
        for k in range(len(f)):
            # real and imaginary parts of I as linear functionals on (e_a, f_a, e_b, f_b)
            idx = np.array([a[k], n + a[k], b[k], n + b[k]])
            g1, b1, g2, b2 = y_self[k].real, y_self[k].imag, y_other[k].real, y_other[k].imag
            re = np.array([g1, -b1, g2, -b2])
            im = np.array([b1, g1, b2, g2])
            outer = np.outer(re, re) + np.outer(im, im)
            ia, ib = np.triu_indices(4)
            coef = np.where(ia == ib, outer[ia, ib], 2.0 * outer[ia, ib])
            rows_q.append(np.full(len(ia), 2 * k + end))
            a_q.append(idx[ia])
            b_q.append(idx[ib])
            v_q.append(coef)
    for r in net.branch_on:
        tag = f"{int(net.branch[r, 0])}-{int(net.branch[r, 1])}#{net.file_row('branch', int(r))}"
        names += [f"I2f[{tag}]", f"I2t[{tag}]"]
    cat = (lambda xs: np.concatenate(xs) if xs else np.zeros(0))
    return QuadraticMap.from_terms(2 * n, names, (cat(rows_q), cat(a_q), cat(b_q), cat(v_q)), ([], [], []))


def angle_forms(net: Network) -> QuadraticMap:
    """Rows Im(V_f V̄_t) − tan(θmax) Re(V_f V̄_t) and tan(θmin) Re − Im (both ≤ 0 when the
    angle difference is inside [θmin, θmax]); only limits inside (−90°, 90°)."""
    n = net.n_bus
    f, t = net.branch_ends()
    br = net.branch[net.branch_on]
    rows_q, a_q, b_q, v_q, names = [], [], [], [], []
    out = 0
    for k in range(len(f)):
        for col, sign in ((BRANCH_ANGLE_HIGH, 1.0), (BRANCH_ANGLE_LOW, -1.0)):
            ang = br[k, col]
            if not -90.0 < ang < 90.0:
                continue
            tn = np.tan(np.radians(ang))
            # Re(V_f conj V_t) = e_f e_t + f_f f_t ; Im = f_f e_t − e_f f_t
            a = np.array([n + f[k], f[k], f[k], n + f[k]])
            b = np.array([t[k], n + t[k], t[k], n + t[k]])
            v = sign * np.array([1.0, -1.0, -tn, -tn])
            rows_q.append(np.full(4, out))
            a_q.append(a)
            b_q.append(b)
            v_q.append(v)
            names.append(f"angle{'max' if sign > 0 else 'min'}[{int(br[k, 0])}-{int(br[k, 1])}#{net.file_row('branch', int(net.branch_on[k]))}]")
            out += 1
    cat = (lambda xs: np.concatenate(xs) if xs else np.zeros(0))
    return QuadraticMap.from_terms(2 * n, names, (cat(rows_q), cat(a_q), cat(b_q), cat(v_q)), ([], [], []))
