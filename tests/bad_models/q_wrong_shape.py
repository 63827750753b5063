import sympy as sp
from estgen import Model

model = Model("block")
temp, lag = model.states("temp lag")
model.process([temp + 0.01 * lag, 0.9 * lag])
model.process_noise(sp.eye(3) * 1e-4)
model.sensor("thermo", [temp], noise=[0.01])
model.initial([20.0, 0.0], [1.0, 1.0])
