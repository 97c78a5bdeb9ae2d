"""The certificate engine on random and analytic quadratic systems.

Every certified box is checked independently: at vertices and random
points of the box a root of the system is searched inside the certified
state region (bounded least squares with the test's own dense evaluation),
and every limit is checked at that root.

Numerical tolerances (residuals 1e-10, region and limit slack 1e-9) are common practice for
double-precision root finding, no source.
"""
from __future__ import annotations

import itertools

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.optimize import least_squares

from robustbox import CertificateError, OperatingPointError, QuadraticSystemError
from robustbox.bounds import RemainderOptions
from robustbox.certify import CertifyOptions, certify
from robustbox.quadratic import QuadraticMap, QuadraticSystem, UncertainSet


def _dense_map(qs: np.ndarray, b: np.ndarray, names: list[str]) -> QuadraticMap:
    rows, a_idx, b_idx, vals = [], [], [], []
    for j, q in enumerate(qs):
        for a, c in itertools.product(range(q.shape[0]), repeat=2):
            if q[a, c] != 0:
                rows.append(j); a_idx.append(a); b_idx.append(c); vals.append(q[a, c])  # noqa: E702
    lr, lc = np.nonzero(b)
    return QuadraticMap.from_terms(qs.shape[1], names, (rows, a_idx, b_idx, vals), (lr, lc, b[lr, lc]))


def _random_system(seed: int, n: int, n_lim: int, extras: bool = False):
    rng = np.random.default_rng(seed)
    qs = rng.normal(scale=0.5, size=(n, n, n)) * (rng.random((n, n, n)) < 0.6)
    qs = 0.5 * (qs + qs.transpose(0, 2, 1))
    b = np.eye(n) * rng.uniform(1.0, 2.0, n) * rng.choice([-1, 1], n) + rng.normal(scale=0.3, size=(n, n))
    hq = rng.normal(scale=0.5, size=(n_lim, n, n))
    hq = 0.5 * (hq + hq.transpose(0, 2, 1))
    hb = rng.normal(size=(n_lim, n))
    z0 = rng.normal(scale=0.5, size=n)
    eq = _dense_map(qs, b, [f"F{j}" for j in range(n)])
    lim = _dense_map(hq, hb, [f"h{t}" for t in range(n_lim)])
    f0 = np.einsum("jab,a,b->j", qs, z0, z0) + b @ z0
    h0 = np.einsum("tab,a,b->t", hq, z0, z0) + hb @ z0
    room = rng.uniform(0.2, 1.5, size=(2, n_lim))
    band = rng.uniform(0.2, 1.0, size=(2, n))
    unc = UncertainSet(tuple(f"p{j}" for j in range(n)), sp.csr_matrix(np.eye(n)), sp.csr_matrix((n_lim, n)),
                       band[0], band[1])
    derived = derived_up = None
    names: tuple[str, ...] = ()
    symmetry = None
    if extras and n_lim:
        # derived rows W h ≤ W h0 + room, and an arbitrary "symmetry" field (any S gives valid bounds)
        w = rng.normal(size=(2, n_lim))
        derived, derived_up = sp.csr_matrix(w), w @ h0 + rng.uniform(0.1, 1.0, 2)
        names = ("d0", "d1")
        symmetry = sp.csr_matrix(rng.normal(size=(n, n)))
    system = QuadraticSystem(eq, f0, lim, h0 - room[0], h0 + room[1], unc, tuple(f"z{i}" for i in range(n)),
                             derived, derived_up, names, symmetry)
    return system, z0, (qs, b, hq, hb)


