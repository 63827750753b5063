"""Models unlike the examples, driven only through the outside interface (docs: contract sections
3 and 10): the compiled C and the reference start from the same state.

A model file may give x0 with an angle outside (-pi, pi] or a quaternion that is unit only to the
1e-6 that validation accepts (seven printed digits of cos and sin of 22.5 degrees). Both filters
must begin from the same canonical state -- the angle wrapped, the quaternion scaled to unit norm
-- or the double C and the reference disagree from step 0 beyond verify's 1e-9.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import estgen

_SWING = """import sympy as sp
from estgen import Model

model = Model("swing")
(th,) = model.states("th", angle=True)
(om,) = model.states("om")
model.dynamics([om, -9.81 / 0.7 * sp.sin(th)], method="rk4")
model.process_noise([1e-6, 1e-3])
model.sensor("enc", [th], noise=[0.02**2], angles=[0])
model.initial([4.0, 2.5], sp.diag(0.1, 0.3))
model.scenario(dt=0.02)
"""

_TUMBLE = """import sympy as sp
from estgen import Model, quat

model = Model("tumble")
q = model.attitude("q")
wx, wy, wz = model.states("wx wy wz")
dt = model.dt
model.process([*quat.mul(q, quat.exp([wx * dt, wy * dt, wz * dt])), wx, wy, wz])
model.process_noise(sp.diag(1e-6, 1e-6, 1e-6, 1e-4, 1e-4, 1e-4) * dt)
model.sensor("mag", quat.rotate(quat.conj(q), [1, 0, 0.5]), noise=[0.02**2] * 3)
model.sensor("acc", quat.rotate(quat.conj(q), [0, 0, -1]), noise=[0.02**2] * 3)
model.sensor("gyro", [wx, wy, wz], noise=[1e-4] * 3)
model.initial([0.9238795, 0, 0.3826834, 0, 0.1, -0.05, 0.2], sp.diag(1e-3, 1e-3, 1e-3, 1e-3, 1e-3, 1e-3))
model.scenario(dt=0.05)
"""


def _pair(tmp_path, text: str, filt: str):
    """The double C and the reference of the model file ``text``."""
    path = tmp_path / "model.py"
    path.write_text(text)
    spec = estgen.load_model(str(path))
    return estgen.build(spec, filter=filt, precision="double"), estgen.reference(spec, filter=filt)


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
def test_angle_outside_the_range_starts_wrapped_in_c_and_reference(tmp_path, filt: str) -> None:
    c, r = _pair(tmp_path, _SWING, filt)
    # 4 rad is 4 - 2 pi in (-pi, pi]; numpy's angle of e^{4i} is the outside value (common practice)
    expected = float(np.angle(np.exp(4.0j)))
    assert c.x[0] == pytest.approx(expected, abs=1e-15) and r.x[0] == pytest.approx(expected, abs=1e-15)
    # one predict: the C and the reference agree to verify's double tolerance
    assert c.predict([], 0.02) == r.predict([], 0.02) == 0
    assert np.allclose(c.x, r.x, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
def test_nearly_unit_quaternion_starts_normalized_in_c_and_reference(tmp_path, filt: str) -> None:
    c, r = _pair(tmp_path, _TUMBLE, filt)
    raw = np.array([0.9238795, 0, 0.3826834, 0])
    assert abs(np.linalg.norm(raw) - 1.0) > 1e-8  # the file's quaternion is not unit in double
    for f in (c, r):
        # the unit quaternion along the given one (numpy's norm); contract 10: |q| = 1
        assert np.allclose(f.x[:4], raw / np.linalg.norm(raw), rtol=0, atol=1e-15)
        assert abs(np.linalg.norm(f.x[:4]) - 1.0) < 1e-15
    assert np.array_equal(c.x, r.x)


def test_verify_passes_in_double_on_a_nearly_unit_quaternion(tmp_path) -> None:
    # Before x0 was made canonical, the double C kept the file's quaternion and the reference
    # normalized it: verify failed at step 0 with |dq| = 4e-8 against its 1e-9.
    from estgen.verify import verify

    path = tmp_path / "tumble.py"
    path.write_text(_TUMBLE)
    res = verify(str(path), filter="ekf", precision="double", steps=50, seed=1)
    assert res.ok, res
    assert math.isclose(float(np.linalg.norm(estgen.load_model(str(path)).x0[:4])), 1.0, abs_tol=1e-15)


_SAW = """import sympy as sp
from estgen import Model

model = Model("saw")
x, v = model.states("x v")
dt = model.dt
model.process([x + dt * v, v])
model.process_noise([1e-4, 1e-6])
model.sensor("phase", [sp.Mod(x, 3)], noise=[0.01])
model.initial([-1.0, -0.5], sp.diag(0.01, 0.001))
model.scenario(dt=0.1)
"""

_DEADBAND = """import sympy as sp
from estgen import Model

model = Model("deadband")
x, v = model.states("x v")
(u,) = model.inputs("u")
dt = model.dt
model.process([x + dt * v, v + dt * (sp.Max(0, sp.Abs(u) - 0.2) * sp.sign(u) - 0.3 * v)])
model.process_noise([1e-5, 1e-3])
model.sensor("pos", [x], noise=[0.01])
model.initial([0.0, 0.0], sp.diag(0.1, 0.1))
model.scenario(dt=0.1, inputs=lambda t: [1.0 if (t % 10) < 5 else -1.0])
"""


def test_particle_filter_mod_takes_the_divisors_sign(tmp_path) -> None:
    # sympy's Mod, like Python's %, has the sign of the divisor (Python language reference,
    # "Binary arithmetic operations"): Mod(-1, 3) = 2, where C's fmod(-1, 3) = -1. The particle
    # filter's C prints its model functions itself; on a state that stays negative it must
    # weigh particles with h = x % 3 as the reference does.
    from estgen.verify import verify

    assert -1.0 % 3 == 2.0
    path = tmp_path / "saw.py"
    path.write_text(_SAW)
    res = verify(str(path), filter="pf", precision="double", steps=60, seed=1, particles=50)
    assert res.ok, res


@pytest.mark.parametrize("precision", ["float", "double"])
def test_particle_filter_sign_compiles_in_float(tmp_path, precision: str) -> None:
    # sign(u) printed as sympy's ((u > 0) - (u < 0)) is an int, a -Wconversion error in a float
    # build under the strict flags (contract section 4); the C must build and match the reference.
    path = tmp_path / "deadband.py"
    path.write_text(_DEADBAND)
    spec = estgen.load_model(str(path))
    c = estgen.build(spec, filter="pf", precision=precision, particles=40, seed=2)
    r = estgen.reference(spec, filter="pf", particles=40, seed=2)
    for u in ([1.0], [-1.0], [0.0]):
        assert c.predict(u, 0.1) == r.predict(u, 0.1) == 0
        assert c.update("pos", [0.01]) == r.update("pos", [0.01]) == 0
    tol = 1e-9 if precision == "double" else 1e-3
    assert np.allclose(c.x, r.x, rtol=tol, atol=tol)
