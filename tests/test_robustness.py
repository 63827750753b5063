"""Robustness of the generated C: refused calls are transactional, gates reject outliers at the
chi-square quantile, set_state validates and recovers, and nothing from a model file reaches the
C except validated identifiers and numeric literals. The transactional tests cover the particle
filter too, held to what it promises (finite x, a positive semidefinite P, normalized weights,
DEGENERATE among its refusals).

Sources: the status codes and their meaning are estgen's own contract (estgen/status.py,
/work/shared/contract.md section 3: "a non-zero status means refused: the filter is then exactly
as it was before the call"); chi-square quantiles come from scipy.stats.chi2.ppf; positive
definiteness is checked with numpy's Cholesky factorization (LAPACK potrf); IEEE 754 float
limits come from numpy.finfo. The helpers here are shared by test_fuzz.py and test_soak.py.
"""

from __future__ import annotations

import dataclasses
import functools
import importlib.util
import math
import os
import re
import subprocess
import sys
from typing import Any, Callable, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pytest
import scipy.stats

import estgen
from estgen.build import CFilter, compile_generated
from estgen.chi2 import chi2_ppf
from estgen.emit import Generated, safe_comment, safe_filename
from estgen.filters import check_filter_support, generate, get
from estgen.errors import ModelError
from estgen.model import ModelSpec
from estgen.reference import model_functions
from estgen.simulate import make_scenario
from estgen.soak import within_rounding
from estgen.status import Status

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(HERE)
EXAMPLES_DIR = os.path.join(REPO, "generated_examples")
EXAMPLES = sorted(d for d in os.listdir(EXAMPLES_DIR) if os.path.isfile(os.path.join(EXAMPLES_DIR, d, "model.py")))
PRECISIONS = ("float", "double")
OK, BAD_INPUT, BAD_DT, NOT_PD, NON_FINITE, GATED = (int(s) for s in (Status.OK, Status.BAD_INPUT, Status.BAD_DT,
                                                                  Status.NOT_POSITIVE_DEFINITE, Status.NON_FINITE,
                                                                  Status.GATED))
DEGENERATE = int(Status.DEGENERATE)
#: options of the kinds whose defaults would make these tests slow (a particle filter of 64)
KIND_OPTIONS: Dict[str, Dict[str, Any]] = {"pf": {"particles": 64}}


# ---------------------------------------------------------------------------------------------
# Shared helpers


def model_path(example: str) -> str:
    return os.path.join(EXAMPLES_DIR, example, "model.py")


@functools.lru_cache(maxsize=None)
def spec_of(example: str) -> ModelSpec:
    return estgen.load_model(model_path(example))


def ukf_available() -> bool:
    """The UKF emitter is written in parallel; parametrize over it once it exists."""
    return importlib.util.find_spec("estgen.emit_ukf") is not None


def filters_for(spec: ModelSpec) -> List[str]:
    """The filters the generator supports for this model (valve_actuator is UKF-only)."""
    out = []
    for filt in ("ekf", "ukf"):
        if filt == "ukf" and not ukf_available():
            continue
        try:
            check_filter_support(spec, filt)
        except ModelError:
            continue
        out.append(filt)
    return out


def configurations() -> List[Tuple[str, str, str]]:
    """(example, filter, precision) for every combination the generator supports."""
    return [(ex, f, p) for ex in EXAMPLES for f in filters_for(spec_of(ex)) for p in PRECISIONS]


CONFIGS = configurations()
CONFIG_IDS = ["-".join(c) for c in CONFIGS]


def pf_configurations() -> List[Tuple[str, str, str]]:
    """(example, "pf", precision) for every example the particle filter takes (no attitudes)."""
    out = []
    for ex in EXAMPLES:
        try:
            check_filter_support(spec_of(ex), "pf")
        except ModelError:
            continue
        out += [(ex, "pf", p) for p in PRECISIONS]
    return out


#: the transactional and fuzz tests hold the particle filter to what it promises too (not the
#: gate, soak and static-analysis sets, which read CONFIGS: its gate and long runs are tested in
#: test_pf_codegen.py)
ALL_CONFIGS = CONFIGS + pf_configurations()
ALL_IDS = ["-".join(c) for c in ALL_CONFIGS]


def generated(example: str, filt: str, precision: str, gates: Optional[Dict[str, float]] = None) -> Generated:
    """The generated C (cached: generating the 15-state UKF takes seconds)."""
    return _generated(example, filt, precision, tuple(sorted(gates.items())) if gates else None)