def _check_box(cert, system, z0, dense, points):
    """Every point of the box must have a root inside the state region, within all limits."""
    qs, b, hq, hb = dense
    target = system.target
    lo_z, hi_z = cert.state_lower, cert.state_upper
    for p in points:
        y = target + p
        fun = lambda z: np.einsum("jab,a,b->j", qs, z, z) + b @ z - y  # noqa: E731
        jac = lambda z: 2 * np.einsum("jab,b->ja", qs, z) + b  # noqa: E731
        sol = least_squares(fun, z0, jac=jac, bounds=(lo_z, hi_z), xtol=1e-15, ftol=1e-15, gtol=1e-15)
        z = sol.x
        for _ in range(20):  # polish with plain Newton: bounded least squares stalls next to a bound
            step = np.linalg.solve(jac(z), -fun(z))
            z = z + step
            if np.max(np.abs(step)) < 1e-15:
                break
        assert np.max(np.abs(fun(z))) < 1e-10, f"no root found for p={p}"
        assert np.all(z >= lo_z - 1e-9) and np.all(z <= hi_z + 1e-9), f"root {z} outside [{lo_z}, {hi_z}] for p={p}"
        h = np.einsum("tab,a,b->t", hq, z, z) + hb @ z
        assert np.all(h <= system.limit_upper + 1e-9) and np.all(h >= system.limit_lower - 1e-9), \
            f"limit violated at p={p}: h={h}"
        if system.derived is not None:
            assert np.all(system.derived @ h <= system.derived_upper + 1e-9), f"derived limit violated at p={p}"


def _box_points(lower, upper, rng, interior=8):
    corners = np.array(list(itertools.product((0, 1), repeat=len(lower))), dtype=float)
    return np.vstack([lower + corners * (upper - lower), lower + rng.random((interior, len(lower))) * (upper - lower)])


@settings(max_examples=240, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 4), n_lim=st.integers(0, 3),
       objective=st.sampled_from(["uniform", "widths", "hosting", "volume"]), extras=st.booleans())
def test_random_systems_certified_boxes_have_roots_inside_limits(seed, n, n_lim, objective, extras):
    system, z0, dense = _random_system(seed, n, n_lim, extras)
    if objective == "hosting":  # one-sided band: lower ends fixed at 0
        unc = system.uncertain
        system = QuadraticSystem(system.equations, system.target, system.limits, system.limit_lower,
                                 system.limit_upper, UncertainSet(unc.names, unc.equation_map, unc.limit_map,
                                                                  np.zeros(n), unc.band_upper), system.variable_names,
                                 system.derived, system.derived_upper, system.derived_names, system.symmetry)
    try:
        cert = certify(system, z0, objective, options=CertifyOptions(max_fraction=1.0))
    except CertificateError as exc:
        # acceptable only when the Jacobian is genuinely poor at z0 or no ω exists even for a zero box
        assert "Jacobian" in str(exc) or "zero box" in str(exc) or "no certifiable box" in str(exc), str(exc)
        return
    assert cert.status == "certified"
    assert cert.recheck().holds
    assert np.all(cert.lower <= 0) and np.all(cert.upper >= 0)
    _check_box(cert, system, z0, dense, _box_points(cert.lower, cert.upper, np.random.default_rng(seed)))


def _scalar_system(lower_room: float = 10.0):
    # z² + z = y around z̄ = 0, ȳ = 0
    eq = QuadraticMap.from_terms(1, ["f"], ([0], [0], [0], [1.0]), ([0], [0], [1.0]))
    lim = QuadraticMap.from_terms(1, ["z"], ([], [], [], []), ([0], [0], [1.0]))
    unc = UncertainSet(("y",), sp.csr_matrix(np.ones((1, 1))), sp.csr_matrix((1, 1)), np.array([1.0]), np.array([1.0]))
    return QuadraticSystem(eq, np.zeros(1), lim, np.array([-lower_room]), np.array([lower_room]), unc, ("z",))


def test_scalar_quadratic_stays_inside_closed_form_range():
    # z² + z = y has a real root iff y ≥ −1/4 (quadratic formula, discriminant 1 + 4y ≥ 0).
    cert = certify(_scalar_system(), np.zeros(1), options=CertifyOptions(max_fraction=5.0))
    assert cert.lower[0] >= -0.25  # closed form above
    # the root z = (−1 + sqrt(1 + 4y))/2 must lie in the certified state region
    for y in (cert.lower[0], cert.upper[0]):
        root = (-1 + np.sqrt(1 + 4 * y)) / 2
        assert cert.state_lower[0] <= root <= cert.state_upper[0]
    print(f"scalar quadratic: certified lower end / analytic −1/4 = {cert.lower[0] / -0.25:.4f}")
    assert cert.lower[0] / -0.25 > 0.9  # measured 1.000; threshold ours (common practice, no source)


