"""The numpy reference filters against outside results: the Kalman filter's steady state (the
discrete algebraic Riccati equation, solved by scipy), finite differences, closed-form moments
of a normal variable, numpy Monte Carlo and scipy's chi-square quantiles."""

from __future__ import annotations

import math
import os

import numpy as np
import pytest
import scipy.linalg
import scipy.stats

import estgen
from estgen.errors import ModelError
from estgen.reference import (
    ReferenceEKF,
    ReferenceUKF,
    gate_threshold,
    model_functions,
    sigma_weights,
    unscented_transform,
    wrap_angle,
)
from estgen.simulate import make_scenario
from estgen.status import Status

HERE = os.path.dirname(os.path.abspath(__file__))
CART = os.path.join(HERE, "models", "ref_cart.py")
ROVER = os.path.join(HERE, "models", "ref_rover.py")


@pytest.fixture(scope="module")
def cart():
    return estgen.load_model(CART)


@pytest.fixture(scope="module")
def rover():
    return estgen.load_model(ROVER)


def cart_matrices(dt: float, q: float, r: float):
    """F, H, Q, R of the cart written out from the model's equations: constant velocity with
    the discretized continuous white-noise acceleration Q (Bar-Shalom et al. 2001, 6.2.2)."""
    F = np.array([[1.0, dt], [0.0, 1.0]])
    H = np.array([[1.0, 0.0]])
    Q = q * np.array([[dt**3 / 3, dt**2 / 2], [dt**2 / 2, dt]])
    return F, H, Q, np.array([[r]])


def test_ekf_steady_state_is_the_dare_solution(cart):
    # Source: scipy.linalg.solve_discrete_are; the steady-state predicted covariance of the
    # Kalman filter solves the DARE (Anderson & Moore, Optimal Filtering, 1979, ch. 4).
    dt, q, r = 0.1, 0.5, 0.04
    f = estgen.reference(cart, "ekf", params={"accel_psd": q, "pos_var": r})
    rng = np.random.default_rng(1)
    for _ in range(3000):
        assert f.predict([], dt) == 0
        assert f.update("laser", [rng.normal()]) == 0
    assert f.predict([], dt) == 0
    F, H, Q, R = cart_matrices(dt, q, r)
    P_dare = scipy.linalg.solve_discrete_are(F.T, H.T, Q, R)
    np.testing.assert_allclose(f.P, P_dare, rtol=1e-9, atol=0)
    # and the filtered covariance is the DARE solution after one update (Anderson & Moore)
    assert f.update("laser", [0.0]) == 0
    S = H @ P_dare @ H.T + R
    P_post = P_dare - P_dare @ H.T @ np.linalg.solve(S, H @ P_dare)
    np.testing.assert_allclose(f.P, P_post, rtol=1e-9, atol=0)


def test_jacobians_match_central_differences(rover):
    # Source: common practice; central differences have O(h^2) error, so with h = 1e-6 and
    # O(1) second derivatives the agreement is ~1e-9 (rounding ~1e-10).
    mf = model_functions(rover)
    p = mf.param_tuple(rover.param_defaults())
    rng = np.random.default_rng(7)
    h = 1e-6
    for _ in range(5):
        x = rng.normal(size=3) * [5.0, 5.0, 3.0]
        u = rng.normal(size=2) + [2.0, 0.0]
        dt = 0.1 + rng.random()
        F = mf.F(x, u, dt, p)
        num = np.column_stack([(mf.f(x + h * e, u, dt, p) - mf.f(x - h * e, u, dt, p)) / (2 * h) for e in np.eye(3)])
        np.testing.assert_allclose(F, num, rtol=0, atol=1e-8)
        assert abs(F[0, 2]) > 1e-3 or abs(F[1, 2]) > 1e-3  # the heading coupling is exercised
        for s in rover.sensors:
            H = mf.H(s.name, x, p)
            numh = np.column_stack([(mf.h(s.name, x + h * e, p) - mf.h(s.name, x - h * e, p)) / (2 * h)
                                    for e in np.eye(3)])
            np.testing.assert_allclose(H, numh, rtol=0, atol=1e-8)


def textbook_kf(x, P, zs, dt, q, r):
    """The linear Kalman filter written from its definition (Anderson & Moore 1979)."""
    F, H, Q, R = cart_matrices(dt, q, r)
    for z in zs:
        x, P = F @ x, F @ P @ F.T + Q
        S = H @ P @ H.T + R
        K = P @ H.T @ np.linalg.inv(S)
        x = x + K @ (np.array([z]) - H @ x)
        P = (np.eye(2) - K @ H) @ P
    return x, P


