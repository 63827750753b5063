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
from typing import Any, Dict, List, Optional, Tuple

import numpy as np

from .build import build, compiler_used
from .filters import FilterSetup, reference
from .model import ModelSpec, as_spec
from .progress import Progress
from .reference import model_functions
from .simulate import make_scenario, run_filter
from .simulate import _scenario_dt as scenario_dt
from .status import Status

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
    #: what the run covered: why this length, calls and statuses per sensor, wraps, gates, notes
    coverage: Dict[str, Any] = field(default_factory=dict)
    compiler: str = ""
    cflags: List[str] = field(default_factory=list)

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
            "coverage": self.coverage, "compiler": self.compiler, "cflags": self.cflags,
        }


#: verify's default length: at least MIN_STEPS; every sensor UPDATES_PER_SENSOR times (at most
#: MAX_STEPS); three of the model's slowest time constants or two of its slowest oscillation
#: periods, at most TIME_SCALE_MAX_STEPS (a float filter drifts from the double reference over a
#: long horizon on ill-conditioned models, e.g. a falling body, so the time rule stays short).
MIN_STEPS, MAX_STEPS, UPDATES_PER_SENSOR, TIME_SCALE_MAX_STEPS = 200, 5000, 50, 500
PF_MAX_STEPS = 400


def model_time_scale(spec: ModelSpec, dt: float) -> Optional[float]:
    """The slowest time scale of the dynamics at x0 with the scenario's first input, in seconds:
    3 x the slowest time constant of a decaying mode or 2 x the slowest oscillation period, from
    the eigenvalues mu of F = df/dx (central differences; a discrete mode mu has the rate
    ln|mu| / dt and the angular frequency arg(mu) / dt). None when every mode is neutral."""
    mf = model_functions(spec)
    p = mf.param_tuple(spec.param_defaults())
    x0 = np.array(spec.x0, dtype=float)
    u0 = np.zeros(spec.nu)
    if spec.input_profile is not None:
        try:
            u0 = np.asarray(spec.input_profile(0.0), dtype=float).reshape(-1)
        except Exception:  # the scenario reports the profile's own error, with its line
            return None
        if u0.shape != (spec.nu,):
            return None
    F = np.empty((spec.n, spec.n))
    with np.errstate(all="ignore"):
        try:
            for j in range(spec.n):
                h = 1e-6 * max(1.0, abs(x0[j]))
                e = np.zeros(spec.n)
                e[j] = h
                F[:, j] = (mf.f(x0 + e, u0, dt, p) - mf.f(x0 - e, u0, dt, p)) / (2 * h)
        except (ArithmeticError, ValueError, TypeError):  # f undefined near x0: no time scale
            return None
        if not np.all(np.isfinite(F)):
            return None
        mu = np.linalg.eigvals(F)
    scales = []
    for m in mu:
        mag = abs(m)
        if mag == 0.0:
            continue
        rate = -np.log(mag) / dt
        if rate > 1e-9 / dt:  # decaying: three time constants
            scales.append(3.0 / rate)
        omega = abs(np.angle(m)) / dt
        if omega > 1e-9 / dt:  # oscillating: two periods
            scales.append(2.0 * 2.0 * np.pi / omega)
    return max(scales) if scales else None


def default_steps(spec: ModelSpec, dt: float) -> Tuple[int, str]:
    """verify's scenario length for ``spec`` and why (see :data:`MIN_STEPS`)."""
    every = max((s.every for s in spec.sensors), default=1)
    reasons = [(MIN_STEPS, f"the minimum {MIN_STEPS}")]
    if spec.sensors:
        slow = max(spec.sensors, key=lambda s: s.every)
        want = UPDATES_PER_SENSOR * every
        why = f"{UPDATES_PER_SENSOR} updates of {slow.name} (every {every} steps)"
        if want > MAX_STEPS:
            want, why = MAX_STEPS, f"{why}, capped at {MAX_STEPS} steps"
        reasons.append((want, why))
    scale = model_time_scale(spec, dt)
    if scale is not None:
        want = int(np.ceil(scale / dt))
        why = f"the dynamics' slowest time scale {scale:.3g} s"
        if want > TIME_SCALE_MAX_STEPS:
            want, why = TIME_SCALE_MAX_STEPS, f"{why}, capped at {TIME_SCALE_MAX_STEPS} steps"
        reasons.append((want, why))
    return max(reasons, key=lambda r: r[0])