def _two_bus(x_pu: float, v_pu: float):
    """Lossless line, slack voltage v at bus 1, load bus 2 drawing P at unity power factor.

    Variables (e, f) of bus 2.  The injection S2 = V2 conj((V2 − V1)/(j x)) = j(|V2|² − v V2)/x gives
    P2 = v f / x and Q2 = (e² + f² − v e) / x.
    """
    eq = QuadraticMap.from_terms(2, ["P2", "Q2"], ([1, 1], [0, 1], [0, 1], [1 / x_pu, 1 / x_pu]),
                                 ([0, 1], [1, 0], [v_pu / x_pu, -v_pu / x_pu]))
    lim = QuadraticMap.from_terms(2, ["V2sq"], ([0, 0], [0, 1], [0, 1], [1.0, 1.0]), ([], [], []))
    unc = UncertainSet(("p2",), sp.csr_matrix(np.array([[1.0], [0.0]])), sp.csr_matrix((1, 1)),
                       np.array([1.0]), np.array([0.0]))
    return QuadraticSystem(eq, np.zeros(2), lim, np.array([0.0]), np.array([4.0]), unc, ("e2", "f2"))


def test_two_bus_line_load_stays_below_textbook_maximum():
    # Maximum unity-power-factor load over a lossless line of reactance X with sending voltage V is
    # V²/(2X) (textbook voltage-stability result, e.g. P. Kundur, "Power System Stability and Control",
    # McGraw-Hill 1994, ch. 14 — value from memory).
    x, v = 0.2, 1.0
    system = _two_bus(x, v)
    point = np.array([v, 0.0])  # no load: V2 = V1
    cert = certify(system, point, options=CertifyOptions(max_fraction=100.0))
    p_max = v ** 2 / (2 * x)
    drawn = -cert.lower[0]  # injection −P is a load of P
    print(f"two-bus line: certified load / analytic maximum V²/(2X) = {drawn / p_max:.4f}")
    assert 0 < drawn <= p_max
    # the root for the certified load exists: |V2|² from the quadratic in the textbook derivation
    a = v ** 4 / 4 - (drawn * x) ** 2
    assert a >= 0


def test_remainder_bounds_are_each_valid_and_best_is_tightest():
    fr = {}
    system, z0, dense = _random_system(7, 3, 2, extras=True)
    for method in ("plain", "eigen", "anchored", "combined"):
        cert = certify(system, z0, options=CertifyOptions(remainder=RemainderOptions(methods=(method,))))
        _check_box(cert, system, z0, dense, _box_points(cert.lower, cert.upper, np.random.default_rng(1)))
        fr[method] = cert.certified_fraction
    best = certify(system, z0).certified_fraction
    assert best >= max(fr.values()) * (1 - 1e-3)


def test_verify_reports_pass_and_fail():
    system = _scalar_system()
    ok = certify(system, np.zeros(1), "verify", box=(np.array([-0.2]), np.array([0.2])))
    assert ok.status == "certified" and ok.worst_margin >= 0
    bad = certify(system, np.zeros(1), "verify", box=(np.array([-0.3]), np.array([0.2])))
    assert bad.status == "rejected" and bad.worst_margin < 0 and "f" in bad.binding


def test_operating_point_errors_name_the_problem():
    system = _scalar_system()
    with pytest.raises(OperatingPointError, match="residual .* in 'f'"):
        certify(system, np.array([0.1]))
    tight = QuadraticSystem(system.equations, system.target, system.limits, np.array([0.5]), np.array([1.0]),
                            system.uncertain, system.variable_names)
    with pytest.raises(OperatingPointError, match="limit.*'z'.*box is empty|box is empty.*'z'"):
        certify(tight, np.zeros(1))
    with pytest.raises(QuadraticSystemError, match="non-finite"):
        certify(system, np.array([np.nan]))
    with pytest.raises(QuadraticSystemError, match="2 entries"):
        certify(system, np.zeros(2))


