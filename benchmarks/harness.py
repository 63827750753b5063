"""Measuring one model and filter: the C driver, callgrind counts, host timing, Cortex-M4F size.

The generated filter and the dense baseline are linked into one driver program that replays
the same recorded scenario (inputs and the first sensor's measurements, one predict and one
update per step) through each. The driver has two modes:

* no argument: run the scenario once through each filter; under
  ``valgrind --tool=callgrind --toggle-collect=<function>`` this counts the instructions of
  each predict and update call (deterministic, callees such as libm included);
* ``time``: replay the scenario repeatedly through both filters, alternating, in 40 rounds of
  about 2 ms each, and print the best (minimum over rounds) wall-clock nanoseconds per step of
  each. Only ratios are meaningful on a shared machine.

Both modes print the final state of each filter, so a run where the two disagree is caught.
"""

from __future__ import annotations

import os
import subprocess
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

from estgen import cross
from estgen.emit import Generated, c_literal
from estgen.model import ModelSpec
from estgen.simulate import make_scenario

from baseline import BaselineSource

__all__ = ["Pair", "write_pair", "build_driver", "count_instructions", "time_steps", "m4f_figures",
           "scenario_arrays"]

#: steps of the recorded scenario the driver replays
STEPS = 200


@dataclass
class Pair:
    """The two filters of one model/filter/precision and where their files are."""

    spec: ModelSpec
    filter: str
    precision: str
    gen: Generated
    base: BaselineSource
    work: Path
    sensor: str = ""
    files: Dict[str, Path] = field(default_factory=dict)

    @property
    def gen_functions(self) -> Tuple[str, str]:
        return f"{self.gen.prefix}_predict", f"{self.gen.prefix}_update_{self.sensor}_nis"

    @property
    def base_functions(self) -> Tuple[str, str]:
        return f"{self.base.prefix}_predict", f"{self.base.prefix}_update_{self.sensor}"


def write_pair(pair: Pair) -> None:
    """Write both filters' sources into the pair's work directory."""
    pair.work.mkdir(parents=True, exist_ok=True)
    pair.sensor = pair.spec.sensors[0].name
    for name, text in pair.gen.files.items():
        (pair.work / name).write_text(text)
    (pair.work / f"{pair.base.prefix}.h").write_text(pair.base.header)
    (pair.work / f"{pair.base.prefix}.c").write_text(pair.base.source)
    pair.files = {"gen": pair.work / f"{pair.gen.prefix}.c", "gen_h": pair.work / f"{pair.gen.prefix}.h",
                  "base": pair.work / f"{pair.base.prefix}.c", "base_h": pair.work / f"{pair.base.prefix}.h"}


def scenario_arrays(spec: ModelSpec, steps: int = STEPS, seed: int = 5) -> Tuple[float, np.ndarray, np.ndarray]:
    """(dt, U, Z): the model's scenario with its first sensor reporting at every step."""
    first = spec.sensors[0].name
    sc = make_scenario(spec, steps, seed, every={first: 1})
    Z = np.array([dict(row)[first] for row in sc.measurements])
    return sc.dt, sc.u, Z


def _rows(c_rows: List[List[str]]) -> str:
    return ",\n".join("    {" + ", ".join(r) + "}" for r in c_rows)


