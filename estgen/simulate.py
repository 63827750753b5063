"""Simulated truth and measurements, and the Monte Carlo consistency test of a filter.

The truth is drawn from the model itself (``x[k+1] = f(x[k], u[k], dt) + w``, ``z = h(x) + v``)
with the model's default parameters; the filter under test may be given other parameters, which
is how a mistuned Q or R shows up. Consistency follows Bar-Shalom, Li and Kirubarajan,
*Estimation with Applications to Tracking and Navigation* (2001), section 5.4: the run-averaged
normalized estimation error squared (NEES) and normalized innovation squared (NIS) must stay
inside their two-sided 95% chi-square bounds.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import multiprocessing
import os
import sys
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, TextIO, Tuple, Union

import numpy as np

from .chi2 import chi2_ppf
from . import filters
from .errors import ModelError, UsageError
from .filters import FilterSetup
from .model import ModelSpec, as_spec
from .reference import model_functions, wrap_angle
from .status import Status
from .truth import Truth

__all__ = [
    "Scenario",
    "make_scenario",
    "run_filter",
    "score_run",
    "run_seed",
    "summarize_runs",
    "MonteCarloResult",
    "StatSummary",
    "monte_carlo",
    "format_summary",
    "plot_result",
    "add_arguments",
    "run",
    "INSIDE_REQUIRED",
    "chi2_bounds",
]

#: a statistic passes when it lies inside its 95% bounds at this fraction of the steps or more
#: (common practice: a consistent filter is inside about 95% of the time; 90% leaves room for
#: the correlation between neighbouring steps)
INSIDE_REQUIRED = 0.90
#: the two-sided probability of the chi-square bounds
BOUND_PROBABILITY = 0.95

SeedLike = Union[int, Sequence[int]]


# ---------------------------------------------------------------------------------------------
# Scenario


@dataclass
class Scenario:
    """One simulated run: inputs, truth and the measurements each step produced."""

    dt: float
    t: np.ndarray  # (steps,) time at the start of each step
    u: np.ndarray  # (steps, nu)
    x_true: np.ndarray  # (steps + 1, n); row 0 is the initial truth
    #: per step, the (sensor, z) pairs reported after that step's motion, in model order
    measurements: List[List[Tuple[str, np.ndarray]]]

    @property
    def steps(self) -> int:
        return int(self.t.shape[0])


def _resolve_every(spec: ModelSpec, every: Optional[Mapping[str, int]]) -> Dict[str, int]:
    out = {s.name: s.every for s in spec.sensors}
    for name, k in (every or {}).items():
        if name not in out:
            raise ModelError(f"--every names sensor {name!r}, which model {spec.name!r} does not have; "
                             f"it has {sorted(out)}")
        if isinstance(k, bool) or int(k) != k or int(k) < 1:
            raise ModelError(f"--every {name}={k}: the interval must be a whole number of steps >= 1")
        out[name] = int(k)
    return out


def _resolve_params(spec: ModelSpec, params: Optional[Mapping[str, float]], what: str) -> Dict[str, float]:
    out = spec.param_defaults()
    for name, value in (params or {}).items():
        if name not in out:
            raise ModelError(f"{what} names parameter {name!r}, which model {spec.name!r} does not have; "
                             f"it has {sorted(out) or 'none'}")
        v = float(value)
        if not math.isfinite(v):
            raise ModelError(f"{what} {name}={value}: the value must be a finite number")
        out[name] = v
    return out


def _scenario_dt(spec: ModelSpec, dt: Optional[float]) -> float:
    value = float(dt) if dt is not None else (spec.scenario_dt or 0.01)
    if not (math.isfinite(value) and value > 0):
        raise ModelError(f"the simulation step dt must be a number > 0, got {dt}")
    return value


def make_scenario(
    spec: Any,
    steps: int,
    seed: SeedLike,
    dt: Optional[float] = None,
    every: Optional[Mapping[str, int]] = None,
    params: Optional[Mapping[str, float]] = None,
) -> Scenario:
    """Simulate ``steps`` steps of the model's truth and its sensors.

    ``x_true[0] ~ N(x0, P0)`` (uniform over the box of ``initial_uniform``); ``x_true[k+1] = f(x_true[k], u_k, w_k, dt) + q``, ``q ~ N(0, Q(dt))``,
    ``w_k ~ N(0, Qw(dt))`` (the noise symbols of the process); sensor s reports after step k when
    ``(k + 1) % every_s == 0`` with ``z = h(x_true[k+1], v) + r``, ``r ~ N(0, R)``, ``v ~ N(0, Rv)``.
    For a measured input, ``u_k`` is the measured value: the truth moves with ``u_k - w_k``. ``u_k`` is the model's input profile at ``t_k = k dt`` (zeros without one).
    ``params`` overrides the truth's parameters (the default is the model's defaults).
    """
    spec = as_spec(spec)
    steps = int(steps)
    if steps < 1:
        raise ModelError(f"the number of steps must be >= 1, got {steps}")
    dtv = _scenario_dt(spec, dt)
    ev = _resolve_every(spec, every)
    pvals = _resolve_params(spec, params, "the truth's parameters")
    truth = Truth(spec, dtv, pvals)
    rng = np.random.default_rng(seed)
    n, nu = spec.n, spec.nu

    t = np.arange(steps) * dtv
    u = np.zeros((steps, nu))
    if spec.input_profile is not None:
        for k in range(steps):
            uk = np.asarray(spec.input_profile(float(t[k])), dtype=float).reshape(-1)
            if uk.shape != (nu,):
                raise ModelError(f"scenario inputs({t[k]:g}) returned {uk.shape[0]} values; the model has {nu} inputs",
                                 spec.where.get("model"))
            u[k] = uk
    if not np.all(np.isfinite(u)):
        raise ModelError("the scenario's input profile returned a non-finite value", spec.where.get("model"))

    x_true = np.empty((steps + 1, n))
    x_true[0] = truth.initial(rng)
    meas: List[List[Tuple[str, np.ndarray]]] = []
    with np.errstate(all="ignore"):
        for k in range(steps):
            q, w = truth.draw_process(rng)
            x = x_true[k + 1] = truth.step(x_true[k], u[k], q, w, k + 1)
            row: List[Tuple[str, np.ndarray]] = []
            for s in spec.sensors:
                if (k + 1) % ev[s.name] == 0:
                    r, v = truth.draw_sensor(rng, s.name)
                    row.append((s.name, truth.measure(s.name, x, r, v)))
            meas.append(row)
    return Scenario(dt=dtv, t=t, u=u, x_true=x_true, measurements=meas)


def run_filter(filt: Any, scenario: Scenario) -> Dict[str, Any]:
    """Run a filter (reference or compiled) through a scenario from its current state.

    Returns ``x`` (steps+1, n) and ``P`` (steps+1, n, n) after each step (row 0: before any),
    ``predict_status`` (steps,), per sensor ``update_status`` (steps,; -1 where it did not
    report) and ``nis`` (steps,; nan where no S was formed), and ``refusals``: {code: count}.
    """
    steps = scenario.steps
    n = int(filt.n)
    ne = int(filt.P.shape[0])  # n minus one per attitude
    xs = np.empty((steps + 1, n))
    Ps = np.empty((steps + 1, ne, ne))
    xs[0], Ps[0] = filt.x, filt.P
    pst = np.zeros(steps, dtype=int)
    ust = {s: np.full(steps, -1, dtype=int) for s in filt.sensors}
    nis = {s: np.full(steps, np.nan) for s in filt.sensors}
    refusals: Dict[int, int] = {}
    for k in range(steps):
        st = int(filt.predict(scenario.u[k], scenario.dt))
        pst[k] = st
        if st:
            refusals[st] = refusals.get(st, 0) + 1
        for name, z in scenario.measurements[k]:
            st = int(filt.update(name, z))
            ust[name][k] = st
            if st in (Status.OK, Status.GATED):
                nis[name][k] = float(filt.nis)
            if st:
                refusals[st] = refusals.get(st, 0) + 1
        xs[k + 1], Ps[k + 1] = filt.x, filt.P
    return {"x": xs, "P": Ps, "predict_status": pst, "update_status": ust, "nis": nis, "refusals": refusals}


# ---------------------------------------------------------------------------------------------
# Monte Carlo


@dataclass
class StatSummary:
    """A run-averaged statistic over the steps, against its chi-square bounds."""

    per_step: np.ndarray  # run-averaged value at each step where it exists (nan elsewhere)
    steps: np.ndarray  # the step numbers (1-based) the values belong to
    dof: int  # degrees of freedom of one run's value (n for NEES, m for NIS)
    lower: float
    upper: float
    #: steps 1..burn_in are the start-up transient: plotted, not judged (see :func:`settling_steps`)
    burn_in: int = 0

    @property
    def valid(self) -> np.ndarray:
        """The steps the verdict judges: a value exists and the step is past the burn-in."""
        return np.isfinite(self.per_step) & (self.steps > self.burn_in)

    @property
    def mean(self) -> float:
        v = self.per_step[self.valid]
        return float(np.mean(v)) if v.size else math.nan

    @property
    def fraction_inside(self) -> float:
        v = self.per_step[self.valid]
        if not v.size:
            return math.nan
        return float(np.mean((v >= self.lower) & (v <= self.upper)))

    @property
    def fraction_above(self) -> float:
        v = self.per_step[self.valid]
        return float(np.mean(v > self.upper)) if v.size else math.nan

    @property
    def fraction_below(self) -> float:
        v = self.per_step[self.valid]
        return float(np.mean(v < self.lower)) if v.size else math.nan

    @property
    def verdict(self) -> str:
        """"consistent", "overconfident" (above the upper bound: P or S too small, e.g. Q or R
        too small), "too cautious" (below the lower bound: Q or R too large), or "no data"."""
        if not np.any(self.valid):
            return "no data"
        if self.fraction_inside >= INSIDE_REQUIRED:
            return "consistent"
        above, below = self.fraction_above, self.fraction_below
        if above == below:  # as many steps out on each side: the mean against its expectation decides
            above, below = self.mean, float(self.dof)
        return "overconfident" if above > below else "too cautious"

    def to_dict(self) -> Dict[str, Any]:
        return {
            "mean": _num(self.mean),
            "lower": self.lower,
            "upper": self.upper,
            "fraction_inside": _num(self.fraction_inside),
            "fraction_above": _num(self.fraction_above),
            "fraction_below": _num(self.fraction_below),
            "verdict": self.verdict,
            "dof": self.dof,
            "judged_steps": int(np.sum(self.valid)),
            "steps": [int(s) for s in self.steps],
            "per_step": [_num(v) for v in self.per_step],
        }


def _num(v: float) -> Optional[float]:
    """JSON has no nan: write null."""
    return float(v) if math.isfinite(v) else None


def chi2_bounds(runs: int, dof: int) -> Tuple[float, float]:
    """Two-sided 95% bounds of a run-averaged chi-square statistic: the sum over ``runs`` runs
    is chi-square with ``runs * dof`` degrees of freedom (Bar-Shalom et al. 2001, 5.4.2)."""
    a = (1.0 - BOUND_PROBABILITY) / 2.0
    return chi2_ppf(a, runs * dof) / runs, chi2_ppf(1.0 - a, runs * dof) / runs


@dataclass
class MonteCarloResult:
    """What :func:`monte_carlo` measured."""

    model: str
    filter: str
    implementation: str  # "reference" or "c-double" / "c-float"
    runs: int
    steps: int
    seed: int
    dt: float
    states: List[str]
    units: List[Optional[str]]
    angles: List[bool]
    nees: StatSummary
    nis: Dict[str, StatSummary]
    rmse: Dict[str, float]
    refusals: Dict[str, int]  # status name -> count over all runs
    filter_params: Dict[str, float]  # all the filter's parameters
    set_params: Dict[str, float]  # the ones changed from the model's defaults (the truth's)
    seconds: float
    gates: Dict[str, float] = field(default_factory=dict)  # gate probabilities set for the filter
    #: run 0 in full for plotting: t, x_true, x, P
    run0: Dict[str, np.ndarray] = field(default_factory=dict, repr=False)
    burn_in: int = 0  # steps left out of the verdict
    burn_in_reason: str = ""

    @property
    def consistent(self) -> bool:
        """NEES and every NIS inside their bounds at INSIDE_REQUIRED of the steps or more."""
        # a sensor that never reported (every > steps) has nothing to judge
        return self.nees.verdict == "consistent" and all(
            s.verdict in ("consistent", "no data") for s in self.nis.values())

    def to_dict(self) -> Dict[str, Any]:
        """The JSON document: the contract's fields plus per-step values and verdicts."""
        return {
            "model": self.model,
            "filter": self.filter,
            "implementation": self.implementation,
            "runs": self.runs,
            "steps": self.steps,
            "seed": self.seed,
            "dt": self.dt,
            "filter_params": dict(self.filter_params),
            "set_params": dict(self.set_params),
            "gates": dict(self.gates),
            "nees": self.nees.to_dict(),
            "nis": {k: v.to_dict() for k, v in self.nis.items()},
            "rmse": {k: _num(v) for k, v in self.rmse.items()},
            "refusals": dict(self.refusals),
            "burn_in_steps": self.burn_in,
            "burn_in_reason": self.burn_in_reason,
            "consistent": bool(self.consistent),
            "seconds": self.seconds,
        }

    def to_json(self) -> str:
        """:meth:`to_dict` as a JSON string."""
        return json.dumps(self.to_dict(), indent=2)