@functools.lru_cache(maxsize=None)
def _generated(example: str, filt: str, precision: str, gates: Optional[Tuple[Tuple[str, float], ...]]) -> Generated:
    kw: Dict[str, Any] = {"gates": dict(gates)} if gates else {}
    return generate(spec_of(example), filter=filt, precision=precision, **kw, **KIND_OPTIONS.get(filt, {}))


def fresh(example: str, filt: str, precision: str, *, gates: Optional[Dict[str, float]] = None,
          cflags: Sequence[str] = (), ldflags: Sequence[str] = ()) -> CFilter:
    """A newly initialized compiled filter (the compiled module is cached, the struct is new)."""
    gen = generated(example, filt, precision, gates)
    comp = compile_generated(gen, list(cflags), list(ldflags))
    spec = spec_of(example)
    if gates:
        spec = dataclasses.replace(spec, sensors=tuple(
            dataclasses.replace(s, gate=gates.get(s.name, s.gate)) for s in spec.sensors))
    return CFilter(spec, comp, filt)


def warm_up(c: Any, spec: ModelSpec, steps: int = 25, seed: int = 3, allowed: Tuple[int, ...] = (OK,)) -> None:
    """Run a few simulated steps so that x and P are no longer the initial values (a gated
    filter may reject a few normal measurements: pass allowed=(OK, GATED))."""
    sc = make_scenario(spec, steps, seed)
    for k in range(steps):
        assert c.predict(sc.u[k], sc.dt) == OK
        for name, z in sc.measurements[k]:
            assert c.update(name, z) in allowed


def is_posdef(P: np.ndarray, precision: Optional[str] = None) -> bool:
    """Positive definite by numpy's Cholesky (LAPACK potrf), on a symmetric matrix. With
    ``precision``, a matrix numpy refuses still passes when it is positive definite within the
    rounding of a Cholesky factorization in that precision (estgen.soak.within_rounding, after
    Higham 2002): only ill-conditioned matrices (fuzzed states of 1e30) get there, where the C's
    factorization and LAPACK's can disagree."""
    if not np.all(np.isfinite(P)) or not np.array_equal(P, P.T):
        return False
    try:
        np.linalg.cholesky(P)
        return True
    except np.linalg.LinAlgError:
        return precision is not None and within_rounding(P, precision)


def checked(c: Any, call: Callable[[], int]) -> int:
    """Run one call and check the contract's invariants: status one of the kind's documented
    codes (0..5, and 6 DEGENERATE for the particle filter); refused => the struct is bit-for-bit
    unchanged; accepted => x finite and, for a Kalman filter, P symmetric positive definite; for
    the particle filter (whose P is the cloud's covariance: a cloud of copies has P = 0) P finite,
    symmetric and positive semidefinite, and the weights normalized as documented: finite, in
    [0, 1], the largest exactly 1, and exp of the log-weights."""
    kind = get(c.filter)
    codes = {0, 1, 2, 3, 4, 5} | {int(s) for s in kind.statuses}
    before = c.raw_state()
    st = int(call())
    assert st in codes, f"status {st} is not a documented code of the {c.filter}"
    if st != OK:
        assert c.raw_state() == before, f"refused call (status {Status(st).name}) changed the struct"
    else:
        assert np.all(np.isfinite(c.x)), f"accepted call left a non-finite x: {c.x}"
        if kind.gaussian:
            assert is_posdef(c.P, c.precision), f"accepted call left P not positive definite:\n{c.P}"
        else:
            _check_cloud(c)
    return st


def _check_cloud(c: Any) -> None:
    P = c.P
    assert np.all(np.isfinite(P)) and np.array_equal(P, P.T), f"accepted call left P non-finite or asymmetric:\n{P}"
    # positive semidefinite up to the rounding of a sum of N weighted outer products (numpy's
    # eigvalsh, LAPACK syevd; eps from numpy.finfo)
    eps = float(np.finfo(np.float32 if c.precision == "float" else np.float64).eps)
    lam = np.linalg.eigvalsh(P)
    assert lam.min() >= -64 * eps * max(float(np.max(np.abs(P))), 1e-300) * P.shape[0], lam
    w = np.array(list(c._s.w), dtype=float)
    lw = np.array(list(c._s.lw), dtype=float)
    assert np.all(np.isfinite(w)) and np.all((w >= 0.0) & (w <= 1.0)) and w.max() == 1.0, w
    assert lw.max() == 0.0 and np.all(lw[w > 0.0] > -np.inf), lw



def real_max(precision: str) -> float:
    return float(np.finfo(np.float32 if precision == "float" else np.float64).max)


# ---------------------------------------------------------------------------------------------
# 1. Transactional calls


