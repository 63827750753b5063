"""Equivalence check: the generated C against the numpy reference on the same simulated data.

Truth and measurements are simulated from the model (:func:`estgen.simulate.make_scenario`);
both filters start from x0, P0 and see the same inputs and measurements. After every step the
state and covariance are compared:

* double: ``|dx_i| <= 1e-9 * max(|x_i|, sigma_i)`` and ``|dP_ij| <= 1e-9 * sigma_i sigma_j``;
* float:  ``|dx_i| <= 0.01 sigma_i`` and ``|dP_ij| <= 0.01 sigma_i sigma_j``,

with x and sigma_i = sqrt(P_ii) from the reference. Every status code must match as well.

The particle filter (``filter="pf"``) draws its random numbers from the generator seeded with
``seed`` (the scenario's seed) in both. In double the C and the reference draw the same numbers
and are held to the same 1e-9 bounds; sigma_i is floored at 1e-6 max(|x_i|, 1) because a cloud
that has collapsed to one point has a covariance of rounding noise only. In float, rounding
changes some decisions (a polar draw accepted in one precision and rejected in the other, a
resampling position on the other side of a cumulative weight), after which the two runs are two
particle filters with independent random numbers: their difference is Monte Carlo error, which
depends on the model and on N and can be many sigma where the cloud has collapsed. So the float
C is compared with the spread of the reference itself: the reference is run again with
PF_FLOAT_SEEDS other seeds on the same data, and the RMS over the steps of the float C's
deviation from the reference (each state, each covariance entry) must not exceed
PF_FLOAT_FACTOR times the largest RMS deviation of those other seeds from it. A correct float
filter is either still in step with the reference (deviation near zero) or another realization
of the same filter (deviation like the other seeds'); a wrong likelihood, noise or resampling
step is not. Status codes must match in double; in float they are compared only until the runs
part (they are then two realizations).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional

import numpy as np

from .build import build
from .model import ModelSpec, as_spec, check_filter_support, with_gates
from .progress import Progress
from .reference import reference
from .simulate import make_scenario, run_filter

__all__ = ["VerifyResult", "verify", "TOLERANCE", "format_result"]

#: (state tolerance, covariance tolerance) per precision, as fractions described above
TOLERANCE = {"double": (1e-9, 1e-9), "float": (0.01, 0.01)}
#: the particle filter in float: other reference seeds giving the spread, and the allowed factor
PF_FLOAT_SEEDS = 6
PF_FLOAT_FACTOR = 1.5


@dataclass
class VerifyResult:
    """Largest deviations of the C from the reference, normalized by their tolerance scale."""

    model: str
    filter: str
    precision: str
    steps: int
    seed: int
    x_dev: List[float]  # per state: max |dx_i| / scale_i over all steps
    x_abs: List[float]  # per state: max |dx_i|
    x_step: List[int]
    P_dev: float  # max |dP_ij| / (sigma_i sigma_j)
    P_step: int
    status_mismatch: List[str] = field(default_factory=list)
    state_names: List[str] = field(default_factory=list)
    tol_x: float = 0.0
    tol_P: float = 0.0

    @property
    def ok(self) -> bool:
        return (not self.status_mismatch and max(self.x_dev, default=0.0) <= self.tol_x
                and self.P_dev <= self.tol_P)

    def as_dict(self) -> Dict[str, Any]:
        return {
            "model": self.model, "filter": self.filter, "precision": self.precision, "steps": self.steps,
            "seed": self.seed, "ok": self.ok, "tolerance": {"x": self.tol_x, "P": self.tol_P},
            "x": {n: {"max_abs": a, "max_normalized": d, "step": s}
                  for n, a, d, s in zip(self.state_names, self.x_abs, self.x_dev, self.x_step)},
            "P": {"max_normalized": self.P_dev, "step": self.P_step},
            "status_mismatch": self.status_mismatch,
        }


def _state_sigma(spec: ModelSpec, sig: np.ndarray) -> np.ndarray:
    """Standard deviations per entry of x from those of the covariance (k, ne): an attitude's
    four entries move by about half its rotation error, so they get half the rms of its three."""
    if not spec.attitudes:
        return sig
    out = np.empty((sig.shape[0], spec.n))
    for kind, xi, ei in spec.error_blocks():
        if kind == "real":
            out[:, xi] = sig[:, ei]
        else:
            out[:, xi:xi + 4] = 0.5 * np.sqrt(np.mean(sig[:, ei:ei + 3] ** 2, axis=1))[:, None]
    return out


def verify(model: Any, filter: str = "ekf", precision: str = "float", steps: int = 200, seed: int = 0,
           dt: Optional[float] = None, gates: Optional[Dict[str, float]] = None, commit_check: str = "cholesky",
           progress: bool = False, **options: Any) -> VerifyResult:
    """Run C and reference side by side on one simulated scenario and compare every step.
    ``gates`` sets chi-square gate probabilities per sensor for both filters; ``commit_check``
    is the C's (see :func:`estgen.emit.generate`). ``progress``: a progress line on stderr."""
    spec: ModelSpec = with_gates(as_spec(model), gates)
    check_filter_support(spec, filter)
    pf = filter == "pf"
    if pf:
        options.setdefault("seed", seed)
    with Progress("verify", 4, progress) as bar:
        bar.step("simulating the scenario")
        scen = make_scenario(spec, steps, seed, dt=dt)
        bar.step("generating and compiling the C")
        c = build(spec, filter=filter, precision=precision, commit_check=commit_check, **options)
        r = reference(spec, filter=filter, **options)
        if precision == "float" and not pf:
            # the C starts from x0 and P0 rounded to float; give the reference the same start
            r.set_state(c.x, c.P)
        bar.step("running the C")
        rc = run_filter(c, scen)
        bar.step("running the reference")
        rr = run_filter(r, scen)
    tol_x, tol_P = TOLERANCE[precision]
    n = spec.n
    xr, xc = rr["x"], rc["x"]
    Pr, Pc = rr["P"], rc["P"]
    sig = np.sqrt(np.maximum(np.einsum("kii->ki", Pr), 0.0))
    if pf:
        sig = np.maximum(sig, 1e-6 * np.maximum(np.abs(xr), 1.0))
    xsig = _state_sigma(spec, sig)
    if precision == "double":
        xscale = np.maximum(np.abs(xr), xsig)
    else:
        xscale = xsig
    with np.errstate(divide="ignore", invalid="ignore"):
        dx = np.abs(xc - xr)
        ndx = np.where(xscale > 0, dx / xscale, np.where(dx > 0, np.inf, 0.0))
        scaleP = sig[:, :, None] * sig[:, None, :]
        dP = np.abs(Pc - Pr)
        ndP = np.where(scaleP > 0, dP / scaleP, np.where(dP > 0, np.inf, 0.0))
    ndx = np.nan_to_num(ndx, nan=np.inf)
    ndP = np.nan_to_num(ndP, nan=np.inf)
    if pf and precision == "float":  # against the spread of other seeds (see the module text)
        tol_x = tol_P = PF_FLOAT_FACTOR
        ndx, ndP, parted = _pf_float_ratios(spec, options, scen, rr, rc)
        rc = dict(rc, predict_status=rc["predict_status"][:parted],
                  update_status={k: v[:parted] for k, v in rc["update_status"].items()})
        rr = dict(rr, predict_status=rr["predict_status"][:parted],
                  update_status={k: v[:parted] for k, v in rr["update_status"].items()})
    mism: List[str] = []
    bad = np.nonzero(rc["predict_status"] != rr["predict_status"])[0]
    if bad.size:
        k = int(bad[0])
        mism.append(f"predict at step {k}: C {rc['predict_status'][k]}, reference {rr['predict_status'][k]}")
    for sname in rc["update_status"]:
        a, b = rc["update_status"][sname], rr["update_status"][sname]
        bad = np.nonzero(a != b)[0]
        if bad.size:
            k = int(bad[0])
            mism.append(f"update {sname} at step {k}: C {a[k]}, reference {b[k]}")
    kP = int(np.unravel_index(int(np.argmax(ndP)), ndP.shape)[0])
    return VerifyResult(
        model=spec.name, filter=filter, precision=precision, steps=steps, seed=seed,
        x_dev=[float(np.max(ndx[:, i])) for i in range(n)],
        x_abs=[float(np.max(dx[:, i])) for i in range(n)],
        x_step=[int(np.argmax(ndx[:, i])) for i in range(n)],
        P_dev=float(np.max(ndP)), P_step=kP, status_mismatch=mism,
        state_names=[s.name for s in spec.states], tol_x=tol_x, tol_P=tol_P,
    )


