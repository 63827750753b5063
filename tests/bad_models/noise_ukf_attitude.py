import sympy as sp
from estgen import Model, quat

model = Model("spin")
q = model.attitude("q")
wx, wy, wz = model.inputs("wx wy wz", noise=[1e-4] * 3)
dt = model.dt
model.process(list(quat.mul(q, quat.exp([wx * dt, wy * dt, wz * dt]))))
model.sensor("acc", quat.rotate(quat.conj(q), [0, 0, -9.81]), noise=[0.05] * 3)
model.initial([1, 0, 0, 0], [0.1] * 3)
