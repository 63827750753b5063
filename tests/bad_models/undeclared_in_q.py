import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
model.process([0.99 * temp])
model.process_noise([sp.Symbol("q") * model.dt])
model.sensor("thermo", [temp], noise=[0.01])
model.initial([20.0], [1.0])
