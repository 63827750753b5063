"""The soak runner (estgen.soak) on every example and filter, at a short length: 2*10^4 float
steps each here; ``estgen soak MODEL --steps 1000000`` runs the full length outside the tests.

Sources: positive definiteness by numpy's Cholesky (LAPACK potrf); the mean NEES of a
consistent filter is the state dimension n (Bar-Shalom, Li and Kirubarajan, Estimation with
Applications to Tracking and Navigation, 2001, section 5.4); the packed layout is the one the
generated header documents (entry (i, j), i <= j, at i*n - i*(i-1)/2 + (j-i)); the sample
covariance of the simulated process noise must match Q (numpy.cov).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest

from estgen.reference import model_functions, wrap_angle
from estgen.layout import unpack
from estgen.soak import _Truth, batch_posdef, soak
from test_robustness import CONFIGS, REPO, generated, model_path, spec_of

STEPS = 20000
#: battery_soc's own scenario only discharges: its charge leaves [0, 1] after ~1.5 h, beyond the
#: open-circuit-voltage curve's domain; the mirrored profile charges and discharges in turn
PROFILE = {"battery_soc": "mirror"}
FLOAT_CONFIGS = [c for c in CONFIGS if c[2] == "float"]
#: examples whose Kalman filters are inconsistent on purpose: pier_tag's mirror ambiguity puts the
#: EKF and UKF on the wrong side in some runs (its README; the particle filter's example)
INCONSISTENT_BY_DESIGN = {"pier_tag"}
FLOAT_IDS = ["-".join(c) for c in FLOAT_CONFIGS]


@pytest.mark.parametrize("config", FLOAT_CONFIGS, ids=FLOAT_IDS)
def test_short_soak_keeps_x_finite_and_p_positive_definite(config):
    ex, filt, prec = config
    spec = spec_of(ex)
    res = soak(spec, filt, prec, steps=STEPS, seed=1, profile=PROFILE.get(ex, "model"),
               generated=generated(ex, filt, prec))
    assert res.steps == STEPS
    assert res.nonfinite_steps == 0 and res.not_posdef_steps == 0, res.as_dict()
    assert res.refusals == 0 and res.bad_measurements == 0, res.as_dict()
    assert res.predict_status == {"OK": STEPS}
    for s in spec.sensors:
        assert sum(res.update_status[s.name].values()) == STEPS // s.every
    # consistency, loosely (a factor of two either way of n over the run; common practice for a
    # smoke test, the Monte Carlo test in estgen simulate is the real one)
    if ex not in INCONSISTENT_BY_DESIGN:
        assert 0.5 * spec.n < res.mean_nees < 2.0 * spec.n, res.mean_nees


def test_soak_reports_a_truth_that_leaves_the_model_domain():
    # The battery on its own discharge-only profile: after ~5000 s the charge is far below 0,
    # where the OCV curve's exponential overflows float; the run must not pass.
    res = soak(spec_of("battery_soc"), "ekf", "float", steps=STEPS, seed=1, profile="model",
               generated=generated("battery_soc", "ekf", "float"))
    assert not res.ok
    assert res.refusals > 0 or res.not_posdef_steps > 0 or res.bad_measurements > 0


def test_packed_layout_and_batch_cholesky():
    # the header's packed layout: row-major upper triangle
    full = unpack(np.arange(6.0)[None, :], 3)[0]
    assert np.array_equal(full, np.array([[0.0, 1.0, 2.0], [1.0, 3.0, 4.0], [2.0, 4.0, 5.0]]))
    good = np.array([[2.0, 1.0], [1.0, 2.0]])
    bad = np.array([[1.0, 2.0], [2.0, 1.0]])  # eigenvalues 3 and -1
    mask, L = batch_posdef(np.stack([good, good]))
    assert mask.all() and np.allclose(L[0] @ L[0].T, good)
    mask, L = batch_posdef(np.stack([good, bad, good]))
    assert mask.tolist() == [True, False, True] and L is None


@pytest.mark.parametrize("ex", ["beacon_rover", "strapdown_nav"])
def test_soak_truth_has_the_model_process_noise(ex):
    # x[k+1] - f(x[k], u[k], 0) over a chunk: zero mean and sample covariance Q(dt) (numpy.cov),
    # with f from the reference's model functions, not the soak's own lambdification.
    spec = spec_of(ex)
    dt = float(spec.scenario_dt)
    tr = _Truth(spec, dt, seed=5, profile="model", period=1000.0)
    x_prev = tr.x.copy()
    U, X, _ = tr.chunk(6000)
    mf = model_functions(spec)
    p = mf.param_tuple(spec.param_defaults())
    prev = np.vstack([x_prev, X[:-1]])
    resid = np.array([X[k] - mf.f(prev[k], U[k], dt, p) for k in range(len(X))])
    ang = np.array(spec.angle_states)
    if ang.any():
        resid[:, ang] = wrap_angle(resid[:, ang])
    Q = mf.Q(dt, p)
    if spec.nw:
        # noise symbols (strapdown_nav's IMU noise through the inputs) add L Qw L' along the
        # path, L = df/dw: exact here, where f is linear in w (covariance of a linear map)
        Qw = mf.Qw(dt, p)
        Ls = [mf.L(prev[k], U[k], dt, p) for k in range(len(X))]
        Q = Q + np.mean([L @ Qw @ L.T for L in Ls], axis=0)
    sd = np.sqrt(np.diag(Q))
    # 6000 samples: the sample variance is within ~4.5 % (1 sigma ~ sqrt(2/6000)) of the truth
    assert np.allclose(np.diag(np.cov(resid.T)) / np.diag(Q), 1.0, atol=0.08)
    assert np.all(np.abs(resid.mean(axis=0)) < 5 * sd / np.sqrt(len(X)))


def test_soak_command_line(tmp_path):
    out = tmp_path / "soak.json"
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    # `estgen soak`, the one command line (no second one in a module's __main__)
    proc = subprocess.run([sys.executable, "-m", "estgen", "soak", model_path("linear_cart"), "--steps", "3000", "-q",
                           "--json", str(out)], capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr
    # -q: the verdict line only, as verify -q; no progress lines in a log (stderr is not a terminal)
    assert proc.stdout.strip().splitlines() == ["result: OK: x finite and P positive definite at every step"], proc.stdout
    assert proc.stderr == "", proc.stderr
    data = json.loads(out.read_text())
    assert data["ok"] is True and data["steps"] == 3000 and data["predict_status"] == {"OK": 3000}
    bad = subprocess.run([sys.executable, "-m", "estgen", "soak", model_path("linear_cart"), "--steps", "0", "-q"],
                         capture_output=True, text=True, env=env, timeout=300)
    assert bad.returncode == 2 and "Traceback" not in bad.stderr


def test_within_rounding_on_a_matrix_lapack_refuses():
    # A covariance the fuzzer produced (beacon_rover EKF, double, after dt = 1e30): condition
    # number ~1e38, so LAPACK's Cholesky fails on it, yet its eigenvalues at 60 digits (mpmath,
    # a sympy dependency) are all positive: it is positive definite, and within_rounding says so.
    import mpmath

    P = np.array([[1.99896318e+63, 4.02495720e+63, 3.92466173e+30, 6.83500548e+33],
                  [4.02495720e+63, 8.10434162e+63, 7.90239443e+30, 1.37624369e+34],
                  [3.92466173e+30, 7.90239443e+30, 1.00000000e+26, 1.34194990e+01],
                  [6.83500548e+33, 1.37624369e+34, 1.34194990e+01, 2.50000000e+27]])
    with mpmath.workdps(60):
        exact = mpmath.eigsy(mpmath.matrix(P.tolist()))[0]
        exact_min = float(min(exact))
    from estgen.soak import within_rounding

    assert exact_min > 0
    mask, _ = batch_posdef(P[None])
    assert bool(mask[0]) or within_rounding(P, "double")
    # an indefinite matrix is never within rounding (eigenvalues 3 and -1)
    assert not within_rounding(np.array([[1.0, 2.0], [2.0, 1.0]]), "float")
    # a slightly indefinite one, lambda_min = -1e-9 lambda_max, only in the coarser precision
    Q = np.diag([1.0, -1e-9])
    assert within_rounding(Q, "float") and not within_rounding(Q, "double")


_COLLAPSING_PF = """import sympy as sp
from estgen import Model

model = Model("dropper")
(pos,) = model.states("pos")
model.process([pos])
model.process_noise([1e-6 * model.dt])
model.sensor("gauge", [pos], noise=[1e-6])
model.initial_uniform([-1.0], [1.0])
model.scenario(dt=1.0)
"""


def test_soak_reports_pivot_and_nees_of_the_steps_that_factor(tmp_path):
    # Eight particles spread over [-1, 1] and a gauge a thousand times sharper: after an update
    # resampling copies one particle into every slot, so P is exactly 0 at some steps (the
    # collapse of a particle filter without roughening, Gordon, Salmond & Smith 1993). Those steps
    # fail the invariant; the others still give a smallest pivot and a NEES, the numbers numpy's
    # Cholesky gives for them, rather than inf and nan.
    path = tmp_path / "dropper.py"
    path.write_text(_COLLAPSING_PF)
    res = soak(str(path), "pf", "double", steps=400, seed=2, particles=8)
    assert not res.ok and res.not_posdef_steps > 0
    assert res.not_posdef_steps + res.borderline_steps < 400
    assert np.isfinite(res.min_cholesky_pivot) and res.min_cholesky_pivot > 0.0
    assert np.isfinite(res.mean_nees) and res.mean_nees > 0.0
