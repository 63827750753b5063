"""Static analysis of every generated file (examples x filters x precisions): gcc -fanalyzer,
cppcheck and clang -Weverything report nothing, and the C holds no heap, no stdio, no
variable-length arrays and includes only <math.h>, <stdint.h>, <stddef.h> and <string.h>.

Sources: gcc's -fanalyzer and -Wvla (GCC manual, "Options That Control Static Analysis" and
"Warning Options"); cppcheck's manual for --enable, --error-exitcode and --inline-suppr; clang's
-Weverything (Clang manual, "Diagnostic flags"); the contract (/work/shared/contract.md section 4)
for what the C may not contain. The tools are installed by CI (.ci/run); a missing tool fails the
test, it never skips.

cppcheck 2.10's value-flow analysis grows much faster than linearly with the length of a
straight-line function: on the 15-state navigation filter it takes tens of seconds (EKF) to well
over ten minutes (UKF). Files larger than CPPCHECK_MAX_BYTES are therefore analysed by
``python tests/test_static_analysis.py --cppcheck-all`` (run by hand and in the soak job, not in
the test suite); gcc -fanalyzer and clang still see them here.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
from typing import List, Tuple

import pytest

from test_robustness import CONFIG_IDS, CONFIGS, generated

#: see the module docstring: bigger sources are left to --cppcheck-all
CPPCHECK_MAX_BYTES = 64 * 1024

ALLOWED_SYSTEM_HEADERS = {"math.h", "stdint.h", "stddef.h", "string.h"}

GCC_FLAGS = ["-std=c99", "-fanalyzer", "-Wall", "-Wextra", "-Wpedantic", "-Wconversion", "-Wdouble-promotion",
             "-Wshadow", "-Wvla", "-Wstack-usage=65536", "-Werror"]

CPPCHECK_FLAGS = ["--enable=warning,style,portability,performance", "--error-exitcode=1", "--inline-suppr",
                  "--std=c99", "--language=c", "-q"]

#: clang -Weverything minus these, each justified:
CLANG_DISABLED = [
    # C99 allows declarations after statements (ISO C99 6.8.2); the warning is for C89 compilers.
    "-Wno-declaration-after-statement",
    # the UKF source states its weights as #defines (documentation the tests read) that the
    # unrolled code does not need to reference; the EKF passes with this warning on.
    "-Wno-unused-macros",
]


def _tool(name: str) -> str:
    path = shutil.which(name)
    assert path, f"{name} is not installed; CI installs it (.ci/run) and this test needs it"
    return path


def _write(tmp_path, config: Tuple[str, str, str]) -> Tuple[str, str]:
    gen = generated(*config)
    folder = tmp_path / "-".join(config)
    folder.mkdir()
    for name, text in gen.files.items():
        (folder / name).write_text(text, encoding="utf-8")
    return str(folder), str(folder / f"{gen.prefix}.c")


def _run(cmd: List[str], cwd: str) -> subprocess.CompletedProcess:
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=900)


@pytest.mark.parametrize("config", CONFIGS, ids=CONFIG_IDS)
def test_gcc_analyzer_is_clean(tmp_path, config):
    folder, src = _write(tmp_path, config)
    proc = _run([_tool("gcc"), *GCC_FLAGS, "-c", src, "-o", os.devnull], folder)
    assert proc.returncode == 0 and not proc.stderr.strip(), proc.stderr


@pytest.mark.parametrize("config", CONFIGS, ids=CONFIG_IDS)
def test_clang_weverything_is_clean(tmp_path, config):
    folder, src = _write(tmp_path, config)
    proc = _run([_tool("clang"), "-std=c99", "-Weverything", *CLANG_DISABLED, "-Werror", "-c", src, "-o", os.devnull],
                folder)
    assert proc.returncode == 0 and not proc.stderr.strip(), proc.stderr


# The EKF's compact forms (--optimize size; under speed a dense F, and the shared scalar update with
# a whitened full R above 12 states) on models the examples do not reach: the benchmark's fully
# coupled and sparse synthetic models and an attitude model with a full R. The same two tools.
COMPACT_MODELS = [("dense", 8), ("sparse", 13), ("attitude_corr_mag", 0)]


@pytest.mark.parametrize("optimize", ["speed", "size"])
@pytest.mark.parametrize("kind,n", COMPACT_MODELS, ids=[f"{k}{n or ''}" for k, n in COMPACT_MODELS])
def test_compact_forms_are_clean(tmp_path, kind, n, optimize):
    import estgen
    from estgen.filters import generate

    sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "benchmarks"))
    from synthetic import write_model

    path = (os.path.join(os.path.dirname(os.path.abspath(__file__)), "models", f"{kind}.py") if n == 0
            else write_model(kind, n, str(tmp_path)))
    spec = estgen.load_model(path)
    for precision in ("float", "double"):
        gen = generate(spec, filter="ekf", precision=precision, optimize=optimize)
        folder = tmp_path / precision
        folder.mkdir()
        for name, text in gen.files.items():
            (folder / name).write_text(text, encoding="utf-8")
        src = str(folder / f"{gen.prefix}.c")
        for cmd in ([_tool("gcc"), *GCC_FLAGS, "-c", src, "-o", os.devnull],
                    [_tool("clang"), "-std=c99", "-Weverything", *CLANG_DISABLED, "-Werror", "-c", src, "-o", os.devnull]):
            proc = _run(cmd, str(folder))
            assert proc.returncode == 0 and not proc.stderr.strip(), (cmd[0], precision, proc.stderr)


def cppcheck(folder: str, src: str) -> subprocess.CompletedProcess:
    return _run([_tool("cppcheck"), *CPPCHECK_FLAGS, "-I", folder, src], folder)


SMALL = [(c, i) for c, i in zip(CONFIGS, CONFIG_IDS) if len(generated(*c).source) <= CPPCHECK_MAX_BYTES]


@pytest.mark.parametrize("config", [c for c, _ in SMALL], ids=[i for _, i in SMALL])
def test_cppcheck_is_clean(tmp_path, config):
    folder, src = _write(tmp_path, config)
    proc = cppcheck(folder, src)
    assert proc.returncode == 0 and not proc.stderr.strip(), proc.stderr + proc.stdout


def test_cppcheck_covers_every_example():
    # The size limit leaves out only the 15- and 16-state navigation models; every other example is analysed.
    covered = {c[0] for c, _ in SMALL}
    assert covered >= {c[0] for c in CONFIGS} - {"strapdown_nav", "quat_nav"}, covered
    assert generated("linear_cart", "ekf", "float").source.count("\n") > 50  # real code, not an empty file


def test_cppcheck_finds_a_planted_defect(tmp_path):
    # The same flags must report an out-of-bounds write, else the clean results above prove nothing.
    src = tmp_path / "planted.c"
    src.write_text("void f(float *out) { float a[3]; int i; for (i = 0; i <= 3; ++i) { a[i] = 1.0f; } out[0] = a[0]; }\n")
    proc = cppcheck(str(tmp_path), str(src))
    assert proc.returncode != 0 and "arrayIndexOutOfBounds" in proc.stderr + proc.stdout


def test_gcc_flags_catch_a_vla(tmp_path):
    src = tmp_path / "vla.c"
    src.write_text("float f(int n) { float a[n]; a[0] = 1.0f; return a[0]; }\n")
    proc = _run([_tool("gcc"), *GCC_FLAGS, "-c", str(src), "-o", os.devnull], str(tmp_path))
    assert proc.returncode != 0 and "vla" in proc.stderr


_FORBIDDEN = re.compile(r"\b(malloc|calloc|realloc|free|alloca|printf|fprintf|sprintf|snprintf|puts|putchar|fopen|"
                        r"FILE|stdin|stdout|stderr|exit|abort|setjmp|longjmp|goto)\b")


def _strip_comments(text: str) -> str:
    text = re.sub(r"/\*.*?\*/", " ", text, flags=re.S)
    return re.sub(r"//[^\n]*", " ", text)


@pytest.mark.parametrize("config", CONFIGS, ids=CONFIG_IDS)
def test_no_heap_no_stdio_and_only_allowed_includes(config):
    gen = generated(*config)
    own = set(gen.files)
    for name, text in gen.files.items():
        code = _strip_comments(text)
        m = _FORBIDDEN.search(code)
        assert m is None, f"{name} uses {m.group(0)}"
        for inc in re.findall(r'#\s*include\s*([<"][^>"]+[>"])', code):
            target = inc[1:-1]
            if inc.startswith('"'):
                assert target in own, f"{name} includes {inc}, not a generated file"
            else:
                assert target in ALLOWED_SYSTEM_HEADERS, f"{name} includes {inc}"
        # no file-scope mutable variables: every file-scope 'static' is a function
        for decl in re.findall(r"^static\s+[^;{]*[;{]", code, flags=re.M):
            assert "(" in decl, f"{name} has a file-scope static variable: {decl!r}"


def main(argv: List[str]) -> int:
    """``--cppcheck-all``: cppcheck every generated file, however large (slow)."""
    ap = argparse.ArgumentParser(description=main.__doc__)
    ap.add_argument("--cppcheck-all", action="store_true", required=True)
    ap.add_argument("--out", default=None, help="folder for the generated files (default: a temp folder)")
    args = ap.parse_args(argv)
    import tempfile

    root = args.out or tempfile.mkdtemp(prefix="estgen-cppcheck-")
    failed = 0
    for config in CONFIGS:
        gen = generated(*config)
        folder = os.path.join(root, "-".join(config))
        os.makedirs(folder, exist_ok=True)
        for name, text in gen.files.items():
            with open(os.path.join(folder, name), "w", encoding="utf-8") as fh:
                fh.write(text)
        proc = cppcheck(folder, os.path.join(folder, f"{gen.prefix}.c"))
        ok = proc.returncode == 0 and not proc.stderr.strip()
        failed += not ok
        print(f"{'clean' if ok else 'FINDINGS'}  {'-'.join(config)}", flush=True)
        if not ok:
            print(proc.stderr + proc.stdout)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
