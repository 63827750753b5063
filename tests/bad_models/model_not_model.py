import sympy as sp
from estgen import Model

model = {"name": "block", "states": ["temp"]}
