import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
missing = model.param("NAN", 0.0)
