"""``estgen report``: what a generated filter costs on a target.

Figures, each measured, never estimated:

* RAM: ``sizeof`` the filter struct on the target (all filter state lives in it), read from a
  compiled probe object with ``nm -S``.
* Stack: for each public function, GCC's ``-fstack-usage`` frame plus the deepest chain of
  static helpers it calls (from ``-fcallgraph-info=su``, every callee assumed reached at the
  deepest point: a conservative bound). Library calls (libm, libgcc) are listed, not counted;
  on the emulated Cortex-M4 the replay also measures the real high-water mark, library calls
  included, by painting the stack.
* Flash: ``.text`` + ``.rodata`` of the filter's object on the target (``size -A``).
* Operation counts of predict and of each update, from the generator (counted on the
  expressions as printed, before the C compiler optimizes); where the generator gives none, by
  a tokenizer over the generated C (see :func:`count_c_ops`).
* Instructions per call of predict and of each update: on an emulated Cortex-M4F (QEMU
  ``mps2-an386`` with ``-icount shift=0``, timed by SysTick, whose ticks-per-instruction the
  replay calibrates with a loop of known length) and on the host (``valgrind --tool=callgrind
  --toggle-collect``), both over the same simulated scenario.

A tool that is not installed is reported as missing and its figures are left out.

JSON (``--json``): ``model``, ``filter``, ``precision``, ``target``, ``struct``, ``ram_bytes``,
``flash`` {text, rodata, total}, ``functions`` {NAME: {stack_bytes, stack_static,
library_calls, ops, ops_counted_by, ops_c_text}}, ``undefined_symbols``, ``instructions``
{steps, seed, "qemu-cortex-m4f": {instructions_per_tick, per_step, NAME: {calls,
instructions_per_call, stack_high_water, refused}}, "host-callgrind": {per_step, NAME: {calls,
instructions_per_call}}}, and ``missing`` {TOOL: [figures it would have given]}.
"""

from __future__ import annotations

import argparse
import json
import math
import re
import sys
import tempfile
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence, Tuple

from . import cross, filters
from .filters import FilterSetup
from .progress import Progress, wanted

__all__ = ["add_arguments", "run", "make_report", "format_report", "count_c_ops", "c_function_bodies"]

DEFAULT_STEPS = 200
DEFAULT_SEED = 0
#: the clock the report converts instructions to microseconds at, unless --clock-mhz says
#: otherwise: a common Cortex-M4F part's maximum (e.g. STM32F407 at 168 MHz)
DEFAULT_CLOCK_MHZ = 168.0

_OP_KEYS = ("add", "mul", "div", "sqrt", "transcendental")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add ``estgen report``'s arguments to ``parser``."""
    parser.add_argument("model", help="the model file (Python)")
    filters.add_arguments(parser, "float")
    parser.add_argument("--target", default="cortex-m4f", choices=tuple(cross.TARGETS),
                        help="where RAM, stack and flash are measured (default cortex-m4f)")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    parser.add_argument("--steps", type=int, default=DEFAULT_STEPS,
                        help=f"scenario length for the instruction counts (default {DEFAULT_STEPS})")
    parser.add_argument("--seed", type=filters.seed_value, default=DEFAULT_SEED)
    parser.add_argument("--clock-mhz", type=float, default=DEFAULT_CLOCK_MHZ,
                        help=f"core clock for the microsecond columns (default {DEFAULT_CLOCK_MHZ:g} MHz)")
    parser.add_argument("-q", "--quiet", action="store_true", help="no progress on stderr")
    parser.add_argument("--progress", action="store_true", help="show progress even when stderr is not a terminal")