def driver_source(pair: Pair) -> str:
    spec, prec = pair.spec, pair.precision
    real = "float" if prec == "float" else "double"
    dt, U, Z = scenario_arrays(spec)
    lit = lambda v: c_literal(float(v), prec)  # noqa: E731
    nu, m = spec.nu, spec.sensors[0].m
    gp, bp = pair.gen.prefix, pair.base.prefix
    gpred, gupd = pair.gen_functions
    bpred, bupd = pair.base_functions
    u_arg = "U[k]" if nu else "NULL"
    urows = [[lit(v) for v in row] for row in U] if nu else [["0"] for _ in range(len(Z))]
    return f"""/* benchmark driver: {gp} vs {bp} (benchmarks/harness.py) */
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <string.h>
#include <time.h>
#include "{gp}.h"
#include "{bp}.h"

#define STEPS {len(Z)}
static const {real} U[STEPS][{max(nu, 1)}] = {{
{_rows(urows)}
}};
static const {real} Z[STEPS][{m}] = {{
{_rows([[lit(v) for v in row] for row in Z])}
}};
static const {real} DT = {lit(dt)};
static {gp}_t gf;
static {bp}_t bf;
static long refused_gen, refused_base;

static void run_gen(void)
{{
    int k;
    {gp}_init(&gf);
    for (k = 0; k < STEPS; ++k) {{
        refused_gen += {gpred}(&gf, {u_arg}, DT) != 0;
        refused_gen += {gupd}(&gf, Z[k], NULL) != 0;
    }}
}}

static void run_base(void)
{{
    int k;
    {bp}_init(&bf);
    for (k = 0; k < STEPS; ++k) {{
        refused_base += {bpred}(&bf, {u_arg}, DT) != 0;
        refused_base += {bupd}(&bf, Z[k]) != 0;
    }}
}}

static double now_ns(void)
{{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec * 1e9 + (double)ts.tv_nsec;
}}

/* ns per step of `reps` replays of the scenario */
static double timed(void (*run)(void), long reps)
{{
    long r;
    double t0 = now_ns();
    for (r = 0; r < reps; ++r) {{
        run();
    }}
    return (now_ns() - t0) / ((double)reps * STEPS);
}}

static long calibrate(void (*run)(void))
{{
    long reps = 1;
    while (timed(run, reps) * (double)reps * STEPS < 2e6 && reps < (1L << 24)) {{
        reps *= 2;
    }}
    return reps;
}}

int main(int argc, char **argv)
{{
    int i;
    if (argc > 1 && strcmp(argv[1], "time") == 0) {{
        long rg = calibrate(run_gen), rb = calibrate(run_base);
        double bg = 1e300, bb = 1e300;
        int round;
        /* many short rounds and the minimum: a round the scheduler interrupted is discarded */
        for (round = 0; round < 40; ++round) {{
            double tg = timed(run_gen, rg), tb = timed(run_base, rb);
            bg = tg < bg ? tg : bg;
            bb = tb < bb ? tb : bb;
        }}
        printf("time %.6g %.6g\\n", bg, bb);
        refused_gen = refused_base = 0;
    }}
    run_gen();
    run_base();
    printf("refused %ld %ld\\n", refused_gen, refused_base);
    printf("xgen");
    for (i = 0; i < {spec.n}; ++i) {{ printf(" %.9g", (double)gf.x[i]); }}
    printf("\\nxbase");
    for (i = 0; i < {spec.n}; ++i) {{ printf(" %.9g", (double)bf.x[i]); }}
    printf("\\n");
    return 0;
}}
"""


def _cc(args: Sequence[str]) -> None:
    proc = subprocess.run(["cc", *args], capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"cc {' '.join(args)} failed:\n{proc.stderr[-3000:]}")


def build_driver(pair: Pair, gen_opt: str = "-O2", base_opt: str = "-O2") -> Path:
    """Compile the two filters (separate translation units, so nothing is inlined into the
    driver) and the driver; returns the executable."""
    w = pair.work
    tag = gen_opt.lstrip("-")
    (w / "driver.c").write_text(driver_source(pair))
    _cc(["-std=c99", gen_opt, "-c", str(pair.files["gen"]), "-o", str(w / f"gen_{tag}.o")])
    _cc(["-std=c99", base_opt, "-c", str(pair.files["base"]), "-o", str(w / "base.o")])
    _cc(["-std=c99", "-O2", f"-I{w}", "-c", str(w / "driver.c"), "-o", str(w / "driver.o")])
    exe = w / f"driver_{tag}"
    _cc([str(w / "driver.o"), str(w / f"gen_{tag}.o"), str(w / "base.o"), "-o", str(exe), "-lm"])
    return exe


def _parse_x(out: str) -> Tuple[np.ndarray, np.ndarray, Tuple[int, int]]:
    xs: Dict[str, np.ndarray] = {}
    refused = (0, 0)
    for line in out.splitlines():
        parts = line.split()
        if parts and parts[0] in ("xgen", "xbase"):
            xs[parts[0]] = np.array([float(v) for v in parts[1:]])
        elif parts and parts[0] == "refused":
            refused = (int(parts[1]), int(parts[2]))
    return xs["xgen"], xs["xbase"], refused


