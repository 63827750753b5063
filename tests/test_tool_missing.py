"""A missing outside tool is one message naming the package to install, and exit 2, on every
command that needs it (contract section 9). The tools are hidden by running estgen with a PATH
that holds every program but them, and a fresh build cache (a cached build needs no compiler).

Package names: Debian's (packages.debian.org: gcc, gcc-arm-none-eabi, qemu-system-arm, valgrind).
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from estgen.errors import ToolMissing

from conftest import ROOT, example_model


def _path_without(tmp_path, hidden):
    """A folder of links to every program on PATH except ``hidden`` (first of each name wins)."""
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    for d in os.environ.get("PATH", "").split(os.pathsep):
        if not os.path.isdir(d):
            continue
        for name in os.listdir(d):
            src = os.path.join(d, name)
            if name in hidden or (bin_dir / name).exists() or not os.access(src, os.X_OK):
                continue
            if any(name.startswith(h) for h in hidden if h.endswith("-")):
                continue
            os.symlink(src, bin_dir / name)
    return str(bin_dir)


def _run(tmp_path, hidden, *args):
    env = {**os.environ, "PATH": _path_without(tmp_path, hidden), "ESTGEN_CACHE": str(tmp_path / "cache"),
           "PYTHONPATH": ROOT, "CC": "cc"}
    return subprocess.run([sys.executable, "-m", "estgen", *args], capture_output=True, text=True, env=env,
                          cwd=str(tmp_path))


COMPILERS = {"cc", "gcc", "x86_64-linux-gnu-gcc", "clang"}
CART = example_model("linear_cart")


@pytest.mark.parametrize("args", [
    ["verify", CART, "--steps", "20"],
    ["simulate", CART, "--runs", "2", "--steps", "10", "--workers", "1"],
    ["soak", CART, "--steps", "100"],
], ids=["verify", "simulate", "soak"])
def test_no_c_compiler(tmp_path, args):
    proc = _run(tmp_path, COMPILERS, *args)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "Traceback" not in proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "is not installed" in lines[0] and "apt-get install gcc" in lines[0]


def test_no_cross_toolchain_or_emulator(tmp_path):
    proc = _run(tmp_path, {"arm-none-eabi-"}, "report", CART, "--steps", "20")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr
    assert "apt-get install gcc-arm-none-eabi" in proc.stderr
    second = tmp_path / "second"
    second.mkdir()
    proc = _run(second, {"qemu-system-arm", "valgrind"}, "report", CART, "--steps", "20")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr
    assert "apt-get install qemu-system-arm" in proc.stderr and "apt-get install valgrind" in proc.stderr


def test_tool_missing_names_the_package():
    assert ToolMissing("arm-none-eabi-gcc").package == "gcc-arm-none-eabi"
    assert ToolMissing("ninja").package == "ninja-build"
    # nm and size come in Debian's binutils package (packages.debian.org), not in one of their name
    assert ToolMissing("nm").package == "binutils" and ToolMissing("size").package == "binutils"
    import pickle

    err = pickle.loads(pickle.dumps(ToolMissing("valgrind")))
    assert err.tool == "valgrind" and "apt-get install valgrind" in str(err)


def test_no_binutils_for_the_host_target(tmp_path):
    proc = _run(tmp_path, {"nm", "size"}, "report", CART, "--target", "host", "--steps", "20")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr
    assert "apt-get install binutils" in proc.stderr and "apt-get install nm" not in proc.stderr


def test_bad_clock_is_refused_before_any_tool_runs(tmp_path):
    # --clock-mhz 0 is bad input whatever is installed: refused first (exit 2), not after a
    # measurement that here could not even start (no cross toolchain)
    proc = _run(tmp_path, {"arm-none-eabi-"}, "report", CART, "--clock-mhz", "0")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr
    assert "--clock-mhz must be > 0" in proc.stderr and "arm-none-eabi" not in proc.stderr
