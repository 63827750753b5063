"""Property-based fuzzing of the compiled filters, built with AddressSanitizer and
UndefinedBehaviorSanitizer.

Random call sequences (predict, update, set_state) with finite, non-finite, tiny, huge and
outlying arguments, and dt including 0, negative, subnormal and huge values. After every call:
the status is one of the documented codes 0..5 (and 6, DEGENERATE, for the particle filter); a
refused call left the struct bit-for-bit unchanged; an accepted call left x finite and P
symmetric positive definite (numpy's Cholesky), or, for the particle filter, P positive
semidefinite and the weights normalized (test_robustness.checked).

The C runs inside Python through cffi, so the sanitizer runtime must be loaded first: each
example is fuzzed in a child process started with LD_PRELOAD of gcc's libasan (the documented
way to sanitize a shared library loaded by an uninstrumented program: GCC manual,
-fsanitize=address; AddressSanitizer wiki, "Frequently asked questions"). Any sanitizer report
or a failed property fails the test. Hypothesis runs derandomized with no example database, so CI
tries the same sequences every time and writes nothing.

Sources: the invariants are estgen's contract (/work/shared/contract.md section 3: "a non-zero
status means refused: the filter is then exactly as it was before the call") and
estgen/status.py; IEEE 754 special values from numpy.finfo.
"""

from __future__ import annotations

import math
import os
import pickle
import subprocess
import sys
from typing import Any, Dict, List, Sequence, Tuple

import numpy as np
import pytest

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(HERE)
if REPO not in sys.path:  # when run as the child process's script
    sys.path.insert(0, REPO)

from test_robustness import ALL_CONFIGS, EXAMPLES, checked, filters_for, spec_of  # noqa: E402

from estgen.verify import state_sigma  # noqa: E402

#: hypothesis examples per (example, filter, precision), so 50 to 100 per example; each is a
#: sequence of up to MAX_CALLS calls
MAX_EXAMPLES = 25
MAX_CALLS = 20

#: every example and filter (the particle filter of 64 particles too) in float (the embedded
#: case); double too except for the 15-state model, whose sanitized builds and runs alone take
#: minutes (test_robustness drives its double C through the same refusals)
FUZZ_CONFIGS = [c for c in ALL_CONFIGS if c[2] == "float" or c[0] != "strapdown_nav"]

# -O0 (the last -O given wins over the harness's -O2): the checks are instrumented at any level,
# and the 200 KB straight-line 15-state UKF then compiles in 2 s instead of 30 s
SANITIZE_CFLAGS = ["-O0", "-fsanitize=address,undefined", "-fno-sanitize-recover=all", "-fno-omit-frame-pointer", "-g"]
SANITIZE_LDFLAGS = ["-fsanitize=address,undefined"]
#: what a sanitizer prints when it finds something (ASan "ERROR: AddressSanitizer", UBSan "runtime error:")
SANITIZER_MARKERS = ("AddressSanitizer", "runtime error:", "LeakSanitizer", "UndefinedBehaviorSanitizer")


# ---------------------------------------------------------------------------------------------
# The property (runs in the child process)


def _strategies(spec: Any, precision: str) -> Any:
    from hypothesis import strategies as st

    big = float(np.finfo(np.float32 if precision == "float" else np.float64).max)
    tiny = float(np.finfo(np.float32 if precision == "float" else np.float64).smallest_subnormal)
    specials = st.sampled_from([0.0, -0.0, tiny, -tiny, 1e-30, 1e30, -1e30, big, -big, 1e38, 1e39,
                                float("nan"), float("inf"), float("-inf")])
    anyfloat = st.one_of(st.floats(-10.0, 10.0), specials, st.floats(allow_nan=True, allow_infinity=True))
    dt0 = float(spec.scenario_dt or 0.01)
    dts = st.one_of(st.sampled_from([dt0, dt0, dt0 / 10, dt0 * 10]), st.floats(0.0, 10 * dt0),
                    st.sampled_from([0.0, -0.0, -dt0, tiny, 1e-30, 1e6, 1e30, big, float("nan"), float("inf"),
                                     float("-inf")]))
    n, nu = spec.n, spec.nu
    predict = st.tuples(st.just("predict"), st.lists(st.one_of(st.floats(-5.0, 5.0), anyfloat), min_size=nu,
                                                      max_size=nu), dts)
    calls = [predict]
    if spec.sensors:
        # z: plausible (h(x) plus a few noise sigmas) or arbitrary
        calls.append(st.tuples(st.just("update"), st.integers(0, len(spec.sensors) - 1), st.booleans(),
                               st.lists(st.one_of(st.floats(-50.0, 50.0), anyfloat), min_size=8, max_size=8)))
    # set_state: x arbitrary or near x0; P = D C D from standard deviations and a correlation
    # factor, or a raw random symmetric matrix (mostly indefinite)
    ne = spec.ne  # P's dimension (n minus one per attitude)
    calls.append(st.tuples(st.just("set_state"), st.lists(st.one_of(st.floats(-3.0, 3.0), anyfloat), min_size=n,
                                                          max_size=n),
                           st.sampled_from(["scaled", "raw", "initial"]),
                           st.lists(st.one_of(st.floats(1e-6, 1e3), anyfloat), min_size=ne, max_size=ne),
                           st.lists(st.floats(-1.0, 1.0), min_size=ne * ne, max_size=ne * ne)))
    return st.lists(st.one_of(*calls), min_size=1, max_size=MAX_CALLS)


