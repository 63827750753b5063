"""The model-file error table: every malformed file in tests/bad_models/ is refused with an
estgen.ModelError whose text is short, names the file and line, says what is wrong and what
to do about it. The command line reports the same with exit status 2 and no traceback.

The expected lines and fragments are read off the fixture files by hand; the rule that a
user-fixable error is one short message, not a traceback, is common practice for compilers
and code generators (and the contract's 'exit 2, one short message naming the file').
"""

from __future__ import annotations

import os
import subprocess
import sys
from typing import Optional, Tuple

import pytest

import estgen
from estgen.filters import check_filter_support

HERE = os.path.dirname(os.path.abspath(__file__))
BAD = os.path.join(HERE, "bad_models")
REPO = os.path.dirname(HERE)

# file, expected line (contract section 9: every message about a model file starts with the
# path as given, then ':LINE:'; a file without `model` is reported at its last line), fragments (what is wrong, what
# to do), and whether the refusal comes from check_filter_support(spec, "ekf") after loading.
CASES: Tuple[Tuple[str, Optional[int], Tuple[str, ...], bool], ...] = (
    ("syntax_error.py", 6, ("syntax error", "does not match"), False),
    ("no_model.py", 6, ("no variable named 'model'", "model = Model("), False),
    ("model_not_model.py", 4, ("is a dict, not an estgen.Model", "assign model = Model("), False),
    ("user_exception.py", 6, ("raised ZeroDivisionError", "fix the line"), False),
    ("sys_exit.py", 7, ("raised SystemExit", "fix the line"), False),
    ("undeclared_in_f.py", 7, ("process() uses 'ambient', never declared", "model.param()"), False),
    ("undeclared_in_h.py", 8, ("sensor 'thermo' h uses 'offset', never declared", "states and parameters"), False),
    ("undeclared_in_q.py", 7, ("process_noise() uses 'q', never declared", "parameters and dt only"), False),
    ("undeclared_in_r.py", 8, ("noise uses 'sigma', never declared", "parameters only"), False),
    ("state_in_q.py", 7, ("uses state 'temp'", "parameters and dt only"), False),
    ("dt_in_sensor.py", 8, ("uses the sample time 'dt', which it may not", "states and parameters only"), False),
    ("input_in_h.py", 9, ("uses input 'heat'", "states and parameters only"), False),
    ("undefined_function.py", 7, ("loss()", "undefined sympy Function"), False),
    ("condition_in_h.py", 8, ("a condition, not a value", "sp.Piecewise"), False),
    ("f_wrong_length.py", 6, ("has 1 entries but the model has 2 states", "one per state"), False),
    ("f_not_finite_at_x0.py", 6, ("not finite", "at x0"), False),
    ("q_wrong_shape.py", 7, ("must be 2x2, got 3x3", "list of 2 variances"), False),
    ("x0_wrong_length.py", 9, ("x0 has 1 entries but the model has 2 states", "one per state"), False),
    ("p0_wrong_shape.py", 9, ("P0 must be 2x2, got 2x3", "2x2 matrix"), False),
    ("q_not_symmetric.py", 7, ("not symmetric", "entry (i, j) equal entry (j, i)"), False),
    ("q_not_psd.py", 7, ("not positive semidefinite", "correlation within [-1, 1]"), False),
    ("r_not_pd.py", 8, ("sensor 'pair' noise R is not positive definite", "variance must be > 0"), False),
    ("p0_not_pd.py", 9, ("P0 is not positive definite", "variance must be > 0"), False),
    ("duplicate_state.py", 6, ("'temp' is already used by a state", "must be unique"), False),
    ("state_param_clash.py", 6, ("parameter name 'temp' is already used by a state", "must be unique"), False),
    ("duplicate_sensor.py", 9, ("sensor 'thermo' is declared twice", "must be unique"), False),
    ("name_not_identifier.py", 4, ("'heated-block' is not a safe C identifier", "letters, digits and '_'"), False),
    ("name_c_keyword.py", 6, ("'double' clashes with a C keyword", "rename"), False),
    ("state_c_keyword.py", 5, ("'int' clashes with a C keyword", "rename"), False),
    ("name_macro.py", 6, ("'NAN' clashes with a C keyword or standard macro", "rename"), False),
    ("name_math_constant.py", 6, ("'e' is the name of a math function or constant", "rename"), False),
    ("param_inf.py", 6, ("parameter 'tau' is not finite (inf)", "finite number"), False),
    ("param_nan.py", 8, ("parameter 'tau' is not finite (nan)", "finite number"), False),
    ("param_string.py", 6, ("parameter 'tau' must be a number, got '120'", "number"), False),
    ("initial_string.py", 9, ("x0[0] must be a number, got 'room'", "number"), False),
    ("initial_symbol.py", 10, ("x0[0] must be a number, got ambient", "give the value"), False),
    ("ekf_abs_in_f.py", 6, ("process() entry 0 (temp) uses Abs", "--filter ukf"), True),
    ("ekf_sign_in_h.py", 8, ("sensor 'thermo' component 0 uses sign", "--filter ukf"), True),
    ("ekf_min_in_f.py", 6, ("process() entry 0 (temp) uses Min", "--filter ukf"), True),
    ("ekf_max_in_h.py", 8, ("sensor 'thermo' component 0 uses Max", "--filter ukf"), True),
    ("ekf_piecewise_in_f.py", 6, ("process() entry 0 (temp) uses Piecewise", "--filter ukf"), True),
    ("ekf_floor_in_h.py", 8, ("sensor 'thermo' component 0 uses floor", "--filter ukf"), True),
    ("ekf_heaviside_in_f.py", 6, ("process() entry 0 (temp) uses Heaviside", "--filter ukf"), True),
    ("ekf_mod_in_h.py", 8, ("sensor 'thermo' component 0 uses Mod", "--filter ukf"), True),
    ("ekf_abs_in_dynamics.py", 6, ("dynamics() entry 1 (rate) uses Abs", "--filter ukf"), True),
    ("dynamics_method_unknown.py", 6, ("method='midpoint') is not known", 'use "rk4" or "euler"'), False),
    ("dt_in_dynamics.py", 6, ("must not use dt", "model.process()"), False),
    ("gate_out_of_range.py", 8, ("gate is a probability strictly between 0 and 1, got 99.7", "between 0 and 1"), False),
    ("every_zero.py", 8, ("every must be a whole number >= 1, got 0", ">= 1"), False),
    ("every_fraction.py", 8, ("every must be a whole number >= 1, got 2.5", ">= 1"), False),
    ("angles_bad_index.py", 8, ("angles must be component indices in 0..0", "booleans"), False),
    ("no_sensor.py", 4, ("declares no sensor", "add model.sensor("), False),
    ("no_process_noise.py", 4, ("no process noise", "add model.process_noise("), False),
    ("no_initial.py", 4, ("no initial state", "add model.initial("), False),
    ("no_dynamics.py", 4, ("no dynamics", "model.process("), False),
    ("no_states.py", 4, ("declares no states", "model.states("), False),
    ("scenario_wrong_inputs.py", 11, ("returns 2 values but the model has 1 inputs", "one per input"), False),
    ("process_twice.py", 8, ("dynamics are already declared at line 6", "once"), False),
    ("sensor_measures_nothing.py", 8, ("sensor 'thermo' h is empty", "at least one expression"), False),
    ("p0_not_finite.py", 9, ("P0 holds an infinite or undefined value", "finite variances"), False),
    ("name_math_function.py", 6, ("'sqrt' is the name of a math function", "rename"), False),
    ("x0_not_a_list.py", 9, ("x0 must be a list of numbers", "one per state"), False),
    ("function_without_c_form.py", 8, ("uses besselj, which has no C form", "elementary functions"), False),
    ("piecewise_no_default.py", 6, ("Piecewise without a final (value, True) branch", "add one"), False),
    ("scenario_raises.py", 5, ("scenario inputs(0) raised ZeroDivisionError", "fix the input function"), False),
    ("attitude_x0_not_unit.py", 10, ("x0[0:4] is attitude 'q' with norm 1.00499", "unit quaternion"), False),
    ("attitude_p0_wrong_dim.py", 10, ("P0 (the error dimension: 4 states minus one per attitude) must be 3x3, "
                                      "got 4x4", "list of 3 variances"), False),
    # a box prior is a box over the four quaternion entries: not a distribution of rotations
    ("attitude_uniform_prior.py", 10, ("initial_uniform() cannot describe attitude 'att'", "use model.initial(x0, P0)"),
     False),
    ("attitude_q_wrong_dim.py", 8, ("process_noise() (the error dimension", "must be 3x3, got 4x4"), False),
    ("attitude_process_not_quaternion.py", 7, ("entries 0..3 (attitude 'q') give a quaternion of norm 3",
                                               "quat.mul(q, quat.exp("), False),
    ("attitude_name_bad.py", 5, ("attitude name 'body attitude' is not a safe C identifier", "letters"), False),
    ("attitude_in_pf.py", 5, ("particle filter does not take attitude states", "--filter ekf"), "pf"),
    # noise symbols (contract section 5): one place each, a covariance of the right size that is
    # positive semidefinite, never inside Q or R, and every sensor component reached by some noise
    ("noise_used_twice.py", 9, ("noise symbol 'wt' enters both process() and sensor 'probe' h",
                                "one place only"), False),
    ("noise_in_two_sensors.py", 10, ("noise symbol 'vb' enters both sensor 'probe' h and sensor 'second' h",
                                     "declare one per place"), False),
    ("noise_unused.py", 6, ("noise symbol 'wl' is used nowhere", "or remove it"), False),
    ("noise_cov_wrong_size.py", 6, ("cov must be 2x2, got 3x3", "list of 2 variances"), False),
    ("noise_cov_not_psd.py", 6, ("cov is not positive definite", "smallest eigenvalue"), False),
    ("noise_cov_uses_state.py", 6, ("cov uses state 'temp'", "parameters and dt only"), False),
    ("noise_in_q.py", 8, ("process_noise() uses noise symbol 'wt'", "parameters and dt only"), False),
    ("noise_in_r.py", 9, ("sensor 'probe' noise uses noise symbol 'vb'", "parameters only"), False),
    ("noise_sensor_none.py", 8, ("sensor 'probe' has no noise", "noise=[...] or write a noise symbol"), False),
    ("noise_component_uncovered.py", 9, ("sensor 'pair' component 1 has no noise", "give it a variance"), False),
    ("noise_correlated_across.py", 6, ("'wt' and 'vb' are correlated but enter different places",
                                       "make them independent"), False),
    ("noise_measured_input_unused.py", 6, ("measured input 'fan' is not used in process()", "drop noise="), False),
    ("noise_declared_twice.py", 7, ("noise symbol 'wt' is already declared at line 6", "must be unique"), False),
    ("noise_no_process_noise.py", 4, ("no process noise", "noise symbols in process()"), False),
    ("noise_sensor_cov_dt.py", 8, ("sensor 'probe' have a covariance that uses dt", "parameters and numbers"), False),
)