def agreement(exe: Path) -> Dict[str, Any]:
    """Run the driver once: do the two filters end where each other does?"""
    out = subprocess.run([str(exe)], capture_output=True, text=True, check=True).stdout
    xg, xb, refused = _parse_x(out)
    dev = float(np.max(np.abs(xg - xb) / (1.0 + np.abs(xb))))
    return {"final_x_rel_dev": dev, "refused_gen": refused[0], "refused_base": refused[1]}


def count_instructions(pair: Pair, exe: Path) -> Dict[str, Any]:
    """Instructions per call of each filter's predict and first-sensor update (callgrind)."""
    fns = list(pair.gen_functions) + list(pair.base_functions)
    res = cross.callgrind_instructions(exe, fns, pair.work / f"cg_{exe.name}")
    per = {}
    for fn in fns:
        ins, calls = res[fn]
        if calls <= 0:
            raise RuntimeError(f"callgrind saw no call of {fn}")
        per[fn] = ins / calls
    gp, gu = pair.gen_functions
    bp, bu = pair.base_functions
    return {"gen_predict": per[gp], "gen_update": per[gu], "gen_step": per[gp] + per[gu],
            "base_predict": per[bp], "base_update": per[bu], "base_step": per[bp] + per[bu]}


def icache_misses(pair: Pair, exe: Path) -> Dict[str, float]:
    """Level-1 instruction-cache misses per step of each filter (callgrind's cache simulator,
    its default cache geometry; toggling on two functions sums them: predict + update)."""
    valgrind = cross.find_tool("valgrind")
    out: Dict[str, float] = {}
    for who, fns in (("gen", pair.gen_functions), ("base", pair.base_functions)):
        dump = pair.work / f"cache.{who}.{exe.name}.out"
        cmd = [valgrind, "--tool=callgrind", "--cache-sim=yes", f"--callgrind-out-file={dump}", "--collect-atstart=no"]
        cmd += [f"--toggle-collect={fn}" for fn in fns] + [str(exe)]
        subprocess.run(cmd, capture_output=True, text=True, check=True, timeout=600)
        events: List[str] = []
        totals: List[int] = []
        for line in dump.read_text().splitlines():
            if line.startswith("events:"):
                events = line.split()[1:]
            elif line.startswith("summary:"):
                totals = [int(v) for v in line.split()[1:]]
        out[who] = totals[events.index("I1mr")] / STEPS
    return out


def time_steps(exe: Path) -> Tuple[float, float]:
    """(generated, baseline) best ns per step on the host, measured in one process."""
    out = subprocess.run([str(exe), "time"], capture_output=True, text=True, check=True, timeout=600).stdout
    for line in out.splitlines():
        if line.startswith("time "):
            _, g, b = line.split()
            return float(g), float(b)
    raise RuntimeError(f"no timing line in:\n{out}")


def _stack(obj: Path, functions: Sequence[str]) -> int:
    ci = obj.with_suffix(".ci")
    frames, edges = cross.parse_callgraph(ci.read_text())
    return max(cross.worst_stack(frames, edges, fn)[0] for fn in functions)


def m4f_figures(source: Path, header: Path, prefix: str, functions: Sequence[str], out_dir: Path,
                opt: str = "-O2") -> Dict[str, int]:
    """``.text``, ``.rodata`` and ``.data`` bytes, ``sizeof`` of the filter struct and the worst stack of ``functions`` on
    the Cortex-M4F (arm-none-eabi-gcc with the M4F's hard-float flags)."""
    obj = cross.compile_object(source, "cortex-m4f", out_dir, include_dirs=[header.parent], opt=opt)
    sizes = cross.section_sizes(obj, "cortex-m4f")
    struct = cross.struct_size(header, f"{prefix}_t", "cortex-m4f", out_dir)
    return {"text": sizes["text"], "rodata": sizes["rodata"], "data": sizes["data"], "struct": struct,
            "stack": _stack(obj, functions)}
