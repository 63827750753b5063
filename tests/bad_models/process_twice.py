import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
model.process([0.99 * temp])
model.process_noise([1e-4])
model.dynamics([-0.01 * (temp - 20)])