def run(args: argparse.Namespace) -> int:
    """Run ``estgen report`` with parsed ``args``: 0 done, 2 bad input."""
    from .errors import ModelError, ToolMissing

    if not args.clock_mhz > 0:
        print("estgen report: --clock-mhz must be > 0", file=sys.stderr)
        return 2
    try:
        rep = make_report(args.model, target=args.target, steps=args.steps, seed=args.seed,
                          progress=wanted(args.quiet, args.progress), **FilterSetup.from_args(args).kwargs(runtime=False))
    except ModelError as err:  # as the command line prints it: the message starts with the model's path
        print(str(err), file=sys.stderr)
        return 2
    if rep["missing"]:
        # a report without its figures is no report: name what to install and stop (exit 2)
        for tool, what in rep["missing"].items():
            print(f"estgen report: {ToolMissing(tool)} (needed for {'; '.join(what)})", file=sys.stderr)
        return 2
    print(format_report(rep, clock_mhz=args.clock_mhz))
    if args.json:
        Path(args.json).write_text(json.dumps(rep, indent=2, sort_keys=True) + "\n")
    return 0


# ---------------------------------------------------------------------------------------------
# Operation counts from the C text (used when the generator gives none)

_TOKEN = re.compile(
    r"\s+|/\*.*?\*/|//[^\n]*|(?P<num>(\d+\.\d*|\.\d+|\d+)([eE][-+]?\d+)?[fFuUlL]*)|(?P<id>[A-Za-z_]\w*)"
    r"|(?P<op>->|\+\+|--|[-+*/]=|&&|\|\||[<>=!]=|<<|>>|[-+*/%()\[\]{};,<>=!&|^~?:.])",
    re.S,
)
_TRANSCENDENTAL = frozenset(
    f + s for f in "sin cos tan asin acos atan atan2 sinh cosh tanh exp expm1 log log1p log10 log2 pow hypot cbrt".split()
    for s in ("", "f")
)
_NOT_OPERANDS = frozenset("return case sizeof float double void const char static struct".split())
_INT_TYPES = frozenset("int unsigned size_t long short char uint8_t uint16_t uint32_t int32_t int8_t int16_t".split())


def _tokens(text: str) -> List[str]:
    out = []
    for m in _TOKEN.finditer(text):
        if m.group("num") or m.group("id") or m.group("op"):
            out.append(m.group(0))
    return out


def _matching(toks: Sequence[str], i: int, opening: str, closing: str, step: int) -> int:
    """Index of the bracket closing the one at ``toks[i]``, walking by ``step`` (+1 or -1)."""
    depth = 0
    while 0 <= i < len(toks):
        depth += (toks[i] == opening) - (toks[i] == closing)
        if depth == 0:
            return i
        i += step
    return i


def _int_names(toks: Sequence[str]) -> set:
    """Variables declared with an integer type in a token list (``size_t i, j = 0, k;``)."""
    names = set()
    for i, t in enumerate(toks):
        if t not in _INT_TYPES:
            continue
        j, expect = i + 1, True
        while j < len(toks) and toks[j] not in (";", ")", "{"):
            if expect and re.fullmatch(r"[A-Za-z_]\w*", toks[j]) and toks[j] not in _INT_TYPES:
                names.add(toks[j])
                expect = False
            elif toks[j] == ",":
                expect = True
            j += 1
    return names


def c_function_bodies(source: str) -> Dict[str, List[str]]:
    """The token lists of the bodies of all functions defined in ``source`` (top-level
    ``name(...) { ... }``), keyed by function name."""
    toks = _tokens(source)
    bodies: Dict[str, List[str]] = {}
    i, depth = 0, 0
    while i < len(toks):
        t = toks[i]
        if t == "{" and depth == 0:
            # the function name is the identifier before the parameter list's "("
            j = _matching(toks, i - 1, ")", "(", -1)
            name = toks[j - 1] if j > 0 else "?"
            k = _matching(toks, i, "{", "}", 1)
            bodies[name] = toks[i + 1:k]
            i = k + 1
            continue
        i += 1
    return bodies


def _is_int_literal(tok: str) -> bool:
    return bool(re.fullmatch(r"\d+[uUlL]*", tok))


