import sympy as sp
from estgen import Model

plant = Model("block")
(temp,) = plant.states("temp")
plant.process([temp])
