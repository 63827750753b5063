"""A relay-driven two-state loop (test model of our own) using every function the EKF cannot
differentiate: sign, Abs, Piecewise, Heaviside, floor, ceiling, Mod, Min and Max. Only the UKF
runs it; its C must compile clean and match the reference."""

import sympy as sp

from estgen import Model

model = Model("ukfnd")
a, b = model.states("a b")
(w,) = model.inputs("w")
dt = model.dt

model.process([
    a + dt * (0.5 * sp.sign(w - a) + 0.1 * sp.Abs(b) - 0.2 * a),
    b + dt * (sp.Piecewise((1.0 - b, a > 0), (-b, True)) + 0.1 * sp.Heaviside(a - 0.5)
              + 0.01 * sp.floor(2 * a) + 0.05 * sp.Mod(a - 0.3, 0.25)),
])
model.process_noise([1e-3 * dt, 1e-3 * dt])
model.sensor("m", [sp.Max(a, b) + sp.Min(a, 0.1 * b), 0.01 * sp.ceiling(3 * b) + b], noise=[0.01, 0.01])
model.initial([0.2, 0.5], sp.diag(0.1, 0.1))
model.scenario(dt=0.05, inputs=lambda t: [0.5 if (t % 4.0) < 2.0 else -0.5])
