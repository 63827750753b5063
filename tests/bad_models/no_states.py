import sympy as sp
from estgen import Model

model = Model("block")
model.process([])
