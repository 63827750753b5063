"""Toolchain helpers for the embedded proof: cross-compile generated C for Cortex-M targets,
inspect the objects (undefined symbols, stack usage, section sizes, struct sizes), and replay a
recorded scenario on an emulated Cortex-M4 under QEMU or on the host under callgrind.

Every helper that needs an outside tool raises :class:`ToolMissing` naming it when it is not
installed: callers report the tool as missing, never a guessed figure.

Command line (writes the scenario header the firmware replay includes)::

    estgen replay MODEL --filter ekf --precision float -o DIR [--steps N] [--seed S]
"""

from __future__ import annotations

import hashlib
import math
import os
import re
import shutil
import subprocess
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np

from .errors import ToolMissing
from .layout import packed_size, unpack

__all__ = [
    "ToolMissing",
    "Target",
    "TARGETS",
    "WARNINGS",
    "FORBIDDEN_SYMBOLS",
    "DOUBLE_MATH",
    "FIRMWARE_DIR",
    "find_tool",
    "compile_object",
    "undefined_symbols",
    "defined_functions",
    "forbidden_references",
    "StackEntry",
    "parse_stack_usage",
    "parse_callgraph",
    "worst_stack",
    "section_sizes",
    "struct_size",
    "generate",
    "replay_header",
    "write_replay",
    "reference_replay",
    "build_firmware",
    "run_qemu",
    "parse_replay_output",
    "ReplayResult",
    "CallStats",
    "QEMU_ARGS",
    "build_host_replay",
    "callgrind_instructions",
]

PathLike = Union[str, os.PathLike]

#: The contract's warning set (contract section 4), always with -Werror.
WARNINGS: Tuple[str, ...] = (
    "-std=c99", "-Wall", "-Wextra", "-Wpedantic", "-Wconversion", "-Wdouble-promotion", "-Wshadow", "-Werror",
)

#: The bare-metal replay project shipped with the package sources.
def _firmware_dir() -> Path:
    """The bare-metal replay project: generated_examples/firmware_qemu in a source checkout, the
    copy shipped in the wheel (package estgen.firmware) in an installed estgen."""
    src = Path(__file__).resolve().parent.parent / "generated_examples" / "firmware_qemu"
    if (src / "Makefile").is_file():
        return src
    return Path(__file__).resolve().parent / "firmware"


FIRMWARE_DIR = _firmware_dir()


@dataclass(frozen=True)
class Target:
    """A compilation target: which tools and which code-generation flags."""

    name: str
    prefix: str  # toolchain prefix: "" for the host, "arm-none-eabi-" for the Cortex-M cores
    flags: Tuple[str, ...]
    hard_double: bool  # the FPU executes double arithmetic (else doubles go through helpers)
    description: str

    @property
    def cc(self) -> str:
        return "gcc" if not self.prefix else self.prefix + "gcc"

    def tool(self, name: str) -> str:
        return find_tool(self.prefix + name)


# The flags are the ones each core's FPU (or lack of one) calls for: the Cortex-M0+ has no FPU,
# the M4F a single-precision FPv4-SP, the M7 (in its double-precision variant) FPv5-D16
# (Arm Cortex-M4 and Cortex-M7 Technical Reference Manuals; GCC ARM options, "-mfpu").
TARGETS: Dict[str, Target] = {
    "host": Target("host", "", (), True, "this machine"),
    "cortex-m0plus": Target("cortex-m0plus", "arm-none-eabi-", ("-mcpu=cortex-m0plus", "-mthumb", "-mfloat-abi=soft"),
                            False, "Cortex-M0+, no FPU"),
    "cortex-m4f": Target("cortex-m4f", "arm-none-eabi-",
                         ("-mcpu=cortex-m4", "-mthumb", "-mfpu=fpv4-sp-d16", "-mfloat-abi=hard"),
                         False, "Cortex-M4F, single-precision FPU"),
    "cortex-m7": Target("cortex-m7", "arm-none-eabi-",
                        ("-mcpu=cortex-m7", "-mthumb", "-mfpu=fpv5-d16", "-mfloat-abi=hard"),
                        True, "Cortex-M7, double-precision FPU"),
}

