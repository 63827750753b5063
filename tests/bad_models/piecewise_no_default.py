import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
model.process([sp.Piecewise((0.99 * temp, temp < 80))])
model.process_noise([1e-4])
model.sensor("thermo", [temp], noise=[0.01])
model.initial([20.0], [1.0])