NON_FINITE_VALUES = (float("nan"), float("inf"), float("-inf"))


@pytest.mark.parametrize("config", ALL_CONFIGS, ids=ALL_IDS)
def test_bad_inputs_are_refused_and_change_nothing(config):
    ex, filt, prec = config
    spec = spec_of(ex)
    c = fresh(ex, filt, prec)
    r = estgen.reference(spec, filt, **KIND_OPTIONS.get(filt, {}))
    warm_up(c, spec)
    warm_up(r, spec)
    sc = make_scenario(spec, 1, 11)
    u0, dt0 = sc.u[0], sc.dt
    tried = 0

    def both(expected: int, cf: Callable[[Any], int]) -> None:
        nonlocal tried
        tried += 1
        assert checked(c, lambda: cf(c)) == expected
        # the reference filter follows the same rules (estgen/status.py)
        before = (r.x.copy(), r.P.copy())
        assert cf(r) == expected
        assert np.array_equal(r.x, before[0]) and np.array_equal(r.P, before[1])

    for bad in NON_FINITE_VALUES:
        both(BAD_INPUT, lambda f: f.predict(u0, bad))
        for i in range(spec.nu):
            u = u0.copy()
            u[i] = bad
            both(BAD_INPUT, lambda f: f.predict(u, dt0))
            both(BAD_INPUT, lambda f: f.predict(u, -1.0))  # non-finite input wins over a bad dt
        for s in spec.sensors:
            for i in range(s.m):
                z = np.zeros(s.m)
                z[i] = bad
                both(BAD_INPUT, lambda f: f.update(s.name, z))
    for dt in (0.0, -0.0, -1e-300 if prec == "double" else -1e-40, -1e-3, -1.0, -1e30):
        both(BAD_DT, lambda f: f.predict(u0, dt))
    # values beyond the float range become infinity on the way into a float build, as a
    # firmware cast would (IEEE 754 round-to-nearest overflows to inf)
    if prec == "float":
        too_big = 1e39
        tried += 1
        assert checked(c, lambda: c.predict(u0, too_big)) == BAD_INPUT
        for s in spec.sensors:
            tried += 1
            assert checked(c, lambda: c.update(s.name, np.full(s.m, too_big))) == BAD_INPUT
    # after all of it, the filter still runs
    assert checked(c, lambda: c.predict(u0, dt0)) == OK
    assert tried >= 10


@pytest.mark.parametrize("config", ALL_CONFIGS, ids=ALL_IDS)
def test_overflowing_measurements_and_steps_are_refused_or_stay_finite(config):
    # z near the largest finite value makes the innovation (and its square in the NIS) overflow;
    # a huge dt makes F P F' overflow. Either the call is refused (NON_FINITE or another code)
    # and changes nothing, or it is accepted with a finite x and a positive definite P.
    ex, filt, prec = config
    spec = spec_of(ex)
    c = fresh(ex, filt, prec)
    warm_up(c, spec)
    big = real_max(prec)
    codes = []
    for s in spec.sensors:
        for value in (big, -big, big / 8, 1e38 if prec == "float" else 1e300):
            codes.append(checked(c, lambda: c.update(s.name, np.full(s.m, value))))
    u0 = make_scenario(spec, 1, 5).u[0]
    for dt in (big, big / 1e6, 1e20 if prec == "float" else 1e200):
        codes.append(checked(c, lambda: c.predict(u0, dt)))
    # an innovation of ~1e38 squared cannot give a finite NIS in either precision (the particle
    # filter: nor a finite weight for any particle, DEGENERATE, where it forms no NIS)
    assert any(code in (NON_FINITE, DEGENERATE) for code in codes), codes


