"""A map with non-additive noise for which the augmented unscented transform with kappa = 3 - N
is exact: every output is linear in x and in w2 and quadratic in w1 alone, so its mean and
covariance need moments of the one-dimensional marginals up to the fourth only."""

import sympy as sp

from estgen import Model

model = Model("nquad")
x1, x2 = model.states("x1 x2")
w1, w2 = model.noise("w1 w2", cov=[1.0, 0.2 ** 2])
model.process([x1 + 0.5 * x2 + w1 + 0.5 * w1 ** 2, 0.8 * x2 - 0.3 * w1 + w2])
model.sensor("s", [x1], noise=[0.1])
model.initial([1.0, -0.5], sp.Matrix([[0.3, 0.1], [0.1, 0.2]]))
