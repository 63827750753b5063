"""The estgen benchmark: generated C against a dense hand-style C filter, in both code forms.

    python benchmarks/run.py [--quick] [--json out.json] [--markdown tables.md] [--only NAME ...]

For every model (the examples in generated_examples/ and synthetic sparse and fully coupled
models from benchmarks/synthetic.py), filter (EKF, UKF) and --optimize form (speed, size) it
measures, in one run and side by side with the dense baseline (benchmarks/baseline.py):

* instructions per predict and per first-sensor update (callgrind, host, -O2, float) and their
  ratio to the dense filter's;
* host wall-clock time per step of both, timed inside one C process, as a ratio;
* Cortex-M4F flash (arm-none-eabi-gcc -O2, float: .text + .rodata + .data) of both, and the
  generated filter's instructions per step on the emulated M4F (QEMU, estgen report's replay) with
  the microseconds they take at 168 MHz, one instruction per cycle (a lower bound);
* generation time, generated lines, the struct against the packed minimum, the worst stack;
* for a few models, -O2 against -Os (instructions and .text).

It prints the tables and the targets with PASS/MISS, and writes everything as JSON. Needs cc,
valgrind, arm-none-eabi-gcc and qemu-system-arm (--no-qemu skips the emulated counts).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence, Tuple

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


def _estgen_root(argv: Sequence[str]) -> Path:
    """--root DIR benchmarks the estgen package (and templates) in DIR instead of this checkout,
    e.g. an exported older commit: `git archive REV estgen templates | tar -x -C DIR`. It has to
    be known before estgen is imported, hence read from argv here."""
    for i, a in enumerate(argv):
        if a == "--root" and i + 1 < len(argv):
            return Path(argv[i + 1]).resolve()
        if a.startswith("--root="):
            return Path(a.split("=", 1)[1]).resolve()
    return ROOT


ESTGEN_ROOT = _estgen_root(sys.argv[1:])
sys.path.insert(0, str(ESTGEN_ROOT))
sys.path.insert(0, str(HERE))

from sympy.core.cache import clear_cache  # noqa: E402

import estgen  # noqa: E402
from estgen.derive import packed_size  # noqa: E402
from estgen.emit import Generated  # noqa: E402
from estgen.filters import generate  # noqa: E402
from estgen.errors import ModelError  # noqa: E402
from estgen.filters import check_filter_support  # noqa: E402
from estgen.model import ModelSpec  # noqa: E402

import harness  # noqa: E402
from baseline import render_baseline  # noqa: E402
from synthetic import write_model  # noqa: E402

EXAMPLES = ["battery_soc", "beacon_rover", "linear_cart", "strapdown_nav", "valve_actuator"]
SPARSE = [2, 6, 12, 18, 24, 30]
DENSE = [2, 4, 8, 12, 16]
QUICK = ["linear_cart", "strapdown_nav", "sparse12", "dense8"]
#: models whose generation is timed in both precisions (the generation-time targets)
BOTH_PRECISIONS = {"strapdown_nav", "sparse24", "sparse30"}
#: models compared at -O2 and -Os
OS_MODELS = ["strapdown_nav", "sparse18", "dense12"]
OS_MODELS_QUICK = ["strapdown_nav"]
PRECISION = "float"  # host and M4F figures: the embedded precision
REAL_BYTES = 4

# Targets of issues 5 and 14 (ratios measured side by side in this run).
T_EKF_SPARSE = 0.15  # default: generated EKF step / dense baseline, strapdown_nav and sparse n >= 12
T_EKF_DENSE = 1.0  # default, fully coupled models: never worse than the dense baseline
T_UKF = 0.5  # default: generated UKF step / dense baseline
T_FLASH_SPEED = 6.0  # default: M4F flash (.text + .rodata + .data) / dense baseline's
T_FLASH_SIZE = 2.0  # --optimize size: flash / dense
T_INSTR_SIZE = 0.5  # --optimize size: step instructions / dense
T_TIME = 1.0  # default: host wall-clock per step / dense (no instruction-cache cliff)
T_GEN_NAV = 10.0  # seconds, strapdown_nav, each filter and precision
T_GEN_SPARSE30 = 60.0  # seconds, sparse30
T_GEN_SPARSE24 = 10.0  # seconds, sparse24
T_FLASH_SPARSE24 = 64 * 1024  # bytes, sparse24, default
#: the clock of the estimated Cortex-M4F time per step: one emulated instruction per cycle, a lower
#: bound (flash wait states, FPU divides/square roots and load-use stalls add cycles)
M4F_MHZ = 168.0
T_RAM = 1.2  # struct <= 1.2 x packed minimum + the largest sensor's working space


def model_list(quick: bool, work: Path) -> List[Tuple[str, str, Path]]:
    """(label, kind, path) of every model of the run."""
    out: List[Tuple[str, str, Path]] = []
    for ex in EXAMPLES:
        out.append((ex, "example", ROOT / "generated_examples" / ex / "model.py"))
    for n in SPARSE:
        out.append((f"sparse{n}", "sparse", Path(write_model("sparse", n, str(work / "models")))))
    for n in DENSE:
        out.append((f"dense{n}", "dense", Path(write_model("dense", n, str(work / "models")))))
    if quick:
        out = [m for m in out if m[0] in QUICK]
    return out


#: the generated C's commit check (--commit-check): "subtractive" is estgen's default
COMMIT_CHECK = "subtractive"


def timed_generate(path: Path, filt: str, precision: str, optimize: str) -> Tuple[Generated, float]:
    """Load the model and generate, from a cold sympy cache: what `estgen generate` costs."""
    clear_cache()
    t0 = time.perf_counter()
    spec = estgen.load_model(path)
    gen = generate(spec, filter=filt, precision=precision, commit_check=COMMIT_CHECK, optimize=optimize)
    return gen, time.perf_counter() - t0


def m4f_step(spec: ModelSpec, filt: str, optimize: str, work: Path) -> Optional[Dict[str, float]]:
    """Instructions of predict and of the first sensor's update on the emulated Cortex-M4F
    (estgen report's QEMU replay of the model's own scenario, float), and the step's estimated
    microseconds at M4F_MHZ, one instruction per cycle."""
    from estgen.report import make_report

    rep = make_report(spec, filt, "float", "cortex-m4f", steps=200, host=False, work_dir=str(work),
                      commit_check=COMMIT_CHECK, optimize=optimize)
    m4 = rep["instructions"].get("qemu-cortex-m4f")
    if not m4:
        return None
    prefix = f"{spec.name}_{filt}"
    pred = m4.get(f"{prefix}_predict", {}).get("instructions_per_call")
    upd = m4.get(f"{prefix}_update_{spec.sensors[0].name}", {}).get("instructions_per_call")
    if pred is None or upd is None:
        return None
    return {"predict": pred, "update": upd, "step": pred + upd, "us_step": (pred + upd) / M4F_MHZ}


def working_space(spec: ModelSpec) -> int:
    """Bytes an update needs at the least for its largest sensor: y (m), S (packed, m(m+1)/2)
    and the gain K (n x m)."""
    m = max(s.m for s in spec.sensors)
    return (m + packed_size(m) + spec.n * m) * REAL_BYTES


def packed_minimum(spec: ModelSpec) -> int:
    """x, the packed covariance and the parameters: what any filter must keep between calls."""
    return (spec.n + packed_size(spec.n) + len(spec.params)) * REAL_BYTES


def measure(label: str, kind: str, path: Path, filt: str, optimize: str, work: Path, log: Any,
            m4f: bool = True) -> Optional[Dict[str, Any]]:
    spec = estgen.load_model(path)
    try:
        check_filter_support(spec, filt)
    except ModelError:
        return None
    row: Dict[str, Any] = {"model": label, "kind": kind, "n": spec.n, "m": spec.sensors[0].m,
                           "sensor": spec.sensors[0].name, "filter": filt, "optimize": optimize, "path": str(path)}
    work = work / optimize
    gen, secs = timed_generate(path, filt, PRECISION, optimize)
    row["gen_seconds"] = {PRECISION: secs}
    if label in BOTH_PRECISIONS:
        _, row["gen_seconds"]["double"] = timed_generate(path, filt, "double", optimize)
    row["lines"] = gen.lines_of_c
    row["ops"] = gen.ops
    stages: Dict[str, float] = {}
    t0 = time.perf_counter()
    pair = harness.Pair(spec, filt, PRECISION, gen, render_baseline(spec, filt, PRECISION), work / label / filt)
    harness.write_pair(pair)
    exe = harness.build_driver(pair)
    stages["build"] = time.perf_counter() - t0
    row.update(harness.agreement(exe))
    t0 = time.perf_counter()
    row["instr"] = harness.count_instructions(pair, exe)
    stages["callgrind"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    g_ns, b_ns = harness.time_steps(exe)
    stages["timing"] = time.perf_counter() - t0
    row["host_ns"] = {"gen": g_ns, "base": b_ns}
    row["exe"] = str(exe)
    t0 = time.perf_counter()
    row["i1_misses"] = harness.icache_misses(pair, exe)
    stages["cache"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    gfns = [f"{gen.prefix}_predict"] + [f"{gen.prefix}_update_{s.name}_nis" for s in spec.sensors]
    bfns = [f"{pair.base.prefix}_predict"] + [f"{pair.base.prefix}_update_{s.name}" for s in spec.sensors]
    row["m4f"] = {
        "gen": harness.m4f_figures(pair.files["gen"], pair.files["gen_h"], gen.prefix, gfns, pair.work / "m4f_gen"),
        "base": harness.m4f_figures(pair.files["base"], pair.files["base_h"], pair.base.prefix, bfns,
                                    pair.work / "m4f_base"),
    }
    for side in ("gen", "base"):
        m = row["m4f"][side]
        m["flash"] = m["text"] + m["rodata"] + m["data"]
    stages["m4f"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    row["m4f_instr"] = m4f_step(spec, filt, optimize, work / label / filt / "qemu") if m4f else None
    stages["qemu"] = time.perf_counter() - t0
    row["ram"] = {"struct": row["m4f"]["gen"]["struct"], "packed_min": packed_minimum(spec),
                  "working_space": working_space(spec)}
    row["_pair"] = pair
    print(f"  {label:14s} {filt} {optimize:5s}: gen {secs:6.1f} s, step {row['instr']['gen_step']:10.0f} vs "
          f"{row['instr']['base_step']:10.0f} instr; " + ", ".join(f"{k} {v:.1f} s" for k, v in stages.items()),
          file=log, flush=True)
    return row


def compare_os(row: Dict[str, Any]) -> Dict[str, Any]:
    """-Os against -O2 for the generated C: host instructions per step and M4F .text."""
    pair: harness.Pair = row["_pair"]
    exe = harness.build_driver(pair, gen_opt="-Os")
    res = estgen.cross.callgrind_instructions(exe, list(pair.gen_functions), pair.work / "cg_os")
    step = sum(ins / calls for ins, calls in res.values())
    gfns = [f"{pair.gen.prefix}_predict"] + [f"{pair.gen.prefix}_update_{s.name}_nis" for s in pair.spec.sensors]
    m4 = harness.m4f_figures(pair.files["gen"], pair.files["gen_h"], pair.gen.prefix, gfns, pair.work / "m4f_os",
                             opt="-Os")
    # -O2 and -Os timed alternately, best of three each: the two builds run in separate processes
    o2, os_ = float("inf"), float("inf")
    for _ in range(3):
        o2 = min(o2, harness.time_steps(Path(row["exe"]))[0])
        os_ = min(os_, harness.time_steps(exe)[0])
    return {"model": row["model"], "filter": row["filter"],
            "O2": {"step_instr": row["instr"]["gen_step"], "text": row["m4f"]["gen"]["text"],
                   "stack": row["m4f"]["gen"]["stack"]},
            "Os": {"step_instr": step, "text": m4["text"], "stack": m4["stack"]},
            "Os_over_O2_time": os_ / o2}


# ---------------------------------------------------------------------------------------------
# Targets and tables


def ratios(r: Dict[str, Any]) -> Dict[str, float]:
    """The row's figures against the dense baseline: step instructions, host time, M4F flash."""
    return {"instr": r["instr"]["gen_step"] / r["instr"]["base_step"],
            "time": r["host_ns"]["gen"] / r["host_ns"]["base"],
            "flash": r["m4f"]["gen"]["flash"] / r["m4f"]["base"]["flash"]}


