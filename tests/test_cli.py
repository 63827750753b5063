"""The command line as a user meets it: help, exit codes, files written, stale checks."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from conftest import ROOT, example_model

COMMANDS = ["generate", "verify", "simulate", "report"]


def run(*args: str, cwd: str = ROOT) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "estgen", *args], cwd=cwd, capture_output=True, text=True)


@pytest.mark.parametrize("cmd", [None] + COMMANDS)
def test_help_on_every_command(cmd):
    proc = run(*([cmd] if cmd else []), "--help")
    assert proc.returncode == 0, proc.stderr
    assert "usage: estgen" in proc.stdout


def test_generate_then_check(tmp_path):
    model = example_model("linear_cart")
    out = tmp_path / "c"
    proc = run("generate", model, "--filter", "ekf", "--precision", "float", "-o", str(out))
    assert proc.returncode == 0, proc.stderr
    assert sorted(os.listdir(out)) == ["cart_ekf.c", "cart_ekf.h"]
    # up to date: exit 0, nothing listed
    proc = run("generate", model, "--filter", "ekf", "--precision", "float", "-o", str(out), "--check")
    assert proc.returncode == 0 and proc.stdout == ""
    # another precision differs: exit 1 and both files listed, nothing written
    before = (out / "cart_ekf.c").read_text()
    proc = run("generate", model, "--filter", "ekf", "--precision", "double", "-o", str(out), "--check")
    assert proc.returncode == 1
    assert "cart_ekf.c" in proc.stdout and "cart_ekf.h" in proc.stdout
    assert (out / "cart_ekf.c").read_text() == before


def test_verify_passes_and_writes_json(tmp_path):
    js = tmp_path / "v.json"
    proc = run("verify", example_model("beacon_rover"), "--precision", "float", "--steps", "100", "--json", str(js))
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "PASS" in proc.stdout
    import json

    data = json.loads(js.read_text())
    assert data["ok"] is True and data["precision"] == "float" and len(data["x"]) == 4


def test_bad_input_exit_2_without_traceback(tmp_path):
    bad = tmp_path / "bad.py"
    bad.write_text("from estgen import Model\nmodel = Model('b')\nx, = model.states('x')\n"
                   "model.process([x + y])\n")
    proc = run("generate", str(bad), "-o", str(tmp_path / "o"))
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "bad.py:4" in proc.stderr
    # the EKF refuses a non-differentiable model and points to the UKF
    proc = run("generate", example_model("valve_actuator"), "--filter", "ekf", "-o", str(tmp_path / "o"))
    assert proc.returncode == 2 and "ukf" in proc.stderr and "Traceback" not in proc.stderr
    # a bad option value is bad input too
    proc = run("generate", example_model("linear_cart"), "--gate", "encoder=2", "-o", str(tmp_path / "o"))
    assert proc.returncode == 2 and "Traceback" not in proc.stderr


def _files(out) -> dict:
    return {name: (out / name).read_bytes() for name in sorted(os.listdir(out))}


def test_generate_progress_goes_to_stderr_and_changes_nothing_else(tmp_path):
    """Common practice (as for verify and simulate): progress on stderr, results on stdout. A log
    (stderr not a terminal) gets nothing unless --progress asks, then one plain line per stage
    (no carriage returns or escape sequences); -q silences everything; stdout and the files are
    the same bytes whatever is shown."""
    model = example_model("beacon_rover")
    out = tmp_path / "c"
    args = ("generate", model, "--filter", "ekf", "--precision", "double", "-o", str(out))
    plain = run(*args)
    assert plain.returncode == 0, plain.stderr
    files = _files(out)
    assert plain.stderr.count("\n") == 1 and "generated in" in plain.stderr  # the summary line only
    shown = run(*args, "--progress")
    assert shown.returncode == 0, shown.stderr
    assert shown.stdout == plain.stdout and _files(out) == files
    lines = shown.stderr.splitlines()
    stages = ["derive predict", "derive update range_a", "derive update range_b", "derive update range_cd",
              "derive update compass", "print C (double)"]
    assert len(lines) == len(stages) + 1 and "generated in" in lines[-1]
    for line, name in zip(lines, stages):
        assert line.startswith("generate rover_ekf: " + name), lines
    assert "\r" not in shown.stderr and "\x1b" not in shown.stderr
    quiet = run(*args, "--progress", "-q")
    assert quiet.returncode == 0 and quiet.stdout == "" and quiet.stderr == ""
    assert _files(out) == files


def test_generate_progress_on_a_terminal_rewrites_one_line(tmp_path):
    """On a terminal the stages (the attitude UKF's here) and what each is doing rewrite one line
    (carriage return, erase to the end of line: ECMA-48 EL), which is erased before the summary
    line (common practice for progress displays)."""
    import pty

    master, slave = pty.openpty()
    model = os.path.join(ROOT, "tests", "models", "attitude_gyro.py")
    proc = subprocess.Popen([sys.executable, "-m", "estgen", "generate", model, "--filter", "ukf", "-o",
                             str(tmp_path / "c")], cwd=ROOT, stdout=subprocess.PIPE, stderr=slave)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:  # EIO: the child closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    stdout = proc.stdout.read().decode()
    assert proc.wait() == 0
    err = b"".join(chunks).decode()
    assert "attgyro_ukf.c" in stdout and "derive" not in stdout
    for text in ("derive predict: f at the sigma points", "derive update acc", "derive update mag",
                 "common subexpressions", "print C (float)"):
        assert "\rgenerate attgyro_ukf: " in err and text in err, err
    progress, summary = err.rsplit("\r\x1b[K", 1)
    assert "\n" not in progress.strip("\r\n") and summary.startswith("attgyro_ukf: ") and "generated in" in summary


@pytest.mark.parametrize("cmd", [["verify"], ["simulate", "--runs", "2", "--steps", "5"], ["soak", "--steps", "5"],
                                 ["report"], ["compare", "--runs", "2", "--steps", "5"], ["replay", "-o", "out"]],
                         ids=lambda c: c[0])
def test_negative_seed_is_bad_input(tmp_path, cmd):
    # contract section 2: bad input is exit 2 with one message, no traceback (numpy's generators
    # take no negative seed: numpy.random.SeedSequence raises ValueError, from its documentation)
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.run([sys.executable, "-m", "estgen", cmd[0], example_model("linear_cart"), *cmd[1:], "--seed", "-1"],
                          cwd=str(tmp_path), capture_output=True, text=True, env=env)
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr and "--seed" in proc.stderr


def test_unwritable_output_is_bad_input(tmp_path):
    # contract section 2: generate exits 2 on bad input with one short message naming the file
    # (a folder that cannot be made because a file holds its name: POSIX mkdir's EEXIST)
    blocker = tmp_path / "gen"
    blocker.write_text("not a folder")
    proc = run("generate", example_model("linear_cart"), "-o", str(blocker))
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr and str(blocker) in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1
    proc = run("generate", example_model("linear_cart"), "-o", str(tmp_path / "ok"), "--depfile",
               str(blocker / "x.d"))
    assert proc.returncode == 2 and "Traceback" not in proc.stderr and str(blocker) in proc.stderr, proc.stderr
