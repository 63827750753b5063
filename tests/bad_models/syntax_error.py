import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
model.process([temp * 0.99)
