"""Noise symbols (contract section 5): noise inside f and h, and measured inputs with noise.

Each check names the outside fact it rests on. Model files: tests/models/noise_*.py.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
import sympy as sp

import estgen
from estgen.model import noise_factor
from estgen.simulate import make_scenario
from estgen.verify import verify

HERE = os.path.dirname(os.path.abspath(__file__))


def _model(name: str) -> str:
    return os.path.join(HERE, "models", name)


def _drive(filters, spec, steps: int, seed: int, dt: float = 0.1) -> None:
    """The same inputs and measurements to every filter; every call must agree on its status."""
    rng = np.random.default_rng(seed)
    for k in range(steps):
        u = list(rng.normal(size=spec.nu))
        st = {int(f.predict(u, dt)) for f in filters}
        assert st == {0}
        for s in spec.sensors:
            z = list(np.array(filters[0].x[:s.m]) + rng.normal(size=s.m) * 0.3)
            st = {int(f.update(s.name, z)) for f in filters}
            assert len(st) == 1


def _close(a: np.ndarray, b: np.ndarray, rel: float) -> bool:
    return bool(np.max(np.abs(a - b)) <= rel * max(1.0, float(np.max(np.abs(b)))))


# -- the spec -------------------------------------------------------------------------------


def test_spec_describes_where_each_noise_symbol_enters():
    """What the particle filter and other consumers read: symbols, covariance, place."""
    spec = estgen.load_model(_model("noise_cart.py"))
    assert [(v.name, v.enters, v.input) for v in spec.noise] == [
        ("acc_noise", "process", "acc"), ("wb", "process", None), ("ep", "gps", None), ("ev", "gps", None)]
    assert spec.nw == 2 and spec.sensor("gps").nv == 2
    dt, sig_b = spec.dt, spec.p_syms[0]
    assert sp.simplify(spec.Qw - sp.diag(0.09, sig_b ** 2 * dt)) == sp.zeros(2, 2)
    # u_true = u_meas - w: the measured input's noise enters with a minus sign
    w_acc = spec.w_syms[0]
    assert sp.simplify(spec.f[1].diff(w_acc) + dt) == 0
    assert spec.f0.free_symbols.isdisjoint(spec.w_syms)
    assert spec.sensor("gps").h0.free_symbols.isdisjoint(spec.sensor("gps").v)
    A = np.array(noise_factor(spec.sensor("gps").Rv), dtype=float)
    # the Cholesky factor, as numpy computes it
    assert np.allclose(A, np.linalg.cholesky(np.array([[0.25, 0.01], [0.01, 0.04]])), rtol=1e-14, atol=0)


def test_contract_section_5_example_as_written():
    """The contract's snippet, with its state v and its noise symbol v side by side."""
    src = '''
import sympy as sp
from estgen import Model
model = Model("snip")
px, py, v, th = model.states("px py v th")
a_meas, om_meas = model.inputs("a_meas om_meas")
dt = model.dt
wa, wg = model.noise("wa wg", cov=sp.diag(0.02**2, 0.001**2))  # zero-mean Gaussian noise symbols
model.process([px + dt * v * sp.cos(th), py + dt * v * sp.sin(th),
               v + dt * (a_meas - wa), th + dt * (om_meas - wg)])   # x[k+1] = f(x, u, w, dt)
(v,) = model.noise("v", cov=[0.05**2])
model.sensor("range", [sp.sqrt(px**2 + py**2) * (1 + v)])           # z = h(x, v); noise= is then optional
model.sensor("bearing", [sp.atan2(py, px)], noise=[0.01**2], angles=[0])
model.initial([10.0, 5.0, 1.0, 0.3], sp.diag(1.0, 1.0, 0.1, 0.05))
model.scenario(dt=0.1, inputs=lambda t: [0.1, 0.05])
'''
    ns: dict = {}
    exec(compile(src, "snippet.py", "exec"), ns)
    spec = estgen.validate(ns["model"])
    assert [s.name for s in spec.states] == ["px", "py", "v", "th"]
    assert [v.name for v in spec.noise] == ["wa", "wg", "v"]
    state_v = spec.states[2].symbol
    assert state_v in spec.f[0].free_symbols and state_v not in spec.sensor("range").h.free_symbols
    for filt in ("ekf", "ukf"):
        for prec in ("double", "float"):
            res = verify(spec, filter=filt, precision=prec, steps=200, seed=3)
            assert res.ok, (filt, prec, res.as_dict())