@pytest.mark.parametrize("alpha,beta,kappa", [(1.0, 2.0, 0.0), (0.3, 2.0, 1.0), (1e-2, 0.0, 0.0)])
def test_ukf_equals_kalman_filter_on_a_linear_model(cart, alpha, beta, kappa):
    # Source: Julier & Uhlmann, Proc. IEEE 92(3), 2004: the unscented transform is exact for
    # linear maps, so the UKF equals the Kalman filter (here: the textbook KF and the EKF).
    dt, q, r = 0.1, 0.2, 0.09
    zs = np.random.default_rng(3).normal(size=60) + np.arange(60) * 0.1
    ekf = estgen.reference(cart, "ekf")
    ukf = estgen.reference(cart, "ukf", alpha=alpha, beta=beta, kappa=kappa)
    for z in zs:
        for f in (ekf, ukf):
            assert f.predict([], dt) == 0
            assert f.update("laser", [z]) == 0
        np.testing.assert_allclose(ukf.x, ekf.x, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(ukf.P, ekf.P, rtol=1e-9, atol=1e-12)
    x_kf, P_kf = textbook_kf(np.array(cart.x0), np.array(cart.P0), zs, dt, q, r)
    np.testing.assert_allclose(ekf.x, x_kf, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(ekf.P, P_kf, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("n,alpha,kappa", [(1, 1.0, 0.0), (3, 1e-3, 0.0), (5, 0.5, 3.0 - 5), (9, 1.0, 2.0)])
def test_sigma_weights_sum(n, alpha, kappa):
    # Source: Wan & van der Merwe 2000 (definitions): the mean weights sum to 1, the
    # covariance weights to 1 + (1 - alpha^2 + beta).
    beta = 2.0
    lam, wm, wc = sigma_weights(n, alpha, beta, kappa)
    assert lam == pytest.approx(alpha**2 * (n + kappa) - n)
    assert wm.shape == (2 * n + 1,)
    assert math.isclose(wm.sum(), 1.0, rel_tol=0, abs_tol=1e-9 * max(1.0, abs(wm[0])))
    assert math.isclose(wc.sum(), 2.0 - alpha**2 + beta, rel_tol=0, abs_tol=1e-9 * max(1.0, abs(wc[0])))


def polar(s):
    r, t = s
    return np.array([r * np.cos(t), r * np.sin(t)])


@pytest.mark.parametrize("kappa", [0.0, 1.0])
def test_unscented_transform_of_polar_to_cartesian(kappa):
    # Source: for t ~ N(mu, s^2), E[cos t] = cos(mu) exp(-s^2/2), E[sin t] = sin(mu) exp(-s^2/2)
    # (the normal characteristic function); r independent of t. The unscented mean is exact to
    # second order (Julier & Uhlmann 2004), so its error is at most the size of the first
    # fourth-order term of exp(-s^2/2), r0 s^4 / 8. With n + kappa = 3 it also matches the
    # Gaussian's fourth moment (Julier & Uhlmann 2004), leaving an error of order s^6.
    r0, mu, sr, st = 10.0, 0.7, 0.2, 0.35
    x = np.array([r0, mu])
    P = np.diag([sr**2, st**2])
    mean, cov = unscented_transform(polar, x, P, alpha=1.0, beta=2.0, kappa=kappa)
    damp = math.exp(-st**2 / 2)
    exact = r0 * damp * np.array([math.cos(mu), math.sin(mu)])
    tol = r0 * st**4 / 8 if kappa == 0.0 else r0 * st**6 / 8
    err = np.abs(mean - exact)
    assert np.all(err <= tol), (err, tol)
    # linearization (the EKF's mean) errs by r0 s^2 / 2 to first order: the UT does better
    assert np.all(err < 0.2 * np.abs(polar(x) - exact))

    # Source: numpy Monte Carlo, 10^6 samples; the closed form lies within 5 standard errors
    rng = np.random.default_rng(11)
    N = 1_000_000
    samples = rng.multivariate_normal(x, P, size=N)
    y = polar(samples.T).T
    se = y.std(axis=0) / math.sqrt(N)
    assert np.all(np.abs(y.mean(axis=0) - exact) < 5 * se)
    assert np.all(np.abs(mean - y.mean(axis=0)) < tol + 5 * se)
    # the covariance: Var[r cos t] = E[r^2] E[cos^2 t] - E[r cos t]^2 with
    # E[cos^2 t] = (1 + cos(2 mu) exp(-2 s^2)) / 2 (same source); the UT covariance is exact to
    # second order, so compare with a relative tolerance of s^2 (first neglected order)
    er2 = r0**2 + sr**2
    var_x = er2 * (1 + math.cos(2 * mu) * math.exp(-2 * st**2)) / 2 - exact[0] ** 2
    var_y = er2 * (1 - math.cos(2 * mu) * math.exp(-2 * st**2)) / 2 - exact[1] ** 2
    np.testing.assert_allclose(np.diag(cov), [var_x, var_y], rtol=st**2)
    np.testing.assert_allclose(np.diag(np.cov(y.T)), [var_x, var_y], rtol=5e-3)


def snapshot(f):
    return f.x, f.P, f.nis


def assert_unchanged(f, snap):
    x, P, nis = snap
    assert np.array_equal(f.x, x) and np.array_equal(f.P, P)
    assert (math.isnan(nis) and math.isnan(f.nis)) or f.nis == nis


@pytest.mark.parametrize("kind", ["ekf", "ukf"])
def test_refusals_leave_the_filter_unchanged(rover, cart, kind):
    # Source: the contract (shared/contract.md, section 3): a non-zero status means refused and
    # the filter is exactly as it was; the codes are estgen.status.Status.
    f = estgen.reference(rover, kind)
    assert f.predict([2.0, 0.7], 0.1) == 0 and f.update("compass", [2.9]) == 0
    snap = snapshot(f)
    assert f.predict([math.nan, 0.0], 0.1) == Status.BAD_INPUT
    assert f.predict([2.0, 0.0], math.inf) == Status.BAD_INPUT
    assert f.predict([2.0, 0.0], math.nan) == Status.BAD_INPUT
    assert f.predict([2.0, 0.0], 0.0) == Status.BAD_DT
    assert f.predict([2.0, 0.0], -0.1) == Status.BAD_DT
    assert f.update("gnss", [0.0, math.inf]) == Status.BAD_INPUT
    assert f.set_state([0.0, math.nan, 0.0], np.eye(3)) == Status.BAD_INPUT
    assert f.set_state([0.0, 0.0, 0.0], [[1, 0.5, 0], [0, 1, 0], [0, 0, 1]]) == Status.NOT_POSITIVE_DEFINITE
    assert f.set_state([0.0, 0.0, 0.0], np.diag([1.0, -1.0, 1.0])) == Status.NOT_POSITIVE_DEFINITE
    assert_unchanged(f, snap)
    with pytest.raises(KeyError):
        f.update("sonar", [1.0])
    with pytest.raises(ValueError):
        f.update("gnss", [1.0])
    with pytest.raises(ValueError):
        f.predict([1.0], 0.1)
    with pytest.raises(KeyError):
        f.set_param("no_such_param", 1.0)
    assert_unchanged(f, snap)
    # a negative measurement variance makes S indefinite
    f.set_param("gnss_var", -10.0)
    assert f.update("gnss", [0.0, 0.0]) == Status.NOT_POSITIVE_DEFINITE
    assert_unchanged(f, snap)
    f.set_param("gnss_var", 0.25)
    assert f.update("gnss", [0.0, 0.0]) == Status.OK

    # an overflowing prediction is NON_FINITE (cart: pos + dt * vel with vel near the maximum)
    c = estgen.reference(cart, kind)
    assert c.set_state([0.0, 1e308], np.diag([1.0, 1.0])) == Status.OK
    snap = snapshot(c)
    assert c.predict([], 10.0) == Status.NON_FINITE
    assert_unchanged(c, snap)


def test_set_state_and_params_are_copies(cart):
    # Source: the contract (section 3): x and P are copies; set_state replaces both.
    f = estgen.reference(cart, "ekf")
    x = f.x
    x[0] = 123.0
    assert f.x[0] != 123.0
    p = f.params
    p["pos_var"] = 5.0
    assert f.params["pos_var"] == 0.09
    assert f.set_state([1.0, 2.0], [[2.0, 0.1], [0.1, 3.0]]) == 0
    np.testing.assert_array_equal(f.x, [1.0, 2.0])
    np.testing.assert_array_equal(f.P, [[2.0, 0.1], [0.1, 3.0]])
    assert math.isnan(f.nis) and f.n == 2 and f.sensors == ["laser"] and f.filter == "ekf"


def test_wrap_angle_range_and_periodicity():
    # Source: common practice: wrapping keeps the angle's sine and cosine and lands in (-pi, pi].
    a = np.concatenate([np.linspace(-20, 20, 4001), [math.pi, -math.pi, 3 * math.pi, -3 * math.pi,
                                                     np.nextafter(math.pi, 4), np.nextafter(-math.pi, -4), 0.0]])
    w = wrap_angle(a)
    assert np.all(w > -math.pi) and np.all(w <= math.pi)
    np.testing.assert_allclose(np.cos(w), np.cos(a), atol=1e-13)
    np.testing.assert_allclose(np.sin(w), np.sin(a), atol=1e-13)
    assert wrap_angle(-math.pi) == math.pi and wrap_angle(math.pi) == math.pi
    assert wrap_angle(-0.5) == -0.5


@pytest.mark.parametrize("kind", ["ekf", "ukf"])
def test_heading_crossing_pi_is_tracked(rover, kind):
    # Source: common practice: with wrapped residuals the heading error stays at the compass
    # noise level (sigma 0.03 rad) while the rover laps; without wrapping each crossing of
    # +-pi would make a 2 pi residual.
    sc = make_scenario(rover, steps=500, seed=5)
    truth_heading = sc.x_true[:, 2]
    crossings = int(np.sum(np.abs(np.diff(truth_heading)) > math.pi))
    assert crossings >= 4
    f = estgen.reference(rover, kind)
    errs = []
    gated = 0
    for k in range(sc.steps):
        assert f.predict(sc.u[k], sc.dt) == 0
        for name, z in sc.measurements[k]:
            st = f.update(name, z)
            assert st in (Status.OK, Status.GATED)  # the compass gate (0.999) may drop a rare one
            gated += st == Status.GATED
        x = f.x
        assert -math.pi < x[2] <= math.pi
        errs.append(wrap_angle(x - sc.x_true[k + 1]))
    assert gated <= 3  # 500 compass readings, 0.1% expected outside the gate
    errs = np.array(errs)[50:]  # after the initial transient
    assert np.max(np.abs(errs[:, 2])) < 6 * 0.03
    assert np.max(np.hypot(errs[:, 0], errs[:, 1])) < 1.5


@pytest.mark.parametrize("kind", ["ekf", "ukf"])
def test_gate_threshold_is_the_chi2_quantile(rover, kind):
    # Source: scipy.stats.chi2.ppf; the gate rejects when NIS exceeds the gate-probability
    # quantile of chi-square with m degrees of freedom (Bar-Shalom et al. 2001, 5.4.2).
    for p, m in [(0.999, 1), (0.99, 2), (0.9, 6)]:
        assert gate_threshold(p, m) == pytest.approx(scipy.stats.chi2.ppf(p, m), rel=1e-12)
    thr = scipy.stats.chi2.ppf(0.999, 1)  # the compass: gate=0.999, one component
    f = estgen.reference(rover, kind)
    P = np.diag([0.4, 0.4, 0.02])
    S = 0.02 + 0.03**2  # H P H' + R for h = heading
    for factor, expected in [(1 + 1e-6, Status.GATED), (1 - 1e-6, Status.OK)]:
        assert f.set_state([0.0, 0.0, 3.0], P) == 0
        z = wrap_angle(3.0 + math.sqrt(thr * S) * factor)  # past +pi: the residual is wrapped back
        before = snapshot(f)
        st = f.update("compass", [z])
        assert st == expected
        assert f.nis == pytest.approx(thr * factor**2, rel=1e-9)
        if st == Status.GATED:
            assert np.array_equal(f.x, before[0]) and np.array_equal(f.P, before[1])


def test_bad_ukf_parameters_are_refused(cart):
    # Source: Julier 2002: the sigma-point spread (n + lambda) = alpha^2 (n + kappa) must be > 0.
    with pytest.raises(ModelError):
        estgen.reference(cart, "ukf", alpha=1.0, kappa=-2.0)
    with pytest.raises(ModelError):
        estgen.reference(cart, "ukf", alpha=0.0)
    assert isinstance(estgen.reference(cart, "ukf", kappa=-1.5), ReferenceUKF)
    assert isinstance(estgen.reference(cart, "ekf"), ReferenceEKF)


def test_unscented_transform_of_wrapped_angles_uses_the_circular_mean():
    # Source: common practice (directional statistics: the mean direction is
    # atan2(sum w sin, sum w cos)); for a map that wraps its output and sigma points that
    # straddle +-pi, the arithmetic mean would point near 0, the circular mean keeps mu, and
    # the wrapped deviations give back P exactly (the map is the identity modulo 2 pi).
    mu, s = math.pi - 0.02, 0.1
    mean, cov = unscented_transform(lambda a: wrap_angle(a), np.array([mu]), np.array([[s**2]]), angles=[True])
    assert abs(wrap_angle(mean[0] - mu)) < 1e-12
    assert cov[0, 0] == pytest.approx(s**2, rel=1e-12)


def test_gates_option_overrides_the_model(cart):
    # Source: scipy.stats.chi2.ppf (as above); reference(..., gates=) mirrors estgen.build's
    # option: a residual of 3 sigma passes no 0.99 gate (chi2.ppf(0.99, 1) = 6.63 < 9).
    f = estgen.reference(cart, "ekf", gates={"laser": 0.99})
    S = 1.0 + 0.09
    assert scipy.stats.chi2.ppf(0.99, 1) < 9.0
    assert f.update("laser", [3.0 * math.sqrt(S)]) == Status.GATED
    assert f.nis == pytest.approx(9.0, rel=1e-12)
    assert estgen.reference(cart, "ekf").update("laser", [3.0 * math.sqrt(S)]) == Status.OK
