"""The generated particle filter against its numpy reference (same seed, same random numbers)."""

from __future__ import annotations

import os
import subprocess
import tempfile

import numpy as np
import pytest
import sympy as sp

import estgen
from estgen import Model, Status, validate
from estgen.build import STRICT_FLAGS
from estgen.filters import generate
from estgen.simulate import make_scenario, run_filter
from estgen.verify import PF_FLOAT_FACTOR, _pf_float_ratios, verify

from conftest import example_model, require_tool

# every example the particle filter allows (it refuses attitude states)
PF_EXAMPLES = ["linear_cart", "battery_soc", "beacon_rover", "valve_actuator", "strapdown_nav"]


def _particles(c) -> np.ndarray:
    N = len(c._s.lw)
    return np.array([[c._s.part[i][j] for j in range(c.n)] for i in range(N)])


@pytest.mark.parametrize("example", PF_EXAMPLES)
def test_double_c_equals_reference(example):
    # contract section 6: same particles and seed, agreement to 1e-9 relative (here every step
    # of a simulated run, states and covariance, and every status code)
    res = verify(example_model(example), "pf", "double", steps=60, seed=2, particles=150)
    assert res.ok, res.as_dict()
    assert max(res.x_dev) < 1e-9 and res.P_dev < 1e-9


@pytest.mark.parametrize("example", PF_EXAMPLES)
def test_float_c_is_a_realization_of_the_reference(example):
    res = verify(example_model(example), "pf", "float", steps=60, seed=2, particles=150)
    assert res.ok, res.as_dict()


def test_float_check_fails_for_a_different_filter():
    # the statistical float check must catch a filter that is not the reference's: here the C
    # runs with 30 times the process noise of the model
    spec = estgen.load_model(example_model("linear_cart"))
    scen = make_scenario(spec, 60, 2)
    opts = {"particles": 150, "seed": 2}
    c = estgen.build(spec, filter="pf", precision="float", **opts)
    c.set_param("q_acc", 30 * c.params["q_acc"])
    c.set_param("q_dist", 30 * c.params["q_dist"])
    rr = run_filter(estgen.reference(spec, filter="pf", **opts), scen)
    rc = run_filter(c, scen)
    rx, rP, _ = _pf_float_ratios(spec, opts, scen, rr, rc)
    assert max(np.max(rx), np.max(rP)) > PF_FLOAT_FACTOR


def test_same_random_numbers_bit_for_bit():
    # a box prior is lower + width * uniform: the particles of init are bit-identical when the
    # generator and the uniforms are; a Gaussian prior adds chol(P0) z (rounding order only)
    m = Model("boxy")
    a, b = m.states("a b")
    m.process([a + 0.1 * b, b])
    m.process_noise([1e-3, 1e-4])
    m.sensor("s", [a * b], noise=[0.01])
    m.initial_uniform([-1.0, 2.0], [1.0, 5.0])
    spec = validate(m)
    for seed in (0, 3, 0xFFFFFFFF):
        c = estgen.build(spec, filter="pf", precision="double", particles=64, seed=seed)
        r = estgen.reference(spec, filter="pf", particles=64, seed=seed)
        assert np.array_equal(_particles(c), r.particles)
        assert int(c._s.rng) == r.rng.state
    c = estgen.build(example_model("beacon_rover"), filter="pf", precision="double", particles=64, seed=9)
    r = estgen.reference(example_model("beacon_rover"), filter="pf", particles=64, seed=9)
    assert np.allclose(_particles(c), r.particles, rtol=1e-15, atol=1e-15)
    # reseed: the same generator state and the same next draws
    c._lib.rover_pf_reseed(c._s, 77)
    r.reseed(77)
    assert int(c._s.rng) == r.rng.state
    assert c.predict([0.5, 0.1], 0.1) == r.predict([0.5, 0.1], 0.1) == Status.OK
    assert np.allclose(c.x, r.x, rtol=1e-12, atol=1e-12)