def count_c_ops(source: str, function: str, _seen: Tuple[str, ...] = ()) -> Dict[str, int]:
    """Floating-point operations in one generated C function, counted from the text.

    Method: binary ``+ - * /`` (and their compound assignments) count as add, mul, div;
    ``sqrt``/``sqrtf`` calls as sqrt, other <math.h> calls (including floor, ceil and fmod, as
    library calls) as transcendental. Operations inside
    ``[]`` subscripts, in ``for (...)`` headers, on integer literals or on variables declared
    with an integer type are index arithmetic and not counted. A ``for`` loop of the form
    ``for ([size_t] i = A; i < B; ...)`` with literal bounds multiplies its body by ``B - A``; any other
    loop counts its body once. Static helpers defined in the same file are counted at each call.
    """
    bodies = c_function_bodies(source)
    toks = bodies[function]
    counts = {k: 0 for k in _OP_KEYS}
    ints = _int_names(toks)
    mult: List[Tuple[int, int]] = []  # (brace depth at which the loop body closes, factor)
    depth, sub, i = 0, 0, 0
    factor = 1
    pending: Optional[int] = None
    while i < len(toks):
        t = toks[i]
        if t == "for":
            # find the header's parentheses and try to read literal bounds
            j = _matching(toks, i + 1, "(", ")", 1)
            head = toks[i + 2:j]
            trip = 1
            # C99: the header may declare its counter (for (size_t i = 0u; ...))
            m = re.fullmatch(r"(?:\w+ )?(\w+) = (\d+)[uU]? ; \1 < (\d+)[uU]? ;.*", " ".join(head))
            if m:
                trip = max(0, int(m.group(3)) - int(m.group(2)))
            pending = trip
            i = j + 1
            continue
        if t == "{":
            depth += 1
            if pending is not None:
                mult.append((depth, pending))
                factor = math.prod(f for _, f in mult)
                pending = None
        elif t == "}":
            if mult and mult[-1][0] == depth:
                mult.pop()
                factor = math.prod(f for _, f in mult)
            depth -= 1
        elif t == ";" and pending is not None and depth >= 0:
            pending = None  # a braceless loop body: counted once (the generator always braces)
        elif t == "[":
            sub += 1
        elif t == "]":
            sub -= 1
        elif sub == 0:
            prev = toks[i - 1] if i > 0 else ""
            nxt = toks[i + 1] if i + 1 < len(toks) else ""
            # binary when the left side is an operand: a name, a number or a closing bracket;
            # not a keyword or a type name ("const float *x" declares a pointer)
            binary = bool(re.fullmatch(r"[\w.]+|\)|\]", prev)) and prev not in _NOT_OPERANDS \
                and not prev.endswith("_t")
            if t in ("+", "-", "*", "/") and binary:
                operands = (prev, nxt)
                if not any(_is_int_literal(o) or o in ints for o in operands):
                    counts[{"+": "add", "-": "add", "*": "mul", "/": "div"}[t]] += factor
            elif t in ("+=", "-=", "*=", "/="):
                lhs = toks[i - 1]
                if lhs not in ints and not _is_int_literal(nxt):
                    counts[{"+=": "add", "-=": "add", "*=": "mul", "/=": "div"}[t]] += factor
            elif nxt == "(" and t in ("sqrt", "sqrtf"):
                counts["sqrt"] += factor
            elif nxt == "(" and t in _TRANSCENDENTAL:
                counts["transcendental"] += factor
            elif nxt == "(" and t in bodies and t != function and t not in _seen:
                for k, v in count_c_ops(source, t, _seen + (function,)).items():
                    counts[k] += v * factor
        i += 1
    return counts


# ---------------------------------------------------------------------------------------------
# The report


def _missing(rep: Dict[str, Any], err: cross.ToolMissing, what: str) -> None:
    rep["missing"].setdefault(err.tool, []).append(what)


