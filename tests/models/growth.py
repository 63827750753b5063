"""The univariate nonstationary growth model (test model).

From Gordon, Salmond and Smith, "Novel approach to nonlinear/non-Gaussian Bayesian state
estimation", IEE Proceedings F 140(2), 1993, section 4 (also Kitagawa 1987 and Arulampalam et
al., IEEE Trans. Signal Processing 50(2), 2002, example 4.1):

    x[k+1] = 0.5 x[k] + 25 x[k] / (1 + x[k]^2) + 8 cos(1.2 k) + w,   w ~ N(0, 10)
    z[k]   = x[k]^2 / 20 + v,                                         v ~ N(0, 1)

with the prior x[0] ~ N(0, 5) (from memory of Gordon et al.; the noise variances 10 and 1 are
as printed in Arulampalam et al.). The forcing 8 cos(1.2 k) enters as the input u, which the
scenario's input profile supplies at t = k (dt = 1).
"""

import math

from estgen import Model

model = Model("growth")
(x,) = model.states("x")
(forcing,) = model.inputs("forcing")
model.process([0.5 * x + 25 * x / (1 + x**2) + forcing])
model.process_noise([10.0])
model.sensor("z", [x**2 / 20], noise=[1.0])
model.initial([0.0], [5.0])
model.scenario(dt=1.0, inputs=lambda t: [8 * math.cos(1.2 * t)])