#: Symbols that mean heap, stdio or process control: none may be referenced by generated code.
FORBIDDEN_SYMBOLS = frozenset(
    """malloc calloc realloc free aligned_alloc memalign posix_memalign _malloc_r _calloc_r _realloc_r
    _free_r _sbrk sbrk _sbrk_r brk printf sprintf snprintf vprintf vsnprintf fprintf puts fputs putchar
    fputc putc fwrite fopen fclose fflush exit _exit abort atexit __assert_func __assert_fail assert
    __stack_chk_fail __errno""".split()
)

#: The double-precision C99 <math.h> functions: a float build must call their f-suffixed forms.
DOUBLE_MATH = frozenset(
    """sqrt cbrt hypot sin cos tan asin acos atan atan2 sinh cosh tanh asinh acosh atanh exp exp2 expm1
    log log2 log10 log1p pow fabs fmod remainder floor ceil round trunc fmin fmax fma copysign erf erfc
    tgamma lgamma ldexp frexp modf nextafter""".split()
)

#: The run-time ABI's double-precision helpers start with this (Arm RTABI32, section 4.1.2).
_AEABI_DOUBLE = re.compile(r"^__aeabi_(d\w+|\w*2d)$")
# libgcc's own names for double helpers, used where there is no __aeabi_ alias.
_LIBGCC_DOUBLE = re.compile(r"^__(?!aeabi)[a-z]*df[a-z]*\d?$")


def find_tool(name: str) -> str:
    """The full path of ``name`` on PATH, or :class:`ToolMissing`."""
    path = shutil.which(name)
    if path is None:
        raise ToolMissing(name)
    return path


def _run(cmd: Sequence[str], cwd: Optional[PathLike] = None, timeout: float = 300) -> subprocess.CompletedProcess:
    proc = subprocess.run(list(cmd), cwd=cwd, capture_output=True, text=True, timeout=timeout)
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed ({proc.returncode}):\n{proc.stdout}{proc.stderr}")
    return proc


# ---------------------------------------------------------------------------------------------
# Compiling and inspecting objects


_VERSIONS: Dict[str, str] = {}


def _compiler_version(cc: str) -> str:
    if cc not in _VERSIONS:
        _VERSIONS[cc] = _run([cc, "--version"]).stdout
    return _VERSIONS[cc]


def toolchain(target: Union[str, Target], opt: str = "-O2") -> Dict[str, Any]:
    """The compiler :func:`compile_object` runs for ``target`` (its ``--version`` first line)
    and the flags it passes: what a report's figures were measured with."""
    tgt = TARGETS[target] if isinstance(target, str) else target
    cc = find_tool(tgt.cc)
    first = _compiler_version(cc).splitlines()
    return {"compiler": tgt.cc, "version": first[0].strip() if first else tgt.cc,
            "flags": [*WARNINGS, opt, "-fstack-usage", "-fcallgraph-info=su", *tgt.flags]}


