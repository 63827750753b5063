import sympy as sp
from estgen import Model, quat

model = Model("gyro")
q = model.attitude("body attitude")
