"""noise_cart.py written with additive noise only: Q = B Qw B' + Q_add and R = M Rv M'."""

import sympy as sp

from estgen import Model

model = Model("acart")
p, v, b = model.states("p v b")
(acc,) = model.inputs("acc")
dt = model.dt
sig_b = model.param("sig_b", 0.01)
model.process([p + dt * v + dt ** 2 / 2 * (acc - b), v + dt * (acc - b), b])
B = sp.Matrix([[-dt ** 2 / 2, 0], [-dt, 0], [0, 1]])
Qw = sp.diag(0.3 ** 2, sig_b ** 2 * dt)
model.process_noise(B * Qw * B.T + sp.diag(1e-6, 0, 0))
M = sp.Matrix([[1, 0], [0.5, 1]])
Rv = sp.Matrix([[0.5 ** 2, 0.01], [0.01, 0.2 ** 2]])
model.sensor("gps", [p, v], noise=M * Rv * M.T)
model.initial([0.0, 1.0, 0.1], sp.diag(1.0, 0.5, 0.04))
model.scenario(dt=0.1, inputs=lambda t: [0.2 * t])
