"""Contract section 10, as written: a gyro-driven attitude with gyro biases and an accelerometer
measuring gravity, plus a magnetometer so that heading is observable (demo values)."""
import math

import sympy as sp
from estgen import Model, quat

model = Model("attgyro")
dt = model.dt
q = model.attitude("q")                 # unit quaternion (w, x, y, z), Hamilton product, body -> reference
bx, by, bz = model.states("bx by bz")
wx, wy, wz = model.inputs("wx wy wz")
qn = quat.mul(q, quat.exp([(wx - bx) * dt, (wy - by) * dt, (wz - bz) * dt]))  # quat.exp: rotation vector -> unit quaternion
model.process([*qn, bx, by, bz])
model.process_noise(sp.diag(*([1e-4 * dt] * 3 + [1e-8 * dt] * 3)))
model.sensor("acc", quat.rotate(quat.conj(q), [0, 0, -9.81]), noise=[0.05] * 3)   # quat.rotate(q, v) = q v q*
model.sensor("mag", quat.rotate(quat.conj(q), [0.4, 0.0, 0.3]), noise=[0.01] * 3, every=5)
model.initial([1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0], sp.diag(0.01, 0.01, 0.01, 1e-4, 1e-4, 1e-4))
model.scenario(dt=0.01, inputs=lambda t: [1.0 + 2.5 * math.sin(0.37 * t), 0.5 + 3.0 * math.cos(0.61 * t),
                                          1.5 * math.sin(0.23 * t)])  # tumbles through every attitude in 20 s
