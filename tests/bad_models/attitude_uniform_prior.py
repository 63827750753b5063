import sympy as sp
from estgen import Model, quat

# A hull's heading and roll as a quaternion, pulled by a magnetometer; the prior is a box.
model = Model("hull")
att = model.attitude("att")
(yaw_rate,) = model.inputs("yaw_rate")
model.process(quat.mul(att, quat.exp([0, 0, yaw_rate * model.dt])))
model.process_noise(sp.diag(1e-5, 1e-5, 1e-4) * model.dt)
model.initial_uniform([0.9, -0.2, -0.2, -0.2], [1.0, 0.2, 0.2, 0.2])
model.sensor("mag", quat.rotate(quat.conj(att), [0.4, 0, 0.9]), noise=[0.02**2] * 3)