def _domain_model():
    m = Model("dom")
    (x,) = m.states("x")
    m.process([sp.sqrt(x)])  # undefined below zero
    m.process_noise([0.01])
    m.sensor("lg", [sp.log(x)], noise=[0.1])
    m.initial([1.0], [[0.01]])
    m.scenario(dt=0.1)
    return validate(m)


@pytest.mark.parametrize("precision", ["double", "float"])
def test_refusals_leave_the_struct_unchanged(precision):
    spec = _domain_model()
    c = estgen.build(spec, filter="pf", precision=precision, particles=100, seed=1)
    r = estgen.reference(spec, filter="pf", particles=100, seed=1)
    for f in (c, r):
        assert f.set_state([-5.0], [[0.01]]) == Status.OK
    before = c.raw_state()
    assert c.predict([], 0.1) == r.predict([], 0.1) == Status.NON_FINITE  # every particle out of f's domain
    assert c.raw_state() == before
    assert c.update("lg", [0.0]) == r.update("lg", [0.0]) == Status.DEGENERATE  # log of a negative
    assert c.raw_state() == before
    assert c.predict([], float("nan")) == Status.BAD_INPUT and c.raw_state() == before
    assert c.predict([], -1.0) == Status.BAD_DT and c.raw_state() == before
    assert c.set_state([1.0], [[-1.0]]) == Status.NOT_POSITIVE_DEFINITE and c.raw_state() == before


def test_gate_refusal_leaves_the_struct_unchanged():
    m = Model("gated")
    (x,) = m.states("x")
    m.process([x])
    m.process_noise([0.01])
    m.sensor("p", [x], noise=[0.01], gate=0.99)
    m.initial([0.0], [[1.0]])
    spec = validate(m)
    c = estgen.build(spec, filter="pf", precision="double", particles=200, seed=4)
    r = estgen.reference(spec, filter="pf", particles=200, seed=4)
    before = c.raw_state()
    assert c.update("p", [40.0]) == r.update("p", [40.0]) == Status.GATED
    assert c.raw_state() == before
    assert c.nis == pytest.approx(r.nis, rel=1e-9)  # y = mean r far from the cloud: cancellation in cov r
    assert c.update("p", [0.3]) == r.update("p", [0.3]) == Status.OK
    assert np.allclose(c.x, r.x, rtol=1e-12)


