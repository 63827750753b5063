import sympy as sp
from estgen import Model

import sys

model = Model("block")
sys.exit("not ready")
