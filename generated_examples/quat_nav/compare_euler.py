"""The quaternion model (quat_nav) against the Euler-angle model (strapdown_nav) on the same
aerobatic flight: a loop, a vertical climb with a roll, a dive straight down.

The truth is the quaternion model's own simulation; both filters (float C) get the same IMU
inputs, satellite fixes and barometer readings; the Euler model's magnetic heading is the truth's
yaw plus 2 deg noise (its sensor), the quaternion model reads its three-axis magnetometer.
Printed: refused calls, the largest attitude error (the rotation angle between truth and
estimate), the largest position error, and the run-averaged NEES of position and velocity
(6 dof, both models carry them the same way) against its 95% chi-square bounds.

    python generated_examples/quat_nav/compare_euler.py [--runs 20] [--seed 1]
"""

from __future__ import annotations

import argparse
import math
import os
import runpy
from typing import Dict, List

import numpy as np
from scipy.spatial.transform import Rotation

import estgen
from estgen.chi2 import chi2_ppf
from estgen.simulate import Scenario, make_scenario, run_filter

HERE = os.path.dirname(os.path.abspath(__file__))
QUAT = os.path.join(HERE, "model.py")
EULER = os.path.join(HERE, "..", "strapdown_nav", "model.py")


def _rot_q(q: np.ndarray) -> Rotation:
    return Rotation.from_quat(np.column_stack([q[:, 1], q[:, 2], q[:, 3], q[:, 0]]))  # scipy: scalar last


def euler_scenario(sc: Scenario, rng: np.random.Generator) -> Scenario:
    """The same flight for the Euler model: its states, and a heading in place of the magnetometer."""
    truth = _rot_q(sc.x_true[:, 6:10])
    ypr = truth.as_euler("ZYX")  # yaw, pitch, roll (z-y-x, as strapdown_nav)
    x = np.zeros((sc.x_true.shape[0], 15))
    x[:, 0:6] = sc.x_true[:, 0:6]
    x[:, 6], x[:, 7], x[:, 8] = ypr[:, 2], ypr[:, 1], ypr[:, 0]
    x[:, 9:15] = sc.x_true[:, 10:16]
    meas = []
    for k, row in enumerate(sc.measurements):
        out = [(name, z) for name, z in row if name != "mag"]
        if any(name == "mag" for name, _ in row):
            hdg = ypr[k + 1, 0] + math.radians(2.0) * rng.standard_normal()
            out.append(("mag_heading", np.array([math.remainder(hdg, 2 * math.pi)])))
        meas.append(out)
    return Scenario(dt=sc.dt, t=sc.t, u=sc.u, x_true=x, measurements=meas)


def attitude_error_deg(truth: Rotation, est: Rotation) -> np.ndarray:
    return np.degrees((truth.inv() * est).magnitude())


def pv_nees(x: np.ndarray, P: np.ndarray, x_true: np.ndarray) -> np.ndarray:
    """NEES of position and velocity (the first six entries of both models' x and P)."""
    out = np.full(x.shape[0], np.nan)
    for k in range(x.shape[0]):
        e = x[k, :6] - x_true[k, :6]
        try:
            c = np.linalg.cholesky(P[k, :6, :6])
            v = np.linalg.solve(c, e)
            out[k] = float(v @ v)
        except np.linalg.LinAlgError:
            pass
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=20)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()
    qspec = estgen.load_model(QUAT)
    espec = estgen.load_model(EULER)
    steps = int(round(runpy.run_path(QUAT)["DURATION"] / qspec.scenario_dt))  # the whole flight
    stats: Dict[str, Dict[str, List[float]]] = {k: {"att": [], "pos": [], "refused": [], "nonfinite": []}
                                                for k in ("euler", "quat")}
    nees: Dict[str, List[np.ndarray]] = {"euler": [], "quat": []}
    for r in range(args.runs):
        sc = make_scenario(qspec, steps, seed=[args.seed, r])
        esc = euler_scenario(sc, np.random.default_rng([args.seed, r, 1]))
        truth = _rot_q(sc.x_true[:, 6:10])
        for kind, spec, scen in (("quat", qspec, sc), ("euler", espec, esc)):
            flt = estgen.build(spec, filter="ekf", precision="float")
            out = run_filter(flt, scen)
            x = out["x"]
            finite = np.all(np.isfinite(x), axis=1)
            if kind == "quat":
                est = _rot_q(np.where(finite[:, None], x[:, 6:10], [1.0, 0, 0, 0]))
            else:
                ypr = np.where(finite[:, None], x[:, [8, 7, 6]], 0.0)
                est = Rotation.from_euler("ZYX", ypr)
            att = attitude_error_deg(truth, est)
            pos = np.linalg.norm(x[:, :3] - scen.x_true[:, :3], axis=1)
            s = stats[kind]
            s["att"].append(float(np.nanmax(np.where(finite, att, np.nan))))
            s["pos"].append(float(np.nanmax(np.where(finite, pos, np.nan))))
            s["refused"].append(float(sum(out["refusals"].values())))
            s["nonfinite"].append(float((~finite).sum()))
            nees[kind].append(pv_nees(x, out["P"], scen.x_true))
    lo, hi = (chi2_ppf(p, args.runs * 6) / args.runs for p in (0.025, 0.975))
    print(f"{args.runs} runs of {steps} steps (dt {qspec.scenario_dt} s), float C EKFs, seed {args.seed}")
    print(f"{'model':8} {'max attitude error (deg)':>26} {'max position error (m)':>24} {'refused calls':>14} "
          f"{'NEES pos+vel mean':>18} {'inside [%.2f, %.2f]' % (lo, hi):>20}")
    for kind in ("euler", "quat"):
        s = stats[kind]
        with np.errstate(all="ignore"):
            avg = np.nanmean(np.array(nees[kind]), axis=0)[1:]
        inside = float(np.mean((avg >= lo) & (avg <= hi)))
        print(f"{kind:8} {np.median(s['att']):>12.2f} median {np.max(s['att']):>6.1f} max "
              f"{np.median(s['pos']):>10.1f} median {np.max(s['pos']):>6.0f} max "
              f"{np.mean(s['refused']):>14.0f} {np.nanmean(avg):>18.2f} {100 * inside:>19.1f}%")


if __name__ == "__main__":
    main()
