import sympy as sp
from estgen import Model

model = Model("block")
(i,) = model.states("int")
