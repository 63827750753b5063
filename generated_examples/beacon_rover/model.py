"""A warehouse shuttle located by radio ranges to four fixed beacons on the hall corners.

Planar unicycle kinematics, continuous time, integrated with RK4 over each step. The
shuttle's own drive reports its commanded acceleration and turn rate (the inputs); the
beacons answer at different rates, and a magnetic compass gives the heading now and then.
"""

import math

import sympy as sp

from estgen import Model

model = Model("rover")
px, py = model.states("px py", units="m m")
(psi,) = model.states("psi", angle=True, units="rad")  # heading from the x axis, CCW
(v,) = model.states("v", units="m/s")
acc, rate = model.inputs("acc rate", units="m/s^2 rad/s")

# Beacon positions in the hall frame (m); an invented 50 m x 55 m hall. All lie well away
# from the track (a circle of radius ~10 m about (0, 10)), so no range comes near zero,
# where the derivative of sqrt would blow up.
beacons = {
    "a": (-25.0, -20.0),
    "b": (25.0, -20.0),
    "c": (25.0, 35.0),
    "d": (-25.0, 35.0),
}
bxy = {k: (model.param(f"b{k}x", x, unit="m"), model.param(f"b{k}y", y, unit="m")) for k, (x, y) in beacons.items()}

model.dynamics([v * sp.cos(psi), v * sp.sin(psi), rate, acc], method="rk4")

# Q: wheel slip and drive-report error as white acceleration / turn-rate noise; invented.
dt = model.dt
model.process_noise([1e-4 * dt, 1e-4 * dt, (0.01) ** 2 * dt, (0.05) ** 2 * dt])


def rng(k: str) -> sp.Expr:
    bx, by = bxy[k]
    return sp.sqrt((px - bx) ** 2 + (py - by) ** 2)


# Radio ranging, ~0.1 m 1-sigma (invented, the order of UWB ranging from memory).
model.sensor("range_a", [rng("a")], noise=[0.1 ** 2], every=1, units="m")
model.sensor("range_b", [rng("b")], noise=[0.1 ** 2], every=2, units="m")
# Beacons c and d answer together in one frame, less often.
model.sensor("range_cd", [rng("c"), rng("d")], noise=[0.15 ** 2, 0.15 ** 2], every=5, units="m m")
# Compass: ~3 degrees 1-sigma indoors (invented); heading residuals are wrapped.
model.sensor("compass", [psi], noise=[math.radians(3.0) ** 2], every=10, angles=[0], units="rad")

model.initial([0.0, 0.0, 0.0, 1.0], sp.diag(0.5 ** 2, 0.5 ** 2, math.radians(10.0) ** 2, 0.2 ** 2))


def drive(t: float) -> list:
    """Hold 1 m/s on a circle of radius 10 m, with a gentle weave in the turn rate."""
    return [0.02 * math.sin(0.3 * t), 0.1 + 0.02 * math.sin(0.5 * t)]


model.scenario(dt=0.1, inputs=drive)
