"""A pendulum on a frictionless-ish pivot, spun hard enough to go over the top (test model).

An angle encoder reads every step and a MEMS rate gyro every other step. The process noise is
a random torque, so Q acts on the rate only (a singular Q: the truth's angle gets no noise).
"""

import sympy as sp

from estgen import Model

model = Model("simpend")
(theta,) = model.states("theta", angle=True, units="rad")
(omega,) = model.states("omega", units="rad/s")
g_over_l = model.param("g_over_l", 9.81, unit="1/s^2")
damping = model.param("damping", 0.05, unit="1/s")
torque_psd = model.param("torque_psd", 0.5, unit="rad^2/s^3")
dt = model.dt

model.dynamics([omega, -g_over_l * sp.sin(theta) - damping * omega], method="rk4")
model.process_noise(sp.diag(0, torque_psd * dt))
model.sensor("encoder", [theta], noise=[0.02**2], angles=[0], units="rad")
model.sensor("gyro", [omega], noise=[0.05**2], every=2, units="rad/s")
model.initial([0.0, 8.0], sp.diag(0.01, 0.04))
model.scenario(dt=0.02)
