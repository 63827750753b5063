"""A flow-control valve with a saturating, dead-band positioner: a UKF-only model.

The positioner moves the valve toward the commanded opening clipped to [0, 1], but only
once the position error leaves a dead band, and then at a rate proportional to the
error beyond it. Flow through the valve follows the square-root law q = kv * a * sqrt(dp)
with a pressure drop dp that wanders slowly about its nominal value. Min and Max make the process non-differentiable
at the band edges and at the limits, so the EKF refuses this model; the UKF handles it.
"""

import sympy as sp

from estgen import Model

model = Model("valve")
opening, dp = model.states("opening dp", units="1 bar")
(cmd,) = model.inputs("cmd", units="1")  # commanded opening; may exceed [0, 1]

gain = model.param("gain", 2.0, unit="1/s")         # positioner loop gain; invented
band = model.param("band", 0.02, unit="1")          # dead band half-width; invented
kv = model.param("kv", 10.0, unit="m^3/h/sqrt(bar)")  # flow coefficient; invented
dp_nom = model.param("dp_nom", 2.0, unit="bar")     # supply-side pressure drop; invented
tau = model.param("tau", 30.0, unit="s")            # pressure drift time constant; invented
dt = model.dt

target = sp.Min(sp.Max(cmd, 0), 1)                  # the positioner's stroke limits
err = target - opening
beyond = sp.Max(err - band, 0) + sp.Min(err + band, 0)  # zero inside the dead band
# dp relaxes toward dp_nom, so it stays well above zero (sqrt in the flow law).
model.process([opening + dt * gain * beyond, dp + dt * (dp_nom - dp) / tau])

# Q: positioner jitter (0.01/sqrt(s)) and a pressure drop wandering by ~0.05 bar/sqrt(s); invented.
model.process_noise([(0.01) ** 2 * dt, 0.05 ** 2 * dt])

# Flow meter (m^3/h), 1 % of a 10 m^3/h range 1-sigma; a coarse stem potentiometer.
model.sensor("flow", [kv * opening * sp.sqrt(dp)], noise=[0.1 ** 2], units="m^3/h")
model.sensor("stem", [opening], noise=[0.02 ** 2], every=10, units="1")

# Start: opening known to 5 % from the last command, pressure drop to 0.05 bar (a tighter
# prior keeps the flow update's product a * sqrt(dp) close to linear for the UKF).
model.initial([0.3, 2.0], sp.diag(0.05 ** 2, 0.05 ** 2))


def steps(t: float) -> list:
    """Command steps, some beyond the stroke limits and some inside the dead band."""
    seq = [0.3, 0.6, 1.2, 0.61, 0.2, -0.1, 0.5, 0.51]
    return [seq[int(t // 5.0) % len(seq)]]


model.scenario(dt=0.05, inputs=steps)
