"""Simulation and the Monte Carlo consistency test, checked against Bar-Shalom, Li and
Kirubarajan, Estimation with Applications to Tracking and Navigation (2001), section 5.4, and
scipy's chi-square quantiles. Most tests run the numpy reference so they do not depend on the
C; one runs the compiled C (it needs the C compiler CI installs)."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest
import scipy.stats

import estgen
from estgen import cli
from estgen.errors import ModelError
from estgen.reference import model_functions, wrap_angle
from estgen.simulate import (
    chi2_bounds,
    format_summary,
    make_scenario,
    monte_carlo,
    run_filter,
)

HERE = os.path.dirname(os.path.abspath(__file__))
CART = os.path.join(HERE, "models", "ref_cart.py")
PENDULUM = os.path.join(HERE, "models", "sim_pendulum.py")


@pytest.fixture(scope="module")
def cart():
    return estgen.load_model(CART)


@pytest.fixture(scope="module")
def pendulum():
    return estgen.load_model(PENDULUM)


def test_correctly_tuned_filter_is_consistent(cart):
    # Source: Bar-Shalom et al. 2001, 5.4.2: a filter whose Q and R are those of the truth has
    # run-averaged NEES and NIS inside the 95% chi-square bounds at about 95% of the steps.
    res = monte_carlo(cart, "ekf", runs=20, steps=100, seed=0, use_reference=True, workers=1)
    assert res.consistent
    assert res.nees.verdict == "consistent" and res.nis["laser"].verdict == "consistent"
    assert res.nees.fraction_inside >= 0.9
    # the mean NEES is near its expectation n = 2 (chi-square mean = dof)
    assert abs(res.nees.mean - 2.0) < 0.3
    assert abs(res.nis["laser"].mean - 1.0) < 0.15


@pytest.mark.parametrize("kind", ["ekf", "ukf"])
def test_nonlinear_model_with_angle_is_consistent(pendulum, kind):
    # Source: Bar-Shalom et al. 2001, 5.4.2 (as above); the pendulum goes over the top, so its
    # angle wraps, and Q is singular (noise on the rate only).
    res = monte_carlo(pendulum, kind, runs=20, steps=150, seed=1, use_reference=True, workers=1)
    assert res.consistent, format_summary(res)
    assert set(res.nis) == {"encoder", "gyro"}
    # the gyro reports every 2nd step: NIS exists at steps 2, 4, ...
    np.testing.assert_array_equal(res.nis["gyro"].steps, np.arange(2, 151, 2))
    np.testing.assert_array_equal(res.nis["encoder"].steps, np.arange(1, 151))


@pytest.mark.parametrize("scale,verdict,side", [(0.01, "overconfident", "fraction_above"),
                                                (100.0, "too cautious", "fraction_below")])
def test_mistuned_q_is_inconsistent(cart, scale, verdict, side):
    # Source: Bar-Shalom et al. 2001, 5.4.2: Q too small makes P too small and the NEES lies
    # above the upper bound (an "optimistic", overconfident filter); Q too large makes P too
    # large and the NEES lies below the lower bound (a "pessimistic" one).
    res = monte_carlo(cart, "ekf", runs=20, steps=100, seed=0, use_reference=True, workers=1,
                      set_params={"accel_psd": 0.2 * scale})
    assert not res.consistent
    assert res.nees.verdict == verdict
    assert getattr(res.nees, side) > 0.5
    assert res.set_params == {"accel_psd": pytest.approx(0.2 * scale)}


@pytest.mark.parametrize("runs,dof", [(1, 1), (20, 2), (50, 3), (100, 12)])
def test_bounds_are_scipy_chi2_quantiles(runs, dof):
    # Source: scipy.stats.chi2.ppf; the bounds of the run-averaged statistic are
    # chi2.ppf([0.025, 0.975], runs * dof) / runs (Bar-Shalom et al. 2001, 5.4.2).
    lo, hi = chi2_bounds(runs, dof)
    want = scipy.stats.chi2.ppf([0.025, 0.975], runs * dof) / runs
    assert lo == pytest.approx(want[0], rel=1e-10) and hi == pytest.approx(want[1], rel=1e-10)


def test_statistics_match_their_definitions(pendulum):
    # Source: Bar-Shalom et al. 2001, 5.4.2: NEES = e' P^-1 e with e the estimation error after
    # the update, averaged over runs; RMSE = sqrt of the mean squared error (definition). Here
    # recomputed by hand from make_scenario and run_filter with np.linalg.inv.
    runs, steps, seed = 4, 40, 3
    res = monte_carlo(pendulum, "ukf", runs=runs, steps=steps, seed=seed, use_reference=True, workers=1)
    nees, sq, nis_enc = [], [], []
    for r in range(runs):
        sc = make_scenario(pendulum, steps, seed=[seed, r])
        out = run_filter(estgen.reference(pendulum, "ukf"), sc)
        e = out["x"][1:] - sc.x_true[1:]
        e[:, 0] = wrap_angle(e[:, 0])
        nees.append([e[k] @ np.linalg.inv(out["P"][k + 1]) @ e[k] for k in range(steps)])
        sq.append(e**2)
        nis_enc.append(out["nis"]["encoder"])
    np.testing.assert_allclose(res.nees.per_step, np.mean(nees, axis=0), rtol=1e-9)
    np.testing.assert_allclose(res.nis["encoder"].per_step, np.mean(nis_enc, axis=0), rtol=1e-12)
    rmse = np.sqrt(np.mean(np.array(sq), axis=(0, 1)))
    assert res.rmse == pytest.approx({"theta": rmse[0], "omega": rmse[1]}, rel=1e-12)
    # the mean is over the judged steps, after the burn-in
    judged = np.mean(nees, axis=0)[res.burn_in:]
    assert res.nees.mean == pytest.approx(float(np.mean(judged)), rel=1e-9)


def test_workers_give_the_same_result_as_one_process(cart):
    # Source: common practice: each run draws from its own seed, so spreading runs over
    # processes must not change any figure.
    a = monte_carlo(cart, "ukf", runs=6, steps=30, seed=4, use_reference=True, workers=1)
    b = monte_carlo(cart, "ukf", runs=6, steps=30, seed=4, use_reference=True, workers=2)
    np.testing.assert_array_equal(a.nees.per_step, b.nees.per_step)
    np.testing.assert_array_equal(a.nis["laser"].per_step, b.nis["laser"].per_step)
    assert a.rmse == b.rmse


def test_scenario_noise_has_the_model_covariances(pendulum):
    # Source: definition of the model (contract section 1): x[k+1] = f(x[k]) + w, w ~ N(0, Q);
    # z = h(x) + v, v ~ N(0, R). The sample variances over 4000 steps lie within 5 standard
    # errors (a variance estimate from N normal samples has relative s.e. sqrt(2/N)).
    steps = 4000
    sc = make_scenario(pendulum, steps, seed=9)
    mf = model_functions(pendulum)
    p = mf.param_tuple(pendulum.param_defaults())
    w = np.array([sc.x_true[k + 1] - mf.f(sc.x_true[k], sc.u[k], sc.dt, p) for k in range(steps)])
    w[:, 0] = wrap_angle(w[:, 0])
    q = 0.5 * sc.dt  # torque_psd * dt on the rate; zero on the angle (a singular Q)
    assert np.max(np.abs(w[:, 0])) < 1e-12
    assert abs(np.var(w[:, 1]) / q - 1) < 5 * math.sqrt(2 / steps)
    enc = [(k, z) for k, row in enumerate(sc.measurements) for s, z in row if s == "encoder"]
    gyro = [(k, z) for k, row in enumerate(sc.measurements) for s, z in row if s == "gyro"]
    assert len(enc) == steps and [k for k, _ in gyro] == list(range(1, steps, 2))  # every=2: (k+1) % 2 == 0
    v = np.array([wrap_angle(z[0] - sc.x_true[k + 1, 0]) for k, z in enc])
    assert abs(np.var(v) / 0.02**2 - 1) < 5 * math.sqrt(2 / steps)
    assert np.all(np.abs(sc.x_true[:, 0]) <= math.pi)
    # the same seed gives the same scenario, another seed another one
    again = make_scenario(pendulum, steps, seed=9)
    np.testing.assert_array_equal(again.x_true, sc.x_true)
    assert not np.array_equal(make_scenario(pendulum, 10, seed=10).x_true, sc.x_true[:11])


def test_every_override_and_bad_names(cart):
    # Source: the contract (section 2): --every changes the reporting interval; unknown names
    # are bad input (ModelError: exit 2 on the command line).
    sc = make_scenario(cart, 20, seed=0, every={"laser": 4})
    assert [k for k, row in enumerate(sc.measurements) if row] == [3, 7, 11, 15, 19]
    with pytest.raises(ModelError):
        make_scenario(cart, 20, seed=0, every={"radar": 2})
    with pytest.raises(ModelError):
        monte_carlo(cart, runs=2, steps=5, use_reference=True, set_params={"nope": 1.0})


def test_refused_updates_are_counted(cart):
    # Source: the contract (section 3): a negative variance makes S indefinite, so every update
    # is refused (status 3); the Monte Carlo reports the refusals and has no NIS to judge.
    res = monte_carlo(cart, "ekf", runs=3, steps=10, seed=0, use_reference=True, workers=1,
                      set_params={"pos_var": -1e6})
    assert res.refusals == {"NOT_POSITIVE_DEFINITE": 30}
    assert res.nis["laser"].verdict == "no data"
    assert "NOT_POSITIVE_DEFINITE x30" in format_summary(res)


def test_cli_json_plot_and_summary(tmp_path, capsys):
    # Source: the contract (section 2): `estgen simulate MODEL --filter F --runs N --steps K
    # --seed S [--set NAME=VALUE] [--json FILE] [--plot FILE.png]` exits 0 when it ran; the JSON
    # holds nees/nis {mean, lower, upper, fraction_inside}, rmse per state and consistent. The
    # PNG signature is from the PNG specification (ISO/IEC 15948, section 5.2).
    js, png = tmp_path / "mc.json", tmp_path / "mc.png"
    rc = cli.main(["simulate", CART, "--filter", "ekf", "--runs", "8", "--steps", "40", "--seed", "2",
                   "--set", "accel_psd=0.002", "--json", str(js), "--plot", str(png), "--reference",
                   "--workers", "1"])
    assert rc == 0
    doc = json.loads(js.read_text())
    for key in ("mean", "lower", "upper", "fraction_inside"):
        assert isinstance(doc["nees"][key], float)
        assert isinstance(doc["nis"]["laser"][key], float)
    lo, hi = scipy.stats.chi2.ppf([0.025, 0.975], 8 * 2) / 8
    assert doc["nees"]["lower"] == pytest.approx(lo, rel=1e-10) and doc["nees"]["upper"] == pytest.approx(hi, rel=1e-10)
    assert set(doc["rmse"]) == {"pos", "vel"} and doc["consistent"] is False
    assert doc["nees"]["verdict"] == "overconfident"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    out = capsys.readouterr().out
    assert "pos" in out and " m" in out and "m/s" in out and "overall: NOT consistent" in out
    assert "accel_psd = 0.002" in out
    # an unknown parameter is bad input: exit 2 with one message, no traceback
    assert cli.main(["simulate", CART, "--runs", "2", "--steps", "5", "--reference", "--set", "bogus=1"]) == 2
    err = capsys.readouterr().err
    assert "bogus" in err and "Traceback" not in err
    assert cli.main(["simulate", CART, "--runs", "2", "--steps", "5", "--reference", "--every", "laser=0"]) == 2


def test_progress_goes_to_stderr_when_asked(cart, capsys):
    # Source: common practice: progress on stderr, the results on stdout.
    monte_carlo(cart, runs=3, steps=5, use_reference=True, workers=1, progress=True)
    cap = capsys.readouterr()
    assert "run 3/3" in cap.err and cap.out == ""


@pytest.mark.parametrize("kind", ["ekf", "ukf"])
@pytest.mark.parametrize("precision", ["double", "float"])
def test_compiled_c_gives_the_reference_statistics(pendulum, kind, precision):
    # Source: the contract (section 3): the compiled C computes what the reference computes.
    # In double every Monte Carlo figure agrees to rounding (verify's tolerance, relative 1e-9).
    # In float, verify allows 0.01 sigma per state; a NEES e' P^-1 e then moves by at most about
    # 2 sqrt(NEES) * 0.01 sqrt(n) (first order), so |dNEES| <= 0.02 sqrt(n NEES) plus as much
    # again for P's own rounding. Needs the C compiler (CI installs it).
    c = monte_carlo(pendulum, kind, runs=4, steps=60, seed=6, precision=precision, workers=1)
    r = monte_carlo(pendulum, kind, runs=4, steps=60, seed=6, use_reference=True, workers=1)
    assert c.implementation == f"c-{precision}" and r.implementation == "reference"
    if precision == "double":
        np.testing.assert_allclose(c.nees.per_step, r.nees.per_step, rtol=1e-9)
        for s in ("encoder", "gyro"):
            np.testing.assert_allclose(c.nis[s].per_step, r.nis[s].per_step, rtol=1e-9)
        assert c.rmse == pytest.approx(r.rmse, rel=1e-9)
    else:
        bound = 0.04 * np.sqrt(2 * r.nees.per_step)
        assert np.all(np.abs(c.nees.per_step - r.nees.per_step) <= bound)
        assert c.rmse == pytest.approx(r.rmse, rel=1e-2)  # 0.01 sigma, and the RMSE is about sigma
        assert not np.array_equal(c.nees.per_step, r.nees.per_step)  # really the float build


@pytest.mark.parametrize("tail,verdict", [([2.0, 2.0], "overconfident"), ([0.1, 0.1], "too cautious"),
                                          ([1.0, 2.0], "consistent"), ([2.0, 0.1], "overconfident"),
                                          ([3.0, 0.1], "overconfident"), ([2.0, 0.0], "too cautious")])
def test_verdict_rules(tail, verdict):
    # Source: Bar-Shalom et al. 2001, 5.4.2: above the upper bound means the filter's
    # covariance is too small (overconfident), below the lower bound too large; 90% inside
    # passes (common practice, INSIDE_REQUIRED). With as many steps out on each side, the mean
    # against its expectation (the dof) decides.
    from estgen.simulate import StatSummary

    vals = np.array([1.0] * 8 + tail)
    st = StatSummary(vals, np.arange(1, 11), dof=1, lower=0.5, upper=1.5)
    assert st.verdict == verdict
    assert st.fraction_inside == pytest.approx(np.mean((vals >= 0.5) & (vals <= 1.5)))


def test_gate_option_gates_in_the_filter_only(cart, tmp_path):
    # Source: scipy.stats.chi2: a gate at probability p rejects a fraction 1 - p of the NIS
    # values of a consistent filter. 5 runs x 200 steps = 1000 updates at p = 0.99: about 10
    # gated, binomial s.d. ~ 3.1. (A tight gate drops large innovations often enough to make
    # the filter itself overconfident, common practice, so a loose gate is the one to count.)
    res = monte_carlo(cart, "ekf", runs=5, steps=200, seed=0, use_reference=True, workers=1,
                      gates={"laser": 0.99})
    gated = res.refusals.get("GATED", 0)
    assert 0 < gated and abs(gated - 10) < 5 * math.sqrt(1000 * 0.01 * 0.99)
    plain = monte_carlo(cart, "ekf", runs=5, steps=200, seed=0, use_reference=True, workers=1)
    assert "GATED" not in plain.refusals
    assert res.gates == {"laser": 0.99} and plain.gates == {}
    js = tmp_path / "g.json"
    assert cli.main(["simulate", CART, "--runs", "2", "--steps", "10", "--reference", "--workers", "1",
                     "--gate", "laser=0.9", "--json", str(js), "--quiet"]) == 0
    assert json.loads(js.read_text())["gates"] == {"laser": 0.9}
    assert cli.main(["simulate", CART, "--runs", "2", "--steps", "5", "--reference", "--gate", "radar=0.9"]) == 2


@pytest.mark.parametrize("cmd", [["simulate", "--filter", "ekf"], ["compare", "--filters", "ekf"]], ids=lambda c: c[0])
def test_plot_without_matplotlib_is_refused_before_the_runs(tmp_path, cmd):
    # A fresh `pip install .` has no matplotlib (it is the plot extra). --plot must be refused
    # at once (exit 2, the install hint), not after the Monte Carlo runs have been paid for:
    # no --json file is written. matplotlib is hidden by a package of its name that fails to
    # import (Python's import system finds the first one on sys.path: common practice).
    fake = tmp_path / "hide" / "matplotlib"
    fake.mkdir(parents=True)
    (fake / "__init__.py").write_text("raise ImportError('hidden for the test')\n")
    repo = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(tmp_path / "hide"), repo, os.environ.get("PYTHONPATH", "")]))
    js = tmp_path / "out.json"
    proc = subprocess.run([sys.executable, "-m", "estgen", cmd[0], os.path.join(repo, "generated_examples", "linear_cart",
                           "model.py"), *cmd[1:], "--runs", "2", "--steps", "5", "--json", str(js),
                           "--plot", str(tmp_path / "p.png")], capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 2, proc.stderr
    assert "pip install matplotlib" in proc.stderr and "Traceback" not in proc.stderr
    assert not js.exists()


def test_set_takes_several_pairs_after_one_flag(tmp_path):
    # The contract writes `[--set NAME=VALUE ...]`: one --set with several pairs and repeated
    # --set flags set the same parameters (argparse's nargs="+" notation, Python docs)
    for i, extra in enumerate((["--set", "accel_psd=0.3", "pos_var=0.1"],
                               ["--set", "accel_psd=0.3", "--set", "pos_var=0.1"])):
        js = tmp_path / f"s{i}.json"
        assert cli.main(["simulate", CART, "--runs", "2", "--steps", "5", "--reference", "-q", *extra,
                         "--json", str(js)]) == 0
        assert json.loads(js.read_text())["set_params"] == {"accel_psd": 0.3, "pos_var": 0.1}
    # the pairs written before the model (common practice on command lines) still find the model
    js = tmp_path / "before.json"
    assert cli.main(["simulate", "--set", "accel_psd=0.3", "pos_var=0.1", CART, "--runs", "2", "--steps", "5",
                     "--reference", "-q", "--json", str(js)]) == 0
    assert json.loads(js.read_text())["set_params"] == {"accel_psd": 0.3, "pos_var": 0.1}


def test_simulate_without_a_model_is_bad_input(capsys):
    assert cli.main(["simulate", "--set", "accel_psd=0.3", "--runs", "2"]) == 2
    assert "MODEL" in capsys.readouterr().err
