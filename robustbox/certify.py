"""The certificate: a box of injections for which a solution provably exists.

Given a :class:`~robustbox.quadratic.QuadraticSystem` and an operating point
z̄, the state responds to injection changes p through a recourse policy
z = z̄ + K w (K a right inverse of J = DF(z̄)).  The fixed-point map

    T(w) = w − (F(z̄ + K w) − ȳ − E p) = (I − J K) w + E p − r0 − q(K w)

maps the box |w| ≤ ω into itself whenever the bound map T̂(ω) ≤ ω
(Brouwer's fixed-point theorem), and then every fixed point lies in
E p + [−a_lo(ω), a_up(ω)], which bounds every monitored quantity.  All
conditions are evaluated with proven floating-point error bounds, so a
certificate holds in exact arithmetic.  The mathematics follows the
self-mapping inner approximations of power-flow feasibility sets (Nguyen,
Dvijotham, Turitsyn, IEEE Trans. Power Systems 2019; Lee et al., IEEE TCNS
2019), with exact Jacobian-hull remainders for quadratic maps.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field, replace
from typing import Literal

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.optimize import linprog

from .bounds import RemainderBound, RemainderOptions
from .errors import CertificateError, OperatingPointError
from .quadratic import QuadraticSystem
from .rounding import compact_upper, gamma, inflate, matvec_upper, sum_error

Objective = Literal["uniform", "hosting", "widths", "volume", "verify"]


@dataclass(frozen=True)
class CertifyOptions:
    """Options of :func:`certify`.

    remainder:            which remainder bounds to combine (tightest per row).
    max_fraction:         the largest fraction of the requested band to look for
                          (1.0: stop at the requested band).
    inflation:            ε in the ω iteration ω ← (1 + ε) T̂(ω).
    max_iterations:       cap on that iteration (a cap reached counts as "no ω").
    precision:            relative precision of the certified fraction.
    residual_tolerance:   largest |F(z̄) − ȳ| accepted at the operating point
                          (in the equations' units, per unit for networks).
    condition_limit:      largest accepted 1-norm condition estimate of J.
    recenter:             for an asymmetric band (uniform objective), also try moving the
                          operating point to the solution at the box centre (the residual
                          F(z_c) − ȳ is carried exactly like r0); keeps the better box.
    """

    remainder: RemainderOptions = RemainderOptions()
    max_fraction: float = 1.0
    inflation: float = 1e-3
    max_iterations: int = 30
    precision: float = 1e-3
    residual_tolerance: float = 1e-6
    condition_limit: float = 1e12
    recenter: bool = True


@dataclass(frozen=True)
class ConditionCheck:
    """Outcome of evaluating every certificate condition at one (box, ω).

    ``worst_margin`` is the smallest normalised margin (≥ 0: all hold);
    ``binding`` names the condition that has it.
    """

    holds: bool
    worst_margin: float
    binding: str
    self_map_margin: float
    limit_margin: float


@dataclass(eq=False)
class Certificate:
    """A certified box of injection deviations p ∈ [lower, upper] around ȳ.

    Units are those of the system (per unit for networks).  ``omega`` is the
    radius of the recourse region in w, ``state_radius`` = |K| ω bounds the
    state deviation |z − z̄| for every injection in the box.  ``status`` is
    "certified" (all conditions hold, proven) or, for ``verify``,
    "rejected" with ``binding`` naming the failed condition.
    """

    status: str
    objective: str
    names: tuple[str, ...]
    lower: np.ndarray
    upper: np.ndarray
    certified_fraction: float
    omega: np.ndarray
    state_point: np.ndarray
    state_radius: np.ndarray
    policy: str
    binding: str
    worst_margin: float
    message: str
    timings_s: dict[str, float] = field(default_factory=dict)
    _engine: "_Conditions | None" = field(default=None, repr=False)

    @property
    def state_lower(self) -> np.ndarray:
        return self.state_point - self.state_radius

    @property
    def state_upper(self) -> np.ndarray:
        return self.state_point + self.state_radius

    def recheck(self) -> ConditionCheck:
        """Re-evaluate every condition for the stored box and ω, with proven rounding bounds."""
        if self._engine is None:
            raise CertificateError("this certificate carries no system to recheck against")
        return self._engine.check(self.lower, self.upper, self.omega)

    def limit_response(self, rows: np.ndarray) -> LimitResponse:
        """How the monitored rows ``rows`` move with the injections over the certified box.

        For every p in [lower, upper] the certified state z(p) satisfies, row by row,
            h(z(p)) + A p  ∈  value + gain p + [−below, above]
        (units of the rows).  ``gain`` is the first-order response C = ∇h K E + A at the certificate's
        point (the recentred one, if the point was moved), ``value`` = h there; ``below``/``above``
        are the same proven bounds the limit conditions use (remainder, linearisation and rounding
        errors, plus the rounding of C itself over the box), so they are upper bounds in exact arithmetic.
        """
        if self._engine is None or self.status != "certified":
            raise CertificateError("only a certified box with its system carries a response")
        eng = self._engine
        rows = np.asarray(rows, dtype=np.int64)
        terms = eng.region_terms(self.omega)
        h_bar = eng.h_bar[rows]
        up, lo = terms["lim_up"][rows], terms["lim_lo"][rows]
        gain, gain_err = eng.injection_coefficients(rows)
        reach = np.maximum(self.upper, -self.lower)
        spread = matvec_upper(gain_err, reach) if gain.shape[1] else np.zeros(len(rows))
        above = (up - h_bar) + spread
        above = above + sum_error(up, h_bar, spread)
        below = (h_bar - lo) + spread
        below = below + sum_error(lo, h_bar, spread)
        names = tuple(eng.names_lim[int(r)] for r in rows)
        return LimitResponse(names, h_bar.copy(), gain, np.maximum(below, 0.0), np.maximum(above, 0.0))


@dataclass(frozen=True, eq=False)
class LimitResponse:
    """Certified response of monitored quantities: h(z(p)) + A p ∈ value + gain p + [−below, above].

    Units are those of the rows; p is the injection deviation from the system's nominal values, for
    every p inside the certificate's box.
    """

    names: tuple[str, ...]
    value: np.ndarray
    gain: np.ndarray
    below: np.ndarray
    above: np.ndarray


# --------------------------------------------------------------------- policy
def _recourse_matrix(jac: sp.csr_matrix, names: tuple[str, ...], limit: float) -> tuple[np.ndarray, str]:
    """A right inverse K of J (J K ≈ I) and the policy's description."""
    m, n = jac.shape
    if n < m:
        raise CertificateError(f"{m} equations but only {n} recourse variables: the system is over-determined")
    if n == m:
        try:
            lu = spla.splu(sp.csc_matrix(jac))
            k = lu.solve(np.eye(m))
        except RuntimeError:
            raise CertificateError(f"the Jacobian is singular at the operating point; "
                                   f"equations involved: {_weak_rows(jac, names)}") from None
        policy = "inverse Jacobian: held quantities stay at their values, every equation's injection is met by the state"
    else:
        try:
            lu = spla.splu(sp.csc_matrix(jac @ jac.T))
            k = np.asarray(jac.T @ lu.solve(np.eye(m)))
        except RuntimeError:
            raise CertificateError(f"the Jacobian has dependent rows at the operating point; "
                                   f"equations involved: {_weak_rows(jac, names)}") from None
        policy = "minimum-change right inverse Jᵀ(JJᵀ)⁻¹: the state moves by the least-squares change"
    if not np.all(np.isfinite(k)):
        raise CertificateError(f"the Jacobian is singular at the operating point; equations involved: {_weak_rows(jac, names)}")
    cond = spla.norm(jac, 1) * np.abs(k).sum(axis=0).max(initial=0.0)
    if cond > limit:
        worst = np.argsort(-np.abs(k).sum(axis=0))[:5]
        raise CertificateError(f"the Jacobian is ill-conditioned at the operating point (1-norm condition "
                               f"estimate {cond:.3g} > {limit:.3g}); equations involved: "
                               + ", ".join(names[i] for i in worst))
    return np.ascontiguousarray(k), policy


def _weak_rows(jac: sp.csr_matrix, names: tuple[str, ...]) -> str:
    """Names of the equations with the largest weight in J's smallest left singular vector."""
    if max(jac.shape) > 3000:
        return "(system too large to locate them; check islanded buses and duplicate equations)"
    u, _, _ = np.linalg.svd(jac.toarray())
    return ", ".join(names[i] for i in np.argsort(-np.abs(u[:, -1]))[:5])


# ----------------------------------------------------------------- conditions
class _Conditions:
    """Everything that does not depend on the box or ω, precomputed once."""

    def __init__(self, system: QuadraticSystem, point: np.ndarray, k: np.ndarray, policy: str,
                 remainder: RemainderOptions) -> None:
        self.system, self.point, self.k, self.policy = system, point, k, policy
        eq, lim, unc = system.equations, system.limits, system.uncertain
        m = eq.n_rows
        self.abs_k = np.ascontiguousarray(inflate(np.abs(k), 0))
        jac, jac_err = eq.jacobian_with_error(point)
        jk = np.asarray(jac @ k)
        inner = int(np.diff(jac.indptr).max(initial=1))
        # |I − J K| ≤ |I − fl(J̃K)| + γ|J̃||K| + |J − J̃||K|
        spread = np.asarray((abs(jac) * gamma(inner + 1) + jac_err) @ self.abs_k)
        self.abs_ijk = inflate(np.abs(np.eye(m) - jk), 1) + inflate(spread, inner)
        value, err = eq.evaluate_with_error(point)
        self.r0 = value - system.target
        self.r0_err = inflate(err + sum_error(value, system.target), 1)
        anchor = None if system.symmetry is None else np.asarray(system.symmetry @ point).ravel()
        self.eq_bound = RemainderBound(eq, k, self.abs_k, remainder, anchor)
        e = unc.equation_map
        self.e_pos, self.e_neg = e.maximum(0).tocsr(), (-e).maximum(0).tocsr()
        # limits
        self.h_bar, h_err = lim.evaluate_with_error(point)
        self.h_err = inflate(h_err, 0)
        grad, grad_err = lim.jacobian_with_error(point)
        g = np.asarray(grad @ k)
        ginner = int(np.diff(grad.indptr).max(initial=1))
        self.lin_err = sp.csr_matrix(grad_err + abs(grad) * inflate(gamma(ginner + 1), 0))
        self.g_pos, self.g_neg = np.maximum(g, 0.0), np.maximum(-g, 0.0)
        del g
        # coefficient bounds of the injections in the limits, C = G E + A: C⁺ + ΔC and C⁻ + ΔC
        c, c_err = self.injection_coefficients(slice(None))
        self.c_up = compact_upper(inflate(np.maximum(c, 0.0) + c_err, 0))  # inflate: the sum's own rounding
        self.c_dn = compact_upper(inflate(np.maximum(-c, 0.0) + c_err, 0))
        self.lim_bound = RemainderBound(lim, k, self.abs_k, remainder.for_limits(), anchor)
        n_der = 0 if system.derived is None else system.derived.shape[0]
        w = system.derived if n_der else sp.csr_matrix((0, lim.n_rows))
        self.w_pos, self.w_neg = w.maximum(0).tocsr(), (-w).maximum(0).tocsr()
        self.w_terms = int(np.diff(w.indptr).max(initial=1))
        self.row_upper = np.concatenate([system.limit_upper, system.derived_upper if n_der else np.zeros(0)])
        self.row_lower = np.concatenate([system.limit_lower, np.full(n_der, -np.inf)])
        width = self.row_upper - self.row_lower
        self.lim_scale = np.where(np.isfinite(width), np.maximum(width, 1e-9),
                                  np.maximum(np.abs(np.where(np.isfinite(self.row_upper), self.row_upper, 0.0)), 1e-9))
        self.names_eq = eq.names
        self.names_lim = tuple(lim.names) + tuple(system.derived_names)

    def injection_coefficients(self, rows: slice | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(C, ΔC) for the given monitored rows: C = fl(G E) + A, |G E + A − C| ≤ ΔC entrywise."""
        unc = self.system.uncertain
        g_pos, g_neg = self.g_pos[rows], self.g_neg[rows]
        if not unc.size:
            return np.zeros((g_pos.shape[0], 0)), np.zeros((g_pos.shape[0], 0))
        e = unc.equation_map
        c = np.asarray(e.T @ (g_pos - g_neg).T).T  # g_pos − g_neg is G exactly (one of the two is 0)
        c += unc.limit_map[rows].toarray()
        einner = int(np.diff(e.tocsc().indptr).max(initial=1))
        c_err = np.asarray(g_pos @ abs(e)) + np.asarray(g_neg @ abs(e))  # |G| |E|
        return c, inflate(gamma(einner + 2) * c_err, 1)

    def stack(self, up: np.ndarray, lo: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Bounds of all limit rows (monitored, then derived) from the monitored rows' bounds.

        ``up``/``lo`` bound h + A p from above/below; a derived row W(h + A p) is
        at most W⁺ up − W⁻ lo (with its rounding error added).
        """
        with np.errstate(invalid="ignore"):
            up_f, lo_f = np.where(np.isfinite(up), up, 0.0), np.where(np.isfinite(lo), lo, 0.0)
        d = self.w_pos @ up_f - self.w_neg @ lo_f
        # |fl(W⁺u − W⁻l) − (W⁺u − W⁻l)| ≤ γ_(k+1) (W⁺|u| + W⁻|l|)   (Higham, Lemma 3.1)
        mag = matvec_upper(self.w_pos, np.abs(up_f)) + matvec_upper(self.w_neg, np.abs(lo_f))
        d = d + inflate(gamma(self.w_terms + 1) * mag, 2)
        # a derived row that uses an unbounded monitored row is unbounded
        bad = (self.w_pos @ (~np.isfinite(up)).astype(float) + self.w_neg @ (~np.isfinite(lo)).astype(float)) > 0
        d = np.where(bad, np.inf, d)
        return np.concatenate([up, d]), np.concatenate([lo, np.full(len(d), -np.inf)])

    def stack_coefficients(self, c_up: np.ndarray, c_lo: np.ndarray) -> np.ndarray:
        """Nonnegative growth coefficients of the upper bounds of all limit rows.

        ``c_up`` (``c_lo``) is how fast the upper bound of h (of −h) grows; for a
        derived row W⁺ c_up + W⁻ c_lo.
        """
        return np.concatenate([c_up, self.w_pos @ c_up + self.w_neg @ c_lo], axis=0)

    # pieces ------------------------------------------------------------
    def injection_terms(self, lower: np.ndarray, upper: np.ndarray) -> tuple[np.ndarray, ...]:
        """Upper bounds of max(E p), max(−E p), max(C p), max(−C p) over the box."""
        u, ln = np.maximum(upper, 0.0), np.maximum(-lower, 0.0)
        ep_max = inflate(self.e_pos @ u + self.e_neg @ ln, 2 * self.system.uncertain.size)
        ep_neg = inflate(self.e_pos @ ln + self.e_neg @ u, 2 * self.system.uncertain.size)
        cp_max = matvec_upper(self.c_up, u) + matvec_upper(self.c_dn, ln)
        cp_neg = matvec_upper(self.c_up, ln) + matvec_upper(self.c_dn, u)
        return ep_max, ep_neg, inflate(cp_max, 2), inflate(cp_neg, 2)

    def region_terms(self, omega: np.ndarray) -> dict[str, np.ndarray]:
        """ω-dependent upper bounds: a_up, a_lo (equations) and the limit parts."""
        delta = matvec_upper(self.abs_k, omega)
        iab = matvec_upper(self.abs_ijk, omega)
        qlo, qhi = self.eq_bound(omega, delta)
        a_up = iab - self.r0 + self.r0_err - qlo
        a_up = a_up + sum_error(iab, self.r0, self.r0_err, qlo)
        a_lo = iab + self.r0 + self.r0_err + qhi
        a_lo = a_lo + sum_error(iab, self.r0, self.r0_err, qhi)
        hlo, hhi = self.lim_bound(omega, delta)
        # w − E p lies in [−a_lo, a_up] (signs free: a moved operating point shifts it), so
        # G (w − E p) ≤ G⁺ a_up + G⁻ a_lo and ≥ −(G⁺ a_lo + G⁻ a_up), with their rounding errors
        # (one pass over each of G⁺, G⁻ for all three products: they are large and dense)
        cols = np.stack([a_up, a_lo, np.abs(a_up) + np.abs(a_lo)])
        gp, gn = cols @ self.g_pos.T, cols @ self.g_neg.T
        g_up = gp[0] + gn[1]
        g_dn = gp[1] + gn[0]
        inner = self.g_pos.shape[1]
        g_err = inflate(gp[2], inner) + inflate(gn[2], inner)
        g_err = inflate(gamma(inner + 2) * g_err, 2)
        g_up, g_dn = g_up + g_err, g_dn + g_err
        lerr = matvec_upper(self.lin_err, delta)
        # h ≤ h̄ + err + Cp + g_up + hhi + lerr  ;  h ≥ h̄ − err − C(−p) − g_dn + hlo − lerr
        lim_up = self.h_bar + self.h_err + g_up + hhi + lerr
        lim_up = lim_up + sum_error(self.h_bar, self.h_err, g_up, hhi, lerr)
        lim_lo = self.h_bar - self.h_err - g_dn + hlo - lerr
        lim_lo = lim_lo - sum_error(self.h_bar, self.h_err, g_dn, hlo, lerr)
        return {"a_up": a_up, "a_lo": a_lo, "lim_up": lim_up, "lim_lo": lim_lo, "delta": delta}

    def bound_map(self, omega: np.ndarray, ep_max: np.ndarray, ep_neg: np.ndarray,
                  terms: dict[str, np.ndarray] | None = None) -> np.ndarray:
        """T̂(ω): proven upper bound of |T(w)| over |w| ≤ ω."""
        terms = terms or self.region_terms(omega)
        up = ep_max + terms["a_up"]
        up = up + sum_error(ep_max, terms["a_up"])
        lo = ep_neg + terms["a_lo"]
        lo = lo + sum_error(ep_neg, terms["a_lo"])
        return np.maximum(np.maximum(up, lo), 0.0)

    def margins(self, lower: np.ndarray, upper: np.ndarray, omega: np.ndarray,
                terms: dict[str, np.ndarray] | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(self-map margins, upper-limit margins, lower-limit margins), ≥ 0 where a condition holds."""
        ep_max, ep_neg, cp_max, cp_neg = self.injection_terms(lower, upper)
        terms = terms or self.region_terms(omega)
        that = self.bound_map(omega, ep_max, ep_neg, terms)
        up, lo = self.limit_bounds(terms, cp_max, cp_neg)
        with np.errstate(invalid="ignore"):
            mu = np.where(np.isfinite(self.row_upper), self.row_upper - up, np.inf)
            ml = np.where(np.isfinite(self.row_lower), lo - self.row_lower, np.inf)
        return omega - that, mu, ml

    def limit_bounds(self, terms: dict[str, np.ndarray], cp_max: np.ndarray, cp_neg: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray]:
        """Proven upper and lower bounds of every limit row (monitored and derived)."""
        up = terms["lim_up"] + cp_max
        up = up + sum_error(terms["lim_up"], cp_max)
        lo = terms["lim_lo"] - cp_neg
        lo = lo - sum_error(terms["lim_lo"], cp_neg)
        return self.stack(up, lo)

    def check(self, lower: np.ndarray, upper: np.ndarray, omega: np.ndarray) -> ConditionCheck:
        """Evaluate every condition; ``holds`` only if all hold with proven rounding."""
        ms, mu, ml = self.margins(lower, upper, omega)
        # exact comparisons of proven bounds (a subtraction a − b ≥ 0 is exact in sign)
        scale = np.maximum(omega, 1e-300)
        rel_s = ms / scale
        rel_u, rel_l = mu / self.lim_scale, ml / self.lim_scale
        holds = bool(np.all(ms >= 0) and np.all(mu >= 0) and np.all(ml >= 0))
        cands = []
        if rel_s.size:
            i = int(np.argmin(rel_s))
            cands.append((rel_s[i], f"self-mapping of equation '{self.names_eq[i]}'"))
        if rel_u.size:
            i = int(np.argmin(rel_u))
            cands.append((rel_u[i], f"upper limit '{self.names_lim[i]}'"))
            i = int(np.argmin(rel_l))
            cands.append((rel_l[i], f"lower limit '{self.names_lim[i]}'"))
        worst, binding = min(cands, key=lambda c: c[0]) if cands else (np.inf, "none")
        smin = float(rel_s.min(initial=np.inf))
        lmin = float(min(rel_u.min(initial=np.inf), rel_l.min(initial=np.inf)))
        return ConditionCheck(holds, float(worst), binding, smin, lmin)

    def least_omega(self, lower: np.ndarray, upper: np.ndarray, inflation: float, max_iter: int,
                    start: np.ndarray | None = None, stop_on_limits: bool = True) -> tuple[bool, np.ndarray]:
        """(found, ω): the smallest ω (up to inflation) with T̂(ω) ≤ ω and all limits holding.

        When none is found, ``found`` is False and ω is the last iterate.

        Iterates ω ← max(ω, (1 + ε) T̂(ω)) from ω = max(box reach, start); the
        sequence increases, and limits that fail on the way fail at every
        larger ω too (all bounds grow with ω), which ends the search early.
        Every third step a geometric extrapolation of the increments is tried
        and kept when it is itself a valid ω (then ω is valid, not least);
        six growing increments in a row end the search as divergent.
        """
        ep_max, ep_neg, cp_max, cp_neg = self.injection_terms(lower, upper)
        # start below every fixed point: the reach of the box after the residual's shift (≥ 0)
        omega = np.maximum(np.maximum(ep_max - self.r0 - self.r0_err, ep_neg + self.r0 - self.r0_err), 0.0)
        if start is not None:
            omega = np.maximum(omega, start)
        step_prev, growing = 0.0, 0
        for k in range(max_iter):
            terms = self.region_terms(omega)
            if stop_on_limits and self._limits_fail(terms, cp_max, cp_neg):
                return False, omega
            that = self.bound_map(omega, ep_max, ep_neg, terms)
            if not np.all(np.isfinite(that)):
                return False, omega
            if np.all(that <= omega):
                return True, omega
            new = np.maximum(omega, (1.0 + inflation) * that)
            step = float(np.max(new - omega))
            rate = step / step_prev if step_prev > 0 else np.inf
            growing = growing + 1 if rate >= 1.0 else 0
            if k > 5 and growing >= 6:
                return False, new  # increments no longer shrink: no fixed point within reach
            if k % 2 == 1 and rate < 0.995:
                # geometric extrapolation of the remaining increments; accepted only if it is a valid ω
                trial = new + (new - omega) * (1.05 * rate / (1.0 - rate))
                t_terms = self.region_terms(trial)
                if np.all(self.bound_map(trial, ep_max, ep_neg, t_terms) <= trial) and not (
                        stop_on_limits and self._limits_fail(t_terms, cp_max, cp_neg)):
                    return True, trial
            omega, step_prev = new, step
        return False, omega

    def _limits_fail(self, terms: dict[str, np.ndarray], cp_max: np.ndarray, cp_neg: np.ndarray) -> bool:
        up, lo = self.limit_bounds(terms, cp_max, cp_neg)
        with np.errstate(invalid="ignore"):
            return bool(np.any(up > self.row_upper) or np.any(lo < self.row_lower))


# ------------------------------------------------------------------- searches
def _band(system: QuadraticSystem) -> tuple[np.ndarray, np.ndarray]:
    return system.uncertain.band_lower.astype(float), system.uncertain.band_upper.astype(float)


def _fraction_in(lower: np.ndarray, upper: np.ndarray, wl: np.ndarray, wu: np.ndarray) -> float:
    """Largest t with t·band ⊆ [lower, upper]."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ratios = np.concatenate([np.where(wu > 0, upper / wu, np.inf), np.where(wl > 0, -lower / wl, np.inf)])
    return float(min(ratios.min(initial=np.inf), 1e300))


def _describe_box(lower: np.ndarray, upper: np.ndarray, wl: np.ndarray, wu: np.ndarray,
                  names: tuple[str, ...]) -> str:
    """Widths of a box against the requested band, for a message (LP objectives)."""
    band = wl + wu
    total = float(np.sum(upper - lower) / np.sum(band)) if np.sum(band) > 0 else 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        each = np.where(band > 0, (upper - lower) / band, np.inf)
    k = int(np.argmin(each))
    return (f"widths {total:.4g} of the requested band's total width, per injection "
            f"{float(each.min()):.3g} ('{names[k]}') to {float(each[np.isfinite(each)].max(initial=0)):.3g}")


def _uniform(eng: _Conditions, opts: CertifyOptions, wl: np.ndarray, wu: np.ndarray) -> tuple[float, np.ndarray]:
    """Largest t ≤ max_fraction with [−t wl, t wu] certified: bisection on t (least ω at each t),
    then a scan of ω's scale around the last least ω (:func:`_scan_scale`)."""
    def it(t: float, start: np.ndarray | None = None) -> np.ndarray | None:
        found, omega = eng.least_omega(-t * wl, t * wu, opts.inflation, opts.max_iterations, start)
        return omega if found else None

    omega0 = it(0.0)
    if omega0 is None:
        _, last = eng.least_omega(0 * wl, 0 * wu, opts.inflation, opts.max_iterations, stop_on_limits=False)
        why = eng.check(0 * wl, 0 * wu, last)
        raise CertificateError(f"no certificate even for a zero box: {why.binding} fails (normalised margin "
                               f"{why.worst_margin:.3g}); the residual or Jacobian at the operating point leaves "
                               "no self-mapping region, or that limit has no room")
    # the limits alone, linearised (remainders at ω0 only), bound t from above
    hi = min(opts.max_fraction, _max_t_at(eng, omega0, wl, wu, limits_only=True) * (1 + 1e-9))
    if hi <= 0:
        return 0.0, omega0
    om = it(hi, omega0)
    if om is not None:
        return hi, om
    best_t, best_omega, t_fail = 0.0, omega0, hi
    # bracket: steps of 8 down from hi, then geometric bisection (the answer may be far below hi)
    while best_t == 0.0 and t_fail > hi * 1e-9:
        om = it(t_fail / 8.0, omega0)
        if om is not None:
            best_t, best_omega = t_fail / 8.0, om
        else:
            t_fail /= 8.0
    if best_t == 0.0:
        return 0.0, omega0
    while t_fail > best_t * (1 + opts.precision):
        mid = np.sqrt(best_t * t_fail)
        om = it(mid, best_omega)  # an ω valid at a smaller t lies below the least one at mid: a valid start
        if om is None:
            t_fail = mid
        else:
            best_t, best_omega = mid, om
    # the least ω's shape, scaled: ω = τ ω*, closed form in τ
    t_scan, om_scan = _scan_scale(eng, best_omega, wl, wu, opts.max_fraction)
    if t_scan > best_t:
        return t_scan, om_scan
    return best_t, best_omega


def _max_t_at(eng: _Conditions, omega: np.ndarray, wl: np.ndarray, wu: np.ndarray, limits_only: bool = False) -> float:
    """Largest t for which [−t wl, t wu] satisfies every condition at this fixed ω (floating point);
    with ``limits_only`` the self-mapping rows are left out."""
    slack, coef = _slack_rows(eng, omega, wl, wu, limits_only)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        if np.any(slack < 0):
            return -1.0
        ratio = np.where(coef > 0, slack / coef, np.inf)
    return float(np.nanmin(ratio, initial=np.inf))


def _slack_rows(eng: _Conditions, omega: np.ndarray, wl: np.ndarray, wu: np.ndarray, limits_only: bool = False
                ) -> tuple[np.ndarray, np.ndarray]:
    """(slack, coef): at this ω the box [−t wl, t wu] meets every condition iff slack ≥ t·coef (floating point)."""
    terms = eng.region_terms(omega)
    s_up, s_lo, c_up, c_lo = eng.injection_terms(-wl, wu)
    up, lo = eng.stack(terms["lim_up"], terms["lim_lo"])
    n_mon = len(c_lo)
    with np.errstate(invalid="ignore"):
        slack = np.concatenate([omega - terms["a_up"], omega - terms["a_lo"],
                                eng.row_upper - up, lo[:n_mon] - eng.row_lower[:n_mon]])
    coef = np.concatenate([s_up, s_lo, eng.stack_coefficients(c_up, c_lo), c_lo])
    if limits_only:
        m = len(s_up)
        slack, coef = slack[2 * m:], coef[2 * m:]
    return slack, coef


def _scan_scale(eng: _Conditions, omega: np.ndarray, wl: np.ndarray, wu: np.ndarray,
                cap: float) -> tuple[float, np.ndarray]:
    """Largest t over ω = τ ω* (τ > 0); the result is rechecked with proven bounds.

    Every bound is a nonnegative quadratic form in ω plus linear and constant parts, so each row's
    slack is a quadratic in τ: three evaluations (τ = 0, 1, 2) give it, and t(τ) = min_i slack_i(τ)/coef_i
    is maximised on a grid of τ, then refined.  The proven recheck backs t off until it holds.
    """
    s0, coef = _slack_rows(eng, 0.0 * omega, wl, wu)
    s1, _ = _slack_rows(eng, omega, wl, wu)
    s2, _ = _slack_rows(eng, 2.0 * omega, wl, wu)
    keep = np.isfinite(s0) & np.isfinite(s1) & np.isfinite(s2)
    s0, s1, s2, coef = s0[keep], s1[keep], s2[keep], coef[keep]
    c2 = 0.5 * (s2 - 2.0 * s1 + s0)
    c1 = s1 - s0 - c2
    pos = coef > 0
    inv = np.where(pos, 1.0 / np.where(pos, coef, 1.0), 0.0)

    def t_of(taus: np.ndarray) -> np.ndarray:
        sl = s0[:, None] + c1[:, None] * taus[None] + c2[:, None] * taus[None] ** 2
        with np.errstate(over="ignore", invalid="ignore"):
            t = np.where(pos[:, None], sl * inv[:, None], np.where(sl >= 0, np.inf, -np.inf)).min(axis=0)
        return np.minimum(t, cap)

    taus = np.geomspace(1e-2, 1e2, 61)
    vals = t_of(taus)
    i = int(np.argmax(vals))
    fine = np.linspace(taus[max(i - 1, 0)], taus[min(i + 1, len(taus) - 1)], 21)
    fvals = t_of(fine)
    j = int(np.argmax(fvals))
    tau, t = float(fine[j]), float(fvals[j])
    for _ in range(60):
        if t <= 0:
            break
        if eng.check(-t * wl, t * wu, tau * omega).holds:
            return t, tau * omega
        t *= 1.0 - 1e-5
    return 0.0, omega


def _lp_box(eng: _Conditions, omega: np.ndarray, wl: np.ndarray, wu: np.ndarray, cap: float,
            weights: np.ndarray, lower_fixed: float | None, volume: bool = False) -> tuple[np.ndarray, np.ndarray] | None:
    """Maximise Σ weights·(u − l) at fixed ω with HiGHS (or the log-volume with Clarabel); None if infeasible.

    ``lower_fixed``: None, or the fraction of the band's lower side at which the lower ends are fixed.

    The rows are the conditions of the certificate at this ω, linear in (u, −l); their right-hand sides
    are shrunk by 1e-7 (relative) and the box is rechecked with proven bounds by the caller.
    """
    s = len(wl)
    terms = eng.region_terms(omega)
    e_pos, e_neg = eng.e_pos.toarray(), eng.e_neg.toarray()
    cp, cn = eng.c_up, eng.c_dn
    up, lo = eng.stack(terms["lim_up"], terms["lim_lo"])
    n_mon = cp.shape[0]
    a_rows = [np.hstack([e_pos, e_neg]), np.hstack([e_neg, e_pos]),
              eng.stack_coefficients(np.hstack([cp, cn]), np.hstack([cn, cp])), np.hstack([cn, cp])]
    rhs = [omega - terms["a_up"], omega - terms["a_lo"],
           eng.row_upper - up, lo[:n_mon] - eng.row_lower[:n_mon]]
    a_ub, b_ub = np.vstack(a_rows), np.concatenate(rhs)
    finite = np.isfinite(b_ub)
    a_ub, b_ub = a_ub[finite], b_ub[finite]
    if np.any(b_ub < 0):
        return None
    active = np.any(a_ub != 0, axis=1)
    a_ub, b_ub = a_ub[active], b_ub[active] * (1 - 1e-7)
    fixed = None if lower_fixed is None else lower_fixed * wl
    lb = np.concatenate([np.zeros(s), np.zeros(s) if fixed is None else fixed])
    ub = np.concatenate([cap * wu, cap * wl if fixed is None else fixed])
    if volume:
        x = _volume_box(a_ub, b_ub, lb, ub, weights)
    else:
        res = linprog(-np.concatenate([weights, weights]), A_ub=sp.csr_matrix(a_ub) if a_ub.size else None,
                      b_ub=b_ub if a_ub.size else None, bounds=list(zip(lb, ub)), method="highs")
        x = res.x if res.status == 0 else None
    if x is None:
        return None
    x = np.clip(x, lb, ub)
    return -x[s:], x[:s]


def _uniform_best(system: QuadraticSystem, point: np.ndarray, k: np.ndarray, policy: str, eng: "_Conditions",
                  options: CertifyOptions, wl: np.ndarray, wu: np.ndarray
                  ) -> tuple[float, "_Conditions", np.ndarray, np.ndarray, str]:
    """The largest uniform fraction t, around the given point or (asymmetric bands, ``recenter``) the solution
    at the box centre, whichever certifies more; returns (t, engine, ω, point, policy text)."""
    recenter = options.recenter and bool(np.any(wl != wu))
    # with recentring ahead, the box around the given point is only its starting bracket: coarse
    first = replace(options, precision=max(options.precision, 0.02)) if recenter else options
    t, omega = _uniform(eng, first, wl, wu)
    if recenter and t < options.max_fraction:
        t_cap = min(options.max_fraction, _max_t_at(eng, omega, wl, wu, limits_only=True) * 4.0)
        del eng  # one engine at a time (each holds dense rows × m bounds): rebuilt below if needed
        moved = _recentered(system, point, options, wl, wu, t, max(t_cap, t))
        if moved is not None and moved[0] > t:
            t, eng, omega = moved
            return t, eng, omega, eng.point, eng.policy + "; operating point moved to the solution at the box centre"
        eng = _Conditions(system, point, k, policy, options.remainder)
        if first is not options:
            t, omega = _uniform(eng, options, wl, wu)  # the given point stays: full precision
    return t, eng, omega, point, policy


def _grow_each(eng: _Conditions, opts: CertifyOptions, lower: np.ndarray, upper: np.ndarray, omega: np.ndarray,
               cap: np.ndarray, weights: np.ndarray, steps: int = 12) -> tuple[np.ndarray, np.ndarray]:
    """Each injection's upper end in turn (largest weight first), grown by bisection to the largest value that
    still certifies with the others held; every accepted box is rechecked with proven bounds."""
    upper = upper.copy()
    for k in np.argsort(-weights, kind="stable"):
        if not weights[k] > 0 or upper[k] >= cap[k]:
            continue

        def certified(value: float):
            trial = upper.copy()
            trial[k] = value
            found, om = eng.least_omega(lower, trial, opts.inflation, opts.max_iterations)
            return om if found and eng.check(lower, trial, om).holds else None

        lo, hi = upper[k], cap[k]
        om = certified(hi)
        if om is not None:
            upper[k], omega = hi, om
            continue
        for _ in range(steps):
            mid = 0.5 * (lo + hi)
            om = certified(mid)
            if om is not None:
                lo, omega = mid, om
            else:
                hi = mid
        upper[k] = lo
    return upper, omega


def _worse_than_uniform(objective: str, lower: np.ndarray, upper: np.ndarray, t: float, wl: np.ndarray,
                        wu: np.ndarray, weights: np.ndarray) -> bool:
    """Whether the LP's box scores below the certified uniform box [−t wl, t wu] on the objective's own measure."""
    if objective == "volume":
        keep = weights > 0
        def logvol(w: np.ndarray) -> float:
            return float(np.sum(np.log(np.maximum(w[keep], 1e-300))))
        return logvol(upper - lower) < logvol(t * (wu + wl))
    if objective == "hosting":
        return float(weights @ upper) < float(weights @ (t * wu))
    return float(weights @ (upper - lower)) < float(weights @ (t * (wu + wl)))


def _volume_box(a_ub: np.ndarray, b_ub: np.ndarray, lb: np.ndarray, ub: np.ndarray,
                weights: np.ndarray) -> np.ndarray | None:
    """Maximise Σ_k [w_k > 0] log(u_k + ln_k) (the box's log-volume) under the same rows: a conic program."""
    import cvxpy as cp

    s = len(weights)
    # rows scaled to unit largest entry; entries below 1e-12 of it dropped with their largest effect moved to
    # the right-hand side (x is boxed in [lb, ub]), so every kept row is tighter than the original one
    scale = np.max(np.abs(a_ub), axis=1, initial=0.0) if a_ub.size else np.zeros(0)
    scale = np.where(scale > 0, scale, 1.0)
    a_ub, b_ub = a_ub / scale[:, None], b_ub / scale
    tiny = (np.abs(a_ub) < 1e-12) & (a_ub != 0)
    if np.any(tiny):
        worst = np.where(a_ub > 0, a_ub * ub[None, :], a_ub * lb[None, :])
        b_ub = b_ub - np.sum(np.where(tiny, worst, 0.0), axis=1)
        a_ub = np.where(tiny, 0.0, a_ub)
        if np.any(b_ub < 0):
            return None
    x = cp.Variable(2 * s)
    keep = np.flatnonzero(weights > 0)
    width = x[:s][keep] + x[s:][keep]
    cons = [x >= lb, x <= ub]
    if a_ub.size:
        cons.append(a_ub @ x <= b_ub)
    prob = cp.Problem(cp.Maximize(cp.sum(cp.log(width))), cons)
    try:
        prob.solve(solver=cp.CLARABEL)
    except cp.error.SolverError:
        return None
    if prob.status not in ("optimal", "optimal_inaccurate") or x.value is None:
        return None
    return np.asarray(x.value, dtype=float)


def _lp_search(eng: _Conditions, opts: CertifyOptions, wl: np.ndarray, wu: np.ndarray, weights: np.ndarray,
               lower_fixed: float | None, omega_start: np.ndarray, volume: bool = False
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Alternate LP at fixed ω and the least ω for the LP's box; keep the best proven box."""
    best: tuple[float, np.ndarray, np.ndarray, np.ndarray] | None = None
    for tau in (1.0, 1.5, 2.5):
        omega = tau * omega_start
        for _ in range(4):
            box = _lp_box(eng, omega, wl, wu, opts.max_fraction, weights, lower_fixed, volume)
            if box is None:
                break
            lower, upper = box
            for _ in range(40):
                if eng.check(lower, upper, omega).holds:
                    break
                lower, upper = lower * (1 - 1e-6), upper * (1 - 1e-6)
            else:
                break
            value = (float(np.sum(np.log(np.maximum(upper - lower, 1e-300)[weights > 0]))) if volume
                     else float(weights @ (upper - lower)))
            if best is None or value > best[0] + 1e-9 * abs(best[0]):
                best = (value, lower, upper, omega)
            found, tighter = eng.least_omega(lower, upper, opts.inflation, opts.max_iterations)
            if not found or np.allclose(tighter, omega):
                break
            omega = tighter
    if best is None:
        fixed = "" if lower_fixed is None else f" with the lower ends fixed at {lower_fixed:.4g} of the band's lower side"
        raise CertificateError(f"the box LP found no certifiable box{fixed} at any tried region radius")
    return best[1], best[2], best[3]


def _solve_at(system: QuadraticSystem, shift: np.ndarray, start: np.ndarray, max_iter: int = 30) -> np.ndarray | None:
    """Newton's method for F(z) = ȳ + shift from ``start``; None if it does not converge."""
    eq = system.equations
    goal = system.target + shift
    z = start.copy()
    scale = 1.0 + np.max(np.abs(goal), initial=0.0)
    for _ in range(max_iter):
        res = eq.evaluate(z) - goal
        if np.max(np.abs(res), initial=0.0) <= 1e-13 * scale:
            return z
        try:
            step = spla.spsolve(sp.csc_matrix(eq.jacobian(z)), -res) if eq.n_rows == eq.n_vars else None
        except RuntimeError:
            return None
        if step is None or not np.all(np.isfinite(step)):
            return None
        z = z + step
    res = eq.evaluate(z) - goal
    return z if np.max(np.abs(res), initial=0.0) <= 1e-10 * scale else None


def _recentered(system: QuadraticSystem, point: np.ndarray, opts: CertifyOptions, wl: np.ndarray, wu: np.ndarray,
                t_floor: float, t_cap: float) -> tuple[float, _Conditions, np.ndarray] | None:
    """Largest t in (t_floor, t_cap] certified around the solution at the centre of [−t wl, t wu].

    The operating point moves to z_c solving F(z_c) = ȳ + E p_c, p_c = t (wu − wl)/2; the box in the
    original coordinates is unchanged, so the residual F(z_c) − ȳ ≈ E p_c is carried as r0 and every
    condition is the same proven one.  Each trial factorises a new Jacobian: a handful of trials only.
    """
    e = system.uncertain.equation_map
    centre = 0.5 * (wu - wl)
    best = None
    z_prev = point

    def attempt(t: float):
        nonlocal z_prev
        z_c = _solve_at(system, e @ (t * centre), z_prev)
        if z_c is None:
            return None
        h = system.limits.evaluate(z_c) + system.uncertain.limit_map @ (t * centre)
        if np.any(h > system.limit_upper) or np.any(h < system.limit_lower):
            return None
        try:
            k, policy = _recourse_matrix(system.equations.jacobian(z_c), system.equations.names, opts.condition_limit)
        except CertificateError:
            return None
        eng = _Conditions(system, z_c, k, policy, opts.remainder)
        found, omega = eng.least_omega(-t * wl, t * wu, opts.inflation, opts.max_iterations)
        if not found:
            return None
        z_prev = z_c
        return (z_c, k, policy), omega  # the engine itself is rebuilt once at the end (memory)

    # doubling from the uncentred t (a centred box reaches about twice as far), then geometric bisection
    lo, hi = t_floor, t_cap
    doubling = lo > 0
    for _ in range(10):
        if hi <= lo * (1 + 10 * opts.precision):
            break
        if doubling and 2.0 * lo < hi:
            mid = 2.0 * lo
        else:
            mid = np.sqrt(lo * hi) if lo > 0 else 0.5 * hi
        got = attempt(mid)
        if got is None:
            hi, doubling = mid, False
        else:
            lo, best = mid, (mid, *got)
    if best is None:
        return None
    t, (z_c, k, policy), omega = best
    return t, _Conditions(system, z_c, k, policy, opts.remainder), omega


# ---------------------------------------------------------------------- entry
def certify(system: QuadraticSystem, point: np.ndarray, objective: Objective = "uniform", *,
            box: tuple[np.ndarray, np.ndarray] | None = None, weights: np.ndarray | None = None,
            options: CertifyOptions = CertifyOptions()) -> Certificate:
    """Certify a box of injection deviations around the operating point ``point``.

    objective:
      "uniform"  largest fraction t ≤ max_fraction of the requested band;
      "hosting"  lower ends fixed at the band's lower end, maximise Σ weights·upper (LP);
      "widths"   maximise Σ weights·(upper − lower) inside max_fraction × band (LP);
      "volume"   maximise the box's log-volume Σ log(upper − lower) inside max_fraction × band (conic, cvxpy);
      "verify"   check the given ``box = (lower, upper)``; status "certified" or "rejected".
    Raises OperatingPointError when the point does not solve the equations or
    violates a limit (the box is then empty), CertificateError when no
    certificate can be formed (singular Jacobian, no self-mapping region).
    """
    t0 = time.perf_counter()
    lower_kept = 1.0
    if not (options.max_fraction > 0 and np.isfinite(options.max_fraction)):
        raise CertificateError(f"max_fraction must be a positive number, got {options.max_fraction}")
    point = system.equations._check_point(point)
    eq = system.equations
    residual = eq.evaluate(point) - system.target
    worst = int(np.argmax(np.abs(residual))) if residual.size else 0
    if residual.size and abs(residual[worst]) > options.residual_tolerance:
        raise OperatingPointError(f"the operating point does not satisfy the equations: residual "
                                  f"{residual[worst]:.3g} in '{eq.names[worst]}' exceeds the tolerance "
                                  f"{options.residual_tolerance:g}")
    h = system.limits.evaluate(point)
    excess = np.maximum(h - system.limit_upper, system.limit_lower - h)
    flat = np.flatnonzero((system.limit_upper - system.limit_lower <= 0) & (excess <= 1e-9 * (1.0 + np.abs(h))))
    if flat.size:  # a limit with no width: the quantity cannot move at all
        names = ", ".join(f"'{system.limits.names[t]}' (lower = upper = {system.limit_upper[t]:.9g})" for t in flat[:5])
        raise CertificateError(f"limits with no width on quantities that move with the injections: {names}; "
                               "no box wider than a point can be certified (widen the limit, or hold the quantity "
                               "by the policy)")
    viol = [f"'{system.limits.names[t]}' = {h[t]:.9g} outside [{system.limit_lower[t]:.9g}, {system.limit_upper[t]:.9g}]"
            f" by {excess[t]:.3g}" for t in np.flatnonzero(excess > 0)]
    if system.derived is not None and system.derived.shape[0]:  # e.g. the faces of a flow polygon
        d = np.asarray(system.derived @ h).ravel()
        viol += [f"'{system.derived_names[t]}' = {d[t]:.9g} above {system.derived_upper[t]:.9g} by "
                 f"{d[t] - system.derived_upper[t]:.3g}" for t in np.flatnonzero(d > system.derived_upper)]
    if viol:
        raise OperatingPointError("the operating point violates " + f"{len(viol)} limit(s), so the box is empty: "
                                  + "; ".join(viol[:10]) + (" ..." if len(viol) > 10 else ""), viol)
    jac = eq.jacobian(point)
    k, policy = _recourse_matrix(jac, eq.names, options.condition_limit)
    eng = _Conditions(system, point, k, policy, options.remainder)
    t1 = time.perf_counter()
    wl, wu = _band(system)
    if weights is None:
        with np.errstate(divide="ignore"):
            weights = np.where(wl + wu > 0, 1.0 / (wl + wu), 0.0)
    weights = np.asarray(weights, dtype=float)
    if objective == "verify":
        if box is None:
            raise CertificateError("objective 'verify' needs box=(lower, upper)")
        lower, upper = (np.asarray(b, dtype=float).reshape(-1) for b in box)
        if lower.shape != wl.shape or upper.shape != wl.shape:
            raise CertificateError(f"box has {lower.shape[0]}/{upper.shape[0]} entries, the system has "
                                   f"{wl.shape[0]} uncertain injections")
        if np.any(lower > 0) or np.any(upper < 0):
            raise CertificateError("the box must contain the operating point (lower ≤ 0 ≤ upper)")
        _, omega = eng.least_omega(lower, upper, options.inflation, options.max_iterations)
    elif objective == "uniform":
        t, eng, omega, point, policy = _uniform_best(system, point, k, policy, eng, options, wl, wu)
        lower, upper = -t * wl, t * wu
    elif objective in ("hosting", "widths", "volume"):
        # from the best uniform box (recentred when that is larger): never worse than it
        t, eng, omega_u, point, policy = _uniform_best(system, point, k, policy, eng, options, wl, wu)
        if objective == "hosting":
            # the whole lower side if it can be kept, else the largest uniform fraction of it (certified above)
            try:
                lower, upper, omega = _lp_search(eng, options, wl, wu, weights, 1.0, omega_u)
            except CertificateError:
                lower_kept = t * (1.0 - 1e-6)  # just inside the certified uniform box: the LP shrinks its rows by 1e-7
                lower, upper, omega = _lp_search(eng, options, wl, wu, weights, lower_kept, omega_u)
            if _worse_than_uniform(objective, lower, upper, t, wl, wu, weights) and lower_kept >= 1.0:
                lower, upper, omega = -t * wl, t * wu, omega_u
            upper, omega = _grow_each(eng, options, lower, upper, omega, options.max_fraction * wu, weights)
        else:
            try:
                lower, upper, omega = _lp_search(eng, options, wl, wu, weights, None, omega_u, objective == "volume")
            except CertificateError:  # the uniform box is certified: never worse than it
                lower, upper, omega = -t * wl, t * wu, omega_u
        if _worse_than_uniform(objective, lower, upper, t, wl, wu, weights):
            lower, upper, omega = -t * wl, t * wu, omega_u
    else:
        raise CertificateError(f"unknown objective '{objective}' (uniform, hosting, widths, volume, verify)")
    t2 = time.perf_counter()
    check = eng.check(lower, upper, omega)
    t3 = time.perf_counter()
    if not check.holds and objective != "verify":
        raise CertificateError(f"internal: the proven recheck failed ({check.binding}, margin "
                               f"{check.worst_margin:.3g}); no certificate is returned")
    status = "certified" if check.holds else "rejected"
    frac = _fraction_in(lower, upper, wl, wu)
    if objective != "verify" and len(lower) and np.all(upper - lower <= 0):
        raise CertificateError(f"only a zero-width box can be certified around this point ({check.binding} leaves "
                               "no room); choose an operating point with room, e.g. a larger OPF margin")
    if status == "rejected":
        message = f"rejected: {check.binding} fails (margin {check.worst_margin:.3g})"
    elif objective == "uniform":
        message = f"certified: {frac:.4g} of the requested band; binding: {check.binding}"
    else:
        message = f"certified: {_describe_box(lower, upper, wl, wu, system.uncertain.names)}; binding: {check.binding}"
        if objective == "hosting" and lower_kept < 1.0:
            message += (f" (the whole lower side of the band cannot be kept: lower ends at {lower_kept:.4g} of it, "
                        "upper ends maximised)")
    return Certificate(status, objective, system.uncertain.names, lower, upper, frac, omega, point,
                       matvec_upper(eng.abs_k, omega), policy, check.binding, check.worst_margin, message,
                       {"setup_s": t1 - t0, "search_s": t2 - t1, "recheck_s": t3 - t2, "total_s": t3 - t0}, eng)
