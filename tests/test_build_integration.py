"""Build integration (contract section 8): the depfile read by GNU Make and Ninja themselves,
the CMake package, and the CMake firmware example for the Cortex-M4F run under QEMU.

The references are the build tools: GNU Make's `-q` (exit 0 when every target is up to date,
GNU Make manual, "Instead of Executing Recipes"), Ninja's `-n` dry run ("no work to do"), and
CMake's find_package config mode. These need make, ninja, cmake, arm-none-eabi-gcc and
qemu-system-arm; they fail when one is missing (.ci/run installs them).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import textwrap
import time

import pytest

from conftest import EXAMPLES_DIR, ROOT, require_tool

ESTGEN = [sys.executable, "-m", "estgen"]
ENV = {**os.environ, "PYTHONPATH": ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")}

MODEL = textwrap.dedent("""
    import sympy as sp
    from estgen import Model
    from tank_consts import AREA

    model = Model("tank")
    (h,) = model.states("h", units="m")
    (q,) = model.inputs("q", units="m^3/s")
    dt = model.dt
    model.process([h + dt * q / AREA])
    model.process_noise(sp.Matrix([[1e-6]]) * dt)
    model.sensor("level", [h], noise=[1e-4], units="m")
    model.initial([0.5], sp.Matrix([[0.01]]))
