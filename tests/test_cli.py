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