def _refusal(fname: str, ekf: bool) -> estgen.ModelError:
    path = os.path.join(BAD, fname)
    with pytest.raises(estgen.ModelError) as info:
        spec = estgen.load_model(path)
        if ekf:
            check_filter_support(spec, ekf if isinstance(ekf, str) else "ekf")
    return info.value


def test_every_fixture_is_in_the_table() -> None:
    on_disk = {f for f in os.listdir(BAD) if f.endswith(".py")}
    assert on_disk == {c[0] for c in CASES}
    assert len(CASES) >= 24


@pytest.mark.parametrize("fname,line,fragments,ekf", CASES, ids=[c[0][:-3] for c in CASES])
def test_bad_model_is_refused_clearly(fname: str, line: Optional[int], fragments: Tuple[str, ...], ekf: bool) -> None:
    err = _refusal(fname, ekf)
    assert type(err) is estgen.ModelError
    text = str(err)
    lines = text.splitlines()
    assert 1 <= len(lines) <= 4, text
    head = lines[0]
    given = os.path.join(BAD, fname)  # messages start with the path as the caller gave it
    assert head.startswith(f"{given}:{line}: error: "), text
    assert err.where is not None and err.where.line == line
    # The offending source line is quoted under the message.
    with open(os.path.join(BAD, fname), encoding="utf-8") as fh:
        src = fh.read().splitlines()[line - 1].strip()
    assert lines[1].strip() == src, text
    for frag in fragments:
        assert frag in text, f"{frag!r} not in {text!r}"
    assert "Traceback" not in text


