"""Synthetic benchmark models: model files of any size, in two structures.

* ``sparse``: a chain of weakly coupled 3-state blocks (position, velocity, a slowly drifting
  bias), each block's velocity pulled toward its left neighbour's position by a spring. F has a
  handful of entries per row; the first sensor reads three block positions.
* ``dense``: a recurrent network ``x' = x + dt (-x + tanh(A x + b u))`` with every state in
  every equation (A full), and a dense first sensor ``z_k = tanh(c_k . x)``: F and H are full.

Each model also has a second sensor with a full (correlated) R, so the block update path is
exercised where the models are checked; the benchmark times the first sensor only.

The numbers are our own invention (fixed seeds), chosen so the filters stay well conditioned
over the benchmark's scenarios. Usage::

    python benchmarks/synthetic.py --out DIR sparse:12 dense:8
"""

from __future__ import annotations

import argparse
import math
import os
import random
from typing import List, Sequence

__all__ = ["sparse_model", "dense_model", "model_source", "write_model", "block_sizes"]


def block_sizes(n: int) -> List[int]:
    """Split n states into blocks of 3; the last block keeps the 1 or 2 left over."""
    if n < 1:
        raise ValueError("n must be >= 1")
    sizes = [3] * (n // 3)
    if n % 3:
        sizes.append(n % 3)
    return sizes


def _lit(v: float) -> str:
    return repr(round(float(v), 6))


def sparse_model(n: int) -> str:
    """Source of the n-state block-chain model (see the module doc)."""
    sizes = block_sizes(n)
    names: List[List[str]] = []
    for b, size in enumerate(sizes):
        names.append([f"{kind}{b}" for kind in "pvb"[:size]])
    flat = [nm for blk in names for nm in blk]
    lines = [
        f'"""Synthetic sparse chain, {n} states in {len(sizes)} blocks (benchmarks/synthetic.py)."""',
        "import math",
        "import sympy as sp",
        "from estgen import Model",
        "",
        f'model = Model("chain{n}")',
        f'({", ".join(flat)},) = model.states("{" ".join(flat)}")',
        '(force,) = model.inputs("force")',
        'k = model.param("k", 0.4)      # neighbour spring (weak)',
        'c = model.param("c", 0.8)      # damping',
        "dt = model.dt",
        "f = []",
    ]
    q: List[str] = []
    p0: List[str] = []
    x0: List[str] = []
    for b, blk in enumerate(names):
        pos = blk[0]
        stiff = _lit(1.0 + 0.1 * b)
        left = f" + k * ({names[b - 1][0]} - {pos})" if b > 0 else " + force"
        if len(blk) == 1:
            lines.append(f"f.append({pos} + dt * (-{stiff} * sp.sin({pos}){left}))")
            q.append("1e-4")
            p0.append("0.05")
            x0.append(_lit(0.1 * (b % 3)))
            continue
        vel = blk[1]
        bias = f" + {blk[2]}" if len(blk) == 3 else ""
        lines.append(f"f.append({pos} + dt * {vel})")
        lines.append(f"f.append({vel} + dt * (-{stiff} * sp.sin({pos}) - c * {vel}{left}{bias}))")
        q += ["1e-6", "1e-3"]
        p0 += ["0.05", "0.1"]
        x0 += [_lit(0.1 * (b % 3)), "0.0"]
        if len(blk) == 3:
            lines.append(f"f.append({blk[2]} - dt * 0.05 * {blk[2]})")
            q.append("1e-5")
            p0.append("0.01")
            x0.append("0.0")
    pos_names = [blk[0] for blk in names]
    picks = sorted({0, len(pos_names) // 2, len(pos_names) - 1})
    first = [pos_names[i] for i in picks]
    lines += [
        "model.process(f)",
        f"model.process_noise(sp.diag(*[{', '.join(q)}]) * dt)",
        f'model.sensor("pos", [{", ".join(first)}], noise=[{", ".join(["0.01"] * len(first))}])',
    ]
    # second sensor: a relative reading and the first velocity (or position) with correlated noise
    other = names[0][1] if len(names[0]) > 1 else pos_names[0]
    lines += [
        f'model.sensor("pair", [{pos_names[-1]} - {pos_names[0]}, {other}],',
        "             noise=sp.Matrix([[0.02, 0.005], [0.005, 0.01]]))",
        f"model.initial([{', '.join(x0)}], sp.diag(*[{', '.join(p0)}]))",
        "model.scenario(dt=0.01, inputs=lambda t: [0.5 * math.sin(0.7 * t)])",
        "",
    ]
    return "\n".join(lines)


def dense_model(n: int, seed: int = 7) -> str:
    """Source of the n-state fully coupled model (see the module doc)."""
    rng = random.Random(seed * 1000 + n)
    xs = [f"x{i}" for i in range(n)]
    scale = 0.8 / math.sqrt(n)  # keeps the spectral radius of A below 1: a contracting map
    A = [[rng.gauss(0.0, scale) for _ in range(n)] for _ in range(n)]
    bu = [rng.uniform(-0.5, 0.5) for _ in range(n)]
    m = min(n, 3)
    C = [[rng.gauss(0.0, 1.0 / math.sqrt(n)) for _ in range(n)] for _ in range(m)]
    lines = [
        f'"""Synthetic fully coupled model, {n} states (benchmarks/synthetic.py)."""',
        "import math",
        "import sympy as sp",
        "from estgen import Model",
        "",
        f'model = Model("dense{n}")',
        f'({", ".join(xs)},) = model.states("{" ".join(xs)}")',
        '(drive,) = model.inputs("drive")',
        'leak = model.param("leak", 1.0)',
        "dt = model.dt",
        "X = sp.Matrix([" + ", ".join(xs) + "])",
        "A = sp.Matrix([" + ", ".join("[" + ", ".join(_lit(a) for a in row) + "]" for row in A) + "])",
        "bu = sp.Matrix([" + ", ".join(_lit(v) for v in bu) + "])",
        "act = A * X + bu * drive",
        f"model.process([X[i] + dt * (-leak * X[i] + sp.tanh(act[i])) for i in range({n})])",
        f"model.process_noise(sp.eye({n}) * 1e-3 * dt)",
        "Cm = sp.Matrix([" + ", ".join("[" + ", ".join(_lit(a) for a in row) + "]" for row in C) + "])",
        "lin = Cm * X",
        f'model.sensor("mix", [sp.tanh(lin[i]) for i in range({m})], noise=[{", ".join(["0.01"] * m)}])',
    ]
    second = [f"{xs[0]} + {xs[-1]}", xs[n // 2]] if n > 1 else [xs[0], f"{xs[0]}**2"]
    lines += [
        f'model.sensor("pair", [{", ".join(second)}], noise=sp.Matrix([[0.02, 0.005], [0.005, 0.01]]))',
        f"model.initial([0.1] * {n}, sp.eye({n}) * 0.1)",
        "model.scenario(dt=0.01, inputs=lambda t: [math.sin(0.5 * t)])",
        "",
    ]
    return "\n".join(lines)


def model_source(kind: str, n: int) -> str:
    """The model file text for ``kind`` ("sparse" or "dense") with ``n`` states."""
    if kind == "sparse":
        return sparse_model(n)
    if kind == "dense":
        return dense_model(n)
    raise ValueError(f"unknown synthetic kind {kind!r}; use 'sparse' or 'dense'")


def write_model(kind: str, n: int, out_dir: str) -> str:
    """Write the model file and return its path (``<out_dir>/<kind><n>/model.py``)."""
    d = os.path.join(out_dir, f"{kind}{n}")
    os.makedirs(d, exist_ok=True)
    path = os.path.join(d, "model.py")
    text = model_source(kind, n)
    if not os.path.isfile(path) or open(path, encoding="utf-8").read() != text:
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(text)
    return path


def _main(argv: Sequence[str] = ()) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", required=True, help="directory for the model files")
    ap.add_argument("models", nargs="+", help="KIND:N, e.g. sparse:12 dense:8")
    args = ap.parse_args(list(argv) or None)
    for item in args.models:
        kind, _, n = item.partition(":")
        print(write_model(kind, int(n), args.out))
    return 0


if __name__ == "__main__":
    raise SystemExit(_main())