def compile_object(
    source: PathLike,
    target: Union[str, Target],
    out_dir: PathLike,
    include_dirs: Sequence[PathLike] = (),
    extra_flags: Sequence[str] = (),
    opt: str = "-O2",
    cache: bool = True,
) -> Path:
    """Compile ``source`` with the contract warnings, ``-Werror``, ``opt`` and ``-fstack-usage``
    (plus ``-fcallgraph-info=su`` for the call graph) for ``target``; returns the object path.
    The .su and .ci files are written beside the object.

    With ``cache``, results are kept under ``$ESTGEN_CACHE/cross`` (or ~/.cache/estgen/cross),
    keyed by the compiler's version, the flags and the preprocessed source: a large generated
    filter takes tens of seconds to optimize, and the tests compile each one for three cores."""
    tgt = TARGETS[target] if isinstance(target, str) else target
    cc = find_tool(tgt.cc)
    src = Path(source)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    obj = out / (src.stem + ".o")
    flags = [*WARNINGS, opt, "-fstack-usage", "-fcallgraph-info=su", *tgt.flags]
    flags += [f"-I{d}" for d in include_dirs] + list(extra_flags)
    key = None
    if cache:
        pre = _run([cc, *flags, "-E", "-P", str(src)]).stdout
        # include paths differ run to run; what they brought in is in the preprocessed text
        kflags = [f for f in flags if not f.startswith("-I")]
        digest = hashlib.sha256("\0".join([_compiler_version(cc), *kflags, src.name, pre]).encode())
        key = Path(_cache_root()) / digest.hexdigest()[:32]
        if all((key / (src.stem + ext)).is_file() for ext in (".o", ".su", ".ci")):
            for ext in (".o", ".su", ".ci"):
                shutil.copyfile(key / (src.stem + ext), out / (src.stem + ext))
            return obj
    _run([cc, *flags, "-c", str(src), "-o", str(obj)])
    if key is not None:
        tmp = Path(tempfile.mkdtemp(dir=key.parent))
        for ext in (".o", ".su", ".ci"):
            shutil.copyfile(out / (src.stem + ext), tmp / (src.stem + ext))
        try:
            os.replace(tmp, key)  # atomic: a concurrent run sees all three files or none
        except OSError:
            shutil.rmtree(tmp, ignore_errors=True)
    return obj


def _cache_root() -> str:
    base = os.environ.get("ESTGEN_CACHE") or os.path.join(os.path.expanduser("~"), ".cache", "estgen")
    path = os.path.join(base, "cross")
    os.makedirs(path, exist_ok=True)
    return path


def undefined_symbols(obj: PathLike, target: Union[str, Target]) -> List[str]:
    """The symbols ``obj`` references but does not define (``nm -u``)."""
    tgt = TARGETS[target] if isinstance(target, str) else target
    out = _run([tgt.tool("nm"), "-u", str(obj)]).stdout
    return sorted({line.split()[-1] for line in out.splitlines() if line.strip()})


def defined_functions(obj: PathLike, target: Union[str, Target]) -> List[str]:
    """The external (public) functions ``obj`` defines (``nm -g --defined-only``, type T)."""
    tgt = TARGETS[target] if isinstance(target, str) else target
    out = _run([tgt.tool("nm"), "-g", "--defined-only", str(obj)]).stdout
    return sorted(p[2] for p in (line.split() for line in out.splitlines()) if len(p) == 3 and p[1] == "T")


def forbidden_references(undefined: Sequence[str], precision: str, target: Union[str, Target]) -> List[str]:
    """Which of ``undefined`` the generated code must not reference: heap, stdio and exit
    always; for a float build on a core without double hardware, also double helpers and
    double math functions (the contract: a float build uses f-suffixed functions only)."""
    tgt = TARGETS[target] if isinstance(target, str) else target
    bad = [s for s in undefined if s in FORBIDDEN_SYMBOLS]
    if precision == "float":
        bad += [s for s in undefined if s in DOUBLE_MATH]
        if not tgt.hard_double:
            bad += [s for s in undefined if _AEABI_DOUBLE.match(s) or _LIBGCC_DOUBLE.match(s)]
    return sorted(set(bad))


@dataclass(frozen=True)
class StackEntry:
    """One function's line of a GCC .su file."""

    function: str
    bytes: int
    qualifiers: Tuple[str, ...]  # "static", "dynamic", "bounded"


def parse_stack_usage(text: str) -> Dict[str, StackEntry]:
    """Parse GCC ``-fstack-usage`` output: ``file:line:col:function<TAB>bytes<TAB>qualifiers``
    (GCC manual, "-fstack-usage"). Keys are function names."""
    out: Dict[str, StackEntry] = {}
    for line in text.splitlines():
        parts = line.rstrip("\n").split("\t")
        if len(parts) != 3:
            continue
        loc, size, quals = parts
        name = loc.rsplit(":", 1)[-1]
        out[name] = StackEntry(name, int(size), tuple(q.strip() for q in quals.split(",")))
    return out