def test_singular_jacobian_is_reported_with_equations():
    # z² = y at z̄ = 0: J = 0
    eq = QuadraticMap.from_terms(1, ["square"], ([0], [0], [0], [1.0]), ([], [], []))
    lim = QuadraticMap.from_terms(1, [], ([], [], [], []), ([], [], [])).take([])
    unc = UncertainSet(("y",), sp.csr_matrix(np.ones((1, 1))), sp.csr_matrix((0, 1)), np.ones(1), np.ones(1))
    system = QuadraticSystem(eq, np.zeros(1), lim, np.zeros(0), np.zeros(0), unc, ("z",))
    with pytest.raises(CertificateError, match="singular.*square"):
        certify(system, np.zeros(1))


def test_mismatched_dimensions_are_rejected():
    system = _scalar_system()
    with pytest.raises(QuadraticSystemError, match="target has shape"):
        QuadraticSystem(system.equations, np.zeros(2), system.limits, system.limit_lower, system.limit_upper,
                        system.uncertain, system.variable_names)
    with pytest.raises(QuadraticSystemError, match="non-finite quadratic coefficient"):
        QuadraticMap.from_terms(1, ["f"], ([0], [0], [0], [np.inf]), ([], [], []))


def test_single_precision_storage_gives_upper_bounds_in_exact_arithmetic():
    # reference: exact rational arithmetic (Python's standard-library `fractions`), entries spanning
    # many orders of magnitude, including values below the single-precision normal range
    from fractions import Fraction

    import robustbox.rounding as rounding_mod
    from robustbox.bounds import _projection
    from robustbox.rounding import matvec_upper, round_up_32

    rng = np.random.default_rng(3)
    a = np.abs(rng.normal(size=(6, 40))) * 10.0 ** rng.integers(-45, 30, size=(6, 40))
    x = np.abs(rng.normal(size=40)) * 10.0 ** rng.integers(-20, 5, size=40)
    a32 = round_up_32(a)
    assert a32.dtype == np.float32
    assert all(Fraction(float(u)) >= Fraction(float(v)) for u, v in zip(a32.ravel(), a.ravel()))
    bound = matvec_upper(a32, x)
    for i in range(a.shape[0]):
        exact = sum(Fraction(float(a[i, j])) * Fraction(float(x[j])) for j in range(a.shape[1]))
        assert Fraction(float(bound[i])) >= exact
    d = sp.csr_matrix(rng.normal(size=(5, 7)) * (rng.random((5, 7)) < 0.5))
    k = rng.normal(size=(7, 4))
    for compact in (False, True):
        old, rounding_mod.COMPACT_ENTRIES = rounding_mod.COMPACT_ENTRIES, (0 if compact else 10**9)
        try:
            proj = _projection(d, k, np.abs(k))
        finally:
            rounding_mod.COMPACT_ENTRIES = old
        assert proj.dtype == (np.float32 if compact else np.float64)
        dd = d.toarray()
        for i, j in itertools.product(range(5), range(4)):
            exact = abs(sum(Fraction(float(dd[i, r])) * Fraction(float(k[r, j])) for r in range(7)))
            assert Fraction(float(proj[i, j])) >= exact


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_certified_boxes_hold_with_single_precision_storage(seed, monkeypatch):
    # every stored upper-bound matrix goes to single precision (the path taken on large networks)
    import robustbox.rounding as rounding_mod

    monkeypatch.setattr(rounding_mod, "COMPACT_ENTRIES", 0)
    system, z0, dense = _random_system(seed, 4, 3, extras=True)
    cert = certify(system, z0)
    assert cert.status == "certified" and cert.certified_fraction > 0
    assert cert._engine.c_up.dtype == np.float32
    _check_box(cert, system, z0, dense, _box_points(cert.lower, cert.upper, np.random.default_rng(seed)))
