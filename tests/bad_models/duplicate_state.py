import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
(temp2,) = model.states("temp")