@pytest.mark.parametrize("config", ALL_CONFIGS, ids=ALL_IDS)
def test_set_state_validates_and_recovers(config):
    ex, filt, prec = config
    spec = spec_of(ex)
    n = spec.ne  # P's dimension (n minus one per attitude)
    c = fresh(ex, filt, prec)
    initial = c.raw_state()
    warm_up(c, spec)
    x_ok = np.array(spec.x0)
    P_ok = np.array(spec.P0)
    cases: List[Tuple[int, np.ndarray, np.ndarray]] = []
    for bad in NON_FINITE_VALUES:
        for i in {0, n - 1}:
            x = x_ok.copy()
            x[min(i, spec.n - 1)] = bad
            cases.append((BAD_INPUT, x, P_ok))
            P = P_ok.copy()
            P[i, i] = bad
            cases.append((BAD_INPUT, x_ok, P))
        P = P_ok.copy()
        P[0, n - 1] = P[n - 1, 0] = bad
        cases.append((BAD_INPUT, x_ok, P))
    # not positive definite: zero, negative and tiny-negative variances, a rank-one matrix and an
    # indefinite matrix with a positive diagonal (correlation > 1)
    cases.append((NOT_PD, x_ok, np.zeros((n, n))))
    cases.append((NOT_PD, x_ok, -np.eye(n)))
    P = P_ok.copy()
    P[n - 1, n - 1] = -1e-30
    cases.append((NOT_PD, x_ok, P))
    cases.append((NOT_PD, x_ok, np.ones((n, n))))
    d = np.sqrt(np.diag(P_ok))
    P = P_ok.copy()
    P[0, 1] = P[1, 0] = 1.5 * d[0] * d[1]
    cases.append((NOT_PD, x_ok, P))
    P = P_ok.copy()
    P[0, n - 1] += 0.1 * d[0] * d[n - 1]  # not symmetric: no covariance
    cases.append((NOT_PD, x_ok, P))
    x = x_ok.copy()
    x[0] = float("nan")
    cases.append((BAD_INPUT, x, P))  # non-finite comes first, as for predict and update
    for expected, x, P in cases:
        assert checked(c, lambda: c.set_state(x, P)) == expected, (x, P)
    # recovery: the model's x0 and P0 give back exactly the struct init wrote (the parameters
    # were never touched), and the filter runs normally from there; the particle filter redraws
    # its particles, whose mean and covariance are then x0 and P0 (to rounding)
    assert checked(c, lambda: c.set_state(x_ok, P_ok)) == OK
    if get(filt).gaussian:
        assert c.raw_state() == initial
    else:
        # (an angle state's mean is circular, atan2 of the weighted sines and cosines, while
        # set_state matches the linear sample mean: they differ at third order in the spread)
        rel = np.where(np.array(spec.angle_states, dtype=bool), 1e-2, 1e-4 if prec == "float" else 1e-10)
        sd = np.sqrt(np.diag(P_ok))
        assert np.all(np.abs(c.x - x_ok) <= rel * np.maximum(np.abs(x_ok), sd)), c.x - x_ok
        assert np.all(np.abs(c.P - P_ok) <= np.maximum.outer(rel, rel) * np.outer(sd, sd)), c.P - P_ok
    warm_up(c, spec, steps=15, seed=8)
    assert len(cases) >= 10


@pytest.mark.parametrize("config", ALL_CONFIGS, ids=ALL_IDS)
def test_set_state_recovers_a_filter_pushed_out_of_its_domain(config):
    # Drive the state far outside where the model was meant to be used until calls are refused,
    # then reset: afterwards the filter must accept a normal run again.
    ex, filt, prec = config
    spec = spec_of(ex)
    c = fresh(ex, filt, prec)
    big = math.sqrt(real_max(prec))  # its square overflows
    st = checked(c, lambda: c.set_state(np.full(spec.n, big), np.eye(spec.ne) * big))
    refused = 0
    sc = make_scenario(spec, 10, 4)
    for k in range(10):
        refused += checked(c, lambda: c.predict(sc.u[k], sc.dt)) != OK
        for name, z in sc.measurements[k]:
            refused += checked(c, lambda: c.update(name, z)) != OK
    assert st != OK or refused > 0 or np.all(np.isfinite(c.x))
    assert checked(c, lambda: c.set_state(spec.x0, spec.P0)) == OK
    warm_up(c, spec, steps=20, seed=6)


def _status_enum(header: str) -> Dict[str, int]:
    m = re.search(r"typedef enum \w+ \{(.*?)\}", header, re.S)
    assert m, "no status enum in the header"
    out = {}
    for name, value in re.findall(r"\b[A-Z0-9_]+?_(OK|BAD_INPUT|BAD_DT|NOT_POSITIVE_DEFINITE|NON_FINITE|GATED|DEGENERATE)\s*=\s*(\d+)",
                                  m.group(1)):
        out[name] = int(value)
    return out