# The worker context: set in the parent before the pool forks, so nothing unpicklable (sympy
# expressions, the model's input-profile lambda, a loaded cffi module) has to be sent.
_CTX: Dict[str, Any] = {}


def _filter_factory(ctx: Dict[str, Any]) -> Callable[[], Any]:
    """A function returning a fresh filter under test, its parameters as the run wants them.

    For the C, the code is generated and compiled (or loaded from the build cache) once here;
    each run then gets a new filter struct over the same loaded module, initialized by the C's
    own init, so a run costs no regeneration.
    """
    setup: FilterSetup = ctx["setup"]
    spec = setup.spec(ctx["spec"])  # gates act in the filter only

    def run_options() -> Any:
        """The kind's options for this run: a run-time seed (the particle filter's) is the run's own."""
        if "seed" in setup.options.runtime():
            return dataclasses.replace(setup.options, seed=_pf_seed(ctx))
        return setup.options

    if ctx["use_reference"]:
        mf = model_functions(spec)

        def new() -> Any:
            return setup.kind.reference(spec, run_options(), functions=mf)
    else:
        from .build import CFilter, compile_generated

        comp = compile_generated(setup.generate(spec))

        def new() -> Any:
            return CFilter(spec, comp, setup.name, **run_options().runtime())

    def fresh() -> Any:
        filt = new()
        for name, value in ctx["set_params"].items():
            filt.set_param(name, value)
        return filt

    return fresh


