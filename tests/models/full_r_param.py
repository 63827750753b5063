"""Six states and a correlated two-component sensor whose R holds a parameter: a full R that
cannot be whitened at generation time, so every --optimize form keeps the block update (demo
values)."""

import sympy as sp

from estgen import Model

model = Model("fullr")
s = model.states("s0 s1 s2 s3 s4 s5")
dt = model.dt
r = model.param("r", 0.04)
model.process([s[i] + dt * 0.1 * s[(i + 1) % 6] for i in range(6)])
model.process_noise([1e-4] * 6)
model.sensor("pair", [s[0] + s[1], s[2] * s[3]], noise=sp.Matrix([[r, 0.01], [0.01, r]]))
model.sensor("single", [s[4] - s[5]], noise=[0.01])
model.initial([0.1, 0.2, 0.3, 0.4, 0.5, 0.6], sp.diag(*([0.1] * 6)))
