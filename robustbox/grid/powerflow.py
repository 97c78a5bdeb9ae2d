"""Newton–Raphson AC power flow in polar coordinates.

Standard formulation (W. F. Tinney and C. E. Hart, "Power flow solution by
Newton's method", IEEE Trans. PAS-86, 1967): unknown angles at PV and PQ
buses, unknown magnitudes at PQ buses; the slack bus absorbs the balance.
With ``participation`` (per bus, summing to 1) a scalar α distributes the
balance: every bus's P mismatch includes α·participation, and only the slack
bus angle is fixed.  Independent of the certificate code on purpose (it is
the validator's engine): it uses only the network's admittance matrix.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from .network import GEN_P, GEN_Q, BUS_V_ANG, GEN_V_SET, BUS_V_MAG, Network


@dataclass(frozen=True)
class PowerFlowResult:
    """Bus voltages (complex, per unit), convergence, and the distributed-slack share α (per unit)."""

    voltage: np.ndarray
    converged: bool
    iterations: int
    mismatch_pu: float
    alpha_pu: float


def _ds_dv(ybus, v: np.ndarray):
    """Partial derivatives of bus injections S(V) w.r.t. angle and magnitude (dense or sparse like ybus)."""
    i_bus = ybus @ v
    if not sp.issparse(ybus):
        vn = v / np.abs(v)
        ds_dvm = v[:, None] * np.conj(ybus * vn[None, :]) + np.diag(np.conj(i_bus) * vn)
        ds_dva = 1j * (np.diag(v * np.conj(i_bus)) - v[:, None] * np.conj(ybus * v[None, :]))
        return ds_dva, ds_dvm
    dv = sp.diags(v)
    dvn = sp.diags(v / np.abs(v))
    di = sp.diags(i_bus)
    ds_dvm = dv @ np.conj(ybus @ dvn) + np.conj(di) @ dvn
    ds_dva = 1j * dv @ np.conj(di - ybus @ dv)
    return sp.csr_matrix(ds_dva), sp.csr_matrix(ds_dvm)


DENSE_BELOW = 150  # buses: below this a dense Jacobian is faster (common practice, no source)


def newton_power_flow(ybus: sp.csr_matrix, s_sched: np.ndarray, v0: np.ndarray, slack: int, pv: np.ndarray,
                      pq: np.ndarray, participation: np.ndarray | None = None, tol: float = 1e-10,
                      max_iter: int = 30) -> PowerFlowResult:
    """Solve S(V) = s_sched (+ α·participation on P) with |V| held at PV and slack buses.

    Stops early when the mismatch grows past 1e6 pu (divergence).
    """
    dense = ybus.shape[0] < DENSE_BELOW
    y = ybus.toarray() if dense else ybus
    v = np.asarray(v0, dtype=complex).copy()
    va, vm = np.angle(v), np.abs(v)
    dist = participation is not None
    ang_idx = np.concatenate([pv, pq]) if not dist else np.setdiff1d(np.arange(len(v)), [slack])
    p_idx = ang_idx if not dist else np.arange(len(v))
    alpha = 0.0

    def mismatch() -> np.ndarray:
        s = v * np.conj(y @ v) - s_sched
        p = s.real[p_idx] - (alpha * participation[p_idx] if dist else 0.0)
        return np.concatenate([p, s.imag[pq]])

    f = mismatch()
    it = 0
    while np.max(np.abs(f), initial=0.0) > tol and it < max_iter:
        it += 1
        dva, dvm = _ds_dv(y, v)
        if dense:
            jac = np.block([[dva[np.ix_(p_idx, ang_idx)].real, dvm[np.ix_(p_idx, pq)].real],
                            [dva[np.ix_(pq, ang_idx)].imag, dvm[np.ix_(pq, pq)].imag]])
            if dist:
                jac = np.hstack([jac, np.concatenate([-participation[p_idx], np.zeros(len(pq))])[:, None]])
            try:
                dx = np.linalg.solve(jac, -f)
            except np.linalg.LinAlgError:
                break
        else:
            blocks = [[dva[p_idx][:, ang_idx].real, dvm[p_idx][:, pq].real],
                      [dva[pq][:, ang_idx].imag, dvm[pq][:, pq].imag]]
            jac = sp.bmat(blocks, format="csc")
            if dist:
                col = sp.csc_matrix(np.concatenate([-participation[p_idx], np.zeros(len(pq))])[:, None])
                jac = sp.hstack([jac, col], format="csc")
            try:
                dx = spla.spsolve(jac, -f)
            except RuntimeError:
                break
        if not np.all(np.isfinite(dx)):
            break
        na = len(ang_idx)
        va[ang_idx] += dx[:na]
        vm[pq] += dx[na:na + len(pq)]
        if dist:
            alpha += dx[-1]
        v = vm * np.exp(1j * va)
        f = mismatch()
        if not np.all(np.isfinite(f)) or np.max(np.abs(f)) > 1e6:
            break
    err = float(np.max(np.abs(f), initial=0.0)) if np.all(np.isfinite(f)) else float("inf")
    return PowerFlowResult(v, bool(err <= tol), it, err, alpha)


def case_power_flow(net: Network, tol: float = 1e-10) -> PowerFlowResult:
    """Power flow with the case's own set-points (gen Pg/Qg, Vg; loads Pd/Qd), read as the case format documents it
    (its bus types: every bus with an in-service generator is PV)."""
    ybus = net.admittance()[0]
    s, pv, pq = net.bus_kinds(reactive_range=False)
    on = net.gen_on
    gb = net.gen_bus_idx()
    sg = np.zeros(net.n_bus, dtype=complex)
    np.add.at(sg, gb, (net.gen[on, GEN_P] + 1j * net.gen[on, GEN_Q]) / net.base_mva)
    vm = net.bus[:, BUS_V_MAG].copy()
    vm[gb] = net.gen[on, GEN_V_SET]
    v0 = vm * np.exp(1j * np.radians(net.bus[:, BUS_V_ANG]))
    return newton_power_flow(ybus, sg - net.load_pu(), v0, s, pv, pq, tol=tol)
