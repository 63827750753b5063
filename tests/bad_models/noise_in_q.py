import sympy as sp
from estgen import Model

model = Model("block")
temp, lag = model.states("temp lag")
(wt,) = model.noise("wt", cov=[1e-4])
model.process([temp + 0.01 * lag + wt, 0.9 * lag])
model.process_noise([wt ** 2, 1e-4])
model.sensor("probe", [temp], noise=[0.01])
model.initial([20.0, 0.0], [1.0, 1.0])
