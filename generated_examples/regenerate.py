"""Regenerate (or, with --check, check) the committed C of every example.

Each example folder holds its model file and, per filter and precision, a folder
``<filter>_<precision>/`` with exactly what `estgen generate` writes for those options:

    estgen generate <ex>/model.py --filter <filter> --precision <precision> -o <ex>/<filter>_<precision>

(plus the options in ``OPTIONS``, e.g. ``--particles 1000 --roughening 0.2`` for the particle filter of pier_tag).

CI runs ``python generated_examples/regenerate.py --check``: it exits 1 and lists the stale files
when anything committed differs from what this estgen version generates.
"""

from __future__ import annotations

import argparse
import os
import sys
from typing import Dict, List, Tuple

HERE = os.path.dirname(os.path.abspath(__file__))

#: example folder -> the filters its C is committed for (both precisions each)
EXAMPLES: Dict[str, Tuple[str, ...]] = {
    "battery_soc": ("ekf", "ukf"),
    "beacon_rover": ("ekf", "ukf"),
    "strapdown_nav": ("ekf", "ukf"),
    "quat_nav": ("ekf", "ukf"),
    "linear_cart": ("ekf", "ukf"),
    "valve_actuator": ("ukf",),  # Min/Max: the EKF refuses it
    "pier_tag": ("ekf", "ukf", "pf"),  # a mirror ambiguity: the particle filter's example
}
#: generate options of a committed configuration other than the defaults
OPTIONS: Dict[Tuple[str, str], Dict[str, object]] = {
    ("pier_tag", "pf"): {"particles": 1000, "roughening": 0.2},
}
PRECISIONS = ("float", "double")


def configurations() -> List[Tuple[str, str, str, str]]:
    """(example, model path, filter, precision, output dir) for every committed configuration."""
    out = []
    for ex, filters in EXAMPLES.items():
        model = os.path.join(HERE, ex, "model.py")
        for filt in filters:
            for prec in PRECISIONS:
                out.append((ex, model, filt, prec, os.path.join(HERE, ex, f"{filt}_{prec}")))
    return out


def main(argv: List[str] | None = None) -> int:
    sys.path.insert(0, os.path.dirname(HERE))
    from estgen.filters import generate, names
    from estgen.model import load_model
    from estgen.outputs import stale_files, write_generated

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true", help="write nothing; exit 1 listing stale files")
    args = ap.parse_args(argv)
    unknown = sorted({f for filters in EXAMPLES.values() for f in filters} - set(names()))
    if unknown:
        ap.error(f"EXAMPLES names unknown filter kinds {unknown}; the registry has {list(names())}")
    stale: List[str] = []
    specs = {}
    for ex, model, filt, prec, out in configurations():
        spec = specs.setdefault(model, load_model(model))
        gen = generate(spec, filter=filt, precision=prec, **OPTIONS.get((ex, filt), {}))
        if args.check:
            stale += [os.path.relpath(os.path.join(out, f), HERE) for f in stale_files(gen.files, out)]
        else:
            for f in write_generated(gen.files, out):
                print(os.path.relpath(os.path.join(out, f), HERE))
    if stale:
        print("stale generated files (run python generated_examples/regenerate.py):", file=sys.stderr)
        for s in stale:
            print("  " + s, file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