def _pf_seed(ctx: Dict[str, Any]) -> int:
    """The particle filter's generator seed for the current run: its own for every run. The
    run number lives in the module context _CTX, which _one_run sets in whichever process runs
    it (``ctx`` here is the dict the factory was built from, which never sees it)."""
    return run_seed(int(ctx["seed"]), int(_CTX.get("run", 0)))


def run_seed(seed: int, run: int) -> int:
    """The run-time generator seed (the particle filter's) of run ``run`` of a Monte Carlo test
    seeded with ``seed``: its own for every run, 32 bits as the C's init_seed takes it. Shared
    by ``simulate`` and ``compare``, so both run a filter on the same draws."""
    return (int(seed) * 1000003 + int(run) * 7919 + 1) & 0xFFFFFFFF


def _one_run(r: int) -> Dict[str, Any]:
    ctx = _CTX
    ctx["run"] = r
    sc = make_scenario(ctx["spec"], ctx["steps"], seed=[ctx["seed"], r], dt=ctx["dt"], every=ctx["every"])
    return score_run(ctx["spec"], sc, run_filter(ctx["new_filter"](), sc), keep_run=(r == 0))


def score_run(spec: ModelSpec, sc: Scenario, out: Dict[str, Any], keep_run: bool = False) -> Dict[str, Any]:
    """One run's statistics from :func:`run_filter`'s output on scenario ``sc``: per step the
    NEES (nan where P is not positive definite), the squared error per state, the NIS per sensor
    and the refusals; with ``keep_run``, also the run itself (``run0``: t, x_true, x, P) for plots.
    The input of :func:`summarize_runs`."""
    angles = np.array(spec.angle_states, dtype=bool)
    if spec.attitudes:
        # the error e with x_true = x_est ⊞ e (attitudes: body-frame rotation vector)
        mf = model_functions(spec)
        err = np.array([mf.boxminus(xt, xe) for xt, xe in zip(sc.x_true[1:], out["x"][1:])])
    else:
        err = out["x"][1:] - sc.x_true[1:]
    if angles.any() and not spec.attitudes:
        err[:, angles] = wrap_angle(err[:, angles])
    nees = np.full(sc.steps, np.nan)
    for k in range(sc.steps):
        P = out["P"][k + 1]
        try:
            c = np.linalg.cholesky(0.5 * (P + P.T))
            v = np.linalg.solve(c, err[k])
            nees[k] = float(v @ v)
        except np.linalg.LinAlgError:
            pass  # a P that is not positive definite has no NEES; the step is left out
    res: Dict[str, Any] = {"nees": nees, "sq_err": err ** 2, "nis": out["nis"], "refusals": out["refusals"]}
    if keep_run:
        res["run0"] = {"t": np.arange(sc.steps + 1) * sc.dt, "x_true": _error_view(spec, sc.x_true),
                       "x": _error_view(spec, out["x"]), "P": out["P"]}
    return res


