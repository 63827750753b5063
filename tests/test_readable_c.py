"""Generated C a reviewer can trace: literals, index names, temporaries, section comments.

Sources: IEEE 754-2008 binary32 (the float a C compiler stores for a float literal, C99 6.4.4.2);
numpy's float32 conversion is the reference for what round-trips.
"""

from __future__ import annotations

import re
import textwrap

import numpy as np
import sympy as sp
import pytest

import estgen
from estgen.emit import c_literal
from estgen.filters import generate

from conftest import example_filters, example_model


def _parse_c_float(text: str) -> np.float32:
    """What a C compiler stores for a float literal: the decimal rounded once to binary32
    (C99 6.4.4.2; numpy's str -> float32 conversion rounds correctly the same way)."""
    return np.float32(text.rstrip("F"))


@pytest.mark.parametrize("value", [4.0000000000000007e-10, 1.0000000000000002e-10, 0.1, 1.2184696791468344e-05,
                                   3.141592653589793, 6.283185307179586, 123456789.0, 1e20, -2.5e-7, 0.0, 1.0])
def test_float_literal_is_shortest_round_trip(value):
    """A float literal reads back as the float32 of the value, and no shorter decimal does."""
    text = c_literal(value, "float")
    assert text.endswith("F")
    assert _parse_c_float(text) == np.float32(value)
    mant = text.rstrip("F").split("e")[0].lstrip("-")
    digits = mant.replace(".", "").strip("0")
    if len(digits) > 1:
        # one significant digit fewer (rounded) no longer reads back as the same float32
        shorter = float(f"{np.float32(value):.{len(digits) - 2}e}")
        assert np.float32(shorter) != np.float32(value)


def test_double_literal_round_trips():
    for v in (4.0000000000000007e-10, 0.1, 1e-300, 2.0):
        assert float(c_literal(v, "double")) == v


def test_float_literal_refuses_overflow():
    with pytest.raises(ValueError):
        c_literal(1e39, "float")  # FLT_MAX is about 3.4e38 (IEEE 754 binary32)


@pytest.mark.parametrize("example,filt", example_filters())
def test_state_and_input_indices_are_named(example, filt):
    """The code reads x[<prefix>_ix_<state>] (the header's enum), never a bare x[8]."""
    spec = estgen.load_model(example_model(example))
    gen = generate(spec, filter=filt, precision="float")
    body = re.sub(r"(float|double) (x|xn|xs|u)\[\d+\];", "", gen.source)  # declarations keep their size
    assert not re.search(r"\b(x|xn|xs|u)\[\d+\]", body), re.findall(r"\b(?:x|xn|xs|u)\[\d+\]", body)[:5]
    assert f"x[{gen.prefix}_ix_{spec.states[0].name}]" in gen.source
    for s in spec.inputs:
        assert f"{gen.prefix}_iu_{s.name} = " in gen.header


MODEL_R0 = textwrap.dedent("""
    import sympy as sp
    from estgen import Model
    model = Model("clash")
    p, v = model.states("p v")
    r0 = model.param("r0", 0.01)
    t0 = model.param("t0", 2.0)
    dt = model.dt
    model.process([p + dt * v, v * (1 - dt / t0)])
    model.process_noise(sp.diag(1e-4, 1e-3) * dt)
    model.sensor("pos", [p], noise=[r0])
    model.sensor("both", [p, v * sp.cos(p)], noise=[r0, 0.2])
    model.initial([0.0, 1.0], sp.diag(1.0, 1.0))
""")


def test_temporaries_never_share_a_parameter_name(tmp_path):
    """A residual r0 or CSE temporary t0 beside par->r0 / par->t0 is renamed; the C still agrees
    with the reference (double, 1e-9 relative: estgen verify's tolerance)."""
    path = tmp_path / "clash.py"
    path.write_text(MODEL_R0)
    spec = estgen.load_model(str(path))
    gen = generate(spec, filter="ekf", precision="double")
    decls = set(re.findall(r"const double (\w+) =", gen.source))
    assert not decls & {"r0", "t0"}, decls & {"r0", "t0"}
    assert "r0_t" in decls
    c = estgen.build(spec, filter="ekf", precision="double")
    r = estgen.reference(spec, filter="ekf")
    for f in (c, r):
        assert f.predict([], 0.1) == 0
        assert f.update("both", [0.2, 0.9]) == 0
        assert f.update("pos", [0.25]) == 0
    np.testing.assert_allclose(c.x, r.x, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(c.P, r.P, rtol=1e-9, atol=1e-12)


MODEL_NOISE_NAMES = textwrap.dedent("""
    import sympy as sp
    from estgen import Model
    model = Model("nnames")
    p, v = model.states("p v")
    dt = model.dt
    model.process([p + dt * v, v])
    model.process_noise([1e-4, 1e-4])
    (ep,) = model.noise("ep", cov=[0.25])
    (vn,) = model.noise("v", cov=[0.04])  # the same name as the state v (contract, section 5)
    model.sensor("gps", [p + ep, v + vn, p * (1 + vn / 10)])
    model.initial([0.0, 1.0], sp.diag(1.0, 1.0))
""")


@pytest.mark.parametrize("filt", ["ekf", "ukf", "pf"])
def test_sensor_text_prints_noise_symbols_under_their_model_names(tmp_path, filt):
    """The header's sensor text is the model function as sympy's own printer writes it over the
    model file's names (sympy.sstr of the same expression over plain symbols is the reference);
    a noise symbol named like a state stays a separate term ("v + v", not "2*v"), and the heading
    lists the sensor's noise symbols."""
    path = tmp_path / "nnames.py"
    path.write_text(MODEL_NOISE_NAMES)
    gen = generate(estgen.load_model(str(path)), filter=filt, precision="double")
    p, v, ep, vn = sp.symbols("p v ep _v")
    merged = sp.sstr(v + sp.Symbol("v"))  # what a careless rename would print
    assert merged == "2*v"
    assert " *   gps (noise symbols: ep, v):\n" in gen.header
    assert f" *     z[0] = {sp.sstr(ep + p)}\n" in gen.header
    assert " *     z[1] = v + v\n" in gen.header
    third = sp.sstr(p * (1 + vn / 10)).replace("_v", "v")
    assert f" *     z[2] = {third}\n" in gen.header
    block = gen.header.split(" * Measurements")[1].split(" * Packed covariance")[0]
    assert "_ep" not in block and "_v" not in block, block


def test_ukf_comment_states_the_sigma_point_dimension():
    # the scaled unscented transform's n is the dimension the sigma points span (Julier 2002):
    # the error dimension for an attitude model, and the augmented vector's for noise symbols
    from estgen import load_model
    import os

    att = load_model(os.path.join(os.path.dirname(__file__), "models", "attitude_gyro.py"))
    src = generate(att, filter="ukf").source
    assert f"n = {att.ne} (the error dimension: {att.n} stored states" in src
    nav = example_model("strapdown_nav")
    assert "use an augmented vector's sigma points" in generate(nav, filter="ukf").source
    assert "augmented vector" not in generate(example_model("linear_cart"), filter="ukf").source
