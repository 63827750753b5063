"""The particle filter's cost table (docs/particle_filter.md): for every example the particle
filter takes, the float build on the emulated Cortex-M4F with N = 100 and N = 1000 particles:
struct RAM, flash, instructions per predict and per scenario step (QEMU mps2-an386,
``estgen report``'s measurement). Needs arm-none-eabi-gcc and qemu-system-arm.

    python benchmarks/pf_table.py [--steps 30] [--json benchmarks/pf_results.json]

The figures are measured, not estimated; RAM is sizeof the struct (particles, log-weights and
weights live in it: about N (n + 2) reals).
"""

from __future__ import annotations

import argparse
import json
import os
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)
sys.path.insert(0, os.path.join(ROOT, "generated_examples"))

import regenerate  # noqa: E402

from estgen import load_model  # noqa: E402
from estgen.errors import ModelError  # noqa: E402
from estgen.filters import check_filter_support  # noqa: E402
from estgen.report import make_report  # noqa: E402

PARTICLES = (100, 1000)


def measure(example: str, particles: int, steps: int) -> dict:
    spec = load_model(os.path.join(ROOT, "generated_examples", example, "model.py"))
    rep = make_report(spec, filter="pf", precision="float", target="cortex-m4f", steps=steps, seed=0, host=False,
                      particles=particles)
    m4 = rep["instructions"].get("qemu-cortex-m4f", {})
    pred = f"{spec.name}_pf_predict"
    return {"example": example, "n": spec.n, "particles": particles, "ram_bytes": rep["ram_bytes"],
            "flash_bytes": rep["flash"]["total"] if rep["flash"] else None,
            "predict_instructions": m4.get(pred, {}).get("instructions_per_call"),
            "step_instructions": m4.get("per_step"), "steps": steps, "missing": rep["missing"]}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=30, help="scenario steps replayed (default 30)")
    ap.add_argument("--json", default=None, help="also write the rows as JSON")
    args = ap.parse_args(argv)
    rows = []
    print("| example | n | N | RAM (struct) | flash | M4F instr/predict | M4F instr/step |")
    print("| --- | --- | --- | --- | --- | --- | --- |")
    fmt = lambda v: "-" if v is None else f"{v:,.0f}".replace(",", " ")  # noqa: E731
    for ex in regenerate.EXAMPLES:
        try:
            check_filter_support(load_model(os.path.join(ROOT, "generated_examples", ex, "model.py")), "pf")
        except ModelError:
            continue  # attitude states: the particle filter refuses them
        for N in PARTICLES:
            r = measure(ex, N, args.steps)
            rows.append(r)
            print(f"| {ex} | {r['n']} | {N} | {fmt(r['ram_bytes'])} B | {fmt(r['flash_bytes'])} B | "
                  f"{fmt(r['predict_instructions'])} | {fmt(r['step_instructions'])} |", flush=True)
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(rows, fh, indent=2)
            fh.write("\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
