"""A cart on a track driven by a measured acceleration (accelerometer noise enters through the
input) with a position sensor whose error is a declared noise symbol. Linear: the additive
form is noise_cart_additive.py (Q = B Qw B', R = Rv)."""

import sympy as sp

from estgen import Model

model = Model("ncart")
p, v, b = model.states("p v b")
(acc,) = model.inputs("acc", noise=[0.3 ** 2])
dt = model.dt
sig_b = model.param("sig_b", 0.01)
(wb,) = model.noise("wb", cov=[sig_b ** 2 * dt])
model.process([p + dt * v + dt ** 2 / 2 * (acc - b), v + dt * (acc - b), b + wb])
model.process_noise([1e-6, 0, 0])
(ep, ev) = model.noise("ep ev", cov=sp.Matrix([[0.5 ** 2, 0.01], [0.01, 0.2 ** 2]]))
model.sensor("gps", [p + ep, v + 0.5 * ep + ev])
model.initial([0.0, 1.0, 0.1], sp.diag(1.0, 0.5, 0.04))
model.scenario(dt=0.1, inputs=lambda t: [0.2 * t])