def _execute(c: Any, spec: Any, mf: Any, p: Tuple[float, ...], call: Tuple[Any, ...]) -> int:
    kind = call[0]
    if kind == "predict":
        _, u, dt = call
        return checked(c, lambda: c.predict(u, dt))
    if kind == "update":
        _, k, plausible, vals = call
        s = spec.sensors[k]
        vals = np.array(vals[: s.m], dtype=float)
        if plausible:
            with np.errstate(all="ignore"):
                sig = np.sqrt(np.diag(mf.R(s.name, p)))
                z = mf.h(s.name, c.x, p) + np.clip(np.nan_to_num(vals), -5.0, 5.0) * sig
        else:
            z = vals
        return checked(c, lambda: c.update(s.name, z))
    _, x, how, sd, corr = call
    n = spec.ne  # P's dimension
    x0 = np.array(spec.x0)
    xv = np.array(x, dtype=float)
    with np.errstate(all="ignore"):
        if how == "initial":
            P = np.array(spec.P0)
            xv = x0 + np.nan_to_num(xv, nan=0.0, posinf=0.0, neginf=0.0) * state_sigma(spec, np.sqrt(np.diag(P))[None])[0]
        elif how == "scaled":
            A = np.array(corr).reshape(n, n) + 2.0 * np.eye(n)
            C = A @ A.T
            d = np.sqrt(np.diag(C))
            C = C / np.outer(d, d)
            D = np.diag(np.array(sd, dtype=float))
            P = D @ C @ D
        else:
            A = np.array(corr).reshape(n, n)
            P = A + A.T
    return checked(c, lambda: c.set_state(xv, 0.5 * (P + P.T) if np.all(np.isfinite(P)) else P))


def fuzz(example: str, filt: str, precision: str, cflags: Sequence[str], ldflags: Sequence[str],
         generated_file: str = "") -> Dict[int, int]:
    """Run the property for one configuration; returns the status counts seen."""
    from hypothesis import HealthCheck, given, settings

    from estgen.build import CFilter, compile_generated
    from estgen.reference import model_functions

    spec = spec_of(example)
    if generated_file:
        with open(generated_file, "rb") as fh:
            gen = pickle.load(fh)
    else:
        from test_robustness import generated

        gen = generated(example, filt, precision)
    comp = compile_generated(gen, list(cflags), list(ldflags))
    mf = model_functions(spec)
    p = mf.param_tuple(spec.param_defaults())
    seen: Dict[int, int] = {}

    @settings(max_examples=MAX_EXAMPLES, derandomize=True, database=None, deadline=None,
              suppress_health_check=list(HealthCheck), print_blob=False)
    @given(_strategies(spec, precision))
    def prop(calls: List[Tuple[Any, ...]]) -> None:
        c = CFilter(spec, comp, filt)
        for call in calls:
            st = _execute(c, spec, mf, p, call)
            seen[st] = seen.get(st, 0) + 1

    prop()
    return seen


def _child(argv: List[str]) -> int:
    """Child process: ``test_fuzz.py OUT.pickle GEN.pickle EXAMPLE FILTER PRECISION [...]``."""
    out, triples = argv[0], argv[1:]
    # The runtime is loaded by now; the compilers this process starts must not get it.
    os.environ.pop("LD_PRELOAD", None)
    results = {}
    for i in range(0, len(triples), 4):
        gen_file, ex, filt, prec = triples[i:i + 4]
        results[f"{ex}-{filt}-{prec}"] = fuzz(ex, filt, prec, SANITIZE_CFLAGS, SANITIZE_LDFLAGS, gen_file)
        print(f"fuzzed {ex}-{filt}-{prec}: {results[f'{ex}-{filt}-{prec}']}", flush=True)
    with open(out, "wb") as fh:
        pickle.dump(results, fh)
    return 0


