"""Attitude (error-state) filters: the Jacobians estgen derives against central differences taken
on the manifold with scipy's rotations (Sola, "Quaternion kinematics for the error-state Kalman
filter", 2017, eqs. for the error-state transition; Markley, JGCD 26(2), 2003), the generated C
against the reference, and the unit norm the filters keep."""

from __future__ import annotations

import math
import os

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

import estgen
from estgen import emit_ukf
from estgen.filters import generate
from estgen.reference import model_functions

HERE = os.path.dirname(os.path.abspath(__file__))
GYRO = os.path.join(HERE, "models", "attitude_gyro.py")
RNG = np.random.default_rng(16)


def _rot(q: np.ndarray) -> Rotation:
    return Rotation.from_quat([q[1], q[2], q[3], q[0]])  # scipy: scalar last


def _quat(r: Rotation) -> np.ndarray:
    x, y, z, w = r.as_quat()
    return np.array([w, x, y, z])


def _plus(spec, x: np.ndarray, e: np.ndarray) -> np.ndarray:
    """x ⊞ e with scipy: q ⊗ exp(dtheta) is the body-frame rotation composed on the right."""
    out = np.array(x, dtype=float)
    for kind, xi, ei in spec.error_blocks():
        if kind == "real":
            out[xi] = x[xi] + e[ei]
        else:
            out[xi:xi + 4] = _quat(_rot(x[xi:xi + 4]) * Rotation.from_rotvec(e[ei:ei + 3]))
    return out


def _minus(spec, y: np.ndarray, x: np.ndarray) -> np.ndarray:
    """y ⊟ x: the error e with y = x ⊞ e (scipy's log map for attitudes)."""
    out = np.zeros(spec.ne)
    for kind, xi, ei in spec.error_blocks():
        if kind == "real":
            out[ei] = y[xi] - x[xi]
        else:
            out[ei:ei + 3] = (_rot(x[xi:xi + 4]).inv() * _rot(y[xi:xi + 4])).as_rotvec()
    return out


def _random_state(spec) -> np.ndarray:
    x = RNG.normal(size=spec.n) * 0.05
    for i in spec.attitudes:
        q = RNG.normal(size=4)
        x[i:i + 4] = q / np.linalg.norm(q)
    return x


def _fd_F(spec, fn, x, u, dt, p, step=1e-6) -> np.ndarray:
    """Central differences on the manifold: column j is (f(x ⊞ h e_j) ⊟ f(x) - f(x ⊞ -h e_j) ⊟ f(x)) / 2h
    (common practice: central differences, step ~ eps**(1/3))."""
    y0 = fn.f(x, u, dt, p)
    J = np.zeros((spec.ne, spec.ne))
    for j in range(spec.ne):
        e = np.zeros(spec.ne)
        e[j] = step
        yp = fn.f(_plus(spec, x, e), u, dt, p)
        ym = fn.f(_plus(spec, x, -e), u, dt, p)
        J[:, j] = (_minus(spec, yp, y0) - _minus(spec, ym, y0)) / (2 * step)
    return J


def _fd_H(spec, fn, sensor, x, p, step=1e-6) -> np.ndarray:
    m = spec.sensor(sensor).m
    J = np.zeros((m, spec.ne))
    for j in range(spec.ne):
        e = np.zeros(spec.ne)
        e[j] = step
        J[:, j] = (fn.h(sensor, _plus(spec, x, e), p) - fn.h(sensor, _plus(spec, x, -e), p)) / (2 * step)
    return J


@pytest.fixture(scope="module")
def gyro():
    return estgen.load_model(GYRO)


def test_error_state_jacobians_match_manifold_central_differences(gyro) -> None:
    fn = model_functions(gyro)
    p = fn.param_tuple(gyro.param_defaults())
    for dt in (0.01, 0.3):  # 0.3 s: rotation increments beyond the series branch (t > 1)
        for _ in range(5):
            x = _random_state(gyro)
            u = RNG.normal(size=3) * 3.0
            F = fn.F_err(x, u, dt, p)
            np.testing.assert_allclose(F, _fd_F(gyro, fn, x, u, dt, p), atol=2e-8)
            # exact form of the attitude block for this f: R(exp(w dt))^T (Sola 2017, eq. 274)
            w = (u - x[4:7]) * dt
            np.testing.assert_allclose(F[:3, :3], Rotation.from_rotvec(w).as_matrix().T, atol=1e-12)
            for s in ("acc", "mag"):
                np.testing.assert_allclose(fn.H_err(s, x, p), _fd_H(gyro, fn, s, x, p), atol=2e-8)


