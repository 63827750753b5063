"""The benchmark's dense baseline filters (benchmarks/baseline.py) are real filters.

The benchmark compares the generated C with a hand-style dense C filter; that comparison means
something only if the baseline computes the same filter. Here the baseline, compiled in double,
is run beside the numpy reference (estgen.reference: textbook dense EKF/UKF in numpy float64)
on simulated scenarios, and must agree to 1e-9 at every step; a linear model is also checked
against the Kalman filter equations written out in numpy in this file.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any, List

import numpy as np
import pytest

import estgen
from estgen.errors import ModelError
from estgen.filters import check_filter_support
from estgen.simulate import make_scenario

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "benchmarks"))

from baseline import build_baseline, render_baseline  # noqa: E402
from synthetic import block_sizes, write_model  # noqa: E402

EXAMPLES = sorted(str(p) for p in (ROOT / "generated_examples").glob("*/model.py"))
SYNTHETIC = [("sparse", 2), ("sparse", 13), ("dense", 3), ("dense", 9)]
TOL = 1e-9  # double precision; the same algebra in a different order agrees to ~1e-14
STEPS = 120
SEED = 20261202


def test_examples_found() -> None:
    # the parametrization below must not silently run over nothing
    assert len(EXAMPLES) >= 5, EXAMPLES


def _rel_dev(a: np.ndarray, b: np.ndarray, scale: float) -> float:
    return float(np.max(np.abs(a - b))) / scale


def _compare(spec: Any, filt: str) -> None:
    base = build_baseline(spec, filt, "double")
    ref = estgen.reference(spec, filter=filt)
    sc = make_scenario(spec, STEPS, SEED)
    accepted = 0
    for k in range(sc.steps):
        sb, sr = base.predict(sc.u[k], sc.dt), ref.predict(sc.u[k], sc.dt)
        assert sb == sr, f"step {k}: predict status {sb} (baseline) vs {sr} (reference)"
        for name, z in sc.measurements[k]:
            sb, sr = base.update(name, z), ref.update(name, z)
            assert sb == sr, f"step {k}: update {name} status {sb} vs {sr}"
            accepted += sb == 0
        xr, Pr = ref.x, ref.P
        dx = _rel_dev(base.x, xr, 1.0 + float(np.max(np.abs(xr))))
        dP = _rel_dev(base.P, Pr, float(np.max(np.abs(np.diag(Pr)))))
        assert dx < TOL and dP < TOL, f"step {k}: x deviates {dx:.3g}, P {dP:.3g} (relative)"
    # a comparison over refused updates would prove nothing
    assert accepted >= STEPS // 10, f"only {accepted} updates accepted"
    assert not np.allclose(ref.x, spec.x0), "the scenario never moved the estimate"


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
@pytest.mark.parametrize("path", EXAMPLES, ids=[Path(p).parent.name for p in EXAMPLES])
def test_baseline_matches_reference_on_examples(path: str, filt: str) -> None:
    spec = estgen.load_model(path)
    if spec.attitudes:
        # the dense baseline has no error-state form: it refuses quaternion models clearly
        with pytest.raises(ModelError, match="attitude"):
            render_baseline(spec, filt, "double")
        return
    try:
        check_filter_support(spec, filt)
    except ModelError:
        # the valve model is UKF-only by design (Min/Max); the baseline refuses it the same way
        with pytest.raises(ModelError):
            render_baseline(spec, filt, "double")
        return
    _compare(spec, filt)


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
@pytest.mark.parametrize("kind,n", SYNTHETIC, ids=[f"{k}{n}" for k, n in SYNTHETIC])
def test_baseline_matches_reference_on_synthetic(kind: str, n: int, filt: str, tmp_path: Path) -> None:
    spec = estgen.load_model(write_model(kind, n, str(tmp_path)))
    assert spec.n == n
    _compare(spec, filt)


def test_synthetic_structure(tmp_path: Path) -> None:
    # the sparse models must be sparse and the dense ones dense, or the benchmark's claims are void
    sparse = estgen.load_model(write_model("sparse", 15, str(tmp_path)))
    dense = estgen.load_model(write_model("dense", 6, str(tmp_path)))
    Fs = sparse.f.jacobian(sparse.x_syms)
    Fd = dense.f.jacobian(dense.x_syms)
    Hd = dense.sensors[0].h.jacobian(dense.x_syms)
    assert sum(1 for e in Fs if e != 0) <= 4 * sparse.n
    assert all(e != 0 for e in Fd) and all(e != 0 for e in Hd)
    assert block_sizes(7) == [3, 3, 1] and block_sizes(2) == [2]


def test_linear_cart_against_written_out_kalman_equations() -> None:
    """One predict and one update of the linear cart model against the Kalman filter written
    out here in numpy: P' = F P F' + Q; K = P H' (H P H' + R)^-1; Joseph form
    P+ = (I - K H) P (I - K H)' + K R K' (Simon, Optimal State Estimation, 2006, ch. 5, the
    discrete Kalman filter and its Joseph form; from memory). F is the exact constant-acceleration discretization and Q
    the white-acceleration noise, both from the model file's own derivation (Bar-Shalom, Li,
    Kirubarajan 2001, sec. 6.2.2)."""
    spec = estgen.load_model(ROOT / "generated_examples" / "linear_cart" / "model.py")
    p = spec.param_defaults()
    mass, q_acc, q_dist = p["mass"], p["q_acc"], p["q_dist"]
    dt, force = 0.01, 6.0
    F = np.array([[1.0, dt, dt * dt / (2 * mass)], [0.0, 1.0, dt / mass], [0.0, 0.0, 1.0]])
    G = np.array([dt * dt / (2 * mass), dt / mass, 0.0])
    Q = np.array([[q_acc * dt ** 3 / 3, q_acc * dt ** 2 / 2, 0.0], [q_acc * dt ** 2 / 2, q_acc * dt, 0.0],
                  [0.0, 0.0, q_dist * dt]])
    x0, P0 = np.array(spec.x0, dtype=float), np.array(spec.P0, dtype=float)
    base = build_baseline(spec, "ekf", "double")
    assert base.predict([force], dt) == 0
    x1 = F @ x0 + G * force
    P1 = F @ P0 @ F.T + Q
    np.testing.assert_allclose(base.x, x1, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(base.P, P1, rtol=1e-12, atol=1e-18)
    H = np.array([[1.0, 0.0, 0.0]])
    R = np.array([[0.0005 ** 2]])  # the encoder's noise in the model file
    z = np.array([0.0012])
    assert base.update("encoder", z) == 0
    K = P1 @ H.T @ np.linalg.inv(H @ P1 @ H.T + R)
    x2 = x1 + K @ (z - H @ x1)
    A = np.eye(3) - K @ H
    P2 = A @ P1 @ A.T + K @ R @ K.T
    np.testing.assert_allclose(base.x, x2, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(base.P, P2, rtol=1e-9, atol=1e-18)


def test_baseline_refuses_like_a_filter(tmp_path: Path) -> None:
    # a refused call leaves the state alone: the benchmark never times a filter that silently
    # stopped updating (status values from estgen.Status)
    spec = estgen.load_model(write_model("sparse", 6, str(tmp_path)))
    for filt in ("ekf", "ukf"):
        base = build_baseline(spec, filt, "double")
        x, P = base.x, base.P
        assert base.predict([0.0], -0.01) == int(estgen.Status.BAD_DT)
        m = spec.sensor("pos").m
        assert base.update("pos", [float("nan")] + [0.0] * (m - 1)) == int(estgen.Status.BAD_INPUT)
        np.testing.assert_array_equal(base.x, x)
        np.testing.assert_array_equal(base.P, P)
        assert base.predict([0.0], 0.01) == 0
        assert not np.array_equal(base.P, P)


def test_float_baseline_compiles_clean(tmp_path: Path) -> None:
    # the float build is what goes on the Cortex-M4F: the contract's warning set (no double
    # promotion, no conversions) holds for the baseline too, so its .text is a fair comparison
    import subprocess

    from estgen.cross import WARNINGS

    spec = estgen.load_model(ROOT / "generated_examples" / "strapdown_nav" / "model.py")
    for filt in ("ekf", "ukf"):
        src = render_baseline(spec, filt, "float")
        (tmp_path / f"{src.prefix}.h").write_text(src.header)
        c = tmp_path / f"{src.prefix}.c"
        c.write_text(src.source)
        proc = subprocess.run(["cc", *WARNINGS, "-O2", "-c", str(c), "-o", str(tmp_path / f"{src.prefix}.o")],
                              capture_output=True, text=True)
        assert proc.returncode == 0, proc.stderr
