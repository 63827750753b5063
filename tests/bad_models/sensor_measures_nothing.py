import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
model.process([0.99 * temp])
model.process_noise([1e-4])
model.sensor("thermo", [], noise=[])
model.initial([20.0], [1.0])