_CI_NODE = re.compile(r'node:\s*\{\s*title:\s*"([^"]+)"\s*label:\s*"([^"]*)"')
_CI_EDGE = re.compile(r'edge:\s*\{\s*sourcename:\s*"([^"]+)"\s*targetname:\s*"([^"]+)"')
_CI_BYTES = re.compile(r"\\n(\d+) bytes \(([^)]*)\)")


def parse_callgraph(text: str) -> Tuple[Dict[str, Optional[int]], Dict[str, List[str]]]:
    """Parse GCC ``-fcallgraph-info=su`` (a VCG graph): ``(frames, edges)`` where
    ``frames[f]`` is f's own stack in bytes (None for functions defined elsewhere) and
    ``edges[f]`` the functions f calls."""
    frames: Dict[str, Optional[int]] = {}
    edges: Dict[str, List[str]] = {}
    for m in _CI_NODE.finditer(text):
        b = _CI_BYTES.search(m.group(2))
        frames[m.group(1)] = int(b.group(1)) if b else None
    for m in _CI_EDGE.finditer(text):
        callees = edges.setdefault(m.group(1), [])
        if m.group(2) not in callees:
            callees.append(m.group(2))
    return frames, edges


def worst_stack(frames: Mapping[str, Optional[int]], edges: Mapping[str, Sequence[str]],
                function: str) -> Tuple[int, List[str]]:
    """Worst-case stack of ``function``: its own frame plus the deepest chain of callees in
    the same translation unit (a conservative bound: every callee is assumed to be reached at
    the deepest point). Returns ``(bytes, external callees)``; the external ones (libm,
    libgcc) are not counted and are listed so the reader knows. Recursion raises ValueError
    (the generated code has none)."""
    external: List[str] = []

    def depth(fn: str, path: Tuple[str, ...]) -> int:
        if fn in path:
            raise ValueError(f"recursion through {fn}")
        own = frames.get(fn)
        if own is None:
            if fn not in external:
                external.append(fn)
            return 0
        return own + max((depth(c, path + (fn,)) for c in edges.get(fn, ())), default=0)

    if frames.get(function) is None:
        raise KeyError(f"{function} is not defined in this object")
    return depth(function, ()), sorted(external)


def section_sizes(obj: PathLike, target: Union[str, Target]) -> Dict[str, int]:
    """Section sizes in bytes from ``size -A``, summed by kind: ``text`` (.text*),
    ``rodata`` (.rodata*), ``data`` (.data*), ``bss`` (.bss*)."""
    tgt = TARGETS[target] if isinstance(target, str) else target
    out = _run([tgt.tool("size"), "-A", str(obj)]).stdout
    sizes = {"text": 0, "rodata": 0, "data": 0, "bss": 0}
    for line in out.splitlines():
        parts = line.split()
        if len(parts) >= 2 and parts[0].startswith(".") and parts[1].isdigit():
            for kind in sizes:
                if parts[0] == "." + kind or parts[0].startswith("." + kind + "."):
                    sizes[kind] += int(parts[1])
    return sizes


def struct_size(header: PathLike, type_name: str, target: Union[str, Target], work_dir: PathLike) -> int:
    """``sizeof(type_name)`` on ``target``: compile an array of that many chars and read the
    symbol's size from the object with ``nm -S`` (no need to run target code)."""
    tgt = TARGETS[target] if isinstance(target, str) else target
    hdr = Path(header).resolve()
    work = Path(work_dir)
    work.mkdir(parents=True, exist_ok=True)
    probe = work / f"sizeof_{type_name}.c"
    probe.write_text(f'#include "{hdr.name}"\nchar estgen_sizeof_probe[sizeof({type_name})];\n')
    obj = work / f"sizeof_{type_name}.o"
    _run([find_tool(tgt.cc), *tgt.flags, "-std=c99", "-fno-common", f"-I{hdr.parent}", "-c", str(probe), "-o", str(obj)])
    out = _run([tgt.tool("nm"), "-S", str(obj)]).stdout
    for line in out.splitlines():
        parts = line.split()
        if len(parts) == 4 and parts[3] == "estgen_sizeof_probe":
            return int(parts[1], 16)
    raise RuntimeError(f"no size for {type_name} in {obj}:\n{out}")


