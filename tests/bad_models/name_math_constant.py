import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
e = model.param("e", 0.3)