def test_status_codes_are_equal_across_filters_and_precisions():
    # The enum in every generated Kalman filter header equals estgen.status.Status (the documented
    # codes 0..5; 6, DEGENERATE, is the particle filter's own and appears in its headers only)
    expected = {s.name: int(s) for s in Status if s is not Status.DEGENERATE}
    assert expected == {"OK": 0, "BAD_INPUT": 1, "BAD_DT": 2, "NOT_POSITIVE_DEFINITE": 3, "NON_FINITE": 4, "GATED": 5}
    assert int(Status.DEGENERATE) == 6
    seen_filters = set()
    for ex, filt, prec in ALL_CONFIGS:
        want = {**expected, **{s.name: int(s) for s in get(filt).statuses}}
        assert _status_enum(generated(ex, filt, prec).header) == want, (ex, filt, prec)
        seen_filters.add(filt)
    assert "ekf" in seen_filters and "pf" in seen_filters
    if ukf_available():
        assert "ukf" in seen_filters
    # the committed headers too
    for root, _, files in os.walk(EXAMPLES_DIR):
        for fn in files:
            if fn.endswith(("_ekf.h", "_ukf.h", "_pf.h")):
                with open(os.path.join(root, fn), encoding="utf-8") as fh:
                    want = {**expected, "DEGENERATE": 6} if fn.endswith("_pf.h") else expected
                    assert _status_enum(fh.read()) == want, fn


# ---------------------------------------------------------------------------------------------
# 2. Innovation gating


@pytest.mark.parametrize("dof", [1, 2, 3, 4, 5, 6, 8, 10, 15, 30])
def test_chi2_ppf_matches_scipy(dof):
    # Source: scipy.stats.chi2.ppf
    for p in (1e-6, 0.001, 0.01, 0.05, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975, 0.99, 0.997, 0.999, 0.9999, 1 - 1e-7):
        want = float(scipy.stats.chi2.ppf(p, dof))
        assert chi2_ppf(p, dof) == pytest.approx(want, rel=1e-10), (p, dof)


def _gate_literal(source: str, sensor_fn: str) -> float:
    body = source.split(f"{sensor_fn}_nis(")[1]
    m = re.search(r"if \(nis > ([0-9.eE+-]+)F?\)", body)
    assert m, f"no gate comparison in {sensor_fn}"
    return float(m.group(1))


# Every example and filter in float (the embedded case), and the small linear model in double
# too, for the double literal; gated C is generated once per configuration (seconds for the
# 15-state UKF), shared by the two gate tests.
GATE_CONFIGS = [c for c in CONFIGS if c[2] == "float" or c[0] == "linear_cart"]
GATE_IDS = ["-".join(c) for c in GATE_CONFIGS]
GATE_PROBS = (0.99, 0.95, 0.997, 0.9999)


def gates_for(spec: ModelSpec) -> Dict[str, float]:
    return {s.name: GATE_PROBS[i % len(GATE_PROBS)] for i, s in enumerate(spec.sensors)}


@pytest.mark.parametrize("config", GATE_CONFIGS, ids=GATE_IDS)
def test_generated_gate_threshold_is_the_chi2_quantile(config):
    ex, filt, prec = config
    spec = spec_of(ex)
    gates = gates_for(spec)
    gen = generated(ex, filt, prec, gates)
    for s in spec.sensors:
        got = _gate_literal(gen.source, f"{gen.prefix}_update_{s.name}")
        # Source: scipy.stats.chi2.ppf; a float literal holds ~7 significant digits
        want = float(scipy.stats.chi2.ppf(gates[s.name], s.m))
        assert got == pytest.approx(want, rel=1e-7 if prec == "float" else 1e-12), (s.name, gates[s.name], s.m)


def _innovation_factor(c: Any, spec: ModelSpec, sensor: str, filt: str) -> Tuple[np.ndarray, np.ndarray]:
    """h(x) and a factor L with L L' = S at the filter's present state (from the reference's
    model functions: H P H' + R for the EKF, the unscented transform for the UKF)."""
    mf = model_functions(spec)
    p = mf.param_tuple(spec.param_defaults())
    x, P = c.x, c.P
    if filt == "ukf":
        r = estgen.reference(spec, "ukf")
        r.set_state(x, P)
        z0 = mf.h(sensor, x, p)
        y, S = r._innovation(sensor, z0)[:2]  # (y, S, C, covariance update)
        hx = z0 - y
    else:
        H = mf.H_err(sensor, x, p)  # dh/dx, times M(x) for attitudes (the error-state Jacobian)
        S = H @ P @ H.T + mf.R(sensor, p)
        hx = mf.h(sensor, x, p)
    return hx, np.linalg.cholesky(S)


