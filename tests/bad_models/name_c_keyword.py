import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
scale = model.param("double", 2.0)
