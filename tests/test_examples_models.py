"""The example model files: they load, the EKF accepts the smooth ones, and the symbolic
Jacobians of f and h agree with finite differences."""

from __future__ import annotations

import math
import os
from typing import List

import numpy as np
import pytest
import sympy as sp

import estgen
from estgen.filters import check_filter_support
from estgen.model import ModelSpec

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), os.pardir, "generated_examples")
EXAMPLES = ["battery_soc", "beacon_rover", "strapdown_nav", "linear_cart", "valve_actuator"]
EKF_REFUSED = {"valve_actuator"}


def _path(example: str) -> str:
    return os.path.join(ROOT, example, "model.py")


@pytest.fixture(scope="module", params=EXAMPLES)
def example(request: pytest.FixtureRequest) -> tuple:
    return request.param, estgen.load_model(_path(request.param))


def _scenario_u(spec: ModelSpec, t: float = 0.0) -> List[float]:
    if spec.input_profile is None:
        return [0.0] * spec.nu
    return [float(v) for v in spec.input_profile(t)]


def test_loads_with_scenario_and_units(example: tuple) -> None:
    name, spec = example
    assert spec.n >= 2
    assert spec.scenario_dt is not None and spec.scenario_dt > 0
    assert len(_scenario_u(spec)) == spec.nu
    # Every example documents units for all states (our own rule for the examples).
    assert all(s.unit for s in spec.states), name
    assert os.path.isfile(os.path.join(ROOT, name, "README.md"))


def test_readme_names_every_state_input_sensor_and_filter(example: tuple) -> None:
    # The README documents the model it sits beside (common practice: docs kept with the code).
    name, spec = example
    with open(os.path.join(ROOT, name, "README.md"), encoding="utf-8") as fh:
        text = fh.read()
    for item in [*spec.states, *spec.inputs, *spec.sensors]:
        assert f"`{item.name}`" in text, f"{name}: README does not mention {item.name}"
    assert f"`{spec.name}`" in text
    for filt in ("ekf", "ukf"):
        said = f"--filter {filt} --precision float" in text and f"--filter {filt} --precision double" in text
        assert said == (not (filt == "ekf" and name in EKF_REFUSED)), (name, filt)


def test_strapdown_is_navigation_size() -> None:
    assert estgen.load_model(_path("strapdown_nav")).n >= 15


def test_filter_support(example: tuple) -> None:
    name, spec = example
    check_filter_support(spec, "ukf")
    if name in EKF_REFUSED:
        with pytest.raises(estgen.ModelError) as info:
            check_filter_support(spec, "ekf")
        msg = str(info.value)
        assert ("Min" in msg or "Max" in msg) and "ukf" in msg
        assert "model.py" in msg
    else:
        check_filter_support(spec, "ekf")


def _funcs(spec: ModelSpec):
    """Numeric f(x, u) and h_s(x) (noise symbols at zero) at the parameter defaults and the scenario dt, with their
    sympy Jacobians, all through lambdify."""
    subs = {**spec.default_subs(), spec.dt: spec.scenario_dt}
    xs, us = spec.x_syms, spec.u_syms
    f = spec.f0.xreplace({k: sp.Float(v) for k, v in subs.items()})
    out = [("f", sp.lambdify([xs, us], f, "numpy"), sp.lambdify([xs, us], f.jacobian(xs), "numpy"))]
    for s in spec.sensors:
        h = s.h0.xreplace({k: sp.Float(v) for k, v in subs.items()})
        out.append((s.name, sp.lambdify([xs, us], h, "numpy"), sp.lambdify([xs, us], h.jacobian(xs), "numpy")))
    return out


def _central_diff(fun, x: np.ndarray, u: List[float], step: np.ndarray) -> np.ndarray:
    # Central differences, error O(step^2) (common practice; Nocedal & Wright, Numerical
    # Optimization, 2nd ed., 2006, sec. 8.1).
    cols = []
    for j in range(x.size):
        e = np.zeros_like(x)
        e[j] = step[j]
        cols.append((np.asarray(fun(x + e, u), float) - np.asarray(fun(x - e, u), float)).ravel() / (2 * step[j]))
    return np.column_stack(cols)


def test_values_finite_at_x0(example: tuple) -> None:
    _, spec = example
    x0 = np.array(spec.x0)
    for label, fun, _ in _funcs(spec):
        val = np.asarray(fun(x0, _scenario_u(spec)), float)
        assert np.all(np.isfinite(val)), label