def targets(rows: Sequence[Dict[str, Any]]) -> List[Dict[str, Any]]:
    out: List[Dict[str, Any]] = []

    def add(what: str, row: Dict[str, Any], value: float, limit: float) -> None:
        out.append({"target": what, "model": row["model"], "filter": row["filter"], "optimize": row["optimize"],
                    "value": value, "limit": limit, "pass": value <= limit})

    for r in rows:
        q = ratios(r)
        if r["optimize"] == "size":
            add("size: flash / dense", r, q["flash"], T_FLASH_SIZE)
            add("size: step instr / dense", r, q["instr"], T_INSTR_SIZE)
            continue
        if r["filter"] == "ekf":
            if r["model"] == "strapdown_nav" or (r["kind"] == "sparse" and r["n"] >= 12):
                add("EKF step instr / dense", r, q["instr"], T_EKF_SPARSE)
            if r["kind"] == "dense":
                add("EKF step instr / dense (coupled)", r, q["instr"], T_EKF_DENSE)
        else:
            add("UKF step instr / dense", r, q["instr"], T_UKF)
        add("flash / dense", r, q["flash"], T_FLASH_SPEED)
        add("host time / dense", r, q["time"], T_TIME)
        if r["model"] == "strapdown_nav":
            for prec, sec in r["gen_seconds"].items():
                add(f"generation s ({prec})", r, sec, T_GEN_NAV)
        if r["model"] == "sparse30":
            for prec, sec in r["gen_seconds"].items():
                add(f"generation s ({prec})", r, sec, T_GEN_SPARSE30)
        if r["model"] == "sparse24":
            for prec, sec in r["gen_seconds"].items():
                add(f"generation s ({prec})", r, sec, T_GEN_SPARSE24)
            add("flash bytes", r, r["m4f"]["gen"]["flash"], T_FLASH_SPARSE24)
        ram = r["ram"]
        add("struct / (1.2 packed + ws)", r, ram["struct"] / (T_RAM * ram["packed_min"] + ram["working_space"]), 1.0)
    return out