def test_c_predict_covariance_matches_finite_difference_propagation(gyro) -> None:
    """The C's P' = F P F' + Q with F from central differences on the manifold."""
    c = estgen.build(gyro, filter="ekf", precision="double")
    fn = model_functions(gyro)
    p = fn.param_tuple(gyro.param_defaults())
    for _ in range(3):
        x = _random_state(gyro)
        A = RNG.normal(size=(6, 6))
        P = A @ A.T * 0.01 + np.eye(6) * 1e-3
        u = RNG.normal(size=3)
        assert c.set_state(x, P) == 0
        assert c.predict(u, 0.05) == 0
        F = _fd_F(gyro, fn, x, u, 0.05, p)
        np.testing.assert_allclose(c.P, F @ P @ F.T + fn.Q(0.05, p), atol=1e-9)
        np.testing.assert_allclose(c.x, fn.normalize(fn.f(x, u, 0.05, p)), atol=1e-14)


def _fd_reset(spec, x: np.ndarray, mu: np.ndarray, step: float = 1e-6) -> np.ndarray:
    """Central differences of the error redefinition e -> (x ⊞ e) ⊟ (x ⊞ mu) at e = mu, with
    scipy's rotations: the exact Jacobian of the reset (Sola 2017, sec. 7.2; common practice:
    central differences)."""
    ref = _plus(spec, x, mu)
    J = np.zeros((spec.ne, spec.ne))
    for j in range(spec.ne):
        h = np.zeros(spec.ne)
        h[j] = step
        J[:, j] = (_minus(spec, _plus(spec, x, mu + h), ref) - _minus(spec, _plus(spec, x, mu - h), ref)) / (2 * step)
    return J


def _skew(a: np.ndarray) -> np.ndarray:
    return np.array([[0.0, -a[2], a[1]], [a[2], 0.0, -a[0]], [-a[1], a[0], 0.0]])


def test_reset_jacobian_matches_manifold_central_differences(gyro) -> None:
    """G = blockdiag(I - [mu/2 x], I) is the first-order reset Jacobian (Sola 2017, sec. 7.2;
    Markley 2003): against the exact Jacobian from scipy central differences it must be right to
    second order in the correction mu (the next term of the exact one, the right Jacobian of SO(3),
    is ((|mu| - sin|mu|)/|mu|^3) [mu x]^2, at most |mu|^2/6 per entry: Sola 2017, eq. 143; from
    memory), while keeping P unchanged (G = I) is wrong to first order."""
    fn = model_functions(gyro)
    for size in (1e-3, 1e-2, 0.1, 0.4):
        for _ in range(3):
            x = _random_state(gyro)
            mu = RNG.normal(size=gyro.ne)
            mu[:3] *= size / np.linalg.norm(mu[:3])
            exact = _fd_reset(gyro, x, mu)
            G = fn.reset_jacobian(mu)
            assert np.max(np.abs(G - exact)) <= size**2 / 6 * 1.01 + 1e-8  # 1%: the next order, size^2/32 relative
            # no reset is first-order wrong: the largest entry of [mu/2 x] is at least |mu|/(2 sqrt 3)
            assert np.max(np.abs(np.eye(gyro.ne) - exact)) >= 0.28 * size
            np.testing.assert_array_equal(G[3:, :], np.eye(gyro.ne)[3:, :])  # plain states are not re-referenced


