"""Speed and load torque of a small motor from a quadrature encoder and the commanded current:
the estimator a motor drive runs in its control loop. Demo model (invented values)."""

import math

import sympy as sp

from estgen import Model
from motor_constants import DAMPING, ENCODER_COUNTS, INERTIA, KT

model = Model("drive")
(theta,) = model.states("theta", angle=True, units="rad")
omega, tload = model.states("omega tload", units="rad/s N*m")
(iq,) = model.inputs("iq", units="A")
kt = model.param("kt", KT, unit="N*m/A")
dt = model.dt

accel = (kt * iq - DAMPING * omega - tload) / INERTIA
model.process([theta + dt * omega, omega + dt * accel, tload])
model.process_noise(sp.diag(1e-8, 4.0, 1e-6) * dt)

# encoder quantization: uniform over one count, variance q^2 / 12
count = 2 * math.pi / ENCODER_COUNTS
model.sensor("encoder", [theta], noise=[count**2 / 12], angles=[0], units="rad")
model.initial([0.0, 0.0, 0.0], sp.diag(1e-4, 1.0, 1e-4))  # the angle is known to a few counts at start
model.scenario(dt=1e-3, inputs=lambda t: [0.2 + 0.1 * math.sin(2 * math.pi * 5 * t)])
