"""Print docs/compare.md's tables of the published set-ups, with the time compare takes.

The falling body tracked by a range radar (Athans, Wishner & Bertolini 1968; Julier & Uhlmann
2000; the truth starts at the published true state, the filters at the published estimate) and
the univariate nonstationary growth model (Gordon, Salmond & Smith 1993), with every filter the
models allow. Needs arm-none-eabi-gcc and qemu-system-arm for the cost figures; the first run
builds and measures, later ones read the cost cache.

    python benchmarks/compare_published.py [--runs 20] [--particles 500]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

from estgen.compare import compare, format_comparison  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--runs", type=int, default=20)
    ap.add_argument("--particles", type=int, default=None, help="particle count when the PF takes part")
    args = ap.parse_args()
    opts = {"options": {"pf": {"particles": args.particles}}} if args.particles else {}
    cases = [
        ("falling body (Athans et al. 1968)", os.path.join(ROOT, "tests", "models", "falling_body.py"), 600, 1,
         {"truth_initial": ([3e5, 2e4, 1e-3], [0.0, 0.0, 0.0])}),
        ("growth model (Gordon et al. 1993)", os.path.join(ROOT, "tests", "models", "growth.py"), 50, 1, {}),
    ]
    for title, path, steps, seed, extra in cases:
        t0 = time.perf_counter()
        c = compare(path, None, args.runs, steps, seed, progress=False, **opts, **extra)
        took = time.perf_counter() - t0
        print(f"## {title}: compare took {took:.1f} s\n")
        print(format_comparison(c))
        if "truth_initial" in extra:
            bc = c.states.index("bc")
            late = {n: float(np.sqrt(np.mean(o.error_over_time[200:, bc] ** 2))) for n, o in c.filters.items()}
            print("\nRMSE of bc over t >= 20 s: " + ", ".join(f"{n.upper()} {v:.3g}" for n, v in late.items()))
        print()
    return 0


if __name__ == "__main__":
    sys.exit(main())