def test_c_update_injects_the_error_like_scipy(gyro) -> None:
    """After one update, q_post = q_prior ⊗ exp(K y) (scipy composition), |q| = 1, and P is the
    Joseph form (Bar-Shalom, Li & Kirubarajan 2001, eq. 5.2.3-18) with the manifold Jacobian,
    re-referenced to the new estimate: G P G' with G = I - [dtheta/2 x] (Sola 2017, sec. 7.2), and
    within second order of the reset taken from scipy central differences."""
    c = estgen.build(gyro, filter="ekf", precision="double")
    fn = model_functions(gyro)
    p = fn.param_tuple(gyro.param_defaults())
    x = _random_state(gyro)
    P = np.diag([0.05, 0.05, 0.05, 1e-4, 1e-4, 1e-4])
    assert c.set_state(x, P) == 0
    truth = _plus(gyro, x, np.array([0.08, -0.05, 0.06, 0.0, 0.0, 0.0]))
    z = fn.h("acc", truth, p) + np.array([0.02, -0.03, 0.01])
    assert c.update("acc", z) == 0
    H = _fd_H(gyro, fn, "acc", x, p)
    R = np.diag([0.05] * 3)
    S = H @ P @ H.T + R
    K = P @ H.T @ np.linalg.inv(S)
    dx = K @ (z - fn.h("acc", x, p))
    np.testing.assert_allclose(c.x, _plus(gyro, x, dx), atol=1e-8)
    A = np.eye(6) - K @ H
    Pj = A @ P @ A.T + K @ R @ K.T
    G = np.eye(6)
    G[:3, :3] -= _skew(dx[:3] / 2)
    np.testing.assert_allclose(c.P, G @ Pj @ G.T, atol=1e-9)
    mu = np.linalg.norm(dx[:3])
    Gx = _fd_reset(gyro, x, dx)
    # |G - Gx|_2 <= (|mu| - sin|mu|)/|mu| <= mu^2/6 (the test above), so in the 2-norm
    # |G Pj G' - Gx Pj Gx'| <= mu^2/6 |Pj| (|G| + |Gx|); 1% for the next order (mu^2/32 relative)
    # and the differences' rounding
    norm = lambda a: np.linalg.norm(a, 2)  # noqa: E731
    bound = mu**2 / 6 * 1.01 * norm(Pj) * (norm(G) + norm(Gx))
    assert norm(c.P - Gx @ Pj @ Gx.T) <= bound
    assert norm(c.P - Pj) > 10 * bound  # the reset is resolved by this check
    assert abs(np.linalg.norm(c.x[:4]) - 1.0) < 1e-15 * 4


