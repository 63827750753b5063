import sympy as sp
from estgen import Model

model = Model("block")
(temp,) = model.states("temp")
tau = model.param("tau", "120")
