"""The generated UKF against outside results: the Kalman filter on a linear model (the unscented
transform is exact for linear maps), the numpy reference UKF on every example in both
precisions, the published sigma-point weights, and the refusal rules of the C interface."""

from __future__ import annotations

import math
import os
import re
import shutil
import subprocess
from typing import Dict, List

import numpy as np
import pytest

import estgen
from estgen.build import STRICT_FLAGS, build
from estgen.cli import main as cli_main
from estgen.filters import generate
from estgen.errors import ModelError
from estgen.simulate import make_scenario, run_filter
from estgen.status import Status
from estgen.verify import verify

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
EX = os.path.join(ROOT, "generated_examples")
EXAMPLES = ["linear_cart", "battery_soc", "beacon_rover", "valve_actuator", "strapdown_nav"]
HEADING = os.path.join(HERE, "models", "ukf_heading.py")

_SPECS: Dict[str, estgen.ModelSpec] = {}


def spec_of(name: str) -> estgen.ModelSpec:
    path = HEADING if name == "heading" else os.path.join(EX, name, "model.py")
    if name not in _SPECS:
        _SPECS[name] = estgen.load_model(path)
    return _SPECS[name]


def _rel(a: np.ndarray, b: np.ndarray, scale: np.ndarray) -> float:
    return float(np.max(np.abs(a - b) / scale))


# -- exactness on a linear model -----------------------------------------------------------------

def test_ukf_c_equals_kalman_filter_on_linear_cart() -> None:
    # Source: Julier & Uhlmann, "Unscented filtering and nonlinear estimation", Proc. IEEE 92(3),
    # 2004: the unscented transform reproduces mean and covariance exactly for a linear map, so
    # on a linear model the UKF is the Kalman filter (here the reference EKF, which on a linear
    # model is the Kalman filter: F and H are the model's matrices).
    spec = spec_of("linear_cart")
    c = build(spec, filter="ukf", precision="double")
    kf = estgen.reference(spec, filter="ekf")
    sc = make_scenario(spec, 300, seed=11)
    rc, rk = run_filter(c, sc), run_filter(kf, sc)
    assert np.array_equal(rc["predict_status"], rk["predict_status"])
    for s in rc["update_status"]:
        assert np.array_equal(rc["update_status"][s], rk["update_status"][s])
    sig = np.sqrt(np.einsum("kii->ki", rk["P"]))
    assert _rel(rc["x"], rk["x"], np.maximum(np.abs(rk["x"]), sig)) < 1e-9
    assert _rel(rc["P"], rk["P"], sig[:, :, None] * sig[:, None, :]) < 1e-9
    # the filter did work: the disturbance force was learned from nothing (P0 = 4 N^2)
    assert rk["P"][-1][2, 2] < 0.5 * spec.P0[2][2]


# -- C against the reference UKF -----------------------------------------------------------------

@pytest.mark.parametrize("precision", ["double", "float"])
@pytest.mark.parametrize("example", EXAMPLES)
def test_c_matches_reference_on_every_example(example: str, precision: str) -> None:
    # Source: the numpy reference UKF (estgen.reference.ReferenceUKF, dense textbook form,
    # Wan & van der Merwe 2000); tolerance 1e-9 relative in double, 0.01 sigma in float.
    steps = 120 if example == "strapdown_nav" else 200
    res = verify(spec_of(example), filter="ukf", precision=precision, steps=steps, seed=3)
    assert res.ok, (res.x_dev, res.P_dev, res.status_mismatch)
    assert max(res.x_dev) > 0.0 or precision == "double"  # float rounding must show: it ran


@pytest.mark.parametrize("opts", [{"alpha": 0.5, "beta": 2.0, "kappa": 1.0},
                                  {"alpha": 1e-2, "beta": 2.0, "kappa": 0.0},
                                  {"alpha": 1.0, "beta": 0.0, "kappa": 3.0 - 4.0}])
def test_non_default_parameters_match_reference(opts: Dict[str, float]) -> None:
    # Source: the reference UKF with the same alpha, beta, kappa (scaled UT, Julier 2002);
    # alpha = 1e-2 gives a negative centre weight, kappa = 3 - n is Julier's choice for normals.
    res = verify(spec_of("heading"), filter="ukf", precision="double", steps=150, seed=5, **opts)
    assert res.ok, (opts, res.x_dev, res.P_dev, res.status_mismatch)


