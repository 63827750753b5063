import sympy as sp
from estgen import Model

model = Model("block")
temp, lag = model.states("temp lag")
heat, fan = model.inputs("heat fan", noise=[0.1, 0.1])
model.process([temp + 0.01 * lag + 0.1 * heat, 0.9 * lag])
model.process_noise([1e-4, 1e-4])
model.sensor("probe", [temp], noise=[0.01])
model.initial([20.0, 0.0], [1.0, 1.0])