def _error_view(spec: ModelSpec, X: np.ndarray) -> np.ndarray:
    """States as plotted and tabulated: one column per covariance component (an attitude as its
    rotation vector from the identity, rad; the rest as they are)."""
    if not spec.attitudes:
        return X
    mf = model_functions(spec)
    origin = np.zeros(spec.n)
    for i in spec.attitudes:
        origin[i] = 1.0
    return np.array([mf.boxminus(x, origin) for x in X])


def monte_carlo(
    spec: Any,
    filter: str = "ekf",
    runs: int = 50,
    steps: int = 200,
    seed: int = 0,
    *,
    use_reference: bool = False,
    set_params: Optional[Mapping[str, float]] = None,
    precision: str = "float",
    every: Optional[Mapping[str, int]] = None,
    dt: Optional[float] = None,
    workers: Optional[int] = None,
    progress: Optional[bool] = None,
    gates: Optional[Mapping[str, float]] = None,
    commit_check: str = "subtractive",
    options: Optional[Mapping[str, Any]] = None,
    burn_in: Optional[int] = None,
    **kind_options: Any,
) -> MonteCarloResult:
    """Run the filter on ``runs`` independent simulations and test its consistency.

    The filter under test is the compiled C (``estgen.build``) unless ``use_reference``.
    ``set_params`` changes the filter's parameters; the simulated truth keeps the defaults.
    Runs are spread over ``workers`` processes (default: all cores; 1 runs in this process).
    ``progress``: show progress on stderr (default: when stderr is a terminal).
    ``gates``, ``commit_check`` and the kind's own options (``options`` and ``kind_options``
    together: the UKF's alpha, beta, kappa; the particle filter's particles, resample_threshold,
    roughening and regularization) are those of :func:`estgen.filters.generate`. A particle filter's generator
    gets its own seed in every run, derived from ``seed`` and the run number.
    ``burn_in``: steps left out of the verdict (default: :func:`settling_steps` of run 0).
    """
    started = time.perf_counter()
    spec = as_spec(spec)
    setup = FilterSetup.of(filter, precision, gates, commit_check, **{**(options or {}), **kind_options})
    setup.spec(spec)  # checks support, gate names and options before anything runs
    runs, steps = int(runs), int(steps)
    if runs < 1 or steps < 1:
        raise UsageError(f"--runs and --steps must be >= 1, got {runs} and {steps}")
    if int(seed) < 0:
        raise UsageError(f"--seed must be >= 0, got {seed}")
    if burn_in is not None and not 0 <= int(burn_in) < steps:
        raise UsageError(f"--burn-in must be between 0 and the steps - 1 ({steps - 1}), got {burn_in}")
    fparams = _resolve_params(spec, set_params, "--set")
    changed = {k: v for k, v in fparams.items() if k in (set_params or {})}
    ev = _resolve_every(spec, every)
    dtv = _scenario_dt(spec, dt)
    ctx = {"spec": spec, "setup": setup, "use_reference": bool(use_reference),
           "set_params": changed, "steps": steps, "seed": int(seed), "dt": dtv, "every": ev}
    # build the C (or lambdify the model) once, before forking, so workers inherit it and a
    # problem shows here rather than in a worker
    ctx["new_filter"] = _filter_factory(ctx)
    model_functions(spec)  # the truth's functions

    nworkers = min(runs, int(workers) if workers else (os.cpu_count() or 1))
    show = sys.stderr.isatty() if progress is None else bool(progress)
    results: List[Optional[Dict[str, Any]]] = [None] * runs
    _CTX.clear()
    _CTX.update(ctx)
    try:
        if nworkers <= 1 or "fork" not in multiprocessing.get_all_start_methods():
            for r in range(runs):
                results[r] = _one_run(r)
                _progress(show, r + 1, runs, started)
        else:
            with multiprocessing.get_context("fork").Pool(nworkers) as pool:
                for done, (r, res) in enumerate(pool.imap_unordered(_indexed_run, range(runs)), start=1):
                    results[r] = res
                    _progress(show, done, runs, started)
    finally:
        _CTX.clear()
        if show:
            sys.stderr.write("\n")
            sys.stderr.flush()
    done_results = [res for res in results if res is not None]
    out = summarize_runs(spec, filter, use_reference, precision, runs, steps, int(seed), dtv, fparams, changed,
                      done_results, time.perf_counter() - started, burn_in)
    out.gates = setup.common.gate_map
    return out