@pytest.mark.parametrize("precision", ["double", "float"])
def test_block_sensor_with_angles_and_full_R_matches_reference(precision: str) -> None:
    # Source: the reference UKF (block update with a full R, circular means per angle component).
    res = verify(os.path.join(HERE, "models", "ukf_rangebearing.py"), filter="ukf", precision=precision,
                 steps=400, seed=4)
    assert res.ok, (res.x_dev, res.P_dev, res.status_mismatch)


@pytest.mark.parametrize("precision", ["double", "float"])
def test_tanh_and_exp_pair_identities_match_reference(precision: str) -> None:
    # Source: the reference UKF (tanh and exp evaluated at every sigma point); the addition
    # theorems tanh(c +- d) = (tanh c +- tanh d) / (1 +- tanh c tanh d) and
    # exp(c +- d) = exp(c) exp(+-d) (Abramowitz & Stegun 1964, 4.5.26 and 4.2.1, from memory).
    path = os.path.join(HERE, "models", "ukf_saturation.py")
    spec = estgen.load_model(path)
    # premise: with P0 the first sigma spread of a + 2 b is sqrt(n) * sqrt(P0_aa) = 2.83, so
    # |tanh d| > 0.9 and the direct fallback runs; later, with P shrunk, the identity runs
    assert math.tanh(math.sqrt(spec.n) * math.sqrt(spec.P0[0][0])) > 0.9
    gen = generate(spec, filter="ukf", precision=precision)
    assert gen.source.count("tanh") > 0 and ("expf(" if precision == "float" else "exp(") in gen.source
    res = verify(spec, filter="ukf", precision=precision, steps=300, seed=9)
    assert res.ok, (res.x_dev, res.P_dev, res.status_mismatch)


def test_heading_crossing_pi_tracks_truth_and_reference() -> None:
    # Source: the reference UKF (same algorithm) for equality; for tracking, common practice:
    # a consistent filter's error stays inside 3 sigma nearly always (Bar-Shalom, Li and
    # Kirubarajan 2001, ch. 5: NEES consistency).
    spec = spec_of("heading")
    sc = make_scenario(spec, 500, seed=8)
    hd = sc.x_true[:, 2]
    crossings = int(np.sum(np.abs(np.diff(hd)) > math.pi))
    assert crossings >= 5  # the heading wraps through +-pi again and again
    c = build(spec, filter="ukf", precision="double")
    r = estgen.reference(spec, filter="ukf")
    rc, rr = run_filter(c, sc), run_filter(r, sc)
    sig = np.sqrt(np.einsum("kii->ki", rr["P"]))
    assert _rel(rc["x"], rr["x"], np.maximum(np.abs(rr["x"]), sig)) < 1e-9
    assert np.all(rc["predict_status"] == 0)
    err = rc["x"] - sc.x_true
    err[:, 2] = (err[:, 2] + math.pi) % (2 * math.pi) - math.pi
    sc_sig = np.sqrt(np.einsum("kii->ki", rc["P"]))
    inside = np.abs(err[50:]) <= 3 * sc_sig[50:]
    assert inside.mean() > 0.97, inside.mean()
    assert np.all(np.abs(rc["x"][:, 2]) <= math.pi)
    assert float(np.max(np.abs(err[100:, 2]))) < 0.2  # heading error small across every wrap


# -- what only the UKF can do --------------------------------------------------------------------

def test_model_the_ekf_refuses_is_a_ukf_model() -> None:
    # Source: common practice: Min/Max have no derivative at their kinks, the UKF uses none.
    spec = spec_of("valve_actuator")
    with pytest.raises(ModelError, match="cannot differentiate"):
        generate(spec, filter="ekf", precision="double")
    gen = generate(spec, filter="ukf", precision="double")
    assert "fmin(" in gen.source and "fmax(" in gen.source
    assert verify(spec, filter="ukf", precision="double", steps=150, seed=2).ok