# ---------------------------------------------------------------------------------------------
# Generating and replaying


def generate(model: PathLike, filter: str, precision: str, out_dir: PathLike, **options: Any) -> Tuple[Path, Path]:
    """Generate the filter's C into ``out_dir`` as ``estgen generate`` does and return the
    (header, source) paths. ``options`` are those of :func:`estgen.filters.generate`. Raises
    :class:`~estgen.errors.ModelError` when the generator refuses, e.g. for a filter it does not
    support."""
    from .filters import generate as generate_filter
    from .model import load_model
    from .outputs import write_generated

    spec = load_model(model)
    write_generated(generate_filter(spec, filter, precision, **options).files, os.fspath(out_dir))
    out = Path(out_dir)
    return out / f"{spec.name}_{filter}.h", out / f"{spec.name}_{filter}.c"


def _c_literal(v: float, precision: str) -> str:
    """A scenario value as a C literal of the filter's precision (the generator's printer)."""
    from .emit import c_literal

    try:
        return c_literal(v, precision)
    except ValueError as err:
        raise ValueError(f"scenario value {v!r}: {err}") from None


def _rows(values: Sequence[str], per_line: int = 6) -> str:
    return ",\n".join("    " + ", ".join(values[i:i + per_line]) for i in range(0, len(values), per_line)) or "    0"


def replay_header(spec: Any, filter: str, precision: str, scenario: Any) -> str:
    """The C header main.c includes: names of the filter's type and functions, and the
    scenario (dt, u and measurements per step) as constant arrays."""
    name = spec.name
    pre = f"{name}_{filter}"
    real = "float" if precision == "float" else "double"
    steps = len(scenario.t)
    dts = np.broadcast_to(np.asarray(scenario.dt, dtype=float), (steps,))
    u = np.asarray(scenario.u, dtype=float).reshape(steps, spec.nu)
    sensors = [s.name for s in spec.sensors]
    meas_step: List[str] = []
    meas_sensor: List[str] = []
    meas_offset: List[str] = []
    zs: List[str] = []
    for k, items in enumerate(scenario.measurements):
        for sensor, z in items:
            meas_step.append(f"{k}u")
            meas_sensor.append(f"{sensors.index(sensor)}u")
            meas_offset.append(f"{len(zs)}u")
            zs += [_c_literal(v, precision) for v in np.atleast_1d(np.asarray(z, dtype=float))]
    u_vals = [_c_literal(v, precision) for v in u.ravel()]
    lines = [
        f"/* Scenario replay for {pre} ({precision}), written by estgen.cross: {steps} steps, "
        f"{len(meas_step)} measurements. */",
        "#ifndef REPLAY_DATA_H",
        "#define REPLAY_DATA_H",
        "#include <stddef.h>",
        "#include <stdint.h>",
        f'#include "{pre}.h"',
        f"typedef {real} replay_real;",
        f"typedef {pre}_t replay_filter_t;",
        f"#define REPLAY_INIT {pre}_init",
        f"#define REPLAY_PREDICT {pre}_predict",
        f"#define REPLAY_NX {spec.n}u",
        f"#define REPLAY_NP {packed_size(spec.ne)}u /* packed covariance entries (error dimension) */",
        f"#define REPLAY_STEPS {steps}u",
        f"#define REPLAY_NSENSORS {len(sensors)}u",
        f"#define REPLAY_NMEAS {len(meas_step)}u",
        (f"#define REPLAY_U(k) (&replay_u[(k) * {spec.nu}u])" if spec.nu else "#define REPLAY_U(k) ((void)(k), (const replay_real *)NULL)"),
        "static const char *const replay_sensor_names[] = {" + ", ".join(f'"{s}"' for s in sensors) + "};",
        "static int (*const replay_update[])(replay_filter_t *, const replay_real *) = {"
        + ", ".join(f"{pre}_update_{s}" for s in sensors) + "};",
        f"static const replay_real replay_dt[{steps}] = {{\n{_rows([_c_literal(v, precision) for v in dts])}\n}};",
        f"static const replay_real replay_u[{max(1, len(u_vals))}] = {{\n{_rows(u_vals or ['0'])}\n}};",
        f"static const uint32_t replay_meas_step[{max(1, len(meas_step))}] = {{\n{_rows(meas_step or ['0u'], 12)}\n}};",
        f"static const uint8_t replay_meas_sensor[{max(1, len(meas_step))}] = {{\n{_rows(meas_sensor or ['0u'], 12)}\n}};",
        f"static const uint32_t replay_meas_offset[{max(1, len(meas_step))}] = {{\n{_rows(meas_offset or ['0u'], 12)}\n}};",
        f"static const replay_real replay_z[{max(1, len(zs))}] = {{\n{_rows(zs or ['0'])}\n}};",
        "#endif",
        "",
    ]
    return "\n".join(lines)


