"""A gyro-driven attitude with gyro biases (as attitude_gyro.py) whose magnetometer has correlated
axes: a full, constant R (demo values). The EKF whitens such a sensor in its compact update."""
import math

import sympy as sp
from estgen import Model, quat

model = Model("attcorr")
dt = model.dt
q = model.attitude("q")
bx, by, bz = model.states("bx by bz")
wx, wy, wz = model.inputs("wx wy wz")
qn = quat.mul(q, quat.exp([(wx - bx) * dt, (wy - by) * dt, (wz - bz) * dt]))
model.process([*qn, bx, by, bz])
model.process_noise(sp.diag(*([1e-4 * dt] * 3 + [1e-8 * dt] * 3)))
model.sensor("acc", quat.rotate(quat.conj(q), [0, 0, -9.81]), noise=[0.05] * 3)
R_mag = sp.Matrix([[1.0e-4, 3.0e-5, 0.0], [3.0e-5, 1.2e-4, -2.0e-5], [0.0, -2.0e-5, 0.9e-4]])
model.sensor("mag", quat.rotate(quat.conj(q), [0.4, 0.0, 0.3]), noise=R_mag, every=5)
model.initial([1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0], sp.diag(0.01, 0.01, 0.01, 1e-4, 1e-4, 1e-4))
model.scenario(dt=0.01, inputs=lambda t: [1.0 + 2.5 * math.sin(0.37 * t), 0.5 + 3.0 * math.cos(0.61 * t),
                                          1.5 * math.sin(0.23 * t)])