@pytest.mark.parametrize("precision", ["double", "float"])
def test_every_non_differentiable_function_compiles_clean_and_matches(precision: str, tmp_path) -> None:
    # Source: the reference UKF for the values (sympy's meaning of sign, Mod, Heaviside...:
    # Mod takes the divisor's sign, unlike C's fmod, ISO/IEC 9899:1999 7.12.10.1); the
    # contract's warning set for the C (section 4). Needs gcc and clang: fails without them.
    spec = estgen.load_model(os.path.join(HERE, "models", "ukf_nondiff.py"))
    with pytest.raises(ModelError, match="cannot differentiate"):
        generate(spec, filter="ekf", precision=precision)
    gen = generate(spec, filter="ukf", precision=precision)
    for name, text in gen.files.items():
        (tmp_path / name).write_text(text)
    for compiler in ("gcc", "clang"):
        cc = shutil.which(compiler)
        assert cc, f"{compiler} is required for this test"
        proc = subprocess.run([cc, *STRICT_FLAGS, "-O2", "-c", str(tmp_path / f"{gen.prefix}.c"), "-o",
                               str(tmp_path / "o.o")], capture_output=True, text=True)
        assert proc.returncode == 0, proc.stderr
    res = verify(spec, filter="ukf", precision=precision, steps=300, seed=12)
    assert res.ok, (res.x_dev, res.P_dev, res.status_mismatch)


# -- refusals leave the filter untouched ---------------------------------------------------------

def _fresh(name: str, precision: str = "double"):
    f = build(spec_of(name), filter="ukf", precision=precision)
    assert f.predict([0.9], 0.1) == 0  # move off the initial state first
    return f


@pytest.mark.parametrize("precision", ["double", "float"])
def test_refusals_leave_struct_bit_for_bit_unchanged(precision: str) -> None:
    # Source: the outside interface (contract sections 3 and 4): a non-zero status means the
    # filter is exactly as before; codes as documented in estgen.status.
    f = _fresh("heading", precision)
    before = f.raw_state()
    cases = [
        (lambda: f.predict([float("nan")], 0.1), Status.BAD_INPUT),
        (lambda: f.predict([0.9], float("inf")), Status.BAD_INPUT),
        (lambda: f.predict([0.9], 0.0), Status.BAD_DT),
        (lambda: f.predict([0.9], -0.1), Status.BAD_DT),
        (lambda: f.update("bearing", [float("nan")]), Status.BAD_INPUT),
        (lambda: f.update("fix", [1.0, float("-inf")]), Status.BAD_INPUT),
        (lambda: f.set_state([0, 0, 0, 1], np.array([[1, 2, 0, 0], [2, 1, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1.0]])),
         Status.NOT_POSITIVE_DEFINITE),
    ]
    for call, code in cases:
        assert call() == code
        assert f.raw_state() == before


def _poke_P(f, P: np.ndarray) -> None:
    """Write P into the struct directly, bypassing set_state's check (a corrupted filter)."""
    k = 0
    for i in range(f.n):
        for j in range(i, f.n):
            f._s.P[k] = float(P[i, j])
            k += 1


def test_non_positive_definite_P_refused_by_predict_and_update() -> None:
    # Source: a symmetric matrix with positive diagonal but a negative eigenvalue has no
    # Cholesky factor (Golub & Van Loan, Matrix Computations, 4th ed., 2013, sec. 4.2); the
    # reference refuses it the same way.
    f = _fresh("heading")
    P = np.diag([1.0, 1.0, 0.05, 0.05])
    P[0, 1] = P[1, 0] = 1.5  # eigenvalues 2.5 and -0.5
    assert np.min(np.linalg.eigvalsh(P)) < 0
    _poke_P(f, P)
    before = f.raw_state()
    assert f.predict([0.9], 0.1) == Status.NOT_POSITIVE_DEFINITE
    assert f.raw_state() == before
    for name, z in (("bearing", [0.3]), ("compass", [1.0]), ("fix", [0.0, 0.0])):
        assert f.update(name, z) == Status.NOT_POSITIVE_DEFINITE
        assert f.raw_state() == before