# -- linear models: the additive form and the Kalman filter -----------------------------------


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
def test_linear_noise_symbols_equal_additive_form(filt):
    """For noise entering linearly, x' = F x + B w and z = H x + M v, the filter equals the one with
    Q = B Qw B' and R = M Rv M' (the covariance of a linear map of a Gaussian, common practice),
    to 1e-12 in double: reference and generated C alike."""
    sym = estgen.load_model(_model("noise_cart.py"))
    add = estgen.load_model(_model("noise_cart_additive.py"))
    opts = {"alpha": 0.7, "beta": 2.0, "kappa": 1.0} if filt == "ukf" else {}
    filters = [estgen.reference(sym, filter=filt, **opts), estgen.reference(add, filter=filt, **opts),
               estgen.build(sym, filter=filt, precision="double", **opts)]
    _drive(filters, sym, steps=60, seed=11)
    ref = filters[1]
    for f in (filters[0], filters[2]):
        assert _close(f.x, ref.x, 1e-12), (f.x, ref.x)
        assert _close(f.P, ref.P, 1e-12), np.max(np.abs(f.P - ref.P))


@pytest.mark.parametrize("alpha,beta,kappa", [(1.0, 2.0, 0.0), (0.5, 2.0, 1.0), (1e-2, 2.0, 0.0)])
def test_linear_augmented_ukf_equals_kalman_filter(alpha, beta, kappa):
    """On a linear model the unscented transform is exact (Julier & Uhlmann, Proc. IEEE 92(3),
    2004): the augmented UKF, [x; w] in predict and [x; v] in the update, equals the Kalman
    filter (F P F' + B Qw B' + Q, H P H' + M Rv M'; Kalman 1960), written out here in numpy."""
    spec = estgen.load_model(_model("noise_cart.py"))
    dt, sig_b = 0.1, 0.01
    F = np.array([[1, dt, -dt ** 2 / 2], [0, 1, -dt], [0, 0, 1]])
    G = np.array([[dt ** 2 / 2], [dt], [0]])
    B = np.array([[-dt ** 2 / 2, 0], [-dt, 0], [0, 1]])
    Q = B @ np.diag([0.09, sig_b ** 2 * dt]) @ B.T + np.diag([1e-6, 0, 0])
    H = np.array([[1.0, 0, 0], [0, 1.0, 0]])
    M = np.array([[1.0, 0], [0.5, 1.0]])
    R = M @ np.array([[0.25, 0.01], [0.01, 0.04]]) @ M.T
    x, P = np.array(spec.x0), np.array(spec.P0)
    ukfs = [estgen.reference(spec, filter="ukf", alpha=alpha, beta=beta, kappa=kappa),
            estgen.build(spec, filter="ukf", precision="double", alpha=alpha, beta=beta, kappa=kappa)]
    rng = np.random.default_rng(5)
    for k in range(40):
        u = rng.normal()
        x, P = F @ x + G[:, 0] * u, F @ P @ F.T + Q
        for f in ukfs:
            assert f.predict([u], dt) == 0
        z = H @ x + rng.normal(size=2) * 0.3
        S = H @ P @ H.T + R
        K = P @ H.T @ np.linalg.inv(S)
        x, P = x + K @ (z - H @ x), (np.eye(3) - K @ H) @ P
        for f in ukfs:
            assert f.update("gps", list(z)) == 0
            assert _close(f.x, x, 1e-10), (k, f.x, x)
            assert _close(f.P, P, 1e-10), (k, np.max(np.abs(f.P - P)))


# -- non-additive noise: the augmented transform against a large Monte Carlo ------------------


