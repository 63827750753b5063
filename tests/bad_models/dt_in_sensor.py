import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
model.process([0.99 * temp])
model.process_noise([1e-4])
model.sensor("thermo", [temp + 0.5 * model.dt], noise=[0.01])
model.initial([20.0], [1.0])
