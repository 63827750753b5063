"""A boat ranging and taking a relative bearing to a buoy in one frame, with its compass heading
(test model of our own): a block sensor whose angle components (bearing, heading) sit beside a
range, with correlated noise (full R), so the UKF's block update, circular means inside a block
and wrapped residuals are all exercised while the heading crosses +-pi."""

import sympy as sp

from estgen import Model

model = Model("ukfrb")
px, py = model.states("px py", units="m m")
(hdg,) = model.states("hdg", angle=True, units="rad")
(turn,) = model.inputs("turn", units="rad/s")
speed = model.param("speed", 2.0, unit="m/s")
dt = model.dt

model.process([px + dt * speed * sp.cos(hdg), py + dt * speed * sp.sin(hdg), hdg + dt * turn])
model.process_noise(sp.diag(0.02, 0.02, 1e-4) * dt)
rng = sp.sqrt((40 - px) ** 2 + (-30 - py) ** 2)
brg = sp.atan2(-30 - py, 40 - px) - hdg  # relative bearing: may wrap on its own
model.sensor("rb", [rng, brg, hdg], angles=[1, 2], every=2, gate=0.9999,
             noise=sp.Matrix([[0.25, 0.001, 0.0], [0.001, 0.0004, 0.0001], [0.0, 0.0001, 0.0025]]))
model.initial([0.0, 0.0, 3.0], sp.diag(1.0, 1.0, 0.05))
model.scenario(dt=0.1, inputs=lambda t: [0.9])
