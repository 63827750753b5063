import sympy as sp
from estgen import Model, quat

model = Model("gyro")
qw, qx, qy, qz = model.attitude("q")
(rate,) = model.inputs("rate")
model.process([qw + 2.0, qx, qy, qz + rate * model.dt])
model.process_noise([1e-6] * 3)
model.sensor("acc", quat.rotate(quat.conj([qw, qx, qy, qz]), [0, 0, -9.81]), noise=[0.05] * 3)
model.initial([1.0, 0.0, 0.0, 0.0], [0.01] * 3)
