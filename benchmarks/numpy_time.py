"""Time the numpy reference filter per step (predict + first-sensor update).

Run by benchmarks/run.py in a child process whose environment has OPENBLAS_CORETYPE and
OPENBLAS_L2_SIZE removed (set on some machines for old OpenBLAS builds, they slow a current
numpy; the tests keep them). Reads a JSON list of [model_path, filter] from stdin, writes
``{"model_path|filter": ns_per_step}`` and the BLAS kernel in use to stdout as JSON.
"""

from __future__ import annotations

import json
import os
import sys
import time
from typing import Any, Dict, List

HERE = os.path.dirname(os.path.abspath(__file__))
if not os.environ.get("PYTHONPATH"):  # run.py sets it to the estgen under test
    sys.path.insert(0, os.path.dirname(HERE))
sys.path.insert(0, HERE)

import estgen  # noqa: E402

from harness import scenario_arrays  # noqa: E402


def ns_per_step(path: str, filt: str, rounds: int = 5, block: int = 20) -> float:
    """Best ns per step over blocks of ``block`` steps (the minimum discards blocks the
    scheduler interrupted on a shared machine)."""
    spec = estgen.load_model(path)
    dt, U, Z = scenario_arrays(spec)
    first = spec.sensors[0].name
    best = float("inf")
    for _ in range(rounds):
        ref = estgen.reference(spec, filter=filt)
        ref.predict(U[0], dt)  # first call outside the clock (lazy numpy/lambdify set-up)
        for start in range(0, len(Z) - block + 1, block):
            t0 = time.perf_counter()
            for k in range(start, start + block):
                ref.predict(U[k], dt)
                ref.update(first, Z[k])
            best = min(best, (time.perf_counter() - t0) / block * 1e9)
    return best


def blas_kernel() -> str:
    try:
        from threadpoolctl import threadpool_info

        info = [f"{d.get('internal_api')}:{d.get('architecture')}" for d in threadpool_info()]
        return ", ".join(info) or "unknown"
    except ImportError:
        return "unknown (threadpoolctl not installed)"


def main() -> int:
    jobs: List[List[str]] = json.load(sys.stdin)
    out: Dict[str, Any] = {"blas": blas_kernel(), "ns": {}}
    for path, filt in jobs:
        out["ns"][f"{path}|{filt}"] = ns_per_step(path, filt)
    json.dump(out, sys.stdout)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