def _pf_float_ratios(spec: ModelSpec, options: Dict[str, Any], scen: Any, rr: Dict[str, Any],
                     rc: Dict[str, Any]) -> Any:
    """(x ratios, P ratios, first step where the runs parted) of the float particle filter: the
    RMS deviation from the reference over the RMS deviation of other seeds, broadcast over the
    steps so that the caller's maxima read them."""
    seed = int(options["seed"])
    others = [run_filter(reference(spec, filter="pf", **{**options, "seed": seed + 7919 * (j + 1)}), scen)
              for j in range(PF_FLOAT_SEEDS)]

    def rms(a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return np.sqrt(np.mean((a - b) ** 2, axis=0))

    def ratio(dev: np.ndarray, env: np.ndarray) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(env > 0, dev / env, np.where(dev > 0, np.inf, 0.0))

    env_x = np.max([rms(o["x"], rr["x"]) for o in others], axis=0)
    env_P = np.max([rms(o["P"], rr["P"]) for o in others], axis=0)
    rx = np.nan_to_num(ratio(rms(rc["x"], rr["x"]), env_x), nan=np.inf)
    rP = np.nan_to_num(ratio(rms(rc["P"], rr["P"]), env_P), nan=np.inf)
    steps = rr["x"].shape[0]
    far = np.nonzero(np.any(np.abs(rc["x"] - rr["x"]) > 1e-3 * (np.abs(rr["x"]) + 1e-3), axis=1))[0]
    parted = int(far[0]) if far.size else steps
    return np.broadcast_to(rx, rr["x"].shape), np.broadcast_to(rP, rr["P"].shape), parted


def format_result(res: VerifyResult) -> str:
    """The table `estgen verify` prints."""
    unit = "max(|x|, sigma)" if res.precision == "double" else "sigma"
    if res.filter == "pf" and res.precision == "float":
        unit = "other seeds' RMS"  # a statistical bound: see the module text
    lines = [
        f"estgen verify: {res.model} {res.filter.upper()} ({res.precision}) against the numpy reference, "
        f"{res.steps} steps, seed {res.seed}",
        f"  {'state':<16} {'max |dx|':>12} {'/ ' + unit:>18} {'tolerance':>10} {'step':>6}",
    ]
    for name, a, d, k in zip(res.state_names, res.x_abs, res.x_dev, res.x_step):
        flag = "" if d <= res.tol_x else "  FAIL"
        lines.append(f"  {name:<16} {a:12.3e} {d:18.3e} {res.tol_x:10.2g} {k:6d}{flag}")
    flag = "" if res.P_dev <= res.tol_P else "  FAIL"
    what = "(RMS |dP_ij| over the other seeds')" if unit.startswith("other") else "(|dP_ij| / sigma_i sigma_j)"
    lines.append(f"  {'P (all entries)':<16} {'':>12} {res.P_dev:18.3e} {res.tol_P:10.2g} {res.P_step:6d}{flag}"
                 f"   {what}")
    for m in res.status_mismatch:
        lines.append(f"  status differs: {m}  FAIL")
    lines.append("  result: " + ("PASS, the C matches the reference" if res.ok else "FAIL"))
    return "\n".join(lines)
