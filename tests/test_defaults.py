"""One set of defaults (contract section 9) and clear messages, on every command.

The reference is the contract itself: every command and ``estgen.build`` default to
``--precision float`` (the build ``generate`` ships), and messages about a model file begin with
the path as the user gave it, then ``:LINE:`` (the ``file:line:`` form GNU tools print and
editors and CI problem matchers parse: GNU Coding Standards, "Formatting Error Messages").
"""

from __future__ import annotations

import inspect
import os
import subprocess
import sys

import pytest

import estgen
from estgen.cli import _parser

from conftest import ROOT

LONG_COMMANDS = ["generate", "verify", "simulate", "soak", "report", "compare", "replay"]
MINIMAL = {"generate": ["-o", "out"], "replay": ["-o", "out"]}


def _args(cmd: str, *extra: str):
    return _parser().parse_args([cmd, "model.py", *MINIMAL.get(cmd, []), *extra])


@pytest.mark.parametrize("cmd", LONG_COMMANDS)
def test_float_seed_zero_and_quiet_everywhere(cmd):
    args = _args(cmd)
    if hasattr(args, "precision"):
        assert args.precision == "float", cmd
    if hasattr(args, "seed"):
        assert args.seed == 0, cmd
    assert _args(cmd, "-q").quiet is True
    assert _args(cmd, "--quiet").quiet is True


@pytest.mark.parametrize("cmd", LONG_COMMANDS)
def test_every_command_takes_the_filter_options(cmd):
    # the filter options are declared once (estgen.filters.add_arguments) and every command
    # accepts them, so the C a command checks is the C generate ships (compare takes --filters)
    kind = ["--filters", "ekf,pf"] if cmd == "compare" else ["--filter", "pf"]
    args = _args(cmd, *kind, "--particles", "64", "--optimize", "size", "--commit-check", "cholesky",
                 "--gate", "s=0.99", "--precision", "double")
    common = estgen.filters.CommonOptions.from_args(args)
    assert (common.optimize, common.commit_check, common.gate_map, common.precision) == \
        ("size", "cholesky", {"s": 0.99}, "double"), cmd
    assert args.particles == 64, cmd


def test_python_api_defaults_to_float():
    for fn in (estgen.build, __import__("estgen.build", fromlist=["build"]).build,
               __import__("estgen.verify", fromlist=["verify"]).verify,
               __import__("estgen.simulate", fromlist=["monte_carlo"]).monte_carlo):
        assert inspect.signature(fn).parameters["precision"].default == "float", fn


def test_messages_start_with_the_path_as_given(tmp_path):
    folder = tmp_path / "models" / "v2"
    folder.mkdir(parents=True)
    (folder / "undef.py").write_text("from estgen import Model\nmodel = Model('u')\nx, = model.states('x')\n"
                                     "model.process([x + y])\n")
    env = {**os.environ, "PYTHONPATH": ROOT}
    given = os.path.join("models", "v2", "undef.py")
    proc = subprocess.run([sys.executable, "-m", "estgen", "generate", given, "-o", "out"], cwd=tmp_path,
                          capture_output=True, text=True, env=env)
    assert proc.returncode == 2
    assert proc.stderr.startswith(f"{given}:4: error: "), proc.stderr
    proc = subprocess.run([sys.executable, "-m", "estgen", "verify", os.path.join("models", "absent.py")],
                          cwd=tmp_path, capture_output=True, text=True, env=env)
    # contract section 9: the path as given, then ':LINE:' (a file that is not there: its line 1)
    assert proc.returncode == 2 and proc.stderr.startswith(os.path.join("models", "absent.py") + ":1: error: ")


def test_replay_is_an_estgen_command(tmp_path):
    model = os.path.join(ROOT, "generated_examples", "linear_cart", "model.py")
    proc = subprocess.run([sys.executable, "-m", "estgen", "replay", model, "--steps", "20", "-o", str(tmp_path)],
                          capture_output=True, text=True, env={**os.environ, "PYTHONPATH": ROOT})
    assert proc.returncode == 0, proc.stderr
    assert "#define REPLAY_STEPS 20u" in (tmp_path / "replay_data.h").read_text()
    import estgen.cross

    assert not hasattr(estgen.cross, "_main")  # no second command line