def test_augmented_unscented_transform_against_monte_carlo():
    """Mean and covariance of x' = f(x, w) for a map quadratic in a noise symbol, x ~ N(x0, P0),
    w ~ N(0, Qw), against 10^6 samples. With alpha = 1, beta = 0 and kappa = 3 - N (Julier &
    Uhlmann, Proc. IEEE 92(3), 2004) the points along each axis form the three-point
    Gauss-Hermite rule, exact for polynomials up to degree 5 (Abramowitz & Stegun 25.4.46), which
    covers every moment this map needs; so the only difference is Monte Carlo error and the
    tolerance is 5 standard errors, estimated from the samples. The EKF's first-order mean
    misses E[w1^2]/2 = 0.5: checked to lie far outside the same tolerance, so the test can fail."""
    spec = estgen.load_model(_model("noise_quadratic.py"))
    N = spec.n + spec.nw
    opts = {"alpha": 1.0, "beta": 0.0, "kappa": 3.0 - N}
    ukfs = [estgen.reference(spec, filter="ukf", **opts), estgen.build(spec, filter="ukf", precision="double", **opts)]
    for f in ukfs:
        assert f.predict([], 0.1) == 0
    rng = np.random.default_rng(2024)
    S = 10 ** 6
    X = rng.multivariate_normal(spec.x0, np.array(spec.P0), size=S)
    W = rng.normal(size=(S, 2)) * np.array([1.0, 0.2])
    Y = np.column_stack([X[:, 0] + 0.5 * X[:, 1] + W[:, 0] + 0.5 * W[:, 0] ** 2,
                         0.8 * X[:, 1] - 0.3 * W[:, 0] + W[:, 1]])
    mean = Y.mean(axis=0)
    se_mean = Y.std(axis=0, ddof=1) / np.sqrt(S)
    D = Y - mean
    cov = D.T @ D / (S - 1)
    prods = np.stack([D[:, i] * D[:, j] for i in range(2) for j in range(2)], axis=1)
    se_cov = (prods.std(axis=0, ddof=1) / np.sqrt(S)).reshape(2, 2)
    for f in ukfs:
        assert np.all(np.abs(f.x - mean) <= 5 * se_mean), (f.x, mean, se_mean)
        assert np.all(np.abs(f.P - cov) <= 5 * se_cov), (f.P, cov, se_cov)
    ekf = estgen.reference(spec, filter="ekf")
    assert ekf.predict([], 0.1) == 0
    assert abs(ekf.x[0] - mean[0]) > 50 * se_mean[0]
    assert abs(ekf.x[0] + 0.5 - mean[0]) <= 5 * se_mean[0]


def test_ekf_noise_jacobians_against_central_differences():
    """The EKF's P' = F P F' + L Qw L' + Q and S = H P H' + M Rv M' + R with L = df/dw and
    M = dh/dv at w = v = 0, the Jacobians checked against central differences of f and h
    (common practice), on the nonlinear model; the C (double) agrees with the reference."""
    spec = estgen.load_model(_model("noise_range.py"))
    mf = estgen.reference(spec, filter="ekf")._fn
    p = mf.param_tuple(spec.param_defaults())
    x, u, dt = np.array([8.0, 3.0, 0.4]), np.array([1.0, 0.1]), 0.1
    eps = 1e-6

    def fw(w):
        return mf.f(x, u, dt, p, w)

    L = np.column_stack([(fw(eps * e) - fw(-eps * e)) / (2 * eps) for e in np.eye(spec.nw)])
    assert np.allclose(mf.L(x, u, dt, p), L, rtol=1e-7, atol=1e-9)
    Mn = (mf.h("range", x, p, np.array([eps])) - mf.h("range", x, p, np.array([-eps]))) / (2 * eps)
    assert np.allclose(mf.M("range", x, p)[:, 0], Mn, rtol=1e-7)
    c = estgen.build(spec, filter="ekf", precision="double")
    r = estgen.reference(spec, filter="ekf")
    P0 = np.array(spec.P0)
    for f in (c, r):
        assert f.set_state(x, P0) == 0
        assert f.predict(list(u), dt) == 0
    F = np.column_stack([(mf.f(x + eps * e, u, dt, p) - mf.f(x - eps * e, u, dt, p)) / (2 * eps) for e in np.eye(3)])
    expect = F @ P0 @ F.T + L @ mf.Qw(dt, p) @ L.T + mf.Q(dt, p)
    assert np.allclose(r.P, expect, rtol=1e-7, atol=1e-12)
    assert _close(c.P, r.P, 1e-12) and _close(c.x, r.x, 1e-12)


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
@pytest.mark.parametrize("precision", ["double", "float"])
def test_noise_model_c_matches_reference(filt, precision):
    """The compiled C against the reference on simulated data (the verify tolerances, as for
    every example), on a model with noise through inputs, a process noise symbol, a correlated
    input covariance and a multiplicative range error."""
    res = verify(_model("noise_range.py"), filter=filt, precision=precision, steps=300, seed=4)
    assert res.ok, res.as_dict()


