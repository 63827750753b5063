"""verify shows what it covered: a length taken from the model, calls and statuses per sensor,
gates exercised by injected outliers, angle wraps, the compiler and its flags."""

from __future__ import annotations

import math
import textwrap

import pytest

import estgen
from estgen.verify import MAX_STEPS, TIME_SCALE_MAX_STEPS, default_steps, format_result, model_time_scale, verify

from conftest import example_model


def _model(tmp_path, text, name="m.py"):
    path = tmp_path / name
    path.write_text(textwrap.dedent(text))
    return estgen.load_model(str(path))


LAG = """
    import sympy as sp
    from estgen import Model
    model = Model("lag")
    (x,) = model.states("x")
    dt = model.dt
    model.process([x - dt * x / 5.0])
    model.process_noise(sp.Matrix([[1e-4]]) * dt)
    model.sensor("s", [x], noise=[0.01], every=4)
    model.initial([1.0], sp.Matrix([[0.1]]))
    model.scenario(dt=0.01)
"""

SPIN = """
    import sympy as sp
    from estgen import Model
    model = Model("spin")
    (th,) = model.states("th", angle=True)
    (w,) = model.states("w")
    dt = model.dt
    model.process([th + dt * w, w])
    model.process_noise(sp.diag(1e-6, 1e-4) * dt)
    model.sensor("enc", [th], noise=[1e-4], angles=[0], gate=0.999)
    model.initial([0.0, {w0}], sp.diag(0.01, 0.01))
    model.scenario(dt=0.01)
"""


def test_length_follows_the_slowest_time_constant(tmp_path):
    """A first-order lag with time constant tau = 5 s (x' = -x / tau, Euler: mu = 1 - dt/tau)
    settles in about three time constants (common practice: 95 % after 3 tau)."""
    spec = _model(tmp_path, LAG.replace("5.0", "1.0"))
    scale = model_time_scale(spec, 0.01)
    assert scale == pytest.approx(3 * 1.0, rel=0.01)
    steps, why = default_steps(spec, 0.01)
    assert steps == math.ceil(scale / 0.01) and "time scale" in why


def test_length_covers_the_slowest_sensor_and_is_capped(tmp_path):
    spec = _model(tmp_path, LAG.replace("5.0", "0.01").replace("every=4", "every=40"))
    steps, why = default_steps(spec, 0.01)
    assert steps == 50 * 40 and "50 updates of s" in why
    spec = _model(tmp_path, LAG.replace("every=4", "every=400"), "rare.py")
    assert default_steps(spec, 0.01) == (MAX_STEPS, "50 updates of s (every 400 steps), capped at 5000 steps")
    spec = _model(tmp_path, LAG.replace("5.0", "500.0"), "slow.py")
    assert default_steps(spec, 0.01)[0] == TIME_SCALE_MAX_STEPS


def test_oscillation_period_counts(tmp_path):
    """An undamped oscillator of 0.5 Hz (exact discretization: rotation by omega dt) has a period
    of 2 s; two periods are asked for."""
    spec = _model(tmp_path, """
        import math
        import sympy as sp
        from estgen import Model
        model = Model("osc")
        p, v = model.states("p v")
        dt = model.dt
        w = 2 * math.pi * 0.5
        model.process([p * sp.cos(w * dt) + v / w * sp.sin(w * dt), -p * w * sp.sin(w * dt) + v * sp.cos(w * dt)])
        model.process_noise(sp.diag(1e-6, 1e-6) * dt)
        model.sensor("pos", [p], noise=[0.01])
        model.initial([1.0, 0.0], sp.diag(0.1, 0.1))
        model.scenario(dt=0.01)
    """)
    assert model_time_scale(spec, 0.01) == pytest.approx(4.0, rel=1e-3)


def test_gates_wraps_statuses_and_compiler_are_reported(tmp_path):
    spec = _model(tmp_path, SPIN.format(w0=3.0))
    res = verify(spec, precision="float", steps=600)
    assert res.ok, format_result(res)
    cov = res.coverage
    enc = cov["sensors"]["enc"]
    assert enc["updates"] == 600 and enc["outliers_injected"] == 2
    assert enc["c"]["GATED"] >= 2 and enc["c"] == enc["reference"]
    assert cov["wraps"]["th"] >= 2  # 3 rad/s for 6 s: about 18 rad, i.e. 2 or 3 crossings of +-pi
    assert cov["statuses_agree"] == cov["calls"] == 1200
    assert res.cflags[:1] == ["-std=c99"] and "-O2" in res.cflags and res.compiler
    text = format_result(res)
    assert "2 outliers injected" in text and "status codes agree on 1200 of 1200 calls" in text
    assert "crossed +-pi" in text and "C compiled by" in text


def test_notes_say_what_was_not_covered(tmp_path):
    spec = _model(tmp_path, SPIN.format(w0=0.0).replace("gate=0.999", "gate=0.999, every=20"))
    res = verify(spec, precision="double", steps=200)
    notes = " ".join(res.coverage["notes"])
    assert "angle th never crossed +-pi" in notes
    assert "sensor enc updated only 10 times" in notes


def test_default_verify_of_an_example_passes():
    res = verify(example_model("linear_cart"))
    assert res.ok and res.precision == "float" and res.steps >= 200