def write_replay(spec: Any, filter: str, precision: str, scenario: Any, out_dir: PathLike) -> Path:
    """Write ``replay_data.h`` for ``scenario`` into ``out_dir``."""
    path = Path(out_dir) / "replay_data.h"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(replay_header(spec, filter, precision, scenario))
    return path


def _quantize(v: Any, precision: str) -> np.ndarray:
    """The scenario values exactly as the C literals hold them."""
    a = np.asarray(v, dtype=float)
    return a.astype(np.float32).astype(float) if precision == "float" else a


def reference_replay(spec: Any, filter: str, precision: str, scenario: Any,
                     **options: Any) -> Tuple[np.ndarray, np.ndarray, List[int]]:
    """Run the float64 reference filter over the same inputs, in the same order as main.c
    (predict, then that step's measurements as recorded), on the values as quantized into
    the C header. Returns (x, P, statuses)."""
    from .filters import reference

    ref = reference(spec, filter=filter, **options)
    steps = len(scenario.t)
    dts = np.broadcast_to(_quantize(scenario.dt, precision), (steps,))
    u = _quantize(scenario.u, precision).reshape(steps, spec.nu)
    statuses: List[int] = []
    for k in range(steps):
        statuses.append(int(ref.predict(list(u[k]), float(dts[k]))))
        for sensor, z in scenario.measurements[k]:
            statuses.append(int(ref.update(sensor, list(np.atleast_1d(_quantize(z, precision))))))
    return np.array(ref.x, dtype=float), np.array(ref.P, dtype=float), statuses


def _make(args: Sequence[str], timeout: float = 300) -> None:
    find_tool("make")
    _run(["make", "--no-print-directory", "-C", str(FIRMWARE_DIR), *args], timeout=timeout)


def build_firmware(gen_dir: PathLike, prefix: str, filter: str, build_dir: PathLike, extra_cflags: str = "",
                   filter_obj: Optional[PathLike] = None) -> Path:
    """Build the bare-metal replay (generated_examples/firmware_qemu) for one generated
    filter in ``gen_dir`` (which must hold replay_data.h too). ``filter_obj``: the filter
    already compiled for cortex-m4f (e.g. by :func:`compile_object`), else the Makefile
    compiles it. Returns the ELF path."""
    find_tool("arm-none-eabi-gcc")
    build = Path(build_dir).resolve()
    args = [f"MODEL_PREFIX={prefix}", f"FILTER={filter}", f"GEN_DIR={Path(gen_dir).resolve()}", f"BUILD={build}",
            f"EXTRA_CFLAGS={extra_cflags}"]
    if filter_obj is not None:
        args.append(f"FILTER_OBJ={Path(filter_obj).resolve()}")
    _make(args + [f"{build}/replay.elf"])
    return build / "replay.elf"


