"""Strapdown inertial navigation for a slow survey drone over a small area: 15 states.

Local level frame, north-east-down (NED), flat earth, no earth rotation: at walking
speeds over a few hundred metres both are far below the sensor noise used here.
The IMU (gyro rates, specific forces) drives the prediction; position and velocity fixes
(satellite receiver), a barometric altitude and a magnetometer heading correct it.

Attitude is carried as roll/pitch/yaw Euler angles (z-y-x order), integrated with the
Euler-angle kinematics; the whole process is one explicit Euler step, which keeps the
expressions small. Pitch must stay away from +-90 deg (sec(pitch) in the kinematics).
"""

import math

import sympy as sp

from estgen import Model

model = Model("nav")
pn, pe, pd = model.states("pn pe pd", units="m m m")
vn, ve, vd = model.states("vn ve vd", units="m/s m/s m/s")
roll, pitch, yaw = model.states("roll pitch yaw", angle=True, units="rad rad rad")
bgx, bgy, bgz = model.states("bgx bgy bgz", units="rad/s rad/s rad/s")       # gyro biases
bax, bay, baz = model.states("bax bay baz", units="m/s^2 m/s^2 m/s^2")       # accelerometer biases
# The IMU's white noise enters where it physically does, through the measured inputs
# (u_true = u_meas - noise); per-sample variances from an invented consumer-grade MEMS IMU:
# angle random walk 0.005 rad/sqrt(s) and velocity random walk 0.02 m/s/sqrt(s), so a rate held
# over one step dt has variance ARW^2 / dt (VRW^2 / dt for the specific force).
dt = model.dt
wx, wy, wz = model.inputs("wx wy wz", units="rad/s rad/s rad/s", noise=[0.005 ** 2 / dt] * 3)   # body rates, gyro
fx, fy, fz = model.inputs("fx fy fz", units="m/s^2 m/s^2 m/s^2", noise=[0.02 ** 2 / dt] * 3)    # specific force, accel

# Standard gravity 9.80665 m/s^2 (from memory); a runtime parameter for local values.
g = model.param("g", 9.80665, unit="m/s^2")

cr, sr = sp.cos(roll), sp.sin(roll)
cp, spp = sp.cos(pitch), sp.sin(pitch)
cy, sy = sp.cos(yaw), sp.sin(yaw)
# Body-to-NED rotation for z-y-x (yaw, pitch, roll) Euler angles (common practice).
C = sp.Matrix([
    [cp * cy, sr * spp * cy - cr * sy, cr * spp * cy + sr * sy],
    [cp * sy, sr * spp * sy + cr * cy, cr * spp * sy - sr * cy],
    [-spp, sr * cp, cr * cp],
])
w = sp.Matrix([wx - bgx, wy - bgy, wz - bgz])
f = sp.Matrix([fx - bax, fy - bay, fz - baz])
acc = C * f + sp.Matrix([0, 0, g])          # NED acceleration: specific force plus gravity
# Euler-angle rates from body rates (common practice, z-y-x convention).
tp = spp / cp
att_rate = sp.Matrix([
    w[0] + (sr * w[1] + cr * w[2]) * tp,
    cr * w[1] - sr * w[2],
    (sr * w[1] + cr * w[2]) / cp,
])

model.process(
    [pn + dt * vn, pe + dt * ve, pd + dt * vd]
    + [vn + dt * acc[0], ve + dt * acc[1], vd + dt * acc[2]]
    + [roll + dt * att_rate[0], pitch + dt * att_rate[1], yaw + dt * att_rate[2]]
    + [bgx, bgy, bgz, bax, bay, baz]
)

# Additive Q keeps what the inputs do not carry: the bias random walks 1e-5 rad/s/sqrt(s) and
# 1e-4 m/s^2/sqrt(s), and a small position term covering the Euler step. The velocity and
# attitude terms come from the IMU noise above, rotated into NED and through the Euler-angle
# kinematics by the filter itself.
model.process_noise([1e-6 * dt] * 3 + [0.0] * 6 + [1e-5 ** 2 * dt] * 3 + [1e-4 ** 2 * dt] * 3)

# Satellite fixes at 10 Hz for a 100 Hz IMU (every 10 steps): 1.5 m horizontal, 3 m vertical
# position and 0.1 m/s velocity, 1-sigma (invented, typical of a small receiver from memory).
model.sensor("gnss_pos", [pn, pe, pd], noise=[1.5 ** 2, 1.5 ** 2, 3.0 ** 2], every=10, units="m m m")
model.sensor("gnss_vel", [vn, ve, vd], noise=[0.1 ** 2] * 3, every=10, units="m/s m/s m/s")
# Barometric altitude (up = -down), 0.3 m 1-sigma at 25 Hz (invented).
model.sensor("baro", [-pd], noise=[0.3 ** 2], every=4, units="m")
# Magnetometer heading, 2 degrees 1-sigma at 20 Hz (invented); the residual is an angle.
model.sensor("mag_heading", [yaw], noise=[math.radians(2.0) ** 2], every=5, angles=[0], units="rad")

deg = math.pi / 180.0
model.initial(
    [0.0] * 6 + [0.0, 0.0, 0.5] + [0.0] * 6,
    sp.diag(*([2.0 ** 2] * 3 + [0.3 ** 2] * 3 + [(2 * deg) ** 2] * 2 + [(5 * deg) ** 2]
              + [(0.2 * deg) ** 2] * 3 + [0.05 ** 2] * 3)),
)


def flight(t: float) -> list:
    """A gentle weave at level flight: turn-rate and forward-acceleration sine waves.

    The accelerometer reads -g on the body z axis when level (specific force in NED-body).
    """
    return [
        0.0,
        0.0,
        0.15 * math.sin(0.2 * t),
        0.3 * math.sin(0.1 * t),
        0.0,
        -9.80665,
    ]


model.scenario(dt=0.01, inputs=flight)
