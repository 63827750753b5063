"""A saturating two-state loop (test model of our own): tanh and exp of affine arguments in f and
h, with a wide prior, so the UKF's pair identities for tanh and exp are used and, while the spread
is large (|tanh d| >= 0.9 in the first steps), the direct fallback as well."""

import sympy as sp

from estgen import Model

model = Model("ukfsat")
a, b = model.states("a b")
(w,) = model.inputs("w")
dt = model.dt

model.process([a + dt * (-a + 2 * sp.tanh(a + 2 * b) + w), b + dt * (0.5 * sp.exp(-0.3 * b) - 0.5)])
model.process_noise(sp.diag(0.01, 0.004) * dt)
model.sensor("sat", [sp.tanh(3 * a - b), sp.exp(0.3 * b)], noise=[0.05 ** 2, 0.02 ** 2])
model.initial([0.2, 0.5], sp.diag(4.0, 1.0))
model.scenario(dt=0.05, inputs=lambda t: [0.5 if (t % 4.0) < 2.0 else -0.5])
