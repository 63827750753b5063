import sympy as sp
from estgen import Model

model = Model("block")
temp, rate = model.states("temp rate")
model.dynamics([rate, -0.1 * rate * sp.Abs(rate)], method="rk4")
model.process_noise([1e-4, 1e-4])
model.sensor("thermo", [temp], noise=[0.01])
model.initial([20.0, 0.1], [1.0, 1.0])