def make_report(model: Any, filter: str = "ekf", precision: str = "float", target: str = "cortex-m4f",
                steps: int = DEFAULT_STEPS, seed: int = DEFAULT_SEED, work_dir: Optional[str] = None,
                scenario: Any = None, host: bool = True, progress: bool = False,
                gates: Optional[Dict[str, float]] = None, commit_check: str = "subtractive",
                **options: Any) -> Dict[str, Any]:
    """Measure one generated filter of ``model`` (a model file path or a ModelSpec). Returns a
    JSON-ready dict (see the module docstring); figures needing a missing tool are absent and the
    tool is listed under ``missing``. ``scenario`` (a :class:`~estgen.simulate.Scenario`) replaces
    the simulated one the instruction counts replay (``steps`` and ``seed`` are then unused);
    ``host=False`` leaves out the host instruction count; ``progress``: a progress line on stderr.
    ``gates``, ``commit_check`` and ``options`` are those of :func:`estgen.filters.generate`."""
    from .model import as_spec

    spec = as_spec(model)
    if target not in cross.TARGETS:
        raise ValueError(f"unknown target {target!r}; use one of {sorted(cross.TARGETS)}")
    tmp = tempfile.TemporaryDirectory(prefix="estgen-report-") if work_dir is None else None
    work = Path(work_dir if work_dir is not None else tmp.name)  # type: ignore[union-attr]
    bar = Progress("report", 3, progress)
    try:
        bar.step("generating the C")
        # The generator itself (what `estgen generate` writes), so its operation counts come along.
        gen = work / "gen"
        gen.mkdir(parents=True, exist_ok=True)
        generated = FilterSetup.of(filter, precision, gates, commit_check, **options).generate(spec)
        for fname, content in generated.files.items():
            (gen / fname).write_text(content)
        prefix = f"{spec.name}_{filter}"
        header, source = gen / f"{prefix}.h", gen / f"{prefix}.c"
        fn_names = [f"{prefix}_predict"] + [f"{prefix}_update_{s.name}" for s in spec.sensors]
        rep: Dict[str, Any] = {
            "model": spec.name,
            "filter": filter,
            "particles": getattr(generated, "particles", None),
            "precision": precision,
            "target": target,
            "struct": f"{prefix}_t",
            "ram_bytes": None,
            "flash": None,
            "functions": {},
            "instructions": {"steps": scenario.steps if scenario is not None else steps,
                             "seed": None if scenario is not None else seed},
            "missing": {},
        }
        text = source.read_text()
        for fn in fn_names:
            key = fn[len(prefix) + 1:]
            from_text = count_c_ops(text, fn)
            ops = generated.ops.get(key)
            how = "generator"
            if not ops:
                ops, how = from_text, "C tokenizer"
            # ops_c_text: the same count taken from the printed C, as a cross-check
            rep["functions"][fn] = {"ops": {k: int(ops.get(k, 0)) for k in _OP_KEYS}, "ops_counted_by": how,
                                    "ops_c_text": from_text}
        bar.step(f"compiling for {target}: RAM, stack, flash")
        _static_figures(rep, header, source, target, work / f"obj-{target}", fn_names)
        bar.step("counting instructions (QEMU" + (", valgrind)" if host else ")"))
        _instruction_figures(rep, spec, filter, precision, gen, work, steps, seed, fn_names, scenario, host)
        return rep
    finally:
        bar.__exit__()
        if tmp is not None:
            tmp.cleanup()


def _static_figures(rep: Dict[str, Any], header: Path, source: Path, target: str, obj_dir: Path,
                    fn_names: Sequence[str]) -> None:
    try:
        rep["toolchain"] = cross.toolchain(target)
        rep["ram_bytes"] = cross.struct_size(header, rep["struct"], target, obj_dir)
        obj = cross.compile_object(source, target, obj_dir, include_dirs=[header.parent])
        sizes = cross.section_sizes(obj, target)
        rep["flash"] = {"text": sizes["text"], "rodata": sizes["rodata"], "total": sizes["text"] + sizes["rodata"]}
        su = cross.parse_stack_usage(obj.with_suffix(".su").read_text())
        frames, edges = cross.parse_callgraph(obj.with_suffix(".ci").read_text())
        public = cross.defined_functions(obj, target)
        for fn in list(fn_names) + [f for f in public if f not in fn_names]:
            worst, external = cross.worst_stack(frames, edges, fn)
            entry = rep["functions"].setdefault(fn, {})
            entry["stack_bytes"] = worst
            entry["stack_static"] = su[fn].qualifiers == ("static",) if fn in su else None
            entry["library_calls"] = external
        rep["undefined_symbols"] = cross.undefined_symbols(obj, target)
    except cross.ToolMissing as err:
        _missing(rep, err, f"RAM, stack and flash on {target}")


