"""`estgen report` and the object-inspection helpers under it, checked against the tools'
own outputs, the ABI documents and hand counts. Needs gcc, arm-none-eabi-gcc/binutils,
qemu-system-arm and valgrind; fails (never skips) without them."""

from __future__ import annotations

import argparse
import ctypes
import json
from pathlib import Path

import pytest

import estgen
from estgen import cross, report
from estgen.build import compile_generated
from estgen.filters import generate as emit_generate

ROOT = Path(__file__).resolve().parent.parent
CART = ROOT / "generated_examples" / "linear_cart" / "model.py"


def _write(tmp_path: Path, name: str, text: str) -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


# ---- stack usage and the call graph ---------------------------------------------------------

_STACK_C = """
#include <string.h>
void sink(volatile char *p);
/* noinline: keep the helper a separate frame so the call graph has an edge to follow; the
 * external call keeps it from being a leaf (an x86-64 leaf may use the red zone unreported) */
static __attribute__((noinline)) int helper(const char *s)
{
    volatile char buf[512];
    size_t i;
    for (i = 0; i < sizeof buf; ++i) {
        buf[i] = s[i % 7u];
    }
    sink(buf);
    return buf[3] + buf[500];
}
int entry(const char *s)
{
    volatile char mine[64];
    mine[0] = s[0];
    return helper(s) + mine[0];
}
"""


@pytest.mark.parametrize("target", ["host", "cortex-m4f"])
def test_worst_stack_follows_static_helpers(tmp_path: Path, target: str) -> None:
    src = _write(tmp_path, "stk.c", _STACK_C)
    obj = cross.compile_object(src, target, tmp_path / target)
    su = cross.parse_stack_usage(obj.with_suffix(".su").read_text())
    # GCC -fstack-usage: a frame holds at least its local arrays
    assert su["helper"].bytes >= 512 and su["entry"].bytes >= 64
    assert su["entry"].qualifiers == ("static",)
    frames, edges = cross.parse_callgraph(obj.with_suffix(".ci").read_text())
    worst, external = cross.worst_stack(frames, edges, "entry")
    # the deepest chain entry -> helper: the sum of the two frames GCC reported
    assert worst == su["entry"].bytes + su["helper"].bytes
    assert "helper" not in external and external == ["sink"]


def test_parse_stack_usage_format() -> None:
    # The line format GCC documents for -fstack-usage: "file:line:col:function  bytes  qualifiers"
    # (GCC manual, Developer Options, -fstack-usage), tab-separated.
    text = "foo.c:3:5:f\t48\tstatic\nfoo.c:9:6:g\t16\tdynamic,bounded\n"
    su = cross.parse_stack_usage(text)
    assert su["f"].bytes == 48 and su["f"].qualifiers == ("static",)
    assert su["g"].qualifiers == ("dynamic", "bounded")


def test_worst_stack_refuses_recursion() -> None:
    frames = {"a": 8, "b": 8}
    edges = {"a": ["b"], "b": ["a"]}
    with pytest.raises(ValueError):
        cross.worst_stack(frames, edges, "a")
    frames2 = {"a": 8, "b": 24, "c": 4}
    edges2 = {"a": ["b", "c", "sqrtf"]}
    assert cross.worst_stack(frames2, edges2, "a") == (32, ["sqrtf"])  # 8 + max(24, 4)


# ---- sizes ----------------------------------------------------------------------------------

_STRUCT_H = "typedef struct { char c; double d; float f[3]; } probe_t;\n"


class _Probe(ctypes.Structure):
    _fields_ = [("c", ctypes.c_char), ("d", ctypes.c_double), ("f", ctypes.c_float * 3)]


@pytest.mark.parametrize("target", ["cortex-m0plus", "cortex-m4f", "cortex-m7"])
def test_struct_size_arm(tmp_path: Path, target: str) -> None:
    hdr = _write(tmp_path, "probe.h", _STRUCT_H)
    # AAPCS32 (Procedure Call Standard for the Arm Architecture), 5.1 Fundamental Data Types:
    # double is 8-byte aligned, whatever the FPU; so c at 0, d at 8, f at 16..28, padded to 32.
    assert cross.struct_size(hdr, "probe_t", target, tmp_path / target) == 32