def test_ekf_refusals_load_fine_for_the_ukf() -> None:
    # The EKF-only refusals are not model errors: the same files are valid for the UKF.
    for fname, _, _, ekf in CASES:
        if ekf is True:
            check_filter_support(estgen.load_model(os.path.join(BAD, fname)), "ukf")


def _run_cli(*args: str) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env["PYTHONPATH"] = REPO + os.pathsep + env.get("PYTHONPATH", "")
    return subprocess.run([sys.executable, "-m", "estgen.cli", *args], capture_output=True, text=True,
                          env=env, cwd=REPO, timeout=120)


@pytest.mark.parametrize("fname,filt", [
    ("syntax_error.py", "ekf"),
    ("user_exception.py", "ekf"),
    ("undeclared_in_h.py", "ukf"),
    ("ekf_min_in_f.py", "ekf"),
    ("no_model.py", "ukf"),
    ("function_without_c_form.py", "ukf"),
    ("piecewise_no_default.py", "ukf"),
])
def test_command_line_reports_bad_model(tmp_path, fname: str, filt: str) -> None:
    out = tmp_path / "out"
    res = _run_cli("generate", os.path.join(BAD, fname), "--filter", filt, "-o", str(out))
    assert res.returncode == 2, res.stderr
    assert "Traceback" not in res.stderr
    assert fname in res.stderr
    assert 1 <= len(res.stderr.strip().splitlines()) <= 4, res.stderr
    assert not out.exists() or not any(out.iterdir())  # nothing written for a refused model