def _fmt_table(header: Sequence[str], body: Sequence[Sequence[Any]]) -> str:
    cells = [[str(h) for h in header]] + [[str(c) for c in row] for row in body]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["| " + " | ".join(c.ljust(w) for c, w in zip(cells[0], widths)) + " |",
             "|" + "|".join("-" * (w + 2) for w in widths) + "|"]
    for r in cells[1:]:
        lines.append("| " + " | ".join(c.rjust(w) if i > 1 else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths)))
                     + " |")
    return "\n".join(lines)


def speed_table(rows: Sequence[Dict[str, Any]]) -> str:
    body = []
    for r in rows:
        i, q, m4 = r["instr"], ratios(r), r.get("m4f_instr")
        body.append([r["model"], r["filter"], r["optimize"], r["n"], f"{i['gen_predict']:.0f}", f"{i['gen_update']:.0f}",
                     f"{i['gen_step']:.0f}", f"{i['base_step']:.0f}", f"{q['instr']:.3f}", f"{q['time']:.3f}",
                     r["m4f"]["gen"]["flash"], r["m4f"]["base"]["flash"], f"{q['flash']:.2f}",
                     f"{r['i1_misses']['gen']:.0f}", f"{r['i1_misses']['base']:.0f}",
                     f"{m4['step']:.0f}" if m4 else "-", f"{m4['us_step']:.1f}" if m4 else "-"])
    return _fmt_table(["model", "filter", "optimize", "n", "gen instr/predict", "gen instr/update", "gen instr/step",
                       "dense instr/step", "instr gen/dense", "time gen/dense", "M4F flash gen", "M4F flash dense",
                       "flash gen/dense", "I1 miss/step gen", "I1 miss/step dense", "M4F instr/step",
                       "M4F us/step @168MHz"], body)