def _instruction_figures(rep: Dict[str, Any], spec: Any, filter: str, precision: str, gen: Path, work: Path,
                         steps: int, seed: int, fn_names: Sequence[str], scen: Any = None, host: bool = True) -> None:
    from .simulate import make_scenario

    if scen is None:
        scen = make_scenario(spec, steps, seed)
    steps = scen.steps
    cross.write_replay(spec, filter, precision, scen, gen)
    prefix = f"{spec.name}_{filter}"
    # emulated Cortex-M4F
    try:
        # the filter compiled as for the flash figure (and cached by compile_object)
        m4obj = cross.compile_object(gen / f"{prefix}.c", "cortex-m4f", work / "qemu-obj", include_dirs=[gen])
        elf = cross.build_firmware(gen, spec.name, filter, work / "qemu", filter_obj=m4obj)
        res = cross.run_qemu(elf, precision)
        m4: Dict[str, Any] = {"instructions_per_tick": res.instructions_per_tick()}
        for fn in fn_names:
            stats = res.predict if fn.endswith("_predict") else res.updates.get(fn[len(prefix) + len("_update_"):])
            if stats is None or stats.calls == 0:
                continue
            ipc = res.instructions_per_call(stats)
            worst = res.worst_instructions_per_call(stats)
            m4[fn] = {"calls": stats.calls, "instructions_per_call": None if ipc is None else round(ipc, 1),
                      "worst_instructions_per_call": None if worst is None else round(worst, 1),
                      "stack_high_water": stats.stack, "refused": stats.refused}
        m4["per_step"] = _per_step(m4, fn_names, steps)
        rep["instructions"]["qemu-cortex-m4f"] = m4
    except cross.ToolMissing as err:
        _missing(rep, err, "instructions on the emulated Cortex-M4F")
    # host, callgrind
    if not host:
        return
    try:
        exe = cross.build_host_replay(gen, spec.name, filter, work / "host")
        counts = cross.callgrind_instructions(exe, fn_names, work / "host")
        host: Dict[str, Any] = {}
        for fn, (ir, calls) in counts.items():
            if calls:
                host[fn] = {"calls": calls, "instructions_per_call": round(ir / calls, 1)}
        host["per_step"] = _per_step(host, fn_names, steps)
        host["toolchain"] = {"compiler": "cc", "version": cross._compiler_version(cross.find_tool("cc")).splitlines()[0],
                             "flags": [*cross.WARNINGS, "-O2", "-g"]}
        rep["instructions"]["host-callgrind"] = host
    except cross.ToolMissing as err:
        _missing(rep, err, "instructions on the host")


def _per_step(figs: Dict[str, Any], fn_names: Sequence[str], steps: int) -> Optional[float]:
    """Mean instructions of one scenario step: one predict and the updates that step had."""
    if not all(fn in figs and figs[fn]["instructions_per_call"] is not None for fn in fn_names[:1]):
        return None
    total = sum(figs[fn]["calls"] * figs[fn]["instructions_per_call"] for fn in fn_names
                if fn in figs and figs[fn]["instructions_per_call"] is not None)
    return round(total / steps, 1)


def _fmt(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.0f}"
    return str(v)


def _us(instr: Any, clock_mhz: float) -> str:
    return "-" if instr is None else f"{instr / clock_mhz:.2f}"


