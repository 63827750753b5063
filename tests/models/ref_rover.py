"""A rover driving in circles on a field: odometry in, GNSS position and a compass heading out
(test model). The heading keeps crossing +-pi, so angle wrapping is exercised every lap."""

import sympy as sp

from estgen import Model

model = Model("refrover")
px, py = model.states("px py", units="m m")
(heading,) = model.states("heading", angle=True, units="rad")
speed, yaw_rate = model.inputs("speed yaw_rate", units="m/s rad/s")
gnss_var = model.param("gnss_var", 0.25, unit="m^2")
dt = model.dt

model.process([px + dt * speed * sp.cos(heading),
               py + dt * speed * sp.sin(heading),
               heading + dt * yaw_rate])
model.process_noise(sp.diag(0.01, 0.01, 0.002) * dt)
model.sensor("gnss", [px, py], noise=[gnss_var, gnss_var], every=5, units="m m")
model.sensor("compass", [heading], noise=[0.03**2], angles=[0], units="rad", gate=0.999)
model.initial([0.0, 0.0, 3.0], sp.diag(0.5, 0.5, 0.05))
model.scenario(dt=0.1, inputs=lambda t: [2.0, 0.7])
