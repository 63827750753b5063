import sympy as sp
from estgen import Model

model = Model("heated-block")
(temp,) = model.states("temp")