""")


def _sh(cmd, cwd, check=True) -> subprocess.CompletedProcess:
    proc = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, env=ENV)
    if check:
        assert proc.returncode == 0, (cmd, proc.stdout, proc.stderr)
    return proc


def _bump(path) -> None:
    """Touch ``path`` so that it is newer than anything built so far (file systems that keep
    whole seconds included), without a time in the future."""
    time.sleep(1.05)
    os.utime(path, None)


@pytest.fixture()
def project(tmp_path):
    (tmp_path / "tank.py").write_text(MODEL)
    (tmp_path / "tank_consts.py").write_text("AREA = 0.25\n")
    return tmp_path


def test_depfile_lists_the_model_and_local_imports_only(project):
    out = project / "gen"
    _sh([*ESTGEN, "generate", "tank.py", "-o", str(out), "--depfile", str(out / "tank.d"), "-q"], project)
    text = (out / "tank.d").read_text()
    targets, deps = text.split(": ", 1)
    assert targets.split() == [str(out / "tank_ekf.c"), str(out / "tank_ekf.h")]  # as -o gave them
    listed = deps.replace("\\\n", " ").split()
    assert listed == ["tank.py", str(project / "tank_consts.py")]  # the model as given
    assert "sympy" not in text and "numpy" not in text and "estgen" not in text


def test_outputs_lists_names_without_generating(project):
    proc = _sh([*ESTGEN, "generate", "tank.py", "--filter", "ukf", "-o", "gen", "--outputs"], project)
    assert proc.stdout.split() == [os.path.join("gen", "tank_ukf.c"), os.path.join("gen", "tank_ukf.h")]
    assert not (project / "gen").exists()


def test_make_rule_reruns_exactly_when_an_input_changes(project):
    require_tool("make")
    gen = " ".join(ESTGEN)
    (project / "Makefile").write_text(
        "gen/tank_ekf.c gen/tank_ekf.h: tank.py\n"
        f"\t{gen} generate tank.py -o gen --depfile gen/tank.d -q\n"
        "-include gen/tank.d\n")
    _sh(["make"], project)
    assert _sh(["make", "-q"], project, check=False).returncode == 0  # up to date
    for changed in ("tank_consts.py", "tank.py"):
        _bump(project / changed)
        assert _sh(["make", "-q"], project, check=False).returncode == 1, changed  # must rerun
        _sh(["make"], project)
        # the rule touched its outputs even where their content did not change
        assert _sh(["make", "-q"], project, check=False).returncode == 0, changed


def test_ninja_rule_reruns_exactly_when_an_input_changes(project):
    require_tool("ninja")
    gen = " ".join(ESTGEN)
    (project / "build.ninja").write_text(
        f"rule gen\n  command = {gen} generate $in -o gen --depfile gen/tank.d -q\n"
        "  depfile = gen/tank.d\n  deps = gcc\n"
        "build gen/tank_ekf.c gen/tank_ekf.h: gen tank.py\n")
    _sh(["ninja"], project)
    assert "no work to do" in _sh(["ninja", "-n"], project).stdout
    _bump(project / "tank_consts.py")
    assert "no work to do" not in _sh(["ninja", "-n"], project).stdout
    _sh(["ninja"], project)
    assert "no work to do" in _sh(["ninja", "-n"], project).stdout


def test_cmake_dir_holds_the_package():
    proc = _sh([*ESTGEN, "--cmake-dir"], ROOT)
    folder = proc.stdout.strip()
    assert os.path.isfile(os.path.join(folder, "estgen-config.cmake"))
    assert os.path.isfile(os.path.join(folder, "estgen-config-version.cmake"))


def _configure(src, build, generator, extra=()):
    cmake_dir = _sh([*ESTGEN, "--cmake-dir"], ROOT).stdout.strip()
    return _sh(["cmake", "-S", str(src), "-B", str(build), "-G", generator, f"-Destgen_DIR={cmake_dir}",
                f"-DESTGEN_EXECUTABLE={sys.executable};-m;estgen", *extra], ROOT)


@pytest.mark.slow
def test_cmake_host_project_with_two_filters(project):
    """estgen_add_filter on a host executable: both filters built, PRECISION and OPTIONS passed
    through, bad arguments refused at configure time."""
    require_tool("cmake")
    require_tool("ninja")
    (project / "main.c").write_text(textwrap.dedent("""
        #include "tank_ekf.h"
        #include "tank_ukf.h"
        int main(void)
        {
            static tank_ekf_t e;
            static tank_ukf_t u;
            const double q = 0.01;
            const float z = 0.51f;
            tank_ekf_init(&e);
            tank_ukf_init(&u);
            if (tank_ekf_predict(&e, &q, 0.1) != 0 || tank_ukf_predict(&u, (const float *)0 + 0, 0.1f) != 1) {
                return 1;
            }
            return tank_ukf_update_level(&u, &z);
        }
    """))
    (project / "CMakeLists.txt").write_text(textwrap.dedent("""
        cmake_minimum_required(VERSION 3.20)
        project(host C)
        find_package(estgen CONFIG REQUIRED)
        add_executable(app main.c)
        estgen_add_filter(app MODEL tank.py FILTER ekf PRECISION double)
        estgen_add_filter(app MODEL tank.py FILTER ukf OPTIONS --alpha 0.5 --commit-check diagonal)
    """))
    build = project / "build"
    _configure(project, build, "Ninja")
    _sh(["cmake", "--build", str(build)], ROOT)
    assert _sh([str(build / "app")], ROOT, check=False).returncode == 0
    ukf_h = next(build.rglob("tank_ukf.h")).read_text()
    assert "options: --filter ukf --precision float --commit-check diagonal --alpha 0.5" in ukf_h
    assert "typedef double tank_ekf_real;" in next(build.rglob("tank_ekf.h")).read_text()
    (project / "CMakeLists.txt").write_text(
        "cmake_minimum_required(VERSION 3.20)\nproject(bad C)\nfind_package(estgen CONFIG REQUIRED)\n"
        "add_executable(app main.c)\nestgen_add_filter(app MODEL tank.py FILTER kalman)\n")
    proc = subprocess.run(["cmake", "-S", str(project), "-B", str(project / "b2"),
                           f"-Destgen_DIR={_sh([*ESTGEN, '--cmake-dir'], ROOT).stdout.strip()}"],
                          capture_output=True, text=True, env=ENV)
    assert proc.returncode != 0 and "FILTER must be ekf, ukf or pf" in proc.stderr


FIRMWARE = os.path.join(EXAMPLES_DIR, "cmake_firmware")


def _qemu(elf) -> dict:
    qemu = require_tool("qemu-system-arm")
    proc = subprocess.run([qemu, "-machine", "mps2-an386", "-cpu", "cortex-m4", "-nographic", "-monitor", "none",
                           "-serial", "none", "-semihosting-config", "enable=on,target=native", "-kernel", str(elf)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    # without a chardev QEMU writes semihosting output to its stderr
    text = proc.stdout + proc.stderr
    return {k: int(v) for k, v in (line.split() for line in text.splitlines() if len(line.split()) == 2)}


@pytest.mark.slow
@pytest.mark.parametrize("generator", ["Ninja", "Unix Makefiles"])
def test_cmake_firmware_example(tmp_path, generator):
    """generated_examples/cmake_firmware: configure and build for the Cortex-M4F, a second build
    does nothing, touching the model or its imported constants regenerates, and the firmware
    finds the load step main.c applies (2 mN*m, within 3 sigma and 20%)."""
    for tool in ("cmake", "ninja" if generator == "Ninja" else "make", "arm-none-eabi-gcc"):
        require_tool(tool)
    src = tmp_path / "src"
    shutil.copytree(FIRMWARE, src / "cmake_firmware")
    shutil.copytree(os.path.join(EXAMPLES_DIR, "firmware_qemu"), src / "firmware_qemu")
    proj = src / "cmake_firmware"
    build = tmp_path / "build"
    _configure(proj, build, generator, [f"-DCMAKE_TOOLCHAIN_FILE={proj / 'cortex-m4f.cmake'}"])
    first = _sh(["cmake", "--build", str(build)], ROOT).stdout
    assert "estgen: ekf (float) from model.py" in first
    gen_c = build / "estgen" / "drive_fw_ekf" / "drive_ekf.c"
    elf = build / "drive_fw.elf"
    stamp = (gen_c.stat().st_mtime_ns, elf.stat().st_mtime_ns)
    again = _sh(["cmake", "--build", str(build)], ROOT).stdout
    assert "estgen:" not in again and "Building" not in again
    assert (gen_c.stat().st_mtime_ns, elf.stat().st_mtime_ns) == stamp
    if generator == "Ninja":
        assert "no work to do" in _sh(["ninja", "-C", str(build), "-n"], ROOT).stdout
    for changed in ("motor_constants.py", "model.py"):
        _bump(proj / changed)
        out = _sh(["cmake", "--build", str(build)], ROOT).stdout
        assert "estgen: ekf (float) from model.py" in out, changed
        assert gen_c.stat().st_mtime_ns > stamp[0]
        stamp = (gen_c.stat().st_mtime_ns, elf.stat().st_mtime_ns)
        assert "estgen:" not in _sh(["cmake", "--build", str(build)], ROOT).stdout
    res = _qemu(elf)
    assert res["refused"] == 0
    assert abs(res["tload"] - 2000) <= max(3 * res["tload_sigma"], 0) and abs(res["tload"] - 2000) < 400
    assert abs(res["omega"] - res["omega_true"]) < 0.01 * abs(res["omega_true"])


def test_the_wheel_ships_every_package_and_the_cmake_files():
    """A plain `pip install .` (the Quick start) installs what pyproject lists: every folder of
    estgen/ with an __init__.py must be listed, and the CMake package is package data
    (setuptools documentation: explicit `packages` are not searched)."""
    import tomllib

    with open(os.path.join(ROOT, "pyproject.toml"), "rb") as fh:
        conf = tomllib.load(fh)["tool"]["setuptools"]
    listed = set(conf["packages"])
    top = os.path.join(ROOT, "estgen")
    rels = [os.path.relpath(d, top) for d, _, files in os.walk(top) if "__init__.py" in files]
    on_disk = {"estgen" if r == "." else "estgen." + r.replace(os.sep, ".") for r in rels}
    assert on_disk <= listed, on_disk - listed
    assert "cmake/*.cmake" in conf["package-data"]["estgen"]
