"""A ground robot dead-reckoning on measured speed and yaw rate (noise through the inputs), a
heading-rate scale error as a process noise symbol, a range sensor whose error grows with the
range (multiplicative noise) and a bearing with an additive R."""

import math

import sympy as sp

from estgen import Model

model = Model("nrange")
px, py = model.states("px py")
(th,) = model.states("th", angle=True)
spd, om = model.inputs("spd om", noise=sp.Matrix([[0.05 ** 2, 1e-5], [1e-5, 0.01 ** 2]]))
sig = model.param("sig", 0.02)
dt = model.dt
(ws,) = model.noise("ws", cov=[sig ** 2])
model.process([px + dt * spd * sp.cos(th), py + dt * spd * sp.sin(th), th + dt * om * (1 + ws)])
model.process_noise([1e-6, 1e-6, 1e-6])
(vr,) = model.noise("vr", cov=[0.02 ** 2])
model.sensor("range", [sp.sqrt(px ** 2 + py ** 2) * (1 + vr)], every=2)
model.sensor("bearing", [sp.atan2(py, px)], noise=[0.01 ** 2], angles=[0], every=3)
model.initial([8.0, 3.0, 0.4], sp.diag(0.3, 0.3, 0.05))
model.scenario(dt=0.1, inputs=lambda t: [1.0, 0.1 * math.sin(0.2 * t)])