def test_valve_example_ekf_refused_on_the_command_line(tmp_path) -> None:
    path = os.path.join(REPO, "generated_examples", "valve_actuator", "model.py")
    res = _run_cli("generate", path, "--filter", "ekf", "-o", str(tmp_path / "out"))
    assert res.returncode == 2
    assert "Traceback" not in res.stderr and "--filter ukf" in res.stderr


_DIVIDES_BY_INPUT = '''import sympy as sp
from estgen import Model

model = Model("mixer")
(conc,) = model.states("conc")
(flow,) = model.inputs("flow")
model.process([conc + model.dt * (1.0 - conc) * 0.5 / flow])
model.process_noise([1e-6])
model.sensor("probe", [conc], noise=[1e-4])
model.initial([0.2], [0.01])
'''


def test_domain_check_uses_the_scenario_input(tmp_path) -> None:
    # f divides by the input: zero input is outside the model's range. Without a scenario the
    # check at zero input refuses it; with a scenario whose flow is never zero it loads.
    bare = tmp_path / "bare.py"
    bare.write_text(_DIVIDES_BY_INPUT)
    with pytest.raises(estgen.ModelError) as info:
        estgen.load_model(str(bare))
    assert "bare.py:7:" in str(info.value) and "zero input" in str(info.value)
    ok = tmp_path / "with_scenario.py"
    ok.write_text(_DIVIDES_BY_INPUT + "model.scenario(dt=1.0, inputs=lambda t: [2.0])\n")
    assert estgen.load_model(str(ok)).nu == 1


def test_unreadable_model_files(tmp_path) -> None:
    # Bytes that are not UTF-8 (Python source is UTF-8 by default: PEP 3120), and a missing file.
    latin = tmp_path / "latin.py"
    latin.write_bytes(b"model = 1  # caf\xe9\n")
    with pytest.raises(estgen.ModelError) as info:
        estgen.load_model(str(latin))
    # the line of the first byte that is not UTF-8 (the file's first line, ending at byte 17)
    assert str(info.value).startswith(f"{latin}:1: error: ") and "UTF-8" in str(info.value)
    second = tmp_path / "second.py"
    second.write_bytes(b"import sympy\nmodel = 1  # caf\xe9\n")
    with pytest.raises(estgen.ModelError) as info:
        estgen.load_model(str(second))
    assert str(info.value).startswith(f"{second}:2: error: "), str(info.value)
    with pytest.raises(estgen.ModelError) as info:
        estgen.load_model(str(tmp_path / "absent.py"))
    assert str(info.value).startswith(f"{tmp_path / 'absent.py'}:1: error: model file not found"), str(info.value)
    res = _run_cli("generate", str(latin), "-o", str(tmp_path / "out"))
    assert res.returncode == 2 and "Traceback" not in res.stderr and "UTF-8" in res.stderr


