import sympy as sp
from estgen import Model

import math

model = Model("block")
(temp,) = model.states("temp")
tau = model.param("tau", math.nan)