@pytest.mark.parametrize("config", GATE_CONFIGS, ids=GATE_IDS)
def test_gate_rejects_outliers_and_passes_normal_measurements(config):
    ex, filt, prec = config
    spec = spec_of(ex)
    gates = gates_for(spec)
    c = fresh(ex, filt, prec, gates=gates)
    warm_up(c, spec, allowed=(OK, GATED))
    rng = np.random.default_rng(2)
    for s in spec.sensors:
        thr = float(scipy.stats.chi2.ppf(gates[s.name], s.m))  # Source: scipy.stats.chi2.ppf
        hx, L = _innovation_factor(c, spec, s.name, filt)
        direction = rng.standard_normal(s.m)
        direction /= np.linalg.norm(direction)
        for scale, expected in ((4.0, GATED), (0.25, OK)):
            # an innovation with NIS = scale * threshold exactly: z = h(x) + L v, v'v = NIS
            z = hx + L @ (direction * math.sqrt(scale * thr))
            before = c.raw_state()
            x_before, P_before = c.x, c.P
            st = checked(c, lambda: c.update(s.name, z))
            assert st == expected, (s.name, scale, Status(st).name)
            assert c.nis == pytest.approx(scale * thr, rel=0.05), (s.name, scale)
            if expected == GATED:
                assert c.raw_state() == before
            elif c.raw_state() == before:
                # accepted without a change: only where the correction is below the C's rounding
                # (pier_tag's beacon is flat far from the pier line: its Jacobian is ~1e-7 there)
                r = estgen.reference(spec, filt)
                r.set_state(x_before, P_before)
                r.update(s.name, z)
                ulp = np.spacing(np.abs(x_before).astype(np.float32 if prec == "float" else np.float64))
                assert np.all(np.abs(r.x - x_before) < ulp), (s.name, r.x - x_before)
            hx, L = _innovation_factor(c, spec, s.name, filt)


@pytest.mark.parametrize("ex", EXAMPLES)
def test_without_gates_no_measurement_is_gated(ex):
    # The examples declare no gate; an outlier of 100 sigma is then accepted, never GATED.
    spec = spec_of(ex)
    assert all(s.gate is None for s in spec.sensors)
    filt = filters_for(spec)[0] if filters_for(spec) else None
    if filt is None:
        pytest.fail(f"no filter available for {ex}")
    gen = generated(ex, filt, "double")
    assert "_GATED;" not in gen.source
    c = fresh(ex, filt, "double")
    warm_up(c, spec)
    s = spec.sensors[0]
    hx, L = _innovation_factor(c, spec, s.name, filt)
    st = checked(c, lambda: c.update(s.name, hx + L @ np.full(s.m, 100.0)))
    assert st != GATED


# ---------------------------------------------------------------------------------------------
# 7. Safety of what is emitted


MARK = "ZQXINJECTZQX"

_MODEL_TEMPLATE = '''
import sympy as sp
from estgen import Model

model = Model({name!r})
a, b = model.states({states!r}, units={sunits!r})
(w,) = model.inputs({inputs!r}, units={iunit!r})
k = model.param({param!r}, 0.5, unit={punit!r})
model.process([a + model.dt * b, b + model.dt * (w - k * b)])
model.process_noise([1e-4 * model.dt, 1e-3 * model.dt])
model.sensor({sensor!r}, [a], noise=[0.01], units={zunit!r})
model.initial([0.0, 0.0], sp.diag(1.0, 1.0))
'''


def _write_model(folder: str, filename: str = "model.py", **overrides: Any) -> str:
    fields = dict(name="hostile", states="a b", sunits=["m", "m/s"], inputs="w", iunit="m/s^2", param="k",
                  punit="1/s", sensor="pos", zunit="m")
    fields.update(overrides)
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, filename)
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(_MODEL_TEMPLATE.format(**fields))
    return path


def _comments(text: str) -> List[str]:
    """The bodies of the C comments, scanning like a C preprocessor (no string literals occur
    in the generated C other than the #include file name)."""
    out = []
    i = 0
    while True:
        j = text.find("/*", i)
        k = text.find("//", i)
        if j < 0 and k < 0:
            return out
        if k >= 0 and (j < 0 or k < j):
            e = text.find("\n", k)
            out.append(text[k + 2:e])
            i = e
            continue
        e = text.find("*/", j + 2)
        assert e >= 0, "unterminated comment"
        out.append(text[j + 2:e])
        i = e + 2


def _assert_clean(gen: Generated) -> None:
    for name, text in gen.files.items():
        assert MARK not in text, f"model text reached {name}"
        for body in _comments(text):
            assert "/*" not in body, f"comment opener inside a comment in {name}: {body!r}"
        assert "??" not in text  # trigraphs (C99 5.2.1.1) would rewrite the source
        assert "\\\n" not in text  # a line splice could pull code into a // comment
        assert all(ord(ch) < 128 for ch in text), f"non-ASCII text in {name}"


HOSTILE_UNITS = [
    f"*/ int {MARK};/*", f"m */ {MARK}", f"/* {MARK}", f"// {MARK}", f"m\n{MARK}", f"m\\\n{MARK}",
    f"??/ {MARK}", f"{MARK}" * 5, f"m*/s {MARK}", f"\u00b0C {MARK}", f"m\r{MARK}", f"\x00{MARK}",
]


