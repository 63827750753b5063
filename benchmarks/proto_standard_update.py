"""Prototype: what the standard-form scalar update would save in the generated EKF.

The generator writes each scalar component of a diagonal-R update in the Joseph form, per
packed entry ``Ps[k] = K[i]*V[j] - K[j]*W[i] + Ps[k]`` with ``V = s K - W``. This script
rewrites those lines of the first sensor's update in a generated file to the standard form
``Ps[k] = Ps[k] - K[i]*W[j]`` (equal in exact arithmetic), drops V, and counts both variants'
instructions per call under callgrind with the benchmark driver. The generator is untouched.

    python benchmarks/proto_standard_update.py MODEL [MODEL ...]
"""

from __future__ import annotations

import re
import sys
from pathlib import Path
from typing import Dict, List

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import estgen  # noqa: E402
from estgen import cross  # noqa: E402
from estgen.derive import packed_index  # noqa: E402
from estgen.filters import generate  # noqa: E402

import harness  # noqa: E402
from baseline import render_baseline  # noqa: E402


def standard_form(source: str, function: str, n: int) -> str:
    """``source`` with the Joseph lines of ``function`` rewritten to the standard form."""
    where = {packed_index(i, j, n): (i, j) for i in range(n) for j in range(i, n)}
    start = source.index(f"int {function}(")
    end = source.index("\n}\n", start)
    body = source[start:end]

    def rewrite(m: "re.Match[str]") -> str:
        if "V[" not in m.group(2):
            return m.group(0)
        i, j = where[int(m.group(1))]
        return f"Ps[{m.group(1)}] = Ps[{m.group(1)}] - K[{i}]*W[{j}];"

    body = re.sub(r"Ps\[(\d+)\] = ([^;]*);", rewrite, body)
    body = re.sub(r"\n\s*V\[\d+\] = [^;]*;", "", body)
    return source[:start] + body + source[end:]


def measure(path: str, work: Path) -> Dict[str, float]:
    spec = estgen.load_model(path)
    gen = generate(spec, filter="ekf", precision="float")
    pair = harness.Pair(spec, "ekf", gen.precision, gen, render_baseline(spec, "ekf", gen.precision),
                        work / spec.name)
    harness.write_pair(pair)
    _, update = pair.gen_functions
    out: Dict[str, float] = {}
    for variant in ("joseph", "standard"):
        if variant == "standard":
            src = pair.files["gen"].read_text()
            pair.files["gen"].write_text(standard_form(src, update, spec.n))
        exe = harness.build_driver(pair, gen_opt="-O2")
        agree = harness.agreement(exe)
        ins, calls = cross.callgrind_instructions(exe, [update], pair.work / f"cg_{variant}")[update]
        out[variant] = ins / calls
        out[f"{variant}_final_x_rel_dev"] = agree["final_x_rel_dev"]
    return out


def main(argv: List[str]) -> int:
    work = HERE / "_build" / "proto_standard"
    for path in argv or [str(HERE.parent / "generated_examples" / "strapdown_nav" / "model.py")]:
        r = measure(path, work)
        print(f"{path}: first-sensor update {r['joseph']:.0f} -> {r['standard']:.0f} instructions per call "
              f"({100 * (r['standard'] / r['joseph'] - 1):+.0f} %); final x vs dense: "
              f"{r['joseph_final_x_rel_dev']:.1e} (Joseph), {r['standard_final_x_rel_dev']:.1e} (standard)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