def test_jacobians_match_finite_differences(example: tuple) -> None:
    name, spec = example
    rng = np.random.default_rng(20261201)
    x0 = np.array(spec.x0)
    sig = np.sqrt(np.diag(np.array(spec.P0)))
    points = [x0] + [x0 + 0.5 * sig * rng.standard_normal(spec.n) for _ in range(4)]
    t_samples = [0.0, 0.37, 1.9, 7.3, 12.1]
    for x, t in zip(points, t_samples):
        u = _scenario_u(spec, t)
        for label, fun, jac in _funcs(spec):
            J = np.asarray(jac(x, u), float)
            step = 1e-6 * np.maximum(1.0, np.abs(x))
            J_fd = _central_diff(fun, x, u, step)
            assert J.shape == J_fd.shape
            # Tolerance: truncation O(step^2) plus rounding ~ eps * |f| / step.
            tol = 1e-6 * (1.0 + np.abs(J))
            assert np.all(np.abs(J - J_fd) <= tol), f"{name} {label} at t={t}: max diff {np.max(np.abs(J - J_fd))}"


def test_jacobian_check_detects_a_wrong_derivative() -> None:
    # Guard that the finite-difference comparison has teeth: a deliberately wrong Jacobian
    # (d sin(x)/dx taken as sin(x)) must differ from the differences.
    fun = lambda x, u: np.array([math.sin(x[0])])  # noqa: E731
    x = np.array([0.7])
    J_fd = _central_diff(fun, x, [], np.array([1e-6]))
    assert abs(J_fd[0, 0] - math.cos(0.7)) < 1e-8
    assert abs(J_fd[0, 0] - math.sin(0.7)) > 1e-2


# Steps and runs per example for the convergence check: a few hundred steps each, longer for
# the navigation model whose satellite fixes come every 10th step.
CONVERGENCE = {
    "battery_soc": (400, 6),
    "beacon_rover": (400, 6),
    "strapdown_nav": (1000, 3),
    "linear_cart": (400, 6),
    "valve_actuator": (400, 6),
}
FILTERS = [(ex, f) for ex in EXAMPLES for f in ("ekf", "ukf") if not (f == "ekf" and ex in EKF_REFUSED)]


@pytest.mark.parametrize("name,filt", FILTERS, ids=[f"{e}-{f}" for e, f in FILTERS])
def test_reference_filter_converges_consistently(name: str, filt: str) -> None:
    from estgen.reference import wrap_angle
    from estgen.simulate import make_scenario, run_filter

    spec = estgen.load_model(_path(name))
    steps, runs = CONVERGENCE[name]
    angles = np.array(spec.angle_states, dtype=bool)
    outside, total, nees_tail = 0, 0, []
    for r in range(runs):
        sc = make_scenario(spec, steps, seed=[20261201, r])
        out = run_filter(estgen.reference(spec, filter=filt), sc)
        assert not out["refusals"], out["refusals"]
        err = out["x"][1:] - sc.x_true[1:]
        err[:, angles] = wrap_angle(err[:, angles])
        P = out["P"][1:]
        sig = np.sqrt(np.einsum("kii->ki", P))
        # A consistent filter keeps each error inside 3 sigma ~99.7 % of the time (common
        # practice; Bar-Shalom, Li, Kirubarajan, 2001, sec. 5.4); allow 2 % for the
        # time-correlated errors of a few runs.
        outside += int(np.sum(np.abs(err) > 3 * sig))
        total += err.size
        tail = slice(steps // 2, steps)
        nees_tail.append(np.mean(np.einsum("ki,kij,kj->k", err[tail], np.linalg.inv(P[tail]), err[tail])))
        # It learns from the sensors: some state's sigma ends well below its initial one.
        ratio = sig[-1] / np.sqrt(np.diag(np.array(spec.P0)))
        assert np.min(ratio) < 0.5, ratio
    assert outside / total < 0.02, f"{outside / total:.4f} of errors beyond 3 sigma"
    # Mean NEES is n for a consistent filter; a loose band (0.5 n, 1.6 n) for few runs.
    mean_nees = float(np.mean(nees_tail))
    assert 0.5 * spec.n < mean_nees < 1.6 * spec.n, mean_nees