def test_struct_size_host_matches_ctypes(tmp_path: Path) -> None:
    hdr = _write(tmp_path, "probe.h", _STRUCT_H)
    assert cross.struct_size(hdr, "probe_t", "host", tmp_path) == ctypes.sizeof(_Probe)  # the C ABI, via ctypes


def test_section_sizes(tmp_path: Path) -> None:
    src = _write(tmp_path, "tbl.c", "const unsigned char table[1000] = {1};\nunsigned char scratch[300];\n"
                                    "int get(int i) { return table[i] + scratch[i]; }\n")
    obj = cross.compile_object(src, "cortex-m4f", tmp_path, extra_flags=["-fno-common"])
    sizes = cross.section_sizes(obj, "cortex-m4f")
    assert sizes["rodata"] == 1000  # sizeof table (C99 6.5.3.4)
    assert sizes["bss"] == 300
    assert 0 < sizes["text"] < 64  # one load-add-return function in Thumb-2


# ---- symbol checks can fail ---------------------------------------------------------------

def test_forbidden_references_are_found(tmp_path: Path) -> None:
    src = _write(tmp_path, "bad.c", "#include <stdlib.h>\n#include <stdio.h>\n#include <math.h>\n"
                                    "extern double gain;\n"
                                    "float g(float a) { char *p = malloc(4); printf(\"%p\", (void *)p);\n"
                                    "  return (float)sqrt((double)a) * (float)((double)a * gain); }\n")
    obj = cross.compile_object(src, "cortex-m4f", tmp_path)
    bad = cross.forbidden_references(cross.undefined_symbols(obj, "cortex-m4f"), "float", "cortex-m4f")
    assert "malloc" in bad and "printf" in bad
    # the M4F's FPU is single precision: a double multiply needs __aeabi_dmul (Arm RTABI32 4.1.2)
    assert "__aeabi_dmul" in bad and "__aeabi_f2d" in bad
    assert "sqrt" in bad  # the double function, not sqrtf


# ---- operation counts from C text -------------------------------------------------------------

_OPS_C = """
static float helper(float a, float b) { return a * b + sqrtf(a); }
int f(float *s, const float *z, float dt)
{
    size_t i, j;
    const float *w = z;
    float acc = 0.0F;
    for (i = 0; i < 4u; ++i) {
        acc += s[i * 2u + 1u] * w[i];
        for (j = 0; j < 3u; ++j) {
            acc -= s[j] / dt;
        }
    }
    s[0] = helper(acc, dt) - sinf(dt) * 2.0F + (1.0F / dt);
    return (int)(i + 1u);
}
"""


def test_count_c_ops_hand_counted() -> None:
    # Counted by hand: the i loop runs 4 times (1 add, 1 mul each), the j loop 12 times
    # (1 add, 1 div each); the last statement has 2 adds, 1 mul, 1 div, 1 sinf plus the
    # helper's 1 mul, 1 add and 1 sqrtf. Index arithmetic (i * 2u + 1u, i + 1u) is not counted.
    assert report.count_c_ops(_OPS_C, "f") == {"add": 19, "mul": 6, "div": 13, "sqrt": 1, "transcendental": 1}


# ---- callgrind counts instructions -------------------------------------------------------------

_NOPS_C = """
/* noinline + asm: exactly 1000 nops in the body; callgrind counts each (Ir). */
__attribute__((noinline)) void spin(void) { __asm__ volatile(".rept 1000\\n\\tnop\\n\\t.endr"); }
int main(void) { int k; for (k = 0; k < 10; ++k) spin(); return 0; }
"""


def test_callgrind_counts_known_instructions(tmp_path: Path) -> None:
    import subprocess

    src = _write(tmp_path, "nops.c", _NOPS_C)
    exe = tmp_path / "nops"
    subprocess.run([cross.find_tool("cc"), "-O2", str(src), "-o", str(exe)], check=True)
    counts = cross.callgrind_instructions(exe, ["spin"], tmp_path)
    ir, calls = counts["spin"]
    assert calls == 10
    # valgrind manual, callgrind: Ir = instructions executed. 1000 nops plus the return
    # (and an endbr64 where the compiler adds CET landing pads): 1001 to 1003 per call.
    assert 1001 <= ir / calls <= 1003