def test_non_finite_intermediate_refused_unchanged() -> None:
    # Source: IEEE 754: sqrt of a negative number is NaN. The valve's flow law reads sqrt(dp);
    # with dp = 0.1 bar and a 1 bar^2 variance, sigma points put dp below zero. The reference
    # refuses with the same code (checked), the C must leave the struct as it was.
    spec = spec_of("valve_actuator")
    c = build(spec, filter="ukf", precision="double")
    r = estgen.reference(spec, filter="ukf")
    x, P = [0.5, 0.1], np.diag([0.01, 1.0])
    assert c.set_state(x, P) == 0 and r.set_state(x, P) == 0
    before = c.raw_state()
    assert r.update("flow", [1.0]) == Status.NON_FINITE
    assert c.update("flow", [1.0]) == Status.NON_FINITE
    assert c.raw_state() == before
    assert c.update("stem", [0.5]) == Status.OK  # a sensor that does not read dp still works


def test_gate_refuses_unchanged_and_reports_nis() -> None:
    # Source: common practice (chi-square innovation gate); the threshold comes from
    # estgen.chi2 (checked against scipy in tests/test_reference.py); NIS from the reference.
    f = _fresh("heading")
    r = estgen.reference(spec_of("heading"), filter="ukf")
    r.set_state(f.x, f.P)
    before = f.raw_state()
    zb = [float(f.x[2]) + 2.0]  # a bearing 2 rad off: far outside the 0.9999 gate
    assert f.update("bearing", zb) == Status.GATED == r.update("bearing", zb)
    assert f.raw_state() == before
    assert f.nis == pytest.approx(r.nis, rel=1e-9) and f.nis > 100.0


# -- weights and options -------------------------------------------------------------------------

def _defines(source: str, prefix: str) -> Dict[str, float]:
    out = {}
    for name in ("WM0", "WC0", "WI", "GAMMA"):
        m = re.search(rf"#define {prefix.upper()}_{name} ([0-9eE.+-]+)F?\b", source)
        assert m, name
        out[name] = float(m.group(1))
    return out


@pytest.mark.parametrize("alpha,beta,kappa", [(1.0, 2.0, 0.0), (0.3, 2.0, 1.0), (1e-3, 2.0, 0.0), (1.0, 0.0, -1.0)])
def test_generated_weights_are_the_published_ones(alpha: float, beta: float, kappa: float) -> None:
    # Source: Wan & van der Merwe, "The unscented Kalman filter for nonlinear estimation",
    # IEEE AS-SPCC 2000, eq. (15): lambda = alpha^2 (n + kappa) - n, Wm0 = lambda/(n+lambda),
    # Wc0 = Wm0 + 1 - alpha^2 + beta, Wi = 1/(2(n+lambda)); the mean weights sum to one.
    spec = spec_of("heading")
    n = spec.n
    gen = generate(spec, filter="ukf", precision="double", alpha=alpha, beta=beta, kappa=kappa)
    d = _defines(gen.source, gen.prefix)
    lam = alpha ** 2 * (n + kappa) - n
    assert d["WM0"] == pytest.approx(lam / (n + lam), rel=1e-15, abs=1e-15)
    assert d["WC0"] == pytest.approx(lam / (n + lam) + 1 - alpha ** 2 + beta, rel=1e-15)
    assert d["WI"] == pytest.approx(1 / (2 * (n + lam)), rel=1e-15)
    assert d["GAMMA"] == pytest.approx(math.sqrt(n + lam), rel=1e-15)
    assert d["WM0"] + 2 * n * d["WI"] == pytest.approx(1.0, rel=1e-9)
    if (alpha, beta, kappa) == (1.0, 2.0, 0.0):
        assert d["WM0"] == 0.0 and d["WC0"] > 0.0  # no negative weight: safe in float


@pytest.mark.parametrize("opts,msg", [({"alpha": 0.0}, "alpha must be > 0"), ({"alpha": -1.0}, "alpha must be > 0"),
                                      ({"kappa": -4.0}, "n \\+ lambda"), ({"kappa": -9.0}, "n \\+ lambda"),
                                      ({"beta": float("nan")}, "finite"), ({"gamma": 1.0}, "unknown UKF option")])
def test_bad_options_are_model_errors(opts: Dict[str, float], msg: str) -> None:
    # Source: common practice: n + lambda must be > 0 for real sigma points (Julier 2002).
    with pytest.raises(ModelError, match=msg):
        generate(spec_of("heading"), filter="ukf", precision="double", **opts)


