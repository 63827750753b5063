"""The UKF's loop form (``--optimize``, estgen/emit_ukf_loop.py) against outside results: the
Kalman filter on a linear model, the numpy reference UKF on every example and on synthetic
models in both precisions, the strict compile, and the rule that picks the form.

The form is forced here through the thresholds of :func:`estgen.emit_ukf.uses_loop_form`, so the
small examples (2 to 4 states, straight-line under both options) run through the loops too."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from typing import Dict

import numpy as np
import pytest

import estgen
import estgen.emit_ukf as emit_ukf
from estgen.build import STRICT_FLAGS, build
from estgen.filters import generate
from estgen.simulate import make_scenario, run_filter
from estgen.status import Status
from estgen.verify import verify

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
EX = os.path.join(ROOT, "generated_examples")
EXAMPLES = ["linear_cart", "battery_soc", "beacon_rover", "valve_actuator", "strapdown_nav", "pier_tag", "quat_nav"]
MODELS = ["ukf_heading.py", "ukf_rangebearing.py", "noise_range.py", "noise_cart.py", "ukf_saturation.py",
          "attitude_gyro.py", "attitude_corr_mag.py"]
sys.path.insert(0, os.path.join(ROOT, "benchmarks"))

from synthetic import write_model  # noqa: E402


@pytest.fixture
def loop_form(monkeypatch: pytest.MonkeyPatch) -> Dict[str, str]:
    """Generate the loop form for every model size: the options to pass."""
    monkeypatch.setattr(emit_ukf, "UKF_LOOP_SIZE_MIN_N", 0)
    return {"optimize": "size"}


def _path(name: str) -> str:
    return os.path.join(EX, name, "model.py") if name in EXAMPLES else os.path.join(HERE, "models", name)


def _is_loop(source: str, prefix: str) -> bool:
    return f"static void {prefix}_f(" in source and "loop form: the 2N+1 sigma points" in source


def test_loop_form_equals_kalman_filter_on_linear_cart(loop_form: Dict[str, str]) -> None:
    # Source: Julier & Uhlmann, "Unscented filtering and nonlinear estimation", Proc. IEEE 92(3),
    # 2004: the unscented transform is exact for a linear map, so on a linear model the UKF is
    # the Kalman filter (Kalman 1960), written out here in numpy from the model file's matrices.
    spec = estgen.load_model(_path("linear_cart"))
    gen = generate(spec, filter="ukf", precision="double", **loop_form)
    assert _is_loop(gen.source, gen.prefix)
    c = build(spec, filter="ukf", precision="double", **loop_form)
    sc = make_scenario(spec, 300, seed=11)
    mass, q_acc, q_dist = 12.0, 0.05, 1e-3  # the model's parameter defaults
    dt = sc.dt
    F = np.array([[1.0, dt, dt * dt / (2 * mass)], [0.0, 1.0, dt / mass], [0.0, 0.0, 1.0]])
    B = np.array([dt * dt / (2 * mass), dt / mass, 0.0])
    Q = np.array([[q_acc * dt ** 3 / 3, q_acc * dt ** 2 / 2, 0.0], [q_acc * dt ** 2 / 2, q_acc * dt, 0.0],
                  [0.0, 0.0, q_dist * dt]])
    Hs = {"encoder": (np.array([[1.0, 0.0, 0.0]]), 0.0005 ** 2), "speed": (np.array([[0.0, 1.0, 0.0]]), 0.01 ** 2)}
    x, P = np.array(spec.x0, dtype=float), np.array(spec.P0, dtype=float)
    worst = 0.0
    for k in range(sc.steps):
        assert c.predict(sc.u[k], dt) == 0
        x, P = F @ x + B * sc.u[k][0], F @ P @ F.T + Q
        for name, z in sc.measurements[k]:
            assert c.update(name, z) == 0
            H, r = Hs[name]
            S = H @ P @ H.T + r
            K = P @ H.T / S
            x = x + (K * (z - H @ x)).ravel()
            P = P - K @ S @ K.T
        sig = np.sqrt(np.diag(P))
        worst = max(worst, float(np.max(np.abs(c.x - x) / np.maximum(np.abs(x), sig))),
                    float(np.max(np.abs(c.P - P) / np.outer(sig, sig))))
    assert worst < 1e-9, worst
    assert P[2, 2] < 0.5 * spec.P0[2][2]  # the disturbance force was learned: the run did work


@pytest.mark.parametrize("precision", ["double", "float"])
@pytest.mark.parametrize("name", EXAMPLES + MODELS)
def test_loop_form_matches_reference(name: str, precision: str, loop_form: Dict[str, str]) -> None:
    # Source: the numpy reference UKF (estgen.reference.ReferenceUKF, dense textbook form, Wan &
    # van der Merwe 2000; attitudes: error-space sigma points about the central image, Crassidis &
    # Markley 2003); verify's tolerances: 1e-9 relative in double, 0.01 sigma in float.
    spec = estgen.load_model(_path(name))
    gen = generate(spec, filter="ukf", precision=precision, **loop_form)
    assert _is_loop(gen.source, gen.prefix)
    steps = 120 if name in ("strapdown_nav", "quat_nav") else 200
    res = verify(spec, filter="ukf", precision=precision, steps=steps, seed=3, **loop_form)
    assert res.ok, (res.x_dev, res.P_dev, res.status_mismatch)
    assert max(res.x_dev) > 0.0 or precision == "double"  # float rounding must show: it ran


@pytest.mark.parametrize("opts", [{"alpha": 1e-2, "beta": 2.0, "kappa": 0.0},
                                  {"alpha": 1.0, "beta": 0.0, "kappa": -1.0}])
def test_loop_form_non_default_parameters(opts: Dict[str, float], loop_form: Dict[str, str]) -> None:
    # Source: the reference UKF with the same alpha, beta, kappa (scaled UT, Julier 2002);
    # alpha = 1e-2 gives a large negative centre weight, kappa = 3 - n Julier's choice for normals.
    res = verify(_path("ukf_heading.py"), filter="ukf", precision="double", steps=150, seed=5, **opts, **loop_form)
    assert res.ok, (opts, res.x_dev, res.P_dev, res.status_mismatch)


@pytest.mark.slow
@pytest.mark.parametrize("kind,n", [("sparse", 13), ("dense", 9)])
@pytest.mark.parametrize("precision", ["double", "float"])
def test_loop_form_matches_reference_on_synthetic(kind: str, n: int, precision: str, tmp_path) -> None:
    # Source: the numpy reference UKF, as above; the synthetic models of the benchmarks, with
    # the form the options choose (size: the loop form from UKF_LOOP_SIZE_MIN_N states).
    spec = estgen.load_model(write_model(kind, n, str(tmp_path)))
    assert emit_ukf.uses_loop_form(spec, "size")
    res = verify(spec, filter="ukf", precision=precision, steps=120, seed=2, optimize="size")
    assert res.ok, (res.x_dev, res.P_dev, res.status_mismatch)


_DOUBLE_MATH = re.compile(r"\b(sin|cos|tan|atan2|atan|asin|acos|sqrt|exp|log|pow|fabs|fmin|fmax|ceil|floor|tanh)\(")
_DOUBLE_LIT = re.compile(r"(?<![\w.])\d+\.\d*(?:[eE][-+]?\d+)?(?![\w.])")


@pytest.mark.parametrize("compiler", ["gcc", "clang"])
def test_loop_form_strict_compile_float_hygiene_determinism(compiler: str, tmp_path, loop_form: Dict[str, str]) -> None:
    # Source: the contract's warning set (section 4); C99 (ISO/IEC 9899:1999) 7.12: the
    # f-suffixed math functions take and return float; common practice (reproducible builds).
    # A missing compiler fails the test.
    cc = shutil.which(compiler)
    assert cc, f"{compiler} is required for this test"
    for name in ("strapdown_nav", "quat_nav", "ukf_rangebearing.py", "noise_range.py"):
        spec = estgen.load_model(_path(name))
        for prec in ("float", "double"):
            gen = generate(spec, filter="ukf", precision=prec, **loop_form)
            assert gen.files == generate(estgen.load_model(_path(name)), filter="ukf", precision=prec,
                                         **loop_form).files
            d = tmp_path / f"{spec.name}_{prec}"
            d.mkdir()
            for fname, text in gen.files.items():
                (d / fname).write_text(text)
            proc = subprocess.run([cc, *STRICT_FLAGS, "-Wvla", "-O2", "-c", str(d / f"{gen.prefix}.c"), "-o",
                                   str(d / "o.o")], capture_output=True, text=True)
            assert proc.returncode == 0, proc.stderr
            for bad in ("malloc", "free(", "printf", "stdio.h", "static " + gen.prefix + "_t"):
                assert bad not in gen.source
            if prec == "float":
                code = re.sub(r"/\*.*?\*/", "", gen.source, flags=re.S)  # comments may say "0.5"
                assert not _DOUBLE_MATH.search(code), _DOUBLE_MATH.search(code)
                assert not _DOUBLE_LIT.search(code), _DOUBLE_LIT.search(code)
                assert "double" not in code
            m = re.search(r"named locals total (\d+) bytes in predict and (\d+) bytes", gen.header)
            assert m and int(m.group(1)) == gen.sigma_stack["predict"] > 0


def test_speed_takes_the_loops_at_once_for_large_or_coupled_models(tmp_path) -> None:
    # Source: the rule in docs/performance.md: from UKF_LOOP_SPEED_MIN_N error states, and from
    # UKF_DENSE_LOOP_MIN_N when f couples most (component, state) pairs (the benchmark's models).
    dense = estgen.load_model(write_model("dense", 16, str(tmp_path)))
    sparse = estgen.load_model(write_model("sparse", 18, str(tmp_path)))
    big = estgen.load_model(write_model("sparse", 24, str(tmp_path)))
    assert emit_ukf.coupling(dense) == 1.0 and emit_ukf.coupling(sparse) < 0.25
    assert emit_ukf.uses_loop_form(dense, "speed") and emit_ukf.uses_loop_form(big, "speed")
    assert not emit_ukf.uses_loop_form(sparse, "speed")  # left to the flash estimate


def test_which_form_each_option_takes(monkeypatch: pytest.MonkeyPatch) -> None:
    # Source: the rule documented in docs/performance.md ("Speed and size"): size from
    # UKF_LOOP_SIZE_MIN_N states; speed from UKF_LOOP_SPEED_MIN_N, and below it when the
    # straight-line form's estimated flash exceeds UKF_STRAIGHT_FLASH_MAX.
    nav = estgen.load_model(_path("strapdown_nav"))
    small = estgen.load_model(_path("beacon_rover"))
    assert emit_ukf.UKF_LOOP_SIZE_MIN_N <= nav.ne < emit_ukf.UKF_LOOP_SPEED_MIN_N
    size = generate(nav, filter="ukf", precision="float", optimize="size")
    speed = generate(nav, filter="ukf", precision="float", optimize="speed")
    assert _is_loop(size.source, size.prefix) and _is_loop(speed.source, speed.prefix)
    monkeypatch.setattr(emit_ukf, "UKF_STRAIGHT_FLASH_MAX", float("inf"))
    straight = generate(nav, filter="ukf", precision="float", optimize="speed")
    assert not _is_loop(straight.source, straight.prefix)
    assert emit_ukf.straight_flash_estimate(straight.source) > 64 * 1024  # why speed took the loops
    assert len(size.source) < len(straight.source)
    small_speed = generate(small, filter="ukf", precision="float", optimize="speed").source
    assert emit_ukf.straight_flash_estimate(small_speed) <= 64 * 1024 and not _is_loop(small_speed, "rover_ukf")
    assert not _is_loop(generate(small, filter="ukf", precision="float", optimize="size").source, "rover_ukf")
    # attitudes: the rule reads the covariance's dimension (three per quaternion)
    quat = estgen.load_model(os.path.join(EX, "quat_nav", "model.py"))
    assert quat.attitudes and emit_ukf.uses_loop_form(quat, "size") == (quat.ne >= emit_ukf.UKF_LOOP_SIZE_MIN_N)
    src = generate(quat, filter="ukf", precision="float", optimize="size").source
    assert "static void qnav_ukf_inject(" in src and "static void qnav_ukf_boxminus(" in src


_PENDULUM = '''
import sympy as sp
from estgen import Model
model = Model("pend")
th, om = model.states("th om")
q = model.param("q", 0.01)
dt = model.dt
model.process([th + dt * om, om - dt * 9.81 * sp.sin(th)])
model.process_noise(sp.diag(q, q) * dt)
model.sensor("angle", [th], noise=[0.01])
model.initial([0.3, 0.0], sp.diag(0.1, 0.1))
'''


def test_loop_predict_commits_under_its_certificate_only(tmp_path, loop_form: Dict[str, str]) -> None:
    # Source: the argument of estgen.emit_ukf_loop.loop_certificate (a non-negatively weighted
    # sum of outer products is positive semidefinite; Cauchy-Schwarz bounds its rounding, Higham,
    # Accuracy and Stability of Numerical Algorithms, 2nd ed., 2002, sec. 3.5); numpy's Cholesky
    # (LAPACK potrf) judges every committed P, and the reference UKF the refusals.
    path = tmp_path / "pend.py"
    path.write_text(_PENDULUM)
    spec = estgen.load_model(str(path))
    src = generate(spec, filter="ukf", precision="double", **loop_form).source
    predict = src[src.index("int pend_ukf_predict("):src.index("int pend_ukf_update_angle_nis(")]
    assert "pend_ukf_commit_diag(Pn)" in predict and "(0.0 <= " in predict  # certified, Q_ii >= 0 checked
    c = build(spec, filter="ukf", precision="double", **loop_form)
    r = estgen.reference(spec, filter="ukf")
    sc = make_scenario(spec, 200, seed=4)
    rc, rr = run_filter(c, sc), run_filter(r, sc)
    assert np.array_equal(rc["predict_status"], rr["predict_status"]) and not rc["predict_status"].any()
    for P in rc["P"]:
        np.linalg.cholesky(P)  # raises when a committed P is not positive definite
    # a negative process-noise variance: the certificate fails and the factorization refuses the
    # P' that numpy finds indefinite (the reference commits it: it checks finiteness only); the
    # struct is unchanged
    for f in (c, r):
        f.set_param("q", -50.0)
    before = c.raw_state()
    assert r.predict([], 0.1) == 0 and float(np.linalg.eigvalsh(r.P)[0]) < 0.0
    assert c.predict([], 0.1) == Status.NOT_POSITIVE_DEFINITE
    assert c.raw_state() == before
    # without the certificate's premise (alpha = 1e-2: Wc0 < 0) the predict always factorizes
    small = generate(spec, filter="ukf", precision="double", alpha=1e-2, **loop_form).source
    assert "_commit_diag(" not in small


@pytest.mark.parametrize("precision", ["double", "float"])
@pytest.mark.parametrize("name", ["strapdown_nav", "quat_nav", "attitude_gyro.py", "attitude_corr_mag.py"])
def test_straight_line_form_still_matches_reference(name: str, precision: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Source: the numpy reference UKF, as above. The default takes the loop form for these two
    # (their straight-line flash is over budget); the straight-line form stays selectable
    # through the thresholds and must stay right.
    monkeypatch.setattr(emit_ukf, "UKF_STRAIGHT_FLASH_MAX", float("inf"))
    spec = estgen.load_model(_path(name))
    gen = generate(spec, filter="ukf", precision=precision)
    assert not _is_loop(gen.source, gen.prefix)
    res = verify(spec, filter="ukf", precision=precision, steps=120, seed=3)
    assert res.ok, (res.x_dev, res.P_dev, res.status_mismatch)
