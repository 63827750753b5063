"""The numbers of this example's README: the generated EKF, UKF and particle filter (float C,
as `estgen generate` ships them) on the same simulated drops of the tag.

    python generated_examples/pier_tag/compare_filters.py [--runs 100] [--particles 1000] [--roughening 0.2]

For each run the tag starts at a random point of the initial_uniform box; every filter sees
the same ranges and beacon readings. A run counts as "on the wrong side" when the estimate
ends on the other side of the pier line than the tag, more than 2 m from it.
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))

import estgen  # noqa: E402
from estgen.chi2 import chi2_ppf  # noqa: E402
from estgen.simulate import make_scenario, run_filter  # noqa: E402


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=100)
    ap.add_argument("--steps", type=int, default=120)
    ap.add_argument("--particles", type=int, default=1000)
    ap.add_argument("--roughening", type=float, default=0.2)
    args = ap.parse_args(argv)
    spec = estgen.load_model(os.path.join(HERE, "model.py"))
    filters = {
        "EKF": lambda run: estgen.build(spec, filter="ekf", precision="float"),
        "UKF": lambda run: estgen.build(spec, filter="ukf", precision="float"),
        f"PF (N = {args.particles})": lambda run: estgen.build(spec, filter="pf", precision="float",
                                                               particles=args.particles, roughening=args.roughening,
                                                               seed=run + 1),
    }
    print(f"{args.runs} drops of {args.steps} steps (dt = {spec.scenario_dt} s); position error |p - p_true| in m")
    print(f"  {'filter':<16} {'wrong side at the end':>22} {'median final error':>19} {'RMS error, steps 21+':>21}"
          f" {'NEES inside 95% bounds':>23}")
    for name, make in filters.items():
        wrong, final, rms, inside = 0, [], [], []
        for run in range(args.runs):
            sc = make_scenario(spec, args.steps, 1000 + run)
            out = run_filter(make(run), sc)
            e = out["x"][1:, :2] - sc.x_true[1:, :2]
            err = np.sqrt(np.sum(e * e, axis=1))
            y_true, y_est = sc.x_true[-1, 1], out["x"][-1, 1]
            wrong += int(abs(y_true) > 2.0 and np.sign(y_true) != np.sign(y_est))
            final.append(err[-1])
            rms.append(np.sqrt(np.mean(err[20:] ** 2)))
            # the NEES at the last step, against the 95% chi-square quantile with n dof
            d = out["x"][-1] - sc.x_true[-1]
            try:
                nees = float(d @ np.linalg.solve(out["P"][-1], d))
            except np.linalg.LinAlgError:
                nees = np.inf
            inside.append(nees <= chi2_ppf(0.95, spec.n))
        print(f"  {name:<16} {wrong:>15d} of {args.runs:<4d} {np.median(final):>19.2f} {np.mean(rms):>21.2f}"
              f" {np.mean(inside):>22.0%}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
