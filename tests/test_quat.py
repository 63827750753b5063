"""estgen.quat against scipy.spatial.transform.Rotation (scipy's quaternions are scalar LAST:
(x, y, z, w); ours are scalar first). Products, rotations, exp/log on random inputs, the guarded
small-angle forms as printed to C (compiled, evaluated at zero and tiny angles), and integrated
kinematics against composed scipy rotations."""

from __future__ import annotations

import ctypes
import os
import subprocess

import numpy as np
import pytest
import sympy as sp
from scipy.spatial.transform import Rotation

from estgen import quat
from estgen.emit import CPrinter

RNG = np.random.default_rng(20261202)
P = sp.symbols("p0:4")
Qs = sp.symbols("q0:4")
V = sp.symbols("v0:3")


def _sl(q: np.ndarray) -> np.ndarray:
    """scalar-first -> scipy's scalar-last."""
    return np.array([q[1], q[2], q[3], q[0]])


def _sf(q: np.ndarray) -> np.ndarray:
    return np.array([q[3], q[0], q[1], q[2]])


def _same_rotation(a: np.ndarray, b: np.ndarray, tol: float) -> None:
    # q and -q are the same rotation
    assert min(np.max(np.abs(a - b)), np.max(np.abs(a + b))) < tol, (a, b)


def _unit(k: int) -> np.ndarray:
    q = RNG.normal(size=(k, 4))
    return q / np.linalg.norm(q, axis=1, keepdims=True)


def test_mul_matches_scipy_composition() -> None:
    # scipy: (r1 * r2).apply(v) == r1.apply(r2.apply(v)); Hamilton p ⊗ q rotates by q first.
    f = sp.lambdify([P, Qs], quat.mul(P, Qs))
    for p, q in zip(_unit(50), _unit(50)):
        ref = (Rotation.from_quat(_sl(p)) * Rotation.from_quat(_sl(q))).as_quat()
        _same_rotation(np.array(f(p, q), dtype=float), _sf(ref), 1e-14)


def test_conj_is_the_inverse() -> None:
    f = sp.lambdify([Qs], quat.conj(Qs))
    for q in _unit(20):
        ref = Rotation.from_quat(_sl(q)).inv().as_quat()
        _same_rotation(np.array(f(q), dtype=float), _sf(ref), 1e-15)


def test_rotate_matches_scipy_apply() -> None:
    f = sp.lambdify([Qs, V], quat.rotate(Qs, V))
    for q, v in zip(_unit(50), RNG.normal(size=(50, 3))):
        np.testing.assert_allclose(f(q, v), Rotation.from_quat(_sl(q)).apply(v), rtol=0, atol=1e-13)


def test_rotate_is_the_full_product_for_a_non_unit_quaternion() -> None:
    # q v q* = |q|^2 R(q/|q|) v (the definition, not the unit-only matrix form)
    f = sp.lambdify([Qs, V], quat.rotate(Qs, V))
    q = np.array([0.3, -1.2, 0.5, 2.0])
    v = np.array([0.1, 0.7, -2.0])
    ref = np.dot(q, q) * Rotation.from_quat(_sl(q / np.linalg.norm(q))).apply(v)
    np.testing.assert_allclose(f(q, v), ref, atol=1e-13)


@pytest.mark.parametrize("scale", [0.0, 1e-300, 1e-12, 1e-6, 1e-3, 0.3, 0.999, 1.0, 1.001, 2.5, 3.1])
def test_exp_matches_scipy_from_rotvec(scale: float) -> None:
    f = sp.lambdify([V], quat.exp(V))
    for d in RNG.normal(size=(10, 3)):
        v = scale * d / np.linalg.norm(d)
        got = np.array(f(v), dtype=float)
        ref = _sf(Rotation.from_rotvec(v).as_quat())
        _same_rotation(got, ref, 2e-16 * 4)
        assert abs(np.linalg.norm(got) - 1.0) < 4e-16


def test_log_inverts_exp_like_scipy_as_rotvec() -> None:
    f = sp.lambdify([Qs], quat.log(Qs))
    for q in _unit(50):
        q = q if q[0] > 0 else -q
        np.testing.assert_allclose(f(q), Rotation.from_quat(_sl(q)).as_rotvec(), atol=1e-14)
    for scale in (0.0, 1e-200, 1e-9, 0.2):  # the series branch, including exactly zero
        v = scale * np.array([0.6, -0.8, 0.0])
        q = _sf(Rotation.from_rotvec(v).as_quat())
        np.testing.assert_allclose(f(q), v, rtol=1e-15, atol=1e-300)


