"""Units: one per name or a clear error, printed as given or refused with the reason; sensor
components and their units reach the header."""

from __future__ import annotations

import textwrap

import pytest

import estgen
from estgen.filters import generate

HEAD = """
    import sympy as sp
    from estgen import Model
    model = Model("u")
"""
TAIL = """
    dt = model.dt
    model.process([a + dt * b, b])
    model.process_noise(sp.diag(1e-4, 1e-4) * dt)
    model.sensor("s", [a, b], noise=[0.1, 0.1]{sensor_units})
    model.initial([0.0, 0.0], sp.diag(1.0, 1.0))
"""


def _load(tmp_path, states_units, sensor_units="", param=""):
    text = HEAD + f"    a, b = model.states(\"a b\"{states_units})\n" + (f"    {param}\n" if param else "") + TAIL
    path = tmp_path / "m.py"
    path.write_text(textwrap.dedent(text.format(sensor_units=sensor_units)))
    return estgen.load_model(str(path)), str(path)


def test_one_unit_per_name_is_printed_as_given(tmp_path):
    spec, _ = _load(tmp_path, ', units="N*m rad/s"', ', units="N*m rad/s"', 'k = model.param("k", 2.0, units="kg*m^2")')
    head = generate(spec, filter="ekf").header
    assert "[0] a [N*m]" in head and "[1] b [rad/s]" in head
    assert "z[0] = a [N*m]" in head and "z[1] = b [rad/s]" in head
    assert "[kg*m^2]" in head  # param(units=) as states spell it


def test_a_single_unit_is_not_broadcast(tmp_path):
    with pytest.raises(estgen.ModelError) as info:
        _load(tmp_path, ', units="rad/s"')
    text = str(info.value)
    assert text.startswith(f"{tmp_path / 'm.py'}:5: error: 1 unit given for 2 names (a b)")
    assert 'units="rad/s rad/s"' in text
    with pytest.raises(estgen.ModelError) as info:
        _load(tmp_path, "", ', units="m"')
    assert "sensor 's': 1 unit given for 2 names" in str(info.value)


@pytest.mark.parametrize("unit,why", [("µm", "'µ'"), ("m*/s", "comment"), ("x" * 30, "longer than 24"),
                                      ("°", "'°'")])
def test_unprintable_units_are_refused_with_the_reason(tmp_path, unit, why):
    with pytest.raises(estgen.ModelError) as info:
        _load(tmp_path, f', units=["{unit}", "m"]')
    assert "cannot be printed in the generated C" in str(info.value) and why in str(info.value)
    with pytest.raises(estgen.ModelError) as info:
        _load(tmp_path, "", "", f'k = model.param("k", 1.0, unit="{unit}")')
    assert "parameter 'k'" in str(info.value) and why in str(info.value)


def test_param_unit_and_units_must_agree(tmp_path):
    with pytest.raises(estgen.ModelError) as info:
        _load(tmp_path, "", "", 'k = model.param("k", 1.0, unit="m", units="s")')
    assert "disagree" in str(info.value)