def test_cli_ukf_generate_check_verify(tmp_path, capsys) -> None:
    # Source: the outside interface (contract section 2): exit codes 0, 1 and 2.
    out = str(tmp_path / "gen")
    assert cli_main(["generate", HEADING, "--filter", "ukf", "--precision", "double", "-o", out, "-q",
                     "--alpha", "0.5", "--kappa", "1"]) == 0
    assert sorted(os.listdir(out)) == ["ukfboat_ukf.c", "ukfboat_ukf.h"]
    assert cli_main(["generate", HEADING, "--filter", "ukf", "--precision", "double", "-o", out, "--check",
                     "--alpha", "0.5", "--kappa", "1"]) == 0
    assert cli_main(["generate", HEADING, "--filter", "ukf", "--precision", "double", "-o", out, "--check"]) == 1
    assert cli_main(["generate", HEADING, "--filter", "ukf", "-o", out, "--alpha", "0"]) == 2
    assert cli_main(["verify", HEADING, "--filter", "ukf", "--steps", "60"]) == 0
    capsys.readouterr()


# -- the C itself --------------------------------------------------------------------------------

def test_deterministic_and_committed_examples_current() -> None:
    # Source: common practice (reproducible builds): same input, same bytes.
    spec = spec_of("beacon_rover")
    a = generate(spec, filter="ukf", precision="float")
    b = generate(estgen.load_model(os.path.join(EX, "beacon_rover", "model.py")), filter="ukf", precision="float")
    assert a.files == b.files
    for name, text in a.files.items():
        with open(os.path.join(EX, "beacon_rover", "ukf_float", name), encoding="utf-8") as fh:
            assert fh.read() == text, f"{name} is stale: run python generated_examples/regenerate.py"


_DOUBLE_MATH = re.compile(r"\b(sin|cos|tan|atan2|atan|asin|acos|sqrt|exp|log|pow|fabs|fmin|fmax|ceil|floor|tanh)\(")
_DOUBLE_LIT = re.compile(r"(?<![\w.])\d+\.\d*(?:[eE][-+]?\d+)?(?![\w.])")


@pytest.mark.parametrize("compiler", ["gcc", "clang"])
def test_strict_compile_and_float_hygiene(compiler: str, tmp_path) -> None:
    # Source: the contract's warning set (section 4); C99 (ISO/IEC 9899:1999) 7.12: the
    # f-suffixed math functions take and return float. A missing compiler fails the test.
    cc = shutil.which(compiler)
    assert cc, f"{compiler} is required for this test"
    for ex in ("valve_actuator", "beacon_rover", "battery_soc"):
        for prec in ("float", "double"):
            gen = generate(spec_of(ex), filter="ukf", precision=prec)
            d = tmp_path / f"{ex}_{prec}"
            d.mkdir()
            for name, text in gen.files.items():
                (d / name).write_text(text)
            proc = subprocess.run([cc, *STRICT_FLAGS, "-O2", "-c", str(d / f"{gen.prefix}.c"), "-o",
                                   str(d / "o.o")], capture_output=True, text=True)
            assert proc.returncode == 0, proc.stderr
            body = gen.source
            for bad in ("malloc", "free(", "printf", "stdio.h", "static " + gen.prefix + "_t"):
                assert bad not in body
            if prec == "float":
                code = "\n".join(line for line in body.splitlines() if not line.lstrip().startswith(("/*", "*")))
                assert not _DOUBLE_MATH.search(code), _DOUBLE_MATH.search(code)
                assert not _DOUBLE_LIT.search(code), _DOUBLE_LIT.search(code)
                assert "double" not in code


def test_ops_and_memory_accounting() -> None:
    # Source: common practice: the header documents where the sigma points live and their bytes.
    spec = spec_of("beacon_rover")
    gen = generate(spec, filter="ukf", precision="double")
    assert set(gen.ops) == {"predict"} | {f"update_{s.name}" for s in spec.sensors}
    assert all(sum(v.values()) > 0 for v in gen.ops.values())
    m = re.search(r"named locals total (\d+) bytes in predict and (\d+) bytes", gen.header)
    assert m and int(m.group(1)) == gen.sigma_stack["predict"] and int(m.group(2)) == gen.sigma_stack["update"]
    assert f"sizeof({gen.prefix}_t) = {gen.struct_bytes} bytes" in gen.header
    # x, packed P and the parameters: the same struct as the EKF's
    assert gen.struct_bytes == (spec.n + spec.n * (spec.n + 1) // 2 + len(spec.params)) * 8
