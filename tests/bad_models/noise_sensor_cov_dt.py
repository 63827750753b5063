import sympy as sp
from estgen import Model

model = Model("block")
temp, lag = model.states("temp lag")
model.process([temp + 0.01 * lag, 0.9 * lag])
model.process_noise([1e-4, 1e-4])
(vb,) = model.noise("vb", cov=[0.01 * model.dt])
model.sensor("probe", [temp * (1 + vb)])
model.initial([20.0, 0.0], [1.0, 1.0])
