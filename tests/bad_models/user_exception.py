import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
tau = 120.0 / 0
