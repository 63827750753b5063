import sympy as sp
from estgen import Model, quat

model = Model("gyro")
q = model.attitude("q")
wx, wy, wz = model.inputs("wx wy wz")
model.process(quat.mul(q, quat.exp([wx * model.dt, wy * model.dt, wz * model.dt])))
model.process_noise(sp.eye(4) * 1e-6)
model.sensor("acc", quat.rotate(quat.conj(q), [0, 0, -9.81]), noise=[0.05] * 3)
model.initial([1.0, 0.0, 0.0, 0.0], [0.01] * 3)
