import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
(heat,) = model.inputs("heat")
model.process([0.99 * temp + 0.001 * heat])
model.process_noise([1e-4])
model.sensor("thermo", [temp], noise=[0.01])
model.initial([20.0], [1.0])
model.scenario(dt=1.0, inputs=lambda t: [50.0, 0.0])
