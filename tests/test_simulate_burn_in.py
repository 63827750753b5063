"""simulate: the start-up transient is left out of the verdict (and said so), fractions above
and below the bounds, error plots with their +-3 sigma envelope, NEES and NIS on a log scale."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import estgen
from estgen import simulate
from estgen.simulate import StatSummary, monte_carlo, settling_steps

from conftest import example_model


def test_settling_of_an_exponential_transient():
    """P_ii = 1 + 99 exp(-k / tau): the standard deviation is within a factor 2 of its settled
    value 1 once 1 + 99 exp(-k / tau) <= 4, i.e. from k = tau ln 33 (algebra)."""
    tau, steps = 20.0, 400
    k = np.arange(steps + 1)
    P = (1.0 + 99.0 * np.exp(-k / tau))[:, None, None] * np.ones((1, 1, 1))
    assert settling_steps(P) == math.ceil(tau * math.log(33.0)) - 1  # 0-based row of step k
    # never more than 20% of the run
    P_slow = (1.0 + 99.0 * np.exp(-k / 60.0))[:, None, None]  # settles near k = 170
    assert settling_steps(P_slow) == int(0.2 * steps)


def test_burn_in_is_left_out_of_the_fractions():
    vals = np.array([50.0] * 5 + [1.0] * 15)
    st = StatSummary(vals, np.arange(1, 21), dof=1, lower=0.5, upper=1.5)
    assert st.fraction_inside == pytest.approx(0.75) and st.verdict == "overconfident"
    st = StatSummary(vals, np.arange(1, 21), dof=1, lower=0.5, upper=1.5, burn_in=5)
    assert st.fraction_inside == 1.0 and st.fraction_above == 0.0 and st.verdict == "consistent"
    assert st.to_dict()["judged_steps"] == 15


def test_cli_prints_the_burn_in_and_fractions(tmp_path, capsys):
    from estgen.cli import main

    js = tmp_path / "s.json"
    assert main(["simulate", example_model("linear_cart"), "--runs", "8", "--steps", "100", "--workers", "1",
                 "--reference", "--burn-in", "10", "--json", str(js)]) == 0
    out = capsys.readouterr().out
    assert "judged from step 11 on (90 steps): burn-in of 10 steps, set by --burn-in" in out
    assert "above   below" in out
    data = json.loads(js.read_text())
    assert data["burn_in_steps"] == 10 and data["nees"]["judged_steps"] == 90
    for key in ("mean", "lower", "upper", "fraction_inside"):  # contract section 2 keys stay
        assert key in data["nees"]
    assert isinstance(data["consistent"], bool) and set(data["rmse"]) == {"pos", "vel", "dist"}
    assert main(["simulate", example_model("linear_cart"), "--runs", "2", "--steps", "10",
                 "--burn-in", "10"]) == 2


def test_plot_shows_errors_with_3_sigma_and_log_statistics(tmp_path, monkeypatch):
    import matplotlib  # noqa: F401  (the plot extra; .ci/run installs .[test,plot])
    res = monte_carlo(estgen.load_model(example_model("linear_cart")), "ekf", runs=4, steps=60,
                      use_reference=True, workers=1)
    figs = []
    monkeypatch.setattr(simulate, "save_figure", lambda fig, path: figs.append(fig))
    simulate.plot_result(res, str(tmp_path / "p.png"))
    axes = figs[0].axes
    n = len(res.states)
    assert all(ax.get_yscale() == "log" for ax in axes[n:])
    assert all(ax.get_yscale() == "linear" for ax in axes[:n])
    # the error line of state 0 is estimate - truth of run 0
    err = res.run0["x"][:, 0] - res.run0["x_true"][:, 0]
    line = next(l for l in axes[0].get_lines() if "error" in l.get_label())
    np.testing.assert_allclose(line.get_ydata(), err)
    assert "±3σ" in " ".join(t.get_text() for t in axes[0].get_legend().get_texts())
