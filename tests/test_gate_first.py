"""A gated update: every filter (EKF and UKF, C and reference) forms the innovation covariance,
reports the NIS and evaluates the gate before it forms the posterior, and a rejected
measurement leaves the filter exactly as it was."""

from __future__ import annotations

import re

import numpy as np
import pytest
import scipy.stats
import sympy as sp

import estgen
from estgen import Model, Status, validate


def _linear_model() -> estgen.ModelSpec:
    # a constant-velocity cart with a scalar position sensor (diagonal R: the EKF's sequential
    # path) and a correlated two-component sensor (full R: its block path)
    m = Model("gatecart")
    p, v = m.states("p v")
    dt = m.dt
    m.process([p + dt * v, v])
    m.process_noise(sp.diag(1e-4, 1e-3) * dt)
    m.sensor("pos", [p], noise=[0.01])
    m.sensor("pair", [p + v, p - v], noise=sp.Matrix([[0.02, 0.005], [0.005, 0.03]]))
    m.initial([0.5, -0.2], sp.Matrix([[0.3, 0.05], [0.05, 0.2]]))
    return validate(m)


H = {"pos": np.array([[1.0, 0.0]]), "pair": np.array([[1.0, 1.0], [1.0, -1.0]])}
R = {"pos": np.array([[0.01]]), "pair": np.array([[0.02, 0.005], [0.005, 0.03]])}
GATE = 0.99


def _filters():
    spec = _linear_model()
    gates = {"pos": GATE, "pair": GATE}
    out = []
    for kind in ("ekf", "ukf"):
        out.append((f"{kind} reference", estgen.reference(spec, filter=kind, gates=gates), 1e-12))
        for precision, tol in (("double", 1e-12), ("float", 1e-5)):
            out.append((f"{kind} C {precision}", estgen.build(spec, filter=kind, precision=precision, gates=gates), tol))
    return out


@pytest.mark.parametrize("sensor,offset", [("pos", [2.5]), ("pair", [2.0, -3.0])])
def test_a_gated_update_reports_the_nis_and_changes_nothing(sensor: str, offset) -> None:
    for label, f, tol in _filters():
        assert f.predict([], 0.1) == Status.OK, label
        x, P = f.x, f.P
        raw = f.raw_state() if hasattr(f, "raw_state") else None
        # a measurement far outside the gate: z = H x + offset
        z = H[sensor] @ x + np.array(offset)
        y = z - H[sensor] @ x
        # NIS = y' S^-1 y with S = H P H' + R (Bar-Shalom, Li, Kirubarajan 2001, sec. 5.4); for a
        # linear h the unscented transform gives the same S (Julier 2002: exact for linear maps)
        S = H[sensor] @ P @ H[sensor].T + R[sensor]
        nis = float(y @ np.linalg.solve(S, y))
        threshold = scipy.stats.chi2.ppf(GATE, len(offset))
        assert nis > threshold  # the test's premise: the gate must reject it
        assert np.isnan(f.nis), label  # no update has formed a NIS yet
        assert f.update(sensor, z) == Status.GATED, label
        assert f.nis == pytest.approx(nis, rel=tol), label
        np.testing.assert_array_equal(f.x, x, err_msg=label)
        np.testing.assert_array_equal(f.P, P, err_msg=label)
        if raw is not None:
            assert f.raw_state() == raw, label
        # just inside the gate it is accepted, and the NIS is still the textbook one
        zin = H[sensor] @ x + np.array(offset) * np.sqrt(0.5 * threshold / nis)
        assert f.update(sensor, zin) == Status.OK, label
        assert f.nis == pytest.approx(0.5 * threshold, rel=max(tol, 1e-9) * 10), label


def test_the_c_gates_before_it_forms_the_posterior() -> None:
    # the generated C reports the NIS and gates as soon as the NIS is complete: the gate check
    # precedes the gain and the commit check in every update function
    spec = _linear_model()
    for kind in ("ekf", "ukf"):
        src = estgen.filters.generate(spec, kind, "double", gates={"pos": GATE, "pair": GATE}).source
        for sensor in ("pos", "pair"):
            body = src[src.index(f"int gatecart_{kind}_update_{sensor}_nis("):]
            body = body[:body.index("\n}\n")]
            gate = body.index("return GATECART_" + kind.upper() + "_GATED;")
            posterior = re.search(r"\b(xs|Ps|dx)\[[^\]]+\] = ", body).start()  # the first write of x+ or P+
            assert body.index("*nis_out = nis;") < gate < posterior < body.index("_commit_pd(Ps)"), (kind, sensor)