def build_host_replay(gen_dir: PathLike, prefix: str, filter: str, build_dir: PathLike, extra_cflags: str = "") -> Path:
    """The same replay built for the host (for callgrind). Returns the executable path."""
    find_tool("cc")
    build = Path(build_dir).resolve()
    _make([f"MODEL_PREFIX={prefix}", f"FILTER={filter}", f"GEN_DIR={Path(gen_dir).resolve()}", f"BUILD={build}",
           f"EXTRA_CFLAGS={extra_cflags}", f"{build}/replay_host"])
    return build / "replay_host"


#: QEMU's options for the replay (see the Makefile's QEMU_FLAGS).
QEMU_ARGS: Tuple[str, ...] = (
    "-machine", "mps2-an386", "-cpu", "cortex-m4", "-nographic", "-monitor", "none", "-serial", "none",
    "-semihosting-config", "enable=on,target=native", "-icount", "shift=0",
)


@dataclass
class CallStats:
    """What the replay measured for one function."""

    calls: int
    ticks: int
    refused: int
    stack: int  # deepest stack byte touched, from the paint probe (0 when not probed)
    max_ticks: int = 0  # the slowest single call (0 from a replay that does not record it)


@dataclass
class ReplayResult:
    """The parsed output of one replay run."""

    x_bits: List[str]
    precision: str
    P_bits: List[str] = field(default_factory=list)
    calib: Optional[Tuple[int, int, int]] = None
    overhead: Optional[Tuple[int, int]] = None
    predict: Optional[CallStats] = None
    updates: Dict[str, CallStats] = field(default_factory=dict)

    def _decode(self, bits: Sequence[str]) -> np.ndarray:
        dtype = ">u4" if self.precision == "float" else ">u8"
        raw = np.array([int(b, 16) for b in bits], dtype=np.uint64).astype(dtype)
        return raw.view(">f4" if self.precision == "float" else ">f8").astype(float)

    @property
    def x(self) -> np.ndarray:
        """The final state decoded from its IEEE-754 bits."""
        return self._decode(self.x_bits)

    @property
    def P(self) -> np.ndarray:
        """The final covariance, unpacked from the upper triangle stored row by row (its
        dimension is the error dimension: n minus one per attitude)."""
        packed = self._decode(self.P_bits)
        ne = int(round((math.sqrt(8 * packed.size + 1) - 1) / 2))
        if packed_size(ne) != packed.size:
            raise RuntimeError(f"{packed.size} covariance entries are no packed symmetric matrix")
        return unpack(packed, ne)

    def instructions_per_tick(self) -> Optional[float]:
        """From the calibration loops: 2*iters more instructions took (t2 - t1) more ticks."""
        if not self.calib:
            return None
        iters, t1, t2 = self.calib
        return 2.0 * iters / (t2 - t1) if t2 > t1 else None

    def instructions_per_call(self, stats: CallStats) -> Optional[float]:
        """Mean instructions of one call, less the timing bracket's own cost."""
        ipt = self.instructions_per_tick()
        if ipt is None or stats.calls == 0 or self.overhead is None:
            return None
        bracket = self.overhead[1] / self.overhead[0]
        return ipt * (stats.ticks / stats.calls - bracket)

    def worst_instructions_per_call(self, stats: CallStats) -> Optional[float]:
        """Instructions of the slowest single call, less the timing bracket's cost (resolution:
        one SysTick, instructions_per_tick instructions)."""
        ipt = self.instructions_per_tick()
        if ipt is None or stats.calls == 0 or self.overhead is None or not stats.max_ticks:
            return None
        return ipt * (stats.max_ticks - self.overhead[1] / self.overhead[0])