def size_table(rows: Sequence[Dict[str, Any]]) -> str:
    body = []
    for r in rows:
        gs = "/".join(f"{v:.1f}" for v in r["gen_seconds"].values())
        ram = r["ram"]
        g = r["m4f"]["gen"]
        body.append([r["model"], r["filter"], r["optimize"], r["n"], gs, r["lines"], g["text"], g["rodata"] + g["data"],
                     r["m4f"]["base"]["text"], ram["struct"], ram["packed_min"], ram["working_space"],
                     g["stack"], r["m4f"]["base"]["stack"], f"{r['host_ns']['gen']:.0f}"])
    return _fmt_table(["model", "filter", "optimize", "n", "gen s (float/double)", "lines", "M4F .text gen",
                       "M4F .rodata+.data gen", "M4F .text dense", "struct B", "packed min B", "sensor ws B",
                       "stack gen B", "stack dense B", "gen ns/step"], body)


def os_table(cmp: Sequence[Dict[str, Any]]) -> str:
    body = [[c["model"], c["filter"], f"{c['O2']['step_instr']:.0f}", f"{c['Os']['step_instr']:.0f}",
             f"{c['Os_over_O2_time']:.2f}", c["O2"]["text"], c["Os"]["text"], c["O2"]["stack"], c["Os"]["stack"]]
            for c in cmp]
    return _fmt_table(["model", "filter", "instr/step -O2", "instr/step -Os", "time -Os/-O2", ".text -O2",
                       ".text -Os", "stack -O2", "stack -Os"], body)


def target_table(ts: Sequence[Dict[str, Any]]) -> str:
    body = [[t["target"], f"{t['model']} {t['filter']} {t['optimize']}", f"{t['value']:.3g}", f"<= {t['limit']:g}",
             "PASS" if t["pass"] else "MISS"] for t in ts]
    return _fmt_table(["target", "model", "measured", "limit", "verdict"], body)


