"""A conveyor carriage on a low-friction rail, pushed by a linear motor: a linear model.

Position and velocity of a rigid mass under a known motor force, plus an unknown constant
disturbance force (cable drag, a slight rail slope) carried as a third state. Everything is
linear in the states, so the EKF is the Kalman filter, its covariance settles to the discrete
Riccati solution, and the UKF reproduces it exactly: this model exists for those checks.
"""

import sympy as sp

from estgen import Model

model = Model("cart")
pos, vel, dist = model.states("pos vel dist", units="m m/s N")
(force,) = model.inputs("force", units="N")

mass = model.param("mass", 12.0, unit="kg")     # carriage plus load; invented for the demo
q_acc = model.param("q_acc", 0.05, unit="m^2/s^3")  # white-acceleration PSD; invented
q_dist = model.param("q_dist", 1e-3, unit="N^2/s")  # disturbance random-walk PSD; invented
dt = model.dt

a = (force + dist) / mass
# Exact discretization for a force held over the step (a constant acceleration).
model.process([pos + dt * vel + dt ** 2 / 2 * a, vel + dt * a, dist])

# Continuous white-noise acceleration, discretized: q [[dt^3/3, dt^2/2], [dt^2/2, dt]]
# (Bar-Shalom, Li, Kirubarajan, Estimation with Applications to Tracking and Navigation,
# 2001, sec. 6.2.2), plus a random-walk disturbance.
model.process_noise(sp.Matrix([
    [q_acc * dt ** 3 / 3, q_acc * dt ** 2 / 2, 0],
    [q_acc * dt ** 2 / 2, q_acc * dt, 0],
    [0, 0, q_dist * dt],
]))

# A magnetic linear encoder, 0.5 mm 1-sigma after quantization (invented).
model.sensor("encoder", [pos], noise=[0.0005 ** 2], units="m")
# A speed pickup on the idler wheel, slower and noisier (invented).
model.sensor("speed", [vel], noise=[0.01 ** 2], every=5, units="m/s")

model.initial([0.0, 0.0, 0.0], sp.diag(0.01 ** 2, 0.05 ** 2, 2.0 ** 2))


def shuttle(t: float) -> list:
    """Push forward, coast, brake, rest: a 4 s back-and-forth cycle of the motor force."""
    phase = t % 4.0
    if phase < 1.0:
        return [6.0]
    if phase < 2.0:
        return [0.0]
    if phase < 3.0:
        return [-6.0]
    return [0.0]


model.scenario(dt=0.01, inputs=shuttle)