def test_exp_derivative_matches_central_differences() -> None:
    # The EKF differentiates exp; the derivative is again a guarded function (common practice:
    # central differences, step ~ eps**(1/3)).
    J = sp.Matrix(quat.exp(V)).jacobian(V)
    fJ = sp.lambdify([V], J)
    f = sp.lambdify([V], quat.exp(V))
    for v in [np.zeros(3), np.array([1e-7, 0, 0]), np.array([0.3, -0.2, 0.1]), np.array([1.2, 0.4, -0.5])]:
        num = np.zeros((4, 3))
        for j in range(3):
            e = np.zeros(3)
            e[j] = 1e-5
            num[:, j] = (np.array(f(v + e), dtype=float) - np.array(f(v - e), dtype=float)) / 2e-5
        np.testing.assert_allclose(np.array(fJ(v), dtype=float), num, atol=1e-9)


def test_integrated_kinematics_match_composed_scipy_rotations() -> None:
    dt = sp.Symbol("dt")
    w = sp.symbols("w0:3")
    step = sp.lambdify([Qs, w, dt], quat.mul(Qs, quat.exp([wi * dt for wi in w])))
    q = np.array([1.0, 0.0, 0.0, 0.0])
    r = Rotation.identity()
    for k in range(2000):
        rate = np.array([3.0 * np.sin(0.01 * k), 2.0, -1.5 * np.cos(0.003 * k)]) + RNG.normal(size=3)
        q = np.array(step(q, rate, 0.01), dtype=float)
        r = r * Rotation.from_rotvec(rate * 0.01)  # body-frame increment: right-multiplied
    _same_rotation(q, _sf(r.as_quat()), 1e-12)


C_SOURCE = """
#include <math.h>
void qexp_{tag}(const {real} *v, {real} *q)
{{
    q[0] = {e0};
    q[1] = {e1};
    q[2] = {e2};
    q[3] = {e3};
}}
void qlog_{tag}(const {real} *q, {real} *v)
{{
    v[0] = {l0};
    v[1] = {l1};
    v[2] = {l2};
}}
"""


@pytest.mark.parametrize("precision", ["double", "float"])
def test_printed_c_is_exact_at_zero_and_tiny_angles(tmp_path, precision: str) -> None:
    """The C form of exp/log compiles cleanly (strict flags, float math only in float) and agrees
    with scipy at a zero angle, tiny angles, the branch boundary and large angles."""
    real = "double" if precision == "double" else "float"
    pr = CPrinter(precision)
    vs = [sp.Symbol(f"v[{i}]") for i in range(3)]
    qs = [sp.Symbol(f"q[{i}]") for i in range(4)]
    e = [pr.doprint(x) for x in quat.exp(vs)]
    lg = [pr.doprint(x) for x in quat.log(qs)]
    src = tmp_path / "q.c"
    src.write_text(C_SOURCE.format(tag=real, real=real, e0=e[0], e1=e[1], e2=e[2], e3=e[3],
                                   l0=lg[0], l1=lg[1], l2=lg[2]))
    lib = tmp_path / "libq.so"
    subprocess.run(["gcc", "-std=c99", "-O2", "-Wall", "-Wextra", "-Wpedantic", "-Wconversion", "-Wdouble-promotion",
                    "-Wshadow", "-Werror", "-shared", "-fPIC", str(src), "-o", str(lib), "-lm"], check=True)
    so = ctypes.CDLL(str(lib))
    ct = ctypes.c_double if precision == "double" else ctypes.c_float
    tol = 1e-15 if precision == "double" else 2e-7
    for scale in (0.0, 1e-30, 1e-10, 1e-4, 0.5, 0.999999, 1.0, 1.000001, 2.0, 3.0):
        v = scale * np.array([0.48, -0.6, 0.64])
        vin = (ct * 3)(*v)
        qout = (ct * 4)()
        getattr(so, f"qexp_{real}")(vin, qout)
        got = np.array(qout[:])
        ref = _sf(Rotation.from_rotvec(v).as_quat())
        assert np.all(np.isfinite(got))
        np.testing.assert_allclose(got, ref, atol=2 * tol)
        vout = (ct * 3)()
        getattr(so, f"qlog_{real}")((ct * 4)(*ref), vout)
        np.testing.assert_allclose(np.array(vout[:]), v, atol=4 * tol * max(1.0, scale), rtol=4 * tol)


def test_contract_attitude_model_loads_with_the_error_dimension() -> None:
    import estgen

    spec = estgen.load_model(os.path.join(os.path.dirname(__file__), "models", "attitude_gyro.py"))
    assert (spec.n, spec.ne, spec.attitudes) == (7, 6, (0,))
    assert [s.name for s in spec.states[:4]] == ["q_w", "q_x", "q_y", "q_z"]
    assert spec.error_names == ("q_rx", "q_ry", "q_rz", "bx", "by", "bz")
    assert spec.error_blocks() == [("attitude", 0, 0), ("real", 4, 3), ("real", 5, 4), ("real", 6, 5)]
    assert spec.Q.shape == (6, 6) and len(spec.P0) == 6 and len(spec.x0) == 7