def _commit() -> str:
    """The checkout's commit, with '+dirty' when estgen/ or templates/ have local changes."""
    def git(*a: str) -> str:
        return subprocess.run(["git", *a], cwd=ESTGEN_ROOT, capture_output=True, text=True).stdout.strip()

    rev = git("rev-parse", "--short", "HEAD")
    if not rev:
        return "unknown"
    return rev + ("+dirty" if git("status", "--porcelain", "--", "estgen", "templates") else "")


def main(argv: Optional[Sequence[str]] = None) -> int:
    ap = argparse.ArgumentParser(description="estgen benchmark: generated C vs a dense C filter, speed and size forms")
    ap.add_argument("--quick", action="store_true", help=f"only {', '.join(QUICK)}")
    ap.add_argument("--json", metavar="FILE", help="write all figures here")
    ap.add_argument("--markdown", metavar="FILE", help="also write the tables here")
    ap.add_argument("--only", nargs="+", metavar="MODEL", help="restrict to these model labels")
    ap.add_argument("--work", default=str(HERE / "_build"), help="build directory (default benchmarks/_build)")
    ap.add_argument("--filters", default="ekf,ukf", help="comma-separated filters (default ekf,ukf)")
    ap.add_argument("--root", default=str(ROOT), help="benchmark the estgen package found in this directory")
    ap.add_argument("--optimize", default="speed,size",
                    help="comma-separated code forms to measure (estgen generate --optimize; default speed,size)")
    ap.add_argument("--no-qemu", action="store_true", help="skip the emulated Cortex-M4F instruction counts")
    ap.add_argument("--no-os", action="store_true", help="skip the -O2 against -Os comparison")
    ap.add_argument("--commit-check", choices=("subtractive", "cholesky", "diagonal"), default="subtractive",
                    help="the generated C's commit check (estgen generate --commit-check; default subtractive)")
    args = ap.parse_args(argv)
    global COMMIT_CHECK
    COMMIT_CHECK = args.commit_check
    modes = [m for m in args.optimize.split(",") if m]
    work = Path(args.work).resolve()
    work.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    models = model_list(args.quick, work)
    if args.only:
        models = [m for m in models if m[0] in args.only]
    rows: List[Dict[str, Any]] = []
    print(f"estgen {estgen.__version__} benchmark, {len(models)} models", file=sys.stderr)
    for label, kind, path in models:
        for filt in args.filters.split(","):
            for mode in modes:
                r = measure(label, kind, path, filt, mode, work, sys.stderr, m4f=not args.no_qemu)
                if r is not None:
                    rows.append(r)
    os_models = [] if args.no_os else OS_MODELS_QUICK if args.quick else OS_MODELS
    cmp = [compare_os(r) for r in rows if r["model"] in os_models and r["optimize"] == "speed"]
    ts = targets(rows)
    elapsed = time.perf_counter() - started
    parts = ["## Speed and flash (float; host x86-64 -O2 instructions and time; Cortex-M4F -O2 flash = .text + "
             ".rodata + .data and emulated instructions; one step = predict + one update of the first sensor)",
             speed_table(rows),
             "## Generation, memory (Cortex-M4F: arm-none-eabi-gcc -O2, float)", size_table(rows)]
    if cmp:
        parts += ["## Generated C at -O2 and -Os", os_table(cmp)]
    parts += ["## Targets", target_table(ts)]
    bad = [r for r in rows if r["final_x_rel_dev"] > 1e-3 or r["refused_gen"] != r["refused_base"]]
    for r in bad:
        parts.append(f"WARNING: {r['model']} {r['filter']}: generated and dense C disagree "
                     f"(final x rel. deviation {r['final_x_rel_dev']:.2g}, refused {r['refused_gen']} vs "
                     f"{r['refused_base']})")
    parts.append(f"{sum(t['pass'] for t in ts)} of {len(ts)} targets met; estgen {_commit()}; "
                 f"run took {elapsed:.0f} s")
    text = "\n\n".join(parts) + "\n"
    print("\n" + text)
    if args.markdown:
        with open(args.markdown, "w", encoding="utf-8") as fh:
            fh.write(text)
    if args.json:
        for r in rows:
            r.pop("_pair", None)
        doc = {"estgen": estgen.__version__, "estgen_root": str(ESTGEN_ROOT), "commit": _commit(), "machine": platform.platform(), "python": sys.version.split()[0],
               "precision": PRECISION, "steps": harness.STEPS, "m4f_mhz": M4F_MHZ, "seconds": elapsed,
               "rows": rows, "os_comparison": cmp, "targets": ts}
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(doc, fh, indent=1)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
