"""A boat holding a steady turn in a harbour basin (test model of our own): the heading keeps
crossing +-pi, and the bearing to a fixed buoy (an angle measurement through atan2) as well as
a compass (the heading itself) are angles, so every residual, mean and state wrap is used."""

import sympy as sp

from estgen import Model

model = Model("ukfboat")
px, py = model.states("px py", units="m m")
(hdg,) = model.states("hdg", angle=True, units="rad")
(spd,) = model.states("spd", units="m/s")
(turn,) = model.inputs("turn", units="rad/s")
bx = model.param("bx", 40.0, unit="m")   # buoy position; invented
by = model.param("by", -30.0, unit="m")
dt = model.dt

model.process([px + dt * spd * sp.cos(hdg), py + dt * spd * sp.sin(hdg), hdg + dt * turn, spd])
model.process_noise(sp.diag(0.02, 0.02, 1e-4, 1e-3) * dt)
model.sensor("bearing", [sp.atan2(by - py, bx - px)], noise=[0.02 ** 2], angles=[0], every=2, units="rad",
             gate=0.9999)
model.sensor("compass", [hdg], noise=[0.05 ** 2], angles=[0], every=3, units="rad")
model.sensor("fix", [px, py], noise=[1.0, 1.0], every=7, units="m m")
model.initial([0.0, 0.0, 3.0, 2.0], sp.diag(1.0, 1.0, 0.05, 0.05))
model.scenario(dt=0.1, inputs=lambda t: [0.9])