def parse_replay_output(text: str, precision: str) -> ReplayResult:
    """Parse main.c's output records (see the comment at the top of main.c)."""
    res = ReplayResult(x_bits=[], precision=precision)
    ended = False
    for line in text.splitlines():
        p = line.split()
        if not p:
            continue
        if p[0] == "calib" and len(p) == 4:
            res.calib = (int(p[1]), int(p[2]), int(p[3]))
        elif p[0] == "overhead" and len(p) == 3:
            res.overhead = (int(p[1]), int(p[2]))
        elif p[0] == "predict" and len(p) in (5, 6):
            res.predict = CallStats(*(int(v) for v in p[1:]))
        elif p[0] == "update" and len(p) in (6, 7):
            res.updates[p[1]] = CallStats(*(int(v) for v in p[2:]))
        elif p[0] == "x" and len(p) == 3:
            res.x_bits.append(p[2])
        elif p[0] == "P" and len(p) == 3:
            res.P_bits.append(p[2])
        elif p[0] == "end":
            ended = True
    if not ended or res.predict is None:
        raise RuntimeError(f"the replay did not finish; its output was:\n{text}")
    return res


def run_qemu(elf: PathLike, precision: str, timeout: float = 300) -> ReplayResult:
    """Run the replay ELF on QEMU's mps2-an386 and parse what it printed."""
    qemu = find_tool("qemu-system-arm")
    proc = subprocess.run([qemu, *QEMU_ARGS, "-kernel", str(elf)], capture_output=True, text=True,
                          timeout=timeout, stdin=subprocess.DEVNULL)
    if proc.returncode != 0:
        raise RuntimeError(f"qemu exited {proc.returncode}:\n{proc.stdout}{proc.stderr}")
    # Without a chardev QEMU writes semihosting output to its stderr.
    return parse_replay_output(proc.stdout + proc.stderr, precision)


def callgrind_instructions(exe: PathLike, functions: Sequence[str], work_dir: PathLike) -> Dict[str, Tuple[int, int]]:
    """Instructions executed inside each of ``functions`` (callees included), counted by
    ``valgrind --tool=callgrind --toggle-collect=FUNCTION``. Returns
    ``{function: (instructions, calls)}``; one run per function, since toggle-collect sums
    over all the functions it is given."""
    valgrind = find_tool("valgrind")
    work = Path(work_dir)
    work.mkdir(parents=True, exist_ok=True)
    out: Dict[str, Tuple[int, int]] = {}
    for fn in functions:
        dump = work / f"callgrind.{fn}.out"
        _run([valgrind, "--tool=callgrind", f"--callgrind-out-file={dump}", f"--toggle-collect={fn}",
              "--collect-atstart=no", str(exe)], timeout=600)
        out[fn] = (_callgrind_total(dump.read_text()), _callgrind_calls(dump.read_text(), fn))
    return out


def _callgrind_total(text: str) -> int:
    """The ``summary:`` (or ``totals:``) line of a callgrind output file: Ir events."""
    for key in ("summary:", "totals:"):
        for line in text.splitlines():
            if line.startswith(key):
                return int(line.split()[1])
    raise RuntimeError("no summary line in callgrind output")


def _callgrind_calls(text: str, function: str) -> int:
    """How many times ``function`` was called: the sum of ``calls=N`` lines that follow a
    ``cfn=`` naming it (callgrind format manual, "Call specification")."""
    names: Dict[str, str] = {}
    total = 0
    target = False
    for line in text.splitlines():
        m = re.match(r"^c?fn=\((\d+)\)(?: (.*))?$", line)
        if m:
            if m.group(2) is not None:
                names[m.group(1)] = m.group(2)
            target = line.startswith("cfn=") and names.get(m.group(1)) == function
            continue
        if line.startswith("calls=") and target:
            total += int(line[6:].split()[0])
            target = False
    return total
