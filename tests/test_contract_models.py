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