def format_report(rep: Dict[str, Any], clock_mhz: float = DEFAULT_CLOCK_MHZ) -> str:
    """The report :func:`make_report`'s figures make: the target first (toolchain, RAM, flash,
    per-call stack, instructions mean and worst, microseconds at ``clock_mhz``), then the
    operations the generator counted, then the host, then what every column means."""
    tc = rep.get("toolchain") or {}
    lines = [f"{rep['model']} {rep['filter']} ({rep['precision']}) on {rep['target']}"]
    if tc:
        lines += [f"  compiler: {tc['version']}", f"  flags:    {' '.join(tc['flags'])}"]
    lines.append(f"  RAM (sizeof {rep['struct']}): {_fmt(rep['ram_bytes'])} bytes"
                 + (f" ({rep['particles']} particles: grows linearly with N)" if rep.get("particles") else ""))
    fl = rep.get("flash")
    lines.append(f"  flash (.text + .rodata): {_fmt(fl['total'])} bytes ({fl['text']} + {fl['rodata']})"
                 if fl else "  flash: -")
    m4 = rep["instructions"].get("qemu-cortex-m4f", {})
    host = rep["instructions"].get("host-callgrind", {})
    fns = list(rep["functions"])
    main_fns = [fn for fn in fns if fn in m4] or fns

    lines += ["", f"  Target: Cortex-M4F, emulated (QEMU mps2-an386), {rep['instructions']['steps']} steps; "
                  f"microseconds at {clock_mhz:g} MHz"]
    head = (f"  {'function':<36} {'stack':>6} {'hw':>6} {'instr':>8} {'worst':>8} {'us':>8} {'us worst':>8}")
    lines += [head, "  " + "-" * (len(head) - 2)]
    for fn in fns:
        f = rep["functions"][fn]
        t = m4.get(fn, {})
        mean, worst = t.get("instructions_per_call"), t.get("worst_instructions_per_call")
        lines.append(f"  {fn:<36} {_fmt(f.get('stack_bytes')):>6} {_fmt(t.get('stack_high_water')):>6} "
                     f"{_fmt(mean):>8} {_fmt(worst):>8} {_us(mean, clock_mhz):>8} {_us(worst, clock_mhz):>8}")
    lines.append(f"  {'one step (predict + the updates of that step)':<50} {_fmt(m4.get('per_step')):>8}"
                 f" {'':>8} {_us(m4.get('per_step'), clock_mhz):>8}")

    lines += ["", "  Operations in the generated C (counted on the printed expressions, before the compiler optimizes)",
              f"  {'function':<36} {'add':>6} {'mul':>6} {'div':>5} {'sqrt':>5} {'trans':>5}"]
    for fn in main_fns:
        ops = rep["functions"][fn].get("ops")
        if ops:
            lines.append(f"  {fn:<36} " + " ".join(f"{_fmt(ops.get(k)):>{w}}" for k, w in zip(_OP_KEYS, (6, 6, 5, 5, 5))))

    if host:
        htc = host.get("toolchain", {})
        lines += ["", f"  Host (this machine, valgrind --tool=callgrind): {htc.get('version', 'cc')}",
                  f"  flags: {' '.join(htc.get('flags', []))}",
                  f"  {'function':<36} {'instr':>8}"]
        for fn in main_fns:
            lines.append(f"  {fn:<36} {_fmt(host.get(fn, {}).get('instructions_per_call')):>8}")
        lines.append(f"  {'one step':<36} {_fmt(host.get('per_step')):>8}")

    lines += [
        "",
        "  Columns:",
        "    stack     bytes: the function's frame + its deepest chain of static callees (GCC -fstack-usage,",
        "              -fcallgraph-info); library calls not included",
        "    hw        bytes: stack high-water measured on the emulated M4F by painting (library calls included)",
        "    instr     instructions per call, mean over the scenario (SysTick ticks x calibrated instructions",
        f"              per tick, {_fmt(m4.get('instructions_per_tick'))}; the timing bracket subtracted)",
        "    worst     instructions of the slowest single call (resolution: one tick)",
        f"    us        instructions / clock at {clock_mhz:g} MHz, counting one instruction per cycle: a lower bound,",
        "              since FPU divides and square roots take 14 cycles and flash wait states add more;",
        "              measure on the part for a budget (--clock-mhz sets the clock)",
        "    add mul div sqrt   floating-point operations in the code as generated",
        "    trans     calls of transcendental functions (sin, cos, tan, exp, log, atan2, pow, tanh, ...)",
    ]
    for tool, what in rep["missing"].items():
        lines.append(f"  missing: {tool} (needed for {'; '.join(what)})")
    return "\n".join(lines)