@pytest.mark.parametrize("unit", HOSTILE_UNITS, ids=range(len(HOSTILE_UNITS)))
def test_hostile_unit_strings_never_reach_the_c(tmp_path, unit):
    # A unit is free text a user may paste; it may reach a comment only when it cannot end or
    # open one. Each hostile unit is tried on a state, an input, a parameter and a sensor.
    for where in ("sunits", "iunit", "punit", "zunit"):
        value: Any = [unit, "m/s"] if where == "sunits" else unit
        path = _write_model(str(tmp_path / where), **{where: value})
        try:
            spec = estgen.load_model(path)
        except ModelError:
            continue  # refused by validation: fine
        for prec in PRECISIONS:
            _assert_clean(generate(spec, "ekf", prec))


def test_safe_comment_and_safe_filename():
    # Every string that could close, open or splice a comment is dropped; plain units pass.
    for unit in HOSTILE_UNITS + ["*/", "/*", "//", "a*/b", "x" * 25, "", "m\t"]:
        assert safe_comment(unit) is None, unit
    for unit in ("m", "m/s", "m/s^2", "rad/s", "1", "m^3/h/sqrt(bar)", "%", "N*m", "kg m^2"):
        assert safe_comment(unit) == unit
    for path in ("d*/*evil.py", "x/y*/z.py", "a b\n.py", "../../*/.py", "we\u00efrd*/.py", "*/"):
        name = safe_filename(path)
        assert re.fullmatch(r"[A-Za-z0-9._-]+", name), (path, name)
        assert "*/" not in name and "/*" not in name


def test_hostile_file_and_folder_names_never_reach_the_c(tmp_path):
    # The folder name ends in '*' and the file name starts with '*': the full path contains '*/'.
    folder = tmp_path / f"d{MARK}*"
    path = _write_model(str(folder), filename=f"*{MARK}.py")
    spec = estgen.load_model(path)
    for prec in PRECISIONS:
        gen = generate(spec, "ekf", prec)
        for name, text in gen.files.items():
            assert f"d{MARK}*" not in text and f"*{MARK}" not in text, name
            for body in _comments(text):
                assert "/*" not in body
        # the file name survives only neutralized
        assert f"_{MARK}.py" in gen.header


HOSTILE_NAMES = [
    ("name", f"x*/{MARK}"), ("name", f"x/*{MARK}"), ("name", f"x//{MARK}"), ("name", f"x\n{MARK}"),
    ("name", f"x{MARK}" * 4), ("name", "_x"), ("name", "x y"), ("name", "\u00e9tat"),
    ("states", f"a b*/{MARK}"), ("states", f"a {MARK}/*"), ("states", f"a b;{MARK}"),
    ("states", f"a b\\{MARK}"), ("states", "a \u0432"), ("states", "a 9b"),
    ("inputs", f"w*/{MARK}"), ("inputs", f"w(){MARK}"), ("param", f"k*/{MARK}"), ("param", f"k.{MARK}"),
    ("param", f"k->{MARK}"), ("param", "k#"), ("sensor", f"pos*/{MARK}"), ("sensor", f"pos({MARK})"),
    ("sensor", f"pos {MARK}"), ("sensor", "pos_nis"), ("sensor", ""),
]


@pytest.mark.parametrize("field,value", HOSTILE_NAMES, ids=range(len(HOSTILE_NAMES)))
def test_hostile_names_are_refused(tmp_path, field, value):
    # Names become C identifiers; anything but a plain identifier must be refused with a
    # ModelError (never a traceback, never text in the C).
    path = _write_model(str(tmp_path), **{field: value})
    with pytest.raises(ModelError):
        spec = estgen.load_model(path)
        _assert_clean(generate(spec, "ekf", "double"))


# Identifiers a C compiler may already know: the predefined macros of GNU dialects (gcc -dM -E
# in -std=gnu99 defines `linux` and `unix`), and names of the generated code's own locals and
# helpers. Each is either refused or generates C that compiles in both dialects and runs.
CLASHING = ["linux", "unix", "s", "x", "P", "u", "z", "y", "W", "K", "V", "xn", "Pn", "xs", "Ps", "par", "nis",
            "U", "d", "i", "j", "k", "memcpy", "fabs", "sqrtf", "isfinite_", "hostile_ekf_t", "size", "real"]


