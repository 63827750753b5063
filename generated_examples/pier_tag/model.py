"""A floating tag in a harbour basin, ranged from two anchors on a straight pier.

The tag (a drifting instrument float) carries a radio that measures its distance to two anchors
bolted to the pier, 30 m apart on the pier's edge (the x axis). Two ranges fix a point only up
to its mirror image across the pier line: (px, py) and (px, -py) give the same pair. The only thing
that tells the sides apart is the strength of a beacon at the basin end, which the pier's piles
shadow: a smooth step across the pier line, flat a few metres away from it. The tag is dropped
somewhere in the box of initial_uniform, which straddles the pier line. A filter that carries
one Gaussian picks a side at the first range update; on the wrong side the step is flat, its
slope (the EKF's Jacobian) and its spread over the sigma points (the UKF's) are near zero, and
the beacon cannot pull the estimate back. Scenario and numbers invented for the demo.
"""

import sympy as sp

from estgen import Model

model = Model("pier_tag")
px, py, vx, vy = model.states("px py vx vy", units="m m m/s m/s")
dt = model.dt
q_acc = model.param("q_acc", 0.01, unit="m^2/s^3")  # drift acceleration PSD (wind, current)

model.process([px + dt * vx, py + dt * vy, vx, vy])
# white-noise acceleration, discretized (common practice): q [[dt^3/3, dt^2/2], [dt^2/2, dt]] per axis
model.process_noise(q_acc * sp.Matrix([
    [dt ** 3 / 3, 0, dt ** 2 / 2, 0],
    [0, dt ** 3 / 3, 0, dt ** 2 / 2],
    [dt ** 2 / 2, 0, dt, 0],
    [0, dt ** 2 / 2, 0, dt],
]))

# the pier anchors at (-15, 0) and (15, 0)
model.sensor("pier", [sp.sqrt((px + 15) ** 2 + py ** 2), sp.sqrt((px - 15) ** 2 + py ** 2)],
             noise=[0.5 ** 2, 0.5 ** 2], units="m m")
# the signal strength of a beacon at the basin end, normalized: the pier's steel piles shadow it,
# so it reads about +1 on the basin side (py > 0), -1 on the far side, with a smooth step of a few
# metres across the pier line
model.sensor("shadow", [sp.tanh(py)], noise=[0.3 ** 2], every=5)

model.initial_uniform([-10.0, -15.0, -0.2, -0.2], [10.0, 18.0, 0.2, 0.2])
model.scenario(dt=0.5)
