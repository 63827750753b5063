"""A body falling vertically through the atmosphere, tracked by a range radar (test model).

The setup of Athans, Wishner and Bertolini, "Suboptimal state estimation for continuous-time
nonlinear systems from discrete noisy measurements", IEEE Trans. Automatic Control 13(5), 1968,
as used again by Julier and Uhlmann ("A new method for the nonlinear transformation of means and
covariances in filters and estimators", IEEE Trans. Automatic Control 45(3), 2000) to compare the
EKF with the unscented filter. States: altitude x1 [ft], downward speed x2 [ft/s] and the
ballistic coefficient x3 (constant); the drag deceleration is exp(-gamma x1) x2^2 x3. The radar
stands M = 1e5 ft from the line of fall at altitude H = 1e5 ft and measures the range.

Numbers (all from memory of Julier & Uhlmann 2000, section VI): gamma = 5e-5 1/ft, M = H = 1e5 ft,
range noise variance 1e4 ft^2, one range per second, no process noise; true initial state
(3e5 ft, 2e4 ft/s, 1e-3), initial estimate (3e5, 2e4, 3e-5) with P0 = diag(1e6, 4e6, 1e-4).
They integrated with fourth-order Runge-Kutta, 64 sub-steps per observation; here RK4 over
dt = 0.1 s with the radar reporting every 10th step (our choice, to keep the C small).
"""

import sympy as sp

from estgen import Model

model = Model("fallbody")
alt, vel, bc = model.states("alt vel bc", units="ft ft/s -")
decay = model.param("decay", 5e-5, unit="1/ft")
model.dynamics([-vel, -sp.exp(-decay * alt) * vel**2 * bc, 0])
model.process_noise(sp.zeros(3, 3))
M, H = 1e5, 1e5
model.sensor("radar", [sp.sqrt(M**2 + (alt - H) ** 2)], noise=[1e4], every=10, units="ft")
model.initial([3e5, 2e4, 3e-5], sp.diag(1e6, 4e6, 1e-4))
model.scenario(dt=0.1)
