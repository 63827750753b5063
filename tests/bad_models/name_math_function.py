import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
(sqrt,) = model.inputs("sqrt")