def test_set_state_moments_in_c():
    # (no angle states here: for an angle the mean is circular, so only close to x)
    c = estgen.build(example_model("battery_soc"), filter="pf", precision="double", particles=100, seed=2)
    x = np.array([0.7, 0.01, 0.05])
    P = np.diag([0.01, 1e-4, 4e-4]) + 1e-5
    assert c.set_state(x, P) == Status.OK
    assert np.allclose(c.x, x, rtol=1e-12, atol=1e-12) and np.allclose(c.P, P, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("precision", ["double", "float"])
def test_strict_compile_with_clang(precision):
    # the contract's warning set, with the second compiler CI installs
    clang = require_tool("clang")
    gen = generate(estgen.load_model(example_model("beacon_rover")), "pf", precision, particles=100, roughening=0.2)
    with tempfile.TemporaryDirectory() as d:
        for name, text in gen.files.items():
            with open(os.path.join(d, name), "w", encoding="utf-8") as fh:
                fh.write(text)
        proc = subprocess.run([clang, *STRICT_FLAGS, "-c", os.path.join(d, f"{gen.prefix}.c"),
                               "-o", os.path.join(d, "o.o")], capture_output=True, text=True)
        assert proc.returncode == 0, proc.stderr
    assert "malloc" not in gen.source and "printf" not in gen.source
    if precision == "float":
        assert "double" not in gen.source


def test_generation_is_deterministic_and_struct_size_is_exact():
    spec = estgen.load_model(example_model("battery_soc"))
    a = generate(spec, "pf", "float", particles=300)
    b = generate(spec, "pf", "float", particles=300)
    assert a.files == b.files
    c = estgen.build(spec, filter="pf", precision="float", particles=300)
    assert c._ffi.sizeof(c._s[0]) == a.struct_bytes


def test_header_additions_come_from_the_kind():
    # the particle filter's own functions and prose reach its header and cffi declarations
    # through its header_partial (pf_header.j2); the Kalman filters' headers carry none of it
    # (common practice: a declaration the header lacks is an implicit-declaration error in C99)
    spec = estgen.load_model(example_model("battery_soc"))
    pf, ekf = generate(spec, "pf", "float", particles=100), generate(spec, "ekf", "float")
    for text in (pf.header, pf.cdef):
        assert "cell_pf_init_seed(cell_pf_t *s, uint32_t seed);" in text
        assert "cell_pf_reseed(cell_pf_t *s, uint32_t seed);" in text
    assert "#define CELL_PF_PARTICLES 100" in pf.header and "(weighted mean of the particles)" in pf.header
    assert "none on P: x and P are the weighted mean" in pf.header
    for text in (ekf.header, ekf.cdef):
        assert "seed" not in text and "particle" not in text
    with open(os.path.join(os.path.dirname(__file__), os.pardir, "templates", "filter.h.j2")) as fh:
        assert 'filt == "pf"' not in fh.read()


@pytest.mark.parametrize("precision", ["float", "double"])
def test_the_clouds_covariance_cannot_overflow(precision):
    # P is a sum of N weighted squares of deviations: a cloud spread over more than
    # sqrt(REAL_MAX / N) overflows it (REAL_MAX from numpy.finfo). set_state refuses a P that
    # could draw particles that far (NON_FINITE, struct unchanged; the reference the same), and
    # predict drops particles that move that far, so an accepted call leaves P finite
    from estgen.pf import particle_reach

    spec = estgen.load_model(example_model("linear_cart"))
    N = 64
    c = estgen.build(spec, filter="pf", precision=precision, particles=N)
    r = estgen.reference(spec, filter="pf", particles=N)
    reach = particle_reach(precision, N)
    big = np.diag([1.0, 1.0, 1.01 * reach ** 2 / (spec.n * N)])
    ok = np.diag([1.0, 1.0, 0.99 * reach ** 2 / (spec.n * N)])
    before = c.raw_state()
    assert c.set_state(np.zeros(3), big) == Status.NON_FINITE and c.raw_state() == before
    if precision == "double":
        assert r.set_state(np.zeros(3), big) == Status.NON_FINITE
    assert c.set_state(np.zeros(3), ok) == Status.OK
    assert np.all(np.isfinite(c.P))
    real_max = float(np.finfo(np.float32 if precision == "float" else np.float64).max)
    for dt in (1e3, 1e9, 1e15):
        st = c.predict([0.0], dt)
        assert st in (Status.OK, Status.NON_FINITE, Status.NOT_POSITIVE_DEFINITE)
        assert np.all(np.isfinite(c.P)) and np.max(np.abs(c.P)) < real_max


def test_roughening_in_c_matches_reference():
    opts = {"particles": 120, "roughening": 0.2, "resample_threshold": 0.9}
    res = verify(example_model("valve_actuator"), "pf", "double", steps=40, seed=5, **opts)
    assert res.ok, res.as_dict()


def _noise_model():
    # contract section 5's forms: noise symbols in the process and in a sensor (scale error);
    # invented numbers
    m = Model("noisy")
    px, py, v = m.states("px py v")
    (a_meas,) = m.inputs("a_meas")
    dt = m.dt
    (wa,) = m.noise("wa", cov=[0.05 ** 2])
    (sv,) = m.noise("sv", cov=[0.02 ** 2])
    m.process([px + dt * v, py + dt * 0.3, v + dt * (a_meas - wa)])
    m.process_noise(sp.diag(1e-4, 1e-4, 0) * dt)
    m.sensor("range", [sp.sqrt(px ** 2 + py ** 2) * (1 + sv)], noise=[0.01 ** 2])
    m.sensor("side", [py], noise=[0.05 ** 2])
    m.initial([3.0, 1.0, 0.5], sp.diag(0.2, 0.2, 0.05))
    m.scenario(dt=0.1, inputs=lambda t: [0.2])
    return validate(m)


@pytest.mark.parametrize("precision", ["double", "float"])
def test_noise_symbols(precision):
    # predict samples w, the scale-error sensor is weighted with R_eff = M Rv M' + R per particle
    res = verify(_noise_model(), "pf", precision, steps=60, seed=3, particles=150)
    assert res.ok, res.as_dict()


def test_noise_symbol_likelihood_is_exact_for_a_scale_error():
    # z = d (1 + v) + e with v ~ N(0, sv^2), e ~ N(0, r): given d, z is Gaussian with variance
    # d^2 sv^2 + r, so the weight ratio of two particles equals the ratio of scipy's normal pdfs
    import scipy.stats
    from estgen.pf import ReferencePF

    spec = _noise_model()
    pf = ReferencePF(spec, particles=4, seed=1, resample_threshold=1e-9)
    X = np.array([[4.9, 0.0, 0.0], [5.2, 0.0, 0.0], [4.0, 3.0, 0.0], [3.0, 4.1, 0.0]])
    pf._X = X.copy()
    assert pf.update("range", [5.05]) == Status.OK
    d = np.hypot(X[:, 0], X[:, 1])
    lp = scipy.stats.norm.logpdf(5.05, loc=d, scale=np.sqrt(d ** 2 * 0.02 ** 2 + 0.01 ** 2))
    assert np.allclose(pf.log_weights, lp - lp.max(), rtol=1e-10, atol=1e-10)


def test_simulate_and_soak_take_the_particle_filter():
    from estgen.simulate import monte_carlo
    from estgen.soak import soak

    spec = estgen.load_model(example_model("valve_actuator"))
    ref = monte_carlo(spec, "pf", runs=3, steps=30, seed=1, use_reference=True, workers=1, progress=False,
                      options={"particles": 100})
    c = monte_carlo(spec, "pf", runs=3, steps=30, seed=1, precision="double", workers=1, progress=False,
                    options={"particles": 100})
    # each run has its own generator seed, the same for the C and the reference: equal statistics
    assert np.allclose(ref.nees.per_step, c.nees.per_step, rtol=1e-6, equal_nan=True)
    res = soak(spec, "pf", "float", steps=3000, seed=2, particles=100)
    assert res.nonfinite_steps == 0
    assert sum(res.predict_status.values()) == 3000


def test_float_moments_of_a_cloud_far_from_the_origin():
    # 1000 float particles near 1e5 with a spread of 0.1: a plain sum of w x loses about
    # sqrt(N) eps |x| (common practice: summation error); the C sums deviations from a particle
    m = Model("far")
    (x,) = m.states("x")
    m.process([x])
    m.process_noise([1e-4])
    m.sensor("p", [x], noise=[0.01])
    m.initial([1.0e5], [[0.01]])
    spec = validate(m)
    c = estgen.build(spec, filter="pf", precision="float", particles=1000, seed=1)
    r = estgen.reference(spec, filter="pf", particles=1000, seed=1)
    sd = np.sqrt(r.P[0, 0])
    assert abs(c.x[0] - r.x[0]) < 0.01 * sd
    assert c.P[0, 0] == pytest.approx(r.P[0, 0], rel=0.01)


def test_a_cloud_of_copies_has_zero_covariance_in_both():
    # after resampling onto one particle the covariance is exactly 0 in the C and the reference
    # (no rounding noise that a relative comparison would magnify)
    m = Model("copies")
    (x,) = m.states("x")
    m.process([x])
    m.process_noise([0.0])
    m.sensor("p", [x], noise=[1e-8])
    m.initial([0.0], [[1.0]])
    spec = validate(m)
    c = estgen.build(spec, filter="pf", precision="double", particles=50, seed=2)
    r = estgen.reference(spec, filter="pf", particles=50, seed=2)
    for f in (c, r):
        assert f.update("p", [0.3]) == Status.OK
    assert c.P[0, 0] == r.P[0, 0] == 0.0
    assert c.x[0] == r.x[0]


@pytest.mark.parametrize("example", ["beacon_rover", "domain"])
def test_random_calls_with_bad_values(example):
    # a random sequence of predicts, updates and set_states with NaN, infinities, huge values and
    # non-positive dt mixed in: C (double) and reference return the same status every call, a
    # refusal leaves the C's bytes unchanged, and the accepted states agree to 1e-9
    spec = _domain_model() if example == "domain" else estgen.load_model(example_model(example))
    c = estgen.build(spec, filter="pf", precision="double", particles=80, seed=11)
    r = estgen.reference(spec, filter="pf", particles=80, seed=11)
    rng = np.random.default_rng(5)
    # 1e300 only as a measurement (every likelihood underflows: DEGENERATE); as an input or a
    # state it turns angles into rounding noise that no two implementations wrap alike
    specials = [np.nan, np.inf, -np.inf, 0.0]

    def value(scale, huge=False):
        if rng.random() < 0.15:
            return float(rng.choice(specials + ([1e300, -1e300] if huge else [])))
        return float(scale * rng.standard_normal())

    for _ in range(150):
        kind = rng.choice(["predict", "update", "set_state"], p=[0.45, 0.45, 0.1])
        before = c.raw_state()
        if kind == "predict":
            u = [value(1.0) for _ in range(spec.nu)]
            dt = value(0.1) if rng.random() < 0.3 else 0.1
            args = (u, dt)
        elif kind == "update":
            s = spec.sensors[int(rng.integers(len(spec.sensors)))]
            args = (s.name, [value(3.0, huge=True) for _ in range(s.m)])
        else:
            x = [value(2.0) for _ in range(spec.n)]
            args = (x, np.diag([abs(value(1.0)) + 1e-3 for _ in range(spec.n)]))
        with np.errstate(all="ignore"):
            sc, sr = getattr(c, kind)(*args), getattr(r, kind)(*args)
        assert sc == sr, (kind, args, sc, sr)
        if sc != Status.OK:
            assert c.raw_state() == before, (kind, args, sc)
        else:
            scale = np.maximum(np.abs(r.x), np.sqrt(np.maximum(np.diag(r.P), 0.0))) + 1e-300
            assert np.all(np.abs(c.x - r.x) <= 1e-9 * scale), (kind, args)


def _special_function_model():
    # a saturating sensor through erf and a gain through the gamma function (invented numbers):
    # sympy's numpy printer maps both to Python's scalar math functions, which the particle
    # filter's vectorized reference must still evaluate per particle
    m = Model("special")
    x, v = m.states("x v")
    m.process([x + m.dt * v, v * (1 - 0.1 * m.dt)])
    m.process_noise(sp.diag(1e-4, 1e-3) * m.dt)
    m.sensor("sat", [2 * sp.erf(x / 3) + sp.erfc(v) / 4], noise=[0.02 ** 2])
    m.sensor("gain", [sp.gamma(1.5 + x ** 2 / 10) + sp.loggamma(2 + v ** 2)], noise=[0.05 ** 2])
    m.initial([0.5, 0.2], sp.diag(0.1, 0.05))
    m.scenario(dt=0.1)
    return validate(m)


def test_special_functions_in_the_reference():
    # erf, erfc, gamma and loggamma evaluated for all particles at once equal libm's values one
    # by one (Python's math module, common practice as the scalar reference), and the C follows
    res = verify(_special_function_model(), "pf", "double", steps=40, seed=1, particles=80)
    assert res.ok, res.as_dict()
    assert max(res.x_dev) < 1e-9 and res.P_dev < 1e-9
