import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
gain = model.param("temp", 0.5)