@pytest.mark.parametrize("form", ["straight", "loop"])
def test_ukf_update_injects_and_resets_like_the_published_equations(gyro, form: str,
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    """One UKF update, written out here from the scaled unscented transform (Wan & van der Merwe
    2000, eqs. 15 and 17-18; Julier 2002 for the weights) with error-space sigma points x ⊞ (+-gamma
    L_i) composed by scipy (Crassidis & Markley 2003, USQUE), then the error-state reset
    P <- G (P - K S K') G' with G = I - [dtheta/2 x] (Sola 2017, sec. 7.2; Markley 2003; G is
    checked against scipy central differences above): the C of both forms must give it."""
    if form == "loop":
        monkeypatch.setattr(emit_ukf, "UKF_LOOP_SIZE_MIN_N", 0)
        opts = {"optimize": "size"}
    else:
        monkeypatch.setattr(emit_ukf, "UKF_STRAIGHT_FLASH_MAX", float("inf"))
        opts = {"optimize": "speed"}
    alpha, beta, kappa = 0.8, 2.0, 1.0
    gen = generate(gyro, filter="ukf", precision="double", alpha=alpha, beta=beta, kappa=kappa, **opts)
    assert (f"static void {gen.prefix}_f(" in gen.source) == (form == "loop")
    assert f"{gen.prefix}_reset(Ps, dx);" in gen.source
    c = estgen.build(gyro, filter="ukf", precision="double", alpha=alpha, beta=beta, kappa=kappa, **opts)
    fn = model_functions(gyro)
    p = fn.param_tuple(gyro.param_defaults())
    x = _random_state(gyro)
    P = np.diag([0.05, 0.04, 0.06, 1e-4, 1e-4, 1e-4])
    P[0, 1] = P[1, 0] = 0.01
    assert c.set_state(x, P) == 0
    truth = _plus(gyro, x, np.array([0.08, -0.05, 0.06, 0.0, 0.0, 0.0]))
    z = fn.h("acc", truth, p) + np.array([0.02, -0.03, 0.01])
    assert c.update("acc", z) == 0
    n = gyro.ne
    lam = alpha**2 * (n + kappa) - n
    wm = np.full(2 * n + 1, 0.5 / (n + lam))
    wm[0] = lam / (n + lam)
    wc = wm.copy()
    wc[0] += 1.0 - alpha**2 + beta
    gL = math.sqrt(n + lam) * np.linalg.cholesky(P)
    E = np.vstack([np.zeros(n), gL.T, -gL.T])
    Z = np.array([fn.h("acc", _plus(gyro, x, e), p) for e in E])
    zhat = wm @ Z
    dZ = Z - zhat
    S = (dZ.T * wc) @ dZ + np.diag([0.05] * 3)
    K = ((E.T * wc) @ dZ) @ np.linalg.inv(S)
    dx = K @ (z - zhat)
    np.testing.assert_allclose(c.x, _plus(gyro, x, dx), atol=1e-10)
    Pm = P - K @ S @ K.T
    G = np.eye(n)
    G[:3, :3] -= _skew(dx[:3] / 2)
    np.testing.assert_allclose(fn.reset_jacobian(dx), G, atol=1e-15)
    np.testing.assert_allclose(c.P, G @ Pm @ G.T, atol=1e-10)
    assert np.max(np.abs(c.P - Pm)) > 1e-5  # the reset is resolved by this check (1e5 x the tolerance)
    r = estgen.reference(gyro, filter="ukf", alpha=alpha, beta=beta, kappa=kappa)
    assert r.set_state(x, P) == 0 and r.update("acc", z) == 0
    np.testing.assert_allclose(r.P, c.P, atol=1e-12)


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
@pytest.mark.parametrize("precision,tol", [("double", 1e-9), ("float", 2e-3)])
def test_c_matches_reference_with_attitude(gyro, filt: str, precision: str, tol: float) -> None:
    c = estgen.build(gyro, filter=filt, precision=precision)
    r = estgen.reference(gyro, filter=filt)
    for k in range(300):
        u = [1.5 * math.sin(0.02 * k), 2.0, -1.0 + 0.5 * math.cos(0.01 * k)]
        assert c.predict(u, 0.01) == r.predict(u, 0.01) == 0
        q = r.x[:4]
        if k % 2 == 0:
            g = _rot(q).inv().apply([0, 0, -9.81]) + RNG.normal(size=3) * 0.2
            assert c.update("acc", g) == r.update("acc", g)
        if k % 5 == 0:
            mg = _rot(q).inv().apply([0.4, 0, 0.3]) + RNG.normal(size=3) * 0.1
            assert c.update("mag", mg) == r.update("mag", mg)
        np.testing.assert_allclose(c.x, r.x, atol=tol)
        scale = np.sqrt(np.outer(np.diag(r.P), np.diag(r.P)))
        assert np.max(np.abs(c.P - r.P) / scale) < tol * 10
        assert abs(np.linalg.norm(c.x[:4]) - 1.0) < (1e-15 if precision == "double" else 1e-6) * 4


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
def test_set_state_scales_the_quaternion_and_refuses_zero(gyro, filt: str) -> None:
    for f in (estgen.build(gyro, filter=filt, precision="double"), estgen.reference(gyro, filter=filt)):
        x = np.array([2.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0])
        assert f.set_state(x, np.eye(6) * 0.01) == 0
        np.testing.assert_allclose(f.x[:4], [1, 0, 0, 0])
        x[0] = 0.0
        assert f.set_state(x, np.eye(6) * 0.01) == int(estgen.Status.BAD_INPUT)


@pytest.mark.parametrize("kappa", [0.0, 1.0])
def test_ukf_predict_of_a_pure_rotation_is_exact(gyro, kappa: float) -> None:
    """With the bias known, q ⊗ exp(e) ⊗ exp(w dt) = (q ⊗ exp(w dt)) ⊗ exp(R(w dt)^T e) exactly, so
    the error-space transform must give the mean q ⊗ exp(w dt) (scipy composition) and
    P' = R^T P R + Q for any spread (Sola 2017, eq. 274; here without linearization)."""
    fn = model_functions(gyro)
    p = fn.param_tuple(gyro.param_defaults())
    c = estgen.build(gyro, filter="ukf", precision="double", kappa=kappa)
    r = estgen.reference(gyro, filter="ukf", kappa=kappa)
    x = _random_state(gyro)
    A = RNG.normal(size=(3, 3))
    P = np.zeros((6, 6))
    P[:3, :3] = A @ A.T * 0.02  # large spread: sigma points up to about a radian out
    P[3:, 3:] = np.eye(3) * 1e-30
    u = np.array([2.0, -1.0, 0.5])
    dt = 0.1
    Rm = Rotation.from_rotvec((u - x[4:7]) * dt).as_matrix()
    for f in (c, r):
        assert f.set_state(x, P) == 0
        assert f.predict(u, dt) == 0
        want_q = _quat(_rot(x[:4]) * Rotation.from_rotvec((u - x[4:7]) * dt))
        assert min(np.abs(f.x[:4] - want_q).max(), np.abs(f.x[:4] + want_q).max()) < 1e-12
        np.testing.assert_allclose(f.P[:3, :3], Rm.T @ P[:3, :3] @ Rm + fn.Q(dt, p)[:3, :3], atol=1e-12)