def test_truth_draws_noise_symbols():
    """The simulated truth passes w through f: with x' = x + w, w ~ N(0, q), the sample variance
    of the increments over K steps satisfies (K-1) s^2 / q ~ chi-square(K-1) (Cochran's theorem;
    bounds from scipy.stats.chi2 at 1e-6 either side); a truth that ignored w would show zero."""
    from scipy.stats import chi2

    src = '''
from estgen import Model
model = Model("walk")
(x,) = model.states("x")
(drift,) = model.inputs("drift", noise=[0.04])
model.process([x + drift])
(r,) = model.noise("r", cov=[0.25])
model.sensor("s", [x + r])
model.initial([0.0], [1.0])
'''
    ns: dict = {}
    exec(compile(src, "walk.py", "exec"), ns)
    spec = estgen.validate(ns["model"])
    K = 4000
    sc = make_scenario(spec, steps=K, seed=9)
    inc = np.diff(sc.x_true[:, 0])  # drift input is 0: the increment is -w
    z = np.array([m[0][1][0] for m in sc.measurements]) - sc.x_true[1:, 0]
    for sample, q in ((inc, 0.04), (z, 0.25)):
        stat = (K - 1) * np.var(sample, ddof=1) / q
        assert chi2.ppf(1e-6, K - 1) < stat < chi2.ppf(1 - 1e-6, K - 1), stat


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
def test_attitude_with_gyro_noise(filt):
    """An attitude driven by a measured gyro (noise through the input), at rest: the rotation
    error evolves as dtheta' = R(w dt)' dtheta - dw dt (Sola, Quaternion kinematics for the
    error-state Kalman filter, 2017, sec. 5.3.3), so with w = 0 the predicted covariance is
    P + dt^2 Qg: exactly in the EKF's first-order propagation, and to second order in the
    spread (the UKF's terms beyond it are products of the tiny variances: checked to 1e-4
    relative). The C (double) agrees with the reference to 1e-12."""
    src = '''
from estgen import Model, quat
model = Model("spin")
q = model.attitude("q")
wx, wy, wz = model.inputs("wx wy wz", noise=[0.02 ** 2, 0.01 ** 2, 0.03 ** 2])
dt = model.dt
model.process(list(quat.mul(q, quat.exp([wx * dt, wy * dt, wz * dt]))))
model.sensor("acc", quat.rotate(quat.conj(q), [0, 0, -9.81]), noise=[0.05] * 3)
model.initial([1, 0, 0, 0], [1e-4, 2e-4, 3e-4])
'''
    ns: dict = {}
    exec(compile(src, "spin.py", "exec"), ns)
    spec = estgen.validate(ns["model"])
    r = estgen.reference(spec, filter=filt)
    c = estgen.build(spec, filter=filt, precision="double")
    dt = 0.01
    for f in (r, c):
        assert f.predict([0.0, 0.0, 0.0], dt) == 0
    expect = np.diag([1e-4, 2e-4, 3e-4]) + dt ** 2 * np.diag([0.02 ** 2, 0.01 ** 2, 0.03 ** 2])
    assert np.allclose(r.P, expect, rtol=1e-12 if filt == "ekf" else 1e-4, atol=1e-18)
    assert _close(c.P, r.P, 1e-12) and _close(c.x, r.x, 1e-12)
    for _ in range(20):
        for f in (r, c):
            assert f.predict([0.3, -0.2, 0.1], dt) == 0
            assert f.update("acc", [0.5, 0.3, -9.7]) == 0
    assert _close(c.P, r.P, 1e-10) and _close(c.x, r.x, 1e-10)