def _inject_outliers(spec: ModelSpec, scen: Any) -> Dict[str, List[int]]:
    """Exercise every chi-square gate: two reports of each gated sensor (at a third and two thirds
    of its reports) get an outlier of 1000 standard deviations of R on component 0. Both filters
    see the same data, so the gate path is compared like any other. Returns the steps per sensor."""
    mf = model_functions(spec)
    p = mf.param_tuple(spec.param_defaults())
    done: Dict[str, List[int]] = {}
    for s in spec.sensors:
        if s.gate is None:
            continue
        ks = [k for k, row in enumerate(scen.measurements) if any(name == s.name for name, _ in row)]
        if len(ks) < 3:
            continue
        sigma = float(np.sqrt(max(mf.R(s.name, p)[0, 0], 0.0)))
        picked = [ks[len(ks) // 3], ks[2 * len(ks) // 3]]
        for k in picked:
            row = scen.measurements[k]
            for i, (name, z) in enumerate(row):
                if name == s.name:
                    z = np.array(z, dtype=float)
                    z[0] += 1000.0 * max(sigma, 1e-6 * max(1.0, abs(z[0])))
                    if s.angles[0]:
                        z[0] = float(np.arctan2(np.sin(z[0]), np.cos(z[0])))
                    row[i] = (name, z)
        done[s.name] = picked
    return done


def _status_counts(st: np.ndarray) -> Dict[str, int]:
    out: Dict[str, int] = {}
    for v in st[st >= 0]:
        name = Status(int(v)).name
        out[name] = out.get(name, 0) + 1
    return out


def _coverage(spec: ModelSpec, scen: Any, rc: Dict[str, Any], rr: Dict[str, Any], why: str,
              outliers: Dict[str, List[int]]) -> Dict[str, Any]:
    """What the run exercised, for the report and the notes on what it did not."""
    calls = int(rc["predict_status"].size)
    agree = int(np.sum(rc["predict_status"] == rr["predict_status"]))
    sensors: Dict[str, Any] = {}
    notes: List[str] = []
    for s in spec.sensors:
        a, b = rc["update_status"][s.name], rr["update_status"][s.name]
        reported = int(np.sum(a >= 0))
        calls += reported
        agree += int(np.sum((a == b) & (a >= 0)))
        sensors[s.name] = {"updates": reported, "c": _status_counts(a), "reference": _status_counts(b)}
        if reported < UPDATES_PER_SENSOR:
            notes.append(f"sensor {s.name} updated only {reported} times (raise --steps)")
        if s.gate is not None:
            gated = sensors[s.name]["c"].get("GATED", 0)
            sensors[s.name]["outliers_injected"] = len(outliers.get(s.name, []))
            if not gated:
                notes.append(f"the gate of {s.name} never rejected a measurement: its path was not exercised")
    wraps: Dict[str, int] = {}
    for i, st in enumerate(spec.states):
        if st.angle:
            jumps = np.abs(np.diff(scen.x_true[:, i]))
            wraps[st.name] = int(np.sum(jumps > np.pi))
            if not wraps[st.name]:
                notes.append(f"angle {st.name} never crossed +-pi in this scenario: the wrap was not exercised")
    return {"length": why, "dt": scen.dt, "calls": calls, "statuses_agree": agree, "sensors": sensors,
            "predict": {"c": _status_counts(rc["predict_status"]), "reference": _status_counts(rr["predict_status"])},
            "wraps": wraps, "notes": notes}


def state_sigma(spec: ModelSpec, sig: np.ndarray) -> np.ndarray:
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


def verify(model: Any, filter: str = "ekf", precision: str = "float", steps: Optional[int] = None, seed: int = 0,
           dt: Optional[float] = None, gates: Optional[Dict[str, float]] = None, commit_check: str = "subtractive",
           progress: bool = False, **options: Any) -> VerifyResult:
    """Run C and reference side by side on one simulated scenario and compare every step.
    ``gates`` sets chi-square gate probabilities per sensor for both filters; ``commit_check``
    is the C's; ``options`` are the kind's own (see :func:`estgen.filters.generate`; a particle
    filter's seed defaults to ``seed``). ``progress``: a progress line on stderr.
    ``steps`` defaults to :func:`default_steps`; every chi-square gate gets two outliers."""
    setup = FilterSetup.of(filter, precision, gates, commit_check, **options)
    if "seed" in setup.options.runtime() and "seed" not in options:
        setup = FilterSetup.of(filter, precision, gates, commit_check, seed=seed, **options)
    spec: ModelSpec = setup.spec(as_spec(model))
    pf = not setup.kind.gaussian  # a particle cloud: see the module text
    dtv = scenario_dt(spec, dt)
    if steps is None:
        steps, why = default_steps(spec, dtv)
        if pf and steps > PF_MAX_STEPS:  # the numpy particle filter is slow: bound its run time
            steps, why = PF_MAX_STEPS, f"{why}, capped at {PF_MAX_STEPS} steps for the particle filter"
    else:
        why = "--steps"
    with Progress("verify", 4, progress) as bar:
        bar.step(f"simulating {steps} steps")
        scen = make_scenario(spec, steps, seed, dt=dtv)
        outliers = _inject_outliers(spec, scen)
        bar.step("generating and compiling the C")
        c = build(spec, **setup.kwargs())
        r = setup.reference(spec)
        if precision == "float" and not pf:
            # the C starts from x0 and P0 rounded to float; give the reference the same start
            r.set_state(c.x, c.P)
        bar.step("running the C")
        rc = run_filter(c, scen)
        bar.step("running the reference")
        rr = run_filter(r, scen)
    cc_version, cc_flags = compiler_used()
    tol_x, tol_P = TOLERANCE[precision]
    n = spec.n
    xr, xc = rr["x"], rc["x"]
    Pr, Pc = rr["P"], rc["P"]
    sig = np.sqrt(np.maximum(np.einsum("kii->ki", Pr), 0.0))
    if pf:
        sig = np.maximum(sig, 1e-6 * np.maximum(np.abs(xr), 1.0))
    xsig = state_sigma(spec, sig)
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
        ndx, ndP, parted = _pf_float_ratios(spec, setup.options.as_dict(), scen, rr, rc)
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
        coverage=_coverage(spec, scen, rc, rr, why, outliers), compiler=cc_version, cflags=cc_flags,
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


def _counts(c: Dict[str, int]) -> str:
    return ", ".join(f"{k} {v}" for k, v in sorted(c.items(), key=lambda kv: Status[kv[0]].value)) or "-"


def format_result(res: VerifyResult) -> str:
    """The table `estgen verify` prints: the deviations, then what the run covered."""
    unit = "max(|x|, sigma)" if res.precision == "double" else "sigma"
    if res.filter == "pf" and res.precision == "float":
        unit = "other seeds' RMS"  # a statistical bound: see the module text
    cov = res.coverage
    lines = [
        f"estgen verify: {res.model} {res.filter.upper()} ({res.precision}) against the numpy reference, "
        f"seed {res.seed}",
    ]
    if cov:
        lines.append(f"  scenario: {res.steps} steps of {cov['dt']:g} s ({res.steps * cov['dt']:g} s); "
                     f"length from {cov['length']}")
    if res.compiler:
        lines.append(f"  C compiled by {res.compiler}: {' '.join(res.cflags)}")
    lines += ["", f"  {'state':<16} {'max |dx|':>12} {'/ ' + unit:>18} {'tolerance':>10} {'step':>6}"]
    for name, a, d, k in zip(res.state_names, res.x_abs, res.x_dev, res.x_step):
        flag = "" if d <= res.tol_x else "  FAIL"
        lines.append(f"  {name:<16} {a:12.3e} {d:18.3e} {res.tol_x:10.2g} {k:6d}{flag}")
    flag = "" if res.P_dev <= res.tol_P else "  FAIL"
    what = "(RMS |dP_ij| over the other seeds')" if unit.startswith("other") else "(|dP_ij| / sigma_i sigma_j)"
    lines.append(f"  {'P (all entries)':<16} {'':>12} {res.P_dev:18.3e} {res.tol_P:10.2g} {res.P_step:6d}{flag}"
                 f"   {what}")
    if cov:
        lines += ["", f"  {'call':<16} {'calls':>7}  statuses of the C (the reference's are compared one by one)"]
        pred = cov["predict"]["c"]
        lines.append(f"  {'predict':<16} {res.steps:7d}  {_counts(pred)}")
        for name, sc in cov["sensors"].items():
            extra = f"; {sc['outliers_injected']} outliers injected" if "outliers_injected" in sc else ""
            lines.append(f"  {'update ' + name:<16} {sc['updates']:7d}  {_counts(sc['c'])}{extra}")
        lines.append(f"  status codes agree on {cov['statuses_agree']} of {cov['calls']} calls")
        for name, k in cov["wraps"].items():
            lines.append(f"  angle {name}: the truth crossed +-pi {k} times")
        for note in cov["notes"]:
            lines.append(f"  note: {note}")
    for m in res.status_mismatch:
        lines.append(f"  status differs: {m}  FAIL")
    lines.append("  result: " + ("PASS, the C matches the reference" if res.ok else "FAIL"))
    return "\n".join(lines)