@pytest.mark.parametrize("name", CLASHING)
def test_names_that_clash_with_c_are_refused_or_work(tmp_path, name):
    path = _write_model(str(tmp_path / "p"), param=name, states="a b" if name not in ("a", "b") else "a1 b1")
    try:
        spec = estgen.load_model(path)
    except ModelError:
        return
    for prec in PRECISIONS:
        gen = generate(spec, "ekf", prec)
        out = tmp_path / prec
        out.mkdir()
        for fn, text in gen.files.items():
            (out / fn).write_text(text)
        for std in ("-std=c99", "-std=gnu99"):
            proc = subprocess.run(["gcc", std, "-Wall", "-Wextra", "-Werror", "-c", str(out / f"{gen.prefix}.c"),
                                   "-o", os.devnull], capture_output=True, text=True)
            assert proc.returncode == 0, f"parameter named {name!r} breaks the C under {std}:\n{proc.stderr}"
        c = CFilter(spec, compile_generated(gen), "ekf")
        assert c.params[name] == 0.5
        warm_up(c, spec, steps=10)


def _snapshot(root: str) -> Dict[str, Tuple[int, int]]:
    out = {}
    for dirpath, dirnames, files in os.walk(root):
        for d in dirnames:
            out[os.path.join(dirpath, d)] = (0, 0)
        for f in files:
            p = os.path.join(dirpath, f)
            st = os.lstat(p)
            out[p] = (st.st_size, st.st_mtime_ns)
    return out


def test_verify_generate_and_build_write_only_their_cache_and_output(tmp_path):
    # Each command runs with HOME, the working folder, the model's folder, ESTGEN_CACHE and
    # TMPDIR all fresh; afterwards only the cache, the temp folder and generate's -o folder
    # may have changed.
    dirs = {k: tmp_path / k for k in ("home", "cwd", "models", "cache", "tmp")}
    for d in dirs.values():
        d.mkdir()
    model = dirs["models"] / "cart.py"
    model.write_text(open(model_path("linear_cart"), encoding="utf-8").read())
    env = dict(os.environ, HOME=str(dirs["home"]), ESTGEN_CACHE=str(dirs["cache"]), TMPDIR=str(dirs["tmp"]),
               PYTHONDONTWRITEBYTECODE="1", PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""),
               XDG_CACHE_HOME=str(dirs["home"] / ".cache"))
    watched = ("home", "cwd", "models")
    before = {k: _snapshot(str(dirs[k])) for k in watched}
    # one interpreter for the three (each start imports sympy): the command line's main() as
    # `estgen verify` and `estgen generate` run it, then the Python build
    script = (
        "import sys, estgen\n"
        "from estgen.cli import main\n"
        f"assert main(['verify', {str(model)!r}, '--steps', '30']) == 0\n"
        f"assert main(['generate', {str(model)!r}, '-o', 'out', '-q']) == 0\n"
        f"c = estgen.build({str(model)!r}, 'ekf', 'float')\n"
        "assert c.predict([0.0], 0.01) == 0\n"
    )
    proc = subprocess.run([sys.executable, "-c", script], cwd=str(dirs["cwd"]), env=env, capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == 0, (proc.stdout, proc.stderr)
    after = {k: _snapshot(str(dirs[k])) for k in watched}
    assert after["home"] == before["home"]
    assert after["models"] == before["models"]
    new_in_cwd = set(after["cwd"]) - set(before["cwd"])
    out = str(dirs["cwd"] / "out")
    assert new_in_cwd == {out, os.path.join(out, "cart_ekf.h"), os.path.join(out, "cart_ekf.c")}
    assert os.listdir(dirs["cache"]), "the build cache was not used, so this test proves nothing"


def test_gate_option_on_the_command_line(tmp_path, capsys):
    # `estgen generate --gate SENSOR=P` writes the scipy quantile into the C; a bad sensor name
    # or probability is refused with exit status 2.
    from estgen.cli import main

    model = model_path("linear_cart")
    assert main(["generate", model, "--gate", "encoder=0.997", "-o", str(tmp_path), "-q"]) == 0
    src = (tmp_path / "cart_ekf.c").read_text()
    want = float(scipy.stats.chi2.ppf(0.997, 1))  # Source: scipy.stats.chi2.ppf
    assert _gate_literal(src, "cart_ekf_update_encoder") == pytest.approx(want, rel=1e-7)
    assert "if (nis >" not in src.split("cart_ekf_update_speed_nis(")[1]  # only the sensor named
    for bad in ("nosuch=0.9", "encoder=1.5", "encoder=0", "encoder"):
        assert main(["generate", model, "--gate", bad, "-o", str(tmp_path / "bad"), "-q"]) == 2, bad
    assert not (tmp_path / "bad").exists()
