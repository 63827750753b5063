"""A cart rolling on a straight rail, position measured by a laser range finder (test model).

Constant-velocity motion driven by white acceleration noise of spectral density ``accel_psd``;
Q is the exact discretization of that noise (common practice, e.g. Bar-Shalom et al. 2001,
section 6.2.2, the discretized continuous white noise acceleration model).
"""

import sympy as sp

from estgen import Model

model = Model("refcart")
pos, vel = model.states("pos vel", units="m m/s")
accel_psd = model.param("accel_psd", 0.2, unit="m^2/s^3")
pos_var = model.param("pos_var", 0.09, unit="m^2")
dt = model.dt

model.process([pos + dt * vel, vel])
model.process_noise(accel_psd * sp.Matrix([[dt**3 / 3, dt**2 / 2], [dt**2 / 2, dt]]))
model.sensor("laser", [pos], noise=[pos_var], units="m")
model.initial([0.0, 1.0], sp.diag(1.0, 0.25))
model.scenario(dt=0.1)
