import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
(heat,) = model.inputs("heat")
model.process([0.99 * temp + 0.001 * heat])
model.process_noise([1e-4])
model.sensor("thermo", [temp + 0.1 * heat], noise=[0.01])
model.initial([20.0], [1.0])