#: the automatic burn-in: covariance within this factor of its settled level, at most this
#: fraction of the steps
SETTLE_FACTOR, SETTLE_MAX_FRACTION = 2.0, 0.2


def settling_steps(P: np.ndarray) -> int:
    """The start-up transient of a run, in steps, from the filter's own covariance ``P``
    (steps + 1, ne, ne): the first step at which every standard deviation is within a factor
    SETTLE_FACTOR of its settled level (its median over the second half of the run), at most
    SETTLE_MAX_FRACTION of the steps.

    Why this default: early on the filter still carries P0, and an EKF linearized far from the
    truth is expected to be off its bounds; the verdict is about the filter once that is
    over. The transient is read from P alone, a property of the filter (P0, Q, R, sensor
    rates), never from the NEES or NIS being judged, so it cannot hide a bad statistic."""
    steps = P.shape[0] - 1
    if steps < 4:
        return 0
    sig = np.sqrt(np.clip(np.einsum("kii->ki", P[1:]), 0.0, None))
    settled = np.median(sig[steps // 2:], axis=0)
    use = settled > 0
    if not use.any():
        return 0
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.abs(np.log(sig[:, use] / settled[use]))
    ok = np.all(ratio <= np.log(SETTLE_FACTOR), axis=1)
    first = int(np.argmax(ok)) if ok.any() else steps
    return min(first, int(SETTLE_MAX_FRACTION * steps))


def _indexed_run(r: int) -> Tuple[int, Dict[str, Any]]:
    return r, _one_run(r)


def _progress(show: bool, done: int, total: int, started: float) -> None:
    if not show:
        return
    el = time.perf_counter() - started
    eta = el / done * (total - done)
    sys.stderr.write(f"\rsimulate: run {done}/{total}  {el:.1f} s elapsed, about {eta:.1f} s left ")
    sys.stderr.flush()


def summarize_runs(spec: ModelSpec, filter: str, use_reference: bool, precision: str, runs: int, steps: int,
                   seed: int, dt: float, fparams: Dict[str, float], changed: Dict[str, float],
                   results: List[Dict[str, Any]], seconds: float, burn_in: Optional[int] = None) -> MonteCarloResult:
    """The Monte Carlo summary of the runs :func:`score_run` scored: run-averaged NEES and NIS
    against their bounds (judged after ``burn_in`` steps; default :func:`settling_steps` of
    run 0), RMSE per state over all runs and steps, refusals by status name."""
    step_no = np.arange(1, steps + 1)
    run0 = next((r["run0"] for r in results if "run0" in r), {})
    if burn_in is None:
        burn_in = settling_steps(run0["P"]) if "P" in run0 else 0
        why = (f"the covariance of run 0 settled (within a factor {SETTLE_FACTOR:g} of its level over the "
               f"second half) after {burn_in} steps (at most {100 * SETTLE_MAX_FRACTION:.0f}% of the run)")
    else:
        why = "--burn-in"
    burn_in = int(burn_in)
    nees_runs = np.array([r["nees"] for r in results])
    with np.errstate(all="ignore"):
        # a step where some run has no NEES (refused P) is averaged over the runs that have one
        nees_mean = _nanmean_rows(nees_runs)
    lo, hi = chi2_bounds(runs, spec.ne)  # NEES has the error dimension (n minus one per attitude)
    nees = StatSummary(nees_mean, step_no, spec.ne, lo, hi, burn_in)
    nis: Dict[str, StatSummary] = {}
    for s in spec.sensors:
        vals = np.array([r["nis"][s.name] for r in results])
        reported = np.any(np.isfinite(vals), axis=0)
        lo, hi = chi2_bounds(runs, s.m)
        nis[s.name] = StatSummary(_nanmean_rows(vals[:, reported]), step_no[reported], s.m, lo, hi, burn_in)
    sq = np.array([r["sq_err"] for r in results])  # (runs, steps, n)
    names, units, angles = _error_columns(spec)
    rmse = {nm: float(np.sqrt(np.mean(sq[:, :, i]))) for i, nm in enumerate(names)}
    refusals: Dict[str, int] = {}
    for r in results:
        for code, count in r["refusals"].items():
            key = Status(code).name
            refusals[key] = refusals.get(key, 0) + count
    impl = "reference" if use_reference else f"c-{precision}"
    return MonteCarloResult(
        model=spec.name, filter=filter, implementation=impl, runs=runs, steps=steps, seed=seed, dt=dt,
        states=names, units=units, angles=angles, nees=nees, nis=nis,
        rmse=rmse, refusals=refusals, filter_params=fparams, set_params=changed, seconds=seconds, run0=run0,
        burn_in=burn_in, burn_in_reason=why,
    )


def _error_columns(spec: ModelSpec) -> Tuple[List[str], List[Optional[str]], List[bool]]:
    """Names, units and angle flags of the covariance's components (see :func:`_error_view`)."""
    if not spec.attitudes:
        return [s.name for s in spec.states], [s.unit for s in spec.states], list(spec.angle_states)
    units: List[Optional[str]] = []
    angles: List[bool] = []
    for kind, xi, _ in spec.error_blocks():
        st = spec.states[xi]
        units += [st.unit] if kind == "real" else ["rad"] * 3
        angles += [st.angle] if kind == "real" else [False] * 3
    return list(spec.error_names), units, angles


def _nanmean_rows(vals: np.ndarray) -> np.ndarray:
    """Mean over runs (axis 0) ignoring nan; nan where no run has a value."""
    if vals.size == 0:
        return np.zeros(vals.shape[1:])
    cnt = np.sum(np.isfinite(vals), axis=0)
    tot = np.nansum(vals, axis=0)
    out = np.full(vals.shape[1:], np.nan)
    np.divide(tot, cnt, out=out, where=cnt > 0)
    return out


# ---------------------------------------------------------------------------------------------
# Reporting


def format_summary(res: MonteCarloResult) -> str:
    """A readable summary for the terminal."""
    lines = [
        f"{res.model}: {res.filter.upper()} ({res.implementation}), {res.runs} runs x {res.steps} steps, "
        f"dt = {res.dt:g} s, seed {res.seed}, {res.seconds:.1f} s",
    ]
    if res.set_params:
        lines.append("filter parameters changed (the truth keeps the defaults): "
                     + ", ".join(f"{k} = {v:g}" for k, v in res.set_params.items()))
    if res.gates:
        lines.append("gates set for the filter: " + ", ".join(f"{k} at {v:g}" for k, v in res.gates.items()))
    lines.append("")
    lines.append("RMSE per state")
    width = max(len(s) for s in res.states)
    for name, unit in zip(res.states, res.units):
        lines.append(f"  {name:<{width}}  {res.rmse[name]:.4g}" + (f" {unit}" if unit else ""))
    lines.append("")
    judged = res.steps - res.burn_in
    lines.append(f"judged from step {res.burn_in + 1} on ({judged} steps): burn-in of {res.burn_in} steps, "
                 + ("set by --burn-in" if res.burn_in_reason == "--burn-in" else res.burn_in_reason
                    + "; --burn-in N to choose, 0 to judge every step"))
    lines.append("run-averaged statistic      mean      95% bounds          inside   above   below  verdict")
    rows = [("NEES", res.nees)] + [(f"NIS {k}", v) for k, v in res.nis.items()]
    for label, st in rows:
        lines.append(f"  {label:<24} {st.mean:8.3f}  [{st.lower:7.3f}, {st.upper:7.3f}]  "
                     f"{100 * st.fraction_inside:5.1f}%  {100 * st.fraction_above:5.1f}%  "
                     f"{100 * st.fraction_below:5.1f}%  {st.verdict}")
    lines.append(f"  (dof: NEES {res.nees.dof}" + "".join(f", {k} {v.dof}" for k, v in res.nis.items())
                 + f"; a statistic passes when inside at {100 * INSIDE_REQUIRED:.0f}% of the judged steps or more;"
                 " above the upper bound: the filter's covariance is too small (overconfident), below the lower:"
                 " too large)")
    if res.refusals:
        lines.append("")
        lines.append("refused calls: " + ", ".join(f"{k} x{v}" for k, v in sorted(res.refusals.items())))
    lines.append("")
    lines.append("overall: " + ("consistent" if res.consistent else "NOT consistent"))
    return "\n".join(lines)


def plot_result(res: MonteCarloResult, path: str) -> None:
    """Write a PNG: per state, run 0's estimation error with its +-3 sigma envelope (the filter's
    own claim: the error should stay inside about 99.7% of the time); then the run-averaged NEES
    and each NIS on a log scale against their 95% bounds, the burn-in shaded. Needs matplotlib
    (the ``plot`` extra)."""
    plt = pyplot()
    from matplotlib import ticker

    r0 = res.run0
    n = len(res.states)
    stats = [("NEES", res.nees)] + [(f"NIS {k}", v) for k, v in res.nis.items()]
    nrows = n + len(stats)
    fig, axes = plt.subplots(nrows, 1, figsize=(9, 2.1 * nrows), squeeze=False)
    axes = axes[:, 0]
    t = r0["t"]
    t_burn = res.burn_in * res.dt
    for i, (name, unit) in enumerate(zip(res.states, res.units)):
        ax = axes[i]
        err = r0["x"][:, i] - r0["x_true"][:, i]
        if res.angles[i]:
            err = wrap_angle(err)
        sig3 = 3.0 * np.sqrt(np.clip(r0["P"][:, i, i], 0.0, None))
        ax.fill_between(t, -sig3, sig3, color="tab:blue", alpha=0.2, label="±3σ (the filter's P)")
        ax.plot(t, err, color="black", lw=0.8, label="error: estimate - truth")
        ax.axhline(0.0, color="grey", lw=0.5)
        outside = float(np.mean(np.abs(err) > sig3)) if err.size else 0.0
        ax.set_ylabel(f"{name} [{unit}]" if unit else name)
        ax.set_title(f"{name}: error of run 0, outside ±3σ at {100 * outside:.1f}% of steps", fontsize="small")
        if i == 0:
            ax.legend(loc="upper right", fontsize="small")
    for ax, (label, st) in zip(axes[n:], stats):
        ts = st.steps * res.dt
        vals = np.where(st.per_step > 0, st.per_step, np.nan)  # a log axis: zero has no place
        ax.plot(ts, vals, lw=0.9, color="tab:green", label=f"run-averaged {label}")
        ax.axhline(st.lower, color="tab:red", ls="--", lw=0.8, label="95% bounds")
        ax.axhline(st.upper, color="tab:red", ls="--", lw=0.8)
        ax.axhline(st.dof, color="grey", ls=":", lw=0.8, label=f"expected ({st.dof})")
        if t_burn > 0:
            ax.axvspan(0.0, t_burn, color="grey", alpha=0.15, label="burn-in (not judged)")
        ax.set_yscale("log")
        ax.yaxis.set_major_formatter(ticker.FormatStrFormatter("%g"))
        ax.yaxis.set_minor_formatter(ticker.NullFormatter())
        ax.set_title(f"{label} over {res.runs} runs: {100 * st.fraction_inside:.0f}% inside, "
                     f"{100 * st.fraction_above:.0f}% above, {100 * st.fraction_below:.0f}% below: {st.verdict}",
                     fontsize="small")
        ax.set_ylabel(f"{label} (log)")
        ax.legend(loc="upper right", fontsize="x-small")
    axes[-1].set_xlabel("time [s]")
    axes[0].set_title(f"{res.model} {res.filter.upper()} ({res.implementation}). " + axes[0].get_title(),
                      fontsize="small")
    save_figure(fig, path)


def pyplot() -> Any:
    """matplotlib.pyplot on the file-only Agg backend; a clear error when matplotlib is missing."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise ModelError("--plot needs matplotlib; install it with: pip install matplotlib (estgen's plot extra)") from None
    return plt


def save_figure(fig: Any, path: str) -> None:
    """Lay out, write as PNG and release a figure."""
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    pyplot().close(fig)


# ---------------------------------------------------------------------------------------------
# Command line


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the ``simulate`` options to a (sub)parser."""
    # optional for argparse only: "--set k=1 MODEL" puts the model among the pairs (see _model_among_pairs)
    parser.add_argument("model", metavar="MODEL", nargs="?", help="the model file")
    filters.add_arguments(parser, "float")
    parser.add_argument("--runs", type=int, default=50, help="Monte Carlo runs (default 50)")
    parser.add_argument("--steps", type=int, default=200, help="steps per run (default 200)")
    parser.add_argument("--seed", type=filters.seed_value, default=0, help="random seed (default 0)")
    parser.add_argument("--burn-in", type=int, default=None, metavar="N",
                        help="leave steps 1..N out of the verdict (default: the start-up transient, the steps "
                             "the filter's covariance takes to settle within a factor 2, at most 20%% of the run)")
    # "--set a=1 b=2" and "--set a=1 --set b=2" both work (the contract writes [--set NAME=VALUE ...])
    parser.add_argument("--set", action="extend", nargs="+", default=[], metavar="NAME=VALUE",
                        help="change parameters of the filter (the truth keeps the defaults); repeatable")
    parser.add_argument("--every", action="extend", nargs="+", default=[], metavar="SENSOR=N",
                        help="the sensor reports every N-th step (overrides the model); repeatable")
    parser.add_argument("--dt", type=float, default=None, help="simulation step in seconds")
    parser.add_argument("--reference", action="store_true", help="test the numpy reference instead of the C")
    parser.add_argument("--workers", type=int, default=None, help="processes (default: all cores)")
    parser.add_argument("--json", metavar="FILE", default=None, help="write the results as JSON")
    parser.add_argument("--plot", metavar="FILE.png", default=None, help="write a plot (needs matplotlib)")
    parser.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--progress", action="store_true", help="show progress even when stderr is not a terminal")


def _pairs(items: Sequence[str], option: str, convert: Callable[[str], Any]) -> Dict[str, Any]:
    out: Dict[str, Any] = {}
    for item in items:
        name, sep, value = item.partition("=")
        if not sep or not name.strip():
            raise ModelError(f"{option} {item!r}: write it as NAME=VALUE")
        try:
            out[name.strip()] = convert(value.strip())
        except ValueError:
            raise ModelError(f"{option} {item!r}: {value!r} is not a valid value") from None
    return out


def _model_among_pairs(args: argparse.Namespace) -> None:
    """``--set``/``--every`` take several pairs, so in ``simulate --set k=1 MODEL`` they swallow
    the model: take it back (the one item without '=' after the last pair)."""
    if args.model is not None:
        return
    for option in ("set", "every"):
        items: List[str] = getattr(args, option)
        if items and "=" not in items[-1]:
            args.model = items.pop()
            return
    raise UsageError("the following arguments are required: MODEL")


def run(args: argparse.Namespace) -> int:
    """Run ``estgen simulate`` with parsed ``args``; returns 0 once it ran (consistent or not).
    Bad input raises :class:`ModelError` for the CLI to print (exit 2)."""
    _model_among_pairs(args)
    check_outputs(args)
    spec = as_spec(args.model)
    res = monte_carlo(
        spec,
        runs=args.runs,
        steps=args.steps,
        seed=args.seed,
        use_reference=args.reference,
        set_params=_pairs(args.set, "--set", float),
        every=_pairs(args.every, "--every", int),
        dt=args.dt,
        workers=args.workers,
        progress=True if getattr(args, "progress", False) else (None if not args.quiet else False),
        **FilterSetup.from_args(args).kwargs(runtime=False),
        burn_in=args.burn_in,
    )
    write_outputs(args, res.to_json, lambda path: plot_result(res, path), lambda: format_summary(res))
    return 0


def check_outputs(args: argparse.Namespace) -> None:
    """Refuse ``--plot`` without matplotlib before the runs, not after them."""
    if args.plot:
        pyplot()


def write_outputs(args: argparse.Namespace, to_json: Callable[[], str], plot: Callable[[str], None],
                  summary: Callable[[], str]) -> None:
    """What a Monte Carlo command writes: ``--json FILE``, ``--plot FILE.png`` and, unless
    ``--quiet``, the summary on stdout."""
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            fh.write(to_json() + "\n")
    if args.plot:
        plot(args.plot)
    if not args.quiet:
        out: TextIO = sys.stdout
        out.write(summary() + "\n")
