"""A drifting survey buoy located by two shore stations that measure only bearings (demo model).

Invented for the compare example in docs/compare.md. The buoy drifts with the current
(constant velocity driven by white acceleration noise); two stations 2 km apart along the shore
each take a bearing to its radio beacon once a second. It was dropped somewhere within about a
kilometre of the planned point, so the first bearings have to pull a wide prior in: that is
where a linearization at the estimate is poorest.
"""

import math

import sympy as sp

from estgen import Model

model = Model("buoy")
px, py = model.states("px py", units="m m")        # east and north of station A
vx, vy = model.states("vx vy", units="m/s m/s")
q = model.param("q", 1e-4, unit="m^2/s^3")          # current fluctuation PSD (invented)
dt = model.dt

model.process([px + dt * vx, py + dt * vy, vx, vy])
qb = sp.Matrix([[dt**3 / 3, dt**2 / 2], [dt**2 / 2, dt]]) * q
model.process_noise(sp.diag(qb, qb).extract([0, 2, 1, 3], [0, 2, 1, 3]))

sigma = math.radians(2.0)                           # bearing noise of each station (invented)
model.sensor("bearing_a", [sp.atan2(py, px)], noise=[sigma**2], angles=[0], units="rad")
model.sensor("bearing_b", [sp.atan2(py, px - 2000.0)], noise=[sigma**2], angles=[0], units="rad")
model.initial([1000.0, 1500.0, 0.0, 0.0], sp.diag(800.0**2, 800.0**2, 0.3**2, 0.3**2))
model.scenario(dt=1.0)