# ---- the report itself ------------------------------------------------------------------

@pytest.fixture(scope="module")
def cart_report(tmp_path_factory: pytest.TempPathFactory):
    work = tmp_path_factory.mktemp("report")
    return report.make_report(str(CART), "ekf", "float", "cortex-m4f", steps=100, seed=5, work_dir=str(work))


def test_report_ram_matches_cffi(cart_report) -> None:
    spec = estgen.load_model(CART)
    gen = emit_generate(spec, "ekf", "float")
    # all four-byte floats: the layout is the same on the M4F (AAPCS32) and the host, where
    # cffi reads sizeof from the compiled struct
    assert cart_report["ram_bytes"] == compile_generated(gen).ffi.sizeof("cart_ekf_t")


def test_report_figures(cart_report) -> None:
    rep = cart_report
    fns = rep["functions"]
    names = ["cart_ekf_predict", "cart_ekf_update_encoder", "cart_ekf_update_speed"]
    for fn in names:
        assert fns[fn]["stack_static"] is True
        assert fns[fn]["stack_bytes"] > 0
        assert sum(fns[fn]["ops"].values()) > 0
    # flash is .text + .rodata of the object on the target
    assert rep["flash"]["total"] == rep["flash"]["text"] + rep["flash"]["rodata"] > 0
    m4 = rep["instructions"]["qemu-cortex-m4f"]
    host = rep["instructions"]["host-callgrind"]
    assert m4["instructions_per_tick"] == pytest.approx(40.0, rel=1e-3)  # see test_embedded
    for fn in names:
        assert m4[fn]["calls"] > 0 and host[fn]["calls"] == m4[fn]["calls"]
        assert m4[fn]["instructions_per_call"] > 20 and host[fn]["instructions_per_call"] > 20
        # Two independent stack figures: the paint probe touched no more than GCC's bound.
        # GCC cannot see library frames; the only library call allowed here is sqrtf, which
        # on the M4F's FPU is the inline VSQRT.F32 with a call only on the errno path for a
        # negative argument (GCC, -fmath-errno; common practice), never taken in a good run.
        assert set(fns[fn]["library_calls"]) <= {"sqrtf"}, fns[fn]["library_calls"]
        assert 0 < m4[fn]["stack_high_water"] <= fns[fn]["stack_bytes"]
    assert rep["missing"] == {}
    assert "cart_ekf_predict" in report.format_report(rep)


def test_report_names_missing_tools(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    real = cross.shutil.which
    monkeypatch.setattr(cross.shutil, "which", lambda name: None if name == "qemu-system-arm" else real(name))
    rep = report.make_report(str(CART), "ekf", "float", "host", steps=20, seed=1, work_dir=str(tmp_path))
    assert "qemu-system-arm" in rep["missing"]
    assert "qemu-cortex-m4f" not in rep["instructions"]  # left out, not guessed
    assert rep["ram_bytes"] is not None  # the host figures are still there
    assert "missing: qemu-system-arm" in report.format_report(rep)


def test_report_command_json(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    parser = argparse.ArgumentParser()
    report.add_arguments(parser)
    out = tmp_path / "r.json"
    args = parser.parse_args([str(CART), "--target", "cortex-m0plus", "--steps", "20", "--json", str(out)])
    assert report.run(args) == 0
    data = json.loads(out.read_text())
    assert data["target"] == "cortex-m0plus" and data["model"] == "cart"
    assert f"{data['ram_bytes']} bytes" in capsys.readouterr().out


def test_report_bad_input_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    parser = argparse.ArgumentParser()
    report.add_arguments(parser)
    # contract section 2: bad input exits 2 with one short message naming the file
    valve = ROOT / "generated_examples" / "valve_actuator" / "model.py"  # Min/Max: no EKF
    assert report.run(parser.parse_args([str(valve), "--filter", "ekf"])) == 2
    assert "model.py" in capsys.readouterr().err
    assert report.run(parser.parse_args([str(tmp_path / "missing.py")])) == 2