_LATE_PROFILE = '''import sympy as sp
from estgen import Model

model = Model("blk")
(temp,) = model.states("temp")
(heat,) = model.inputs("heat")
model.process([0.99 * temp + 0.001 * heat])
model.process_noise([1e-4])
model.sensor("thermo", [temp], noise=[0.01])
model.initial([20.0], [1.0])
levels = [10.0, 20.0]
model.scenario(dt=1.0, inputs=lambda t: [levels[int(t // 5)]])
'''


def test_input_profile_failing_later_names_its_line(tmp_path) -> None:
    # The profile is fine at t = 0 but runs off its table at t = 10 s: simulating must report
    # the model file's line, not a traceback.
    from estgen.simulate import make_scenario

    path = tmp_path / "late.py"
    path.write_text(_LATE_PROFILE)
    spec = estgen.load_model(str(path))
    with pytest.raises(estgen.ModelError) as info:
        make_scenario(spec, 30, seed=1)
    text = str(info.value)
    assert text.startswith(f"{path}:12: error: scenario inputs(10) raised IndexError"), text
    res = _run_cli("simulate", str(path), "--filter", "ekf", "--runs", "2", "--steps", "30", "--seed", "1")
    assert res.returncode == 2 and "Traceback" not in res.stderr and "late.py:12" in res.stderr


_SQRT_DRAIN = '''import sympy as sp
from estgen import Model

model = Model("drain")
(lvl,) = model.states("lvl")
model.process([lvl - model.dt * 5.0 * sp.sqrt(lvl)])
model.process_noise([1e-4])
model.sensor("gauge", [lvl], noise=[1.0])
model.initial([1.0], [[0.5]])
model.scenario(dt=0.5)
'''


@pytest.mark.parametrize("text,line,fragment", [
    ("", 1, "no variable named 'model'"),
    ("import sympy\n\nx = 1\n", 3, "no variable named 'model'"),
    ("model = 3\n", 1, "'model' is an int"),
])
def test_file_level_problems_name_a_line(tmp_path, text: str, line: int, fragment: str) -> None:
    # Contract section 9: a message about a model file begins with the path as the user gave it
    # (here relative to the working directory), then ':LINE:'.
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "m.py").write_text(text)
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    res = subprocess.run([sys.executable, "-m", "estgen", "generate", os.path.join("sub", "m.py"), "-o", "out"],
                         capture_output=True, text=True, env=env, cwd=tmp_path, timeout=120)
    assert res.returncode == 2, res.stderr
    assert res.stderr.startswith(f"{os.path.join('sub', 'm.py')}:{line}: error: "), res.stderr
    assert fragment in res.stderr and "Traceback" not in res.stderr


def test_truth_leaving_the_domain_names_the_process_line(tmp_path) -> None:
    # x - 5 dt sqrt(x) from x = 1 with dt = 0.5 goes negative at the first step and sqrt of a
    # negative number is not real (common practice): the simulated truth stops, and the message
    # points at process() in the model file rather than at no line at all.
    path = tmp_path / "drain.py"
    path.write_text(_SQRT_DRAIN)
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    for cmd in (["verify", "drain.py"], ["simulate", "drain.py", "--runs", "2", "--steps", "10"]):
        res = subprocess.run([sys.executable, "-m", "estgen", *cmd], capture_output=True, text=True, env=env,
                             cwd=tmp_path, timeout=300)
        assert res.returncode == 2, res.stderr
        assert res.stderr.startswith("drain.py:6: error: the simulated truth"), res.stderr
        assert "Traceback" not in res.stderr


@pytest.mark.parametrize("cmd", [["generate", "-o", "out"], ["verify"], ["simulate", "--runs", "2", "--steps", "3"],
                                 ["soak", "--steps", "3"], ["report"], ["compare", "--runs", "2", "--steps", "3"],
                                 ["replay", "-o", "out"]], ids=lambda c: c[0])
def test_every_command_starts_a_model_message_with_its_path(tmp_path, cmd) -> None:
    # Contract section 9, on every command (report used to prefix 'estgen: ').
    (tmp_path / "m.py").write_text(_SQRT_DRAIN.replace("process_noise([1e-4])", "process_noise([-1e-4])"))
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    res = subprocess.run([sys.executable, "-m", "estgen", cmd[0], "m.py", *cmd[1:]], capture_output=True, text=True,
                         env=env, cwd=tmp_path, timeout=300)
    assert res.returncode == 2, res.stderr
    assert res.stderr.startswith("m.py:7: error: process_noise()"), res.stderr
