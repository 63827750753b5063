"""Print the README's resource table ("Putting it in firmware", "What it costs").

Runs `estgen report --target cortex-m4f --precision float --json` for every committed example
configuration and formats RAM, worst stack (static bound / measured), flash and instructions per
predict and per step (emulated M4F, host). Needs arm-none-eabi-gcc, qemu-system-arm, valgrind.

    python benchmarks/firmware_table.py
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, os.path.join(ROOT, "generated_examples"))

import regenerate  # noqa: E402


def row(example: str, filt: str) -> str:
    model = os.path.join(ROOT, "generated_examples", example, "model.py")
    with tempfile.TemporaryDirectory() as tmp:
        out = os.path.join(tmp, "r.json")
        extra = [a for k, v in regenerate.OPTIONS.get((example, filt), {}).items()
                 for a in (f"--{k.replace('_', '-')}", str(v))]  # the committed configuration's options
        subprocess.run([sys.executable, "-m", "estgen", "report", model, "--filter", filt, "--precision", "float",
                        "--target", "cortex-m4f", "--json", out, *extra], check=True, capture_output=True, cwd=ROOT)
        d = json.load(open(out))
    pub = [f for f in d["functions"] if f.endswith("_predict") or ("_update_" in f and not f.endswith("_nis"))]
    qemu = d["instructions"].get("qemu-cortex-m4f", {})
    host = d["instructions"].get("host-callgrind", {})
    static = max(d["functions"][f]["stack_bytes"] for f in pub)
    measured = max((qemu.get(f, {}).get("stack_high_water", 0) for f in pub), default=0)
    pred = next(f for f in pub if f.endswith("_predict"))
    fmt = lambda v: f"{v:,.0f}".replace(",", " ")  # noqa: E731
    return (f"| {example} | {filt.upper()} | {d['ram_bytes']} B | {static} B / {measured} B | "
            f"{fmt(d['flash']['total'])} B | {fmt(qemu[pred]['instructions_per_call'])} | "
            f"{fmt(qemu['per_step'])} | {fmt(host['per_step'])} |")


def main() -> int:
    print("| example | filter | RAM (struct) | stack, worst function (static bound / measured) | "
          "flash on M4F | M4F instr/predict | M4F instr/step | host instr/step |")
    print("| --- | --- | --- | --- | --- | --- | --- | --- |")
    for ex, filters in regenerate.EXAMPLES.items():
        for filt in filters:
            print(row(ex, filt), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