# ---------------------------------------------------------------------------------------------
# The tests (parent process)


def _runtime(name: str) -> str:
    path = subprocess.run(["gcc", f"-print-file-name={name}"], capture_output=True, text=True).stdout.strip()
    assert os.path.isabs(path) and os.path.exists(path), f"gcc's {name} was not found; install gcc's sanitizer runtime"
    return path


@pytest.mark.parametrize("example", EXAMPLES)
def test_fuzz_under_sanitizers(tmp_path, example):
    from test_robustness import generated

    configs = [c for c in FUZZ_CONFIGS if c[0] == example]
    assert configs, f"no filter builds for {example}"
    args: List[str] = []
    for ex, filt, prec in configs:
        # generated here (cached for the other tests; the 15-state UKF takes seconds), compiled
        # in the child: a sanitized module must not be loaded into this process
        gen = generated(ex, filt, prec)
        gfile = tmp_path / f"{ex}-{filt}-{prec}.gen"
        gfile.write_bytes(pickle.dumps(gen))
        args += [str(gfile), ex, filt, prec]
    out = tmp_path / "result.pickle"
    env = dict(os.environ)
    env.update({
        "LD_PRELOAD": _runtime("libasan.so"),
        "ASAN_OPTIONS": "detect_leaks=0:abort_on_error=1:halt_on_error=1",
        "UBSAN_OPTIONS": "halt_on_error=1:print_stacktrace=1",
        "PYTHONPATH": REPO + os.pathsep + HERE + os.pathsep + env.get("PYTHONPATH", ""),
        "PYTHONDONTWRITEBYTECODE": "1",
    })
    proc = subprocess.run([sys.executable, os.path.abspath(__file__), str(out), *args], cwd=str(tmp_path), env=env,
                          capture_output=True, text=True, timeout=1500)
    report = proc.stdout + proc.stderr
    print(proc.stdout)  # the status counts per configuration (pytest -s shows them)
    assert not any(m in report for m in SANITIZER_MARKERS), report[-6000:]
    assert proc.returncode == 0, report[-6000:]
    results = pickle.loads(out.read_bytes())
    assert set(results) == {"-".join(c) for c in configs}
    for name, seen in results.items():
        # the sequences must reach both outcomes, else the property was never exercised
        assert seen.get(0, 0) > 0 and sum(v for k, v in seen.items() if k != 0) > 0, (name, seen)
        assert set(seen) <= ({0, 1, 2, 3, 4, 5, 6} if name.split("-")[1] == "pf" else {0, 1, 2, 3, 4, 5})


def test_sanitizer_setup_catches_an_overflow(tmp_path):
    # The same flags and preload must report a heap overflow in a cffi module, else the clean
    # runs above prove nothing.
    code = (
        "import cffi, sys\n"
        "ffi = cffi.FFI()\n"
        "ffi.cdef('int poke(int i);')\n"
        "ffi.set_source('_rb_poke', '#include <stdlib.h>\\n"
        "int poke(int i) { int *a = malloc(4 * sizeof(int)); int v; a[i] = 1; v = a[i]; free(a); return v; }',"
        f" extra_compile_args={SANITIZE_CFLAGS!r}, extra_link_args={SANITIZE_LDFLAGS!r})\n"
        "ffi.compile(tmpdir=sys.argv[1], verbose=False)\n"
    )
    subprocess.run([sys.executable, "-c", code, str(tmp_path)], check=True, capture_output=True, cwd=str(tmp_path))
    env = dict(os.environ, LD_PRELOAD=_runtime("libasan.so"), ASAN_OPTIONS="detect_leaks=0",
               PYTHONPATH=str(tmp_path))
    proc = subprocess.run([sys.executable, "-c", "import _rb_poke; print(_rb_poke.lib.poke(9))"], env=env,
                          capture_output=True, text=True, cwd=str(tmp_path))
    # UBSan's object-size check or ASan's heap-buffer-overflow, whichever sees it first
    assert proc.returncode != 0 and any(m in proc.stderr for m in SANITIZER_MARKERS + ("heap-buffer-overflow",)), \
        proc.stderr[-2000:]


def test_every_example_has_a_filter_to_fuzz():
    for ex in EXAMPLES:
        assert filters_for(spec_of(ex)), ex


if __name__ == "__main__":
    sys.exit(_child(sys.argv[1:]))
