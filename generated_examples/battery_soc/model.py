"""Li-ion cell state of charge from terminal voltage and current (equivalent-circuit model).

A series resistance R0 and one R1||C1 polarization branch in series with an open-circuit
voltage source OCV(soc). The current is held constant over each step (zero-order hold), so
the discrete map below is the exact solution of the circuit over dt.

The measured terminal voltage v = OCV(soc) - v_rc - R0 * i depends on the current of the
present step. A measurement may only use states, so the ohmic drop R0 * i of the step just
taken is carried as the state v_ohm (set by predict from the held current).
"""

import sympy as sp

from estgen import Model

model = Model("cell")
soc, v_rc, v_ohm = model.states("soc v_rc v_ohm", units="1 V V")
(i,) = model.inputs("i", units="A")  # cell current, discharge positive

# A generic 2.5 Ah 18650-size cell; values invented for the demo, of the usual order
# (from memory: a few tens of milliohm, polarization time constant of tens of seconds).
capacity = model.param("capacity", 2.5, unit="Ah")
r0 = model.param("r0", 0.045, unit="ohm")
r1 = model.param("r1", 0.025, unit="ohm")
c1 = model.param("c1", 1200.0, unit="F")
dt = model.dt

# Open-circuit voltage: steep near empty, sloped plateau, rising toward full. The shape is
# the familiar one of a graphite/NMC cell (from memory); the coefficients are invented so
# that OCV(0) ~ 3.0 V and OCV(1) ~ 4.2 V. Smooth everywhere, so the EKF can differentiate it.
ocv = 3.4 + 0.72 * soc - 0.4 * sp.exp(-15 * soc) + 0.08 * sp.exp(-12 * (1 - soc))

decay = sp.exp(-dt / (r1 * c1))
model.process([
    soc - dt * i / (3600 * capacity),          # coulomb counting (Ah -> A s)
    decay * v_rc + r1 * (1 - decay) * i,       # exact RC step for a held current
    r0 * i,                                    # ohmic drop over the step just taken
])

# Q: current-sensor error and model mismatch; invented for the demo.
model.process_noise([(2e-5) ** 2 * dt, (5e-4) ** 2 * dt, (1e-3) ** 2])

# Terminal voltage, 12-bit-class cell monitor: ~5 mV noise (invented for the demo).
model.sensor("voltage", [ocv - v_rc - v_ohm], noise=[0.005 ** 2], units="V")

# Start unsure of the charge (1 sigma 10 %), at rest, mid-charge: the knees of the curve
# steepen fast outside [0, 1], so a start near full could draw a truth beyond it.
model.initial([0.6, 0.0, 0.0], sp.diag(0.1 ** 2, 0.01 ** 2, 0.01 ** 2))


def pulses(t: float) -> list:
    """Pulsed discharge: 2.5 A (1C) for 60 s, then 40 s rest, repeated."""
    return [2.5 if (t % 100.0) < 60.0 else 0.0]


model.scenario(dt=1.0, inputs=pulses)
