"""Quaternion strapdown navigation for an aerobatic drone: 16 states, 15 in the covariance.

Local level frame, north-east-down (NED), flat earth, no earth rotation (as in the Euler
example, strapdown_nav). Attitude is a unit quaternion (body -> NED); the filter carries its
error as a body-frame rotation vector, so there is no singular attitude: the flight below loops,
climbs vertically, rolls while vertical and dives straight down.

The IMU (gyro rates, specific forces) drives the prediction; satellite position and velocity
fixes, a barometric altitude and a three-axis magnetometer correct it. The IMU's white noise is
written as additive noise in the error space, which is exact here: gyro noise enters the
body-frame rotation error directly, and an isotropic accelerometer noise stays isotropic when
rotated into NED.
"""

import math

import numpy as np
import sympy as sp

from estgen import Model, quat

model = Model("qnav")
dt = model.dt
pn, pe, pd = model.states("pn pe pd", units="m m m")
vn, ve, vd = model.states("vn ve vd", units="m/s m/s m/s")
q = model.attitude("q")                                          # body -> NED
bgx, bgy, bgz = model.states("bgx bgy bgz", units="rad/s rad/s rad/s")       # gyro biases
bax, bay, baz = model.states("bax bay baz", units="m/s^2 m/s^2 m/s^2")       # accelerometer biases
wx, wy, wz = model.inputs("wx wy wz", units="rad/s rad/s rad/s")             # body rates, gyro
fx, fy, fz = model.inputs("fx fy fz", units="m/s^2 m/s^2 m/s^2")             # specific force, accel

# Standard gravity 9.80665 m/s^2 (from memory); a runtime parameter for local values.
g = model.param("g", 9.80665, unit="m/s^2")

acc = quat.rotate(q, [fx - bax, fy - bay, fz - baz])             # specific force in NED
qn = quat.mul(q, quat.exp([(wx - bgx) * dt, (wy - bgy) * dt, (wz - bgz) * dt]))
model.process(
    [pn + dt * vn, pe + dt * ve, pd + dt * vd]
    + [vn + dt * acc[0], ve + dt * acc[1], vd + dt * (acc[2] + g)]
    + qn
    + [bgx, bgy, bgz, bax, bay, baz]
)

# Error-space noise per step (order: position, velocity, attitude rotation vector, biases):
# the same invented consumer-grade MEMS IMU as strapdown_nav, angle random walk 0.005 rad/sqrt(s)
# and velocity random walk 0.02 m/s/sqrt(s); bias random walks 1e-5 rad/s/sqrt(s) and
# 1e-4 m/s^2/sqrt(s); a small position term covering the Euler step.
model.process_noise([1e-6 * dt] * 3 + [0.02 ** 2 * dt] * 3 + [0.005 ** 2 * dt] * 3
                    + [1e-5 ** 2 * dt] * 3 + [1e-4 ** 2 * dt] * 3)

# Satellite fixes at 10 Hz for a 100 Hz IMU, barometric altitude at 25 Hz (as strapdown_nav).
model.sensor("gnss_pos", [pn, pe, pd], noise=[1.5 ** 2, 1.5 ** 2, 3.0 ** 2], every=10, units="m m m")
model.sensor("gnss_vel", [vn, ve, vd], noise=[0.1 ** 2] * 3, every=10, units="m/s m/s m/s")
model.sensor("baro", [-pd], noise=[0.3 ** 2], every=4, units="m")
# Three-axis magnetometer at 20 Hz: an invented local field of 0.2 G north and 0.45 G down, read
# in the body frame, 0.01 G 1-sigma per axis. Unlike a heading it is defined in every attitude.
MAG_NED = [0.2, 0.0, 0.45]
model.sensor("mag", quat.rotate(quat.conj(q), MAG_NED), noise=[0.01 ** 2] * 3, every=5, units="G G G")

deg = math.pi / 180.0
SPEED = 20.0  # m/s, flying north
model.initial(
    [0.0, 0.0, -100.0, SPEED, 0.0, 0.0] + [1.0, 0.0, 0.0, 0.0] + [0.0] * 6,
    sp.diag(*([2.0 ** 2] * 3 + [0.3 ** 2] * 3 + [(2 * deg) ** 2] * 2 + [(5 * deg) ** 2]
              + [(0.2 * deg) ** 2] * 3 + [0.05 ** 2] * 3)),
)

# The flight: body rates per segment (seconds, roll/pitch/yaw rate in rad/s). Pitch rate 0.5 rad/s
# at 20 m/s is a 40 m loop.
SEGMENTS = [
    (5.0, (0.0, 0.0, 0.0)),                  # level
    (4 * math.pi, (0.0, 0.5, 0.0)),          # a full loop, through pitch +90 and -90
    (5.0, (0.0, 0.0, 0.0)),
    (math.pi, (0.0, 0.5, 0.0)),              # pull up to vertical
    (math.pi, (1.0, 0.0, 0.0)),              # half a roll while climbing vertically
    (2 * math.pi, (0.0, 0.5, 0.0)),          # over the top, inverted, to straight down
    (math.pi, (0.0, 0.5, 0.0)),              # pull out to level
    (12.0, (0.0, 0.0, 0.15)),                # level turn
]
STEP = 0.01
DURATION = sum(d for d, _ in SEGMENTS)


def _nominal() -> np.ndarray:
    """Gyro and accelerometer readings of the nominal flight, one row per 10 ms step: the body
    rates of the segment and the specific force f = a - R' g_ned with the centripetal
    acceleration a = (0, 0, -V q) + (0, V r, 0) of a turn at constant speed (common practice)."""
    steps = int(round(DURATION / STEP)) + 1
    out = np.zeros((steps, 6))
    qk = np.array([1.0, 0.0, 0.0, 0.0])
    ends = np.cumsum([d for d, _ in SEGMENTS])
    for k in range(steps):
        seg = min(int(np.searchsorted(ends, k * STEP, side="right")), len(SEGMENTS) - 1)
        p, qr, r = SEGMENTS[seg][1]
        w, x, y, z = qk
        rot = np.array([[1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
                        [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
                        [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)]])
        f = np.array([0.0, SPEED * r, -SPEED * qr]) - rot.T @ np.array([0.0, 0.0, 9.80665])
        out[k] = [p, qr, r, *f]
        ang = np.array([p, qr, r]) * STEP
        th = np.linalg.norm(ang)
        dq = np.array([math.cos(th / 2), *(ang * (math.sin(th / 2) / th if th > 0 else 0.5))])
        qk = np.array([w * dq[0] - x * dq[1] - y * dq[2] - z * dq[3],
                       w * dq[1] + x * dq[0] + y * dq[3] - z * dq[2],
                       w * dq[2] - x * dq[3] + y * dq[0] + z * dq[1],
                       w * dq[3] + x * dq[2] - y * dq[1] + z * dq[0]])
    return out


_FLIGHT = _nominal()


def flight(t: float) -> list:
    """The IMU readings at time t (the last row after the end of the flight)."""
    return list(_FLIGHT[min(int(round(t / STEP)), len(_FLIGHT) - 1)])


model.scenario(dt=STEP, inputs=flight)
