"""``estgen compare``: which filter to ship, weighed on the user's own model.

Every filter the model allows (or the ones named) runs on the same simulated truths: one
scenario per run, drawn once from the shared truth simulator (:mod:`estgen.truth`, through
:func:`estgen.simulate.make_scenario`) and handed to every filter, so all see the same seeds and
the same noise draws. Per filter:
RMSE per state, run-averaged NEES and NIS against their two-sided 95% chi-square bounds and the
consistency verdict (the statistics of ``estgen simulate``), the runs that diverged, the refused
calls, and the cost of its float build on the Cortex-M4F as ``estgen report --target cortex-m4f``
measures it (instructions per step on the emulated core, flash, RAM, stack).

A run has *diverged* when its filter ends it lost: at the end of the run x or P is not finite
or P is not positive definite; or its own NEES is above the 99.9% chi-square quantile of n
degrees of freedom at every one of the last 10% of the steps (a consistent filter does that by
chance with probability below 0.001 per step, so a whole stretch means the estimate is far off
and the filter does not know it); or it refused 10 or more calls in a row.

The recommendation is the cheapest filter (instructions per step, then flash) that is
consistent, has no diverged run, fits the budget, and whose RMSE is within ``margin`` (relative)
of the best filter's in every state. A filter that misses the 90% consistency rule narrowly
(every statistic inside at 80% of the steps or more) still qualifies, with the miss stated: with
few runs the fraction inside is noisy. Every other filter gets a sentence saying why it lost.

The linearization check measures, at every step, how far the EKF's linearized covariance is
from the unscented transform's on the same prior: both are started from the EKF's estimate
(x, P) of that step, predicted and updated with the step's measurements, and compared by the
Förstner-Moonen distance between covariance matrices (W. Förstner and B. Moonen, "A metric for
covariance matrices", Technical Report 1999.6, Dept. of Geodesy and Geoinformatics, University
of Stuttgart, 1999): ``d(A, B) = sqrt(sum_i ln^2 lambda_i)`` over the generalized eigenvalues of
``A v = lambda B v``. It is zero when the two agree, ln 2 = 0.69 when one is twice the other
along some direction, and does not depend on the units of the states. See docs/compare.md.
"""

from __future__ import annotations

import argparse
import dataclasses
import hashlib
import json
import math
import multiprocessing
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np

from ._version import __version__
from .chi2 import chi2_ppf
from .errors import ModelError
from .filters import KINDS, FilterSetup, check_filter_support, seed_value
from .filters.base import DEFAULT_COMMIT_CHECK, DEFAULT_OPTIMIZE, CommonOptions
from .filters import get as filter_kind
from .filters import names as filter_names
from .model import ModelSpec, as_spec
from .progress import Progress, wanted
from .simulate import (INSIDE_REQUIRED, MonteCarloResult, Scenario, StatSummary, check_outputs, make_scenario, pyplot,
                       run_filter, run_seed, save_figure, score_run, settling_steps, summarize_runs, write_outputs)

__all__ = [
    "Budget",
    "FilterOutcome",
    "Linearization",
    "Comparison",
    "compare",
    "available_filters",
    "covariance_distance",
    "format_comparison",
    "plot_comparison",
    "add_arguments",
    "run",
    "DEFAULT_MARGIN",
    "LINEARIZATION_LIMIT",
]

#: RMSE within this fraction of the best filter's, state by state, counts as "as accurate"
DEFAULT_MARGIN = 0.10
#: a filter inside its bounds at this fraction of the steps (every statistic) still qualifies for
#: the recommendation, with its miss stated (our own choice; the verdict itself keeps 90%)
NEARLY_INSIDE = 0.80
#: a Förstner-Moonen distance above this (our own choice: about 22% along some direction)
#: flags the EKF's linearization as breaking down at that step
LINEARIZATION_LIMIT = 0.2
#: divergence: a run's own NEES above this chi-square quantile at every step of its last stretch
DIVERGED_PROBABILITY = 0.999
#: the last stretch, as a fraction of the steps
DIVERGED_TAIL = 0.10
#: divergence: this many refused calls in a row
REFUSAL_STREAK = 10
#: steps of run 0's scenario replayed on the emulated core for the instruction count
COST_STEPS = 100
#: runs the linearization check follows (each costs a reference EKF and UKF step per step)
LINEARIZATION_RUNS = 10
#: the target whose float build the cost figures describe (contract: ``report --target cortex-m4f``)
COST_TARGET = "cortex-m4f"


def available_filters(spec: ModelSpec) -> List[str]:
    """Every filter kind whose support check accepts ``spec``, cheapest kind first."""
    out = []
    for name in filter_names():
        try:
            check_filter_support(spec, name)
        except ModelError:
            continue
        out.append(name)
    return out


def _with_run_seed(setup: FilterSetup, seed: int) -> FilterSetup:
    """``setup`` with its run-time generator seed (a kind that draws random numbers, such as the
    particle filter, declares one) set to ``seed``; unchanged for a kind without one."""
    if "seed" not in setup.options.runtime():
        return setup
    return dataclasses.replace(setup, options=dataclasses.replace(setup.options, seed=seed))


# ---------------------------------------------------------------------------------------------
# Budget


@dataclass
class Budget:
    """What the part can spend on the filter. Any field may be None (no limit).

    ``cycles_per_step`` is compared with the measured instructions per step times
    ``cycles_per_instruction``: 1.0 (the default) is the Cortex-M4's best case, one instruction
    per cycle, so a filter refused at 1.0 cannot fit; loads, divisions and square roots take more
    cycles, so raise it for a margin. ``ram_bytes`` must hold the filter struct and the deepest
    stack of its calls.
    """

    cycles_per_step: Optional[float] = None
    flash_bytes: Optional[int] = None
    ram_bytes: Optional[int] = None
    cycles_per_instruction: float = 1.0

    @classmethod
    def from_clock(cls, clock_mhz: float, rate_hz: float, **limits: Any) -> "Budget":
        """The cycles per step a core at ``clock_mhz`` has when the filter steps at ``rate_hz``
        and may take the whole period."""
        if not (clock_mhz > 0 and rate_hz > 0):
            raise ModelError(f"--clock-mhz and --rate-hz must be > 0, got {clock_mhz} and {rate_hz}")
        return cls(cycles_per_step=clock_mhz * 1e6 / rate_hz, **limits)

    @property
    def empty(self) -> bool:
        return self.cycles_per_step is None and self.flash_bytes is None and self.ram_bytes is None

    def misses(self, cost: Mapping[str, int]) -> List[str]:
        """What in ``cost`` exceeds the budget, one phrase each (empty: it fits)."""
        out = []
        if self.cycles_per_step is not None:
            cycles = cost["instructions_per_step"] * self.cycles_per_instruction
            if cycles > self.cycles_per_step:
                out.append(f"{cycles:.0f} cycles per step against a budget of {self.cycles_per_step:.0f}")
        if self.flash_bytes is not None and cost["flash_bytes"] > self.flash_bytes:
            out.append(f"{cost['flash_bytes']} B of flash against {self.flash_bytes} B")
        if self.ram_bytes is not None:
            ram = cost["ram_bytes"] + cost["stack_bytes"]
            if ram > self.ram_bytes:
                out.append(f"{ram} B of RAM (struct {cost['ram_bytes']} + stack {cost['stack_bytes']}) "
                           f"against {self.ram_bytes} B")
        return out

    def to_dict(self) -> Dict[str, Any]:
        return dataclasses.asdict(self)


# ---------------------------------------------------------------------------------------------
# Results


@dataclass
class FilterOutcome:
    """One filter's figures in a comparison."""

    name: str
    options: Dict[str, Any]
    stats: MonteCarloResult  # RMSE, NEES, NIS, refusals: as estgen simulate reports them
    diverged_runs: int
    #: RMSE over the runs at each step, per state: (steps, n)
    error_over_time: np.ndarray
    #: the first step from which the run-averaged NEES is outside its bounds at half of the
    #: remaining steps or more (None: it never is)
    nees_out_from: Optional[int]
    cost: Optional[Dict[str, int]] = None
    budget_misses: List[str] = field(default_factory=list)
    #: max over states of RMSE / the best filter's RMSE of that state (1 = the best everywhere)
    accuracy_ratio: float = math.nan
    worst_state: str = ""
    reason: str = ""

    @property
    def consistent(self) -> bool:
        return bool(self.stats.consistent)

    @property
    def diverged_fraction(self) -> float:
        return self.diverged_runs / self.stats.runs

    def to_dict(self) -> Dict[str, Any]:
        d = self.stats.to_dict()
        out = {
            "options": dict(self.options),
            "rmse": d["rmse"],
            "nees": d["nees"],
            "nis": d["nis"],
            "consistent": self.consistent,
            "diverged_runs": self.diverged_runs,
            "diverged_fraction": self.diverged_fraction,
            "refusals": d["refusals"],
            "nees_out_from_step": self.nees_out_from,
            "accuracy_ratio": _num(self.accuracy_ratio),
            "cost": dict(self.cost) if self.cost is not None else None,
            "fits_budget": not self.budget_misses,
            "budget_misses": list(self.budget_misses),
            "error_over_time": {s: [_num(v) for v in self.error_over_time[:, i]]
                                for i, s in enumerate(self.stats.states)},
            "reason": self.reason,
            "seconds": self.stats.seconds,
        }
        return out


@dataclass
class Linearization:
    """The linearization check along the EKF's estimates (see the module docstring)."""

    #: per step, the distance after predict and after the step's updates, averaged over the runs
    #: followed (nan where no run gave one)
    predict: np.ndarray
    step: np.ndarray
    runs: int
    limit: float = LINEARIZATION_LIMIT

    @property
    def worst(self) -> float:
        both = np.concatenate([self.predict, self.step])
        both = both[np.isfinite(both)]
        return float(both.max()) if both.size else math.nan

    @property
    def worst_step(self) -> Optional[int]:
        both = np.fmax(np.nan_to_num(self.predict, nan=-1.0), np.nan_to_num(self.step, nan=-1.0))
        return int(np.argmax(both)) + 1 if both.size and both.max() >= 0 else None

    @property
    def first_over(self) -> Optional[int]:
        """The first step (1-based) where either distance exceeds the limit."""
        over = np.nan_to_num(np.fmax(self.predict, self.step), nan=0.0) > self.limit
        return int(np.argmax(over)) + 1 if over.any() else None

    @property
    def fraction_over(self) -> float:
        both = np.fmax(self.predict, self.step)
        v = both[np.isfinite(both)]
        return float(np.mean(v > self.limit)) if v.size else math.nan

    def to_dict(self) -> Dict[str, Any]:
        return {
            "measure": "Förstner-Moonen distance between the EKF's and the unscented covariance",
            "limit": self.limit,
            "runs": self.runs,
            "worst": _num(self.worst),
            "worst_step": self.worst_step,
            "first_step_over": self.first_over,
            "fraction_of_steps_over": _num(self.fraction_over),
            "predict": [_num(v) for v in self.predict],
            "step": [_num(v) for v in self.step],
        }


@dataclass
class Comparison:
    """What :func:`compare` found."""

    model: str
    runs: int
    steps: int
    seed: int
    dt: float
    implementation: str  # "c-float", "c-double" or "reference"
    margin: float
    budget: Budget
    states: List[str]
    units: List[Optional[str]]
    filters: Dict[str, FilterOutcome]
    recommended: str
    reason: str
    linearization: Optional[Linearization]
    seconds: float
    burn_in: int = 0

    def to_dict(self) -> Dict[str, Any]:
        """The JSON document (contract section 7 plus per-step detail)."""
        return {
            "model": self.model,
            "runs": self.runs,
            "steps": self.steps,
            "seed": self.seed,
            "dt": self.dt,
            "implementation": self.implementation,
            "cost_target": COST_TARGET,
            "margin": self.margin,
            "burn_in_steps": self.burn_in,
            "budget": self.budget.to_dict(),
            "filters": {k: v.to_dict() for k, v in self.filters.items()},
            "recommended": self.recommended,
            "reason": self.reason,
            "linearization": self.linearization.to_dict() if self.linearization is not None else None,
            "seconds": self.seconds,
            "estgen": __version__,
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, ensure_ascii=False)


def _num(v: float) -> Optional[float]:
    return float(v) if v is not None and math.isfinite(v) else None


# ---------------------------------------------------------------------------------------------
# Pieces of the measurement


def covariance_distance(A: np.ndarray, B: np.ndarray) -> float:
    """Förstner-Moonen distance ``sqrt(sum ln^2 lambda_i)`` between symmetric positive definite
    ``A`` and ``B`` (lambda: the generalized eigenvalues of ``A v = lambda B v``); inf when
    either is not positive definite."""
    try:
        L = np.linalg.cholesky(0.5 * (B + B.T))
        Linv = np.linalg.solve(L, np.eye(L.shape[0]))
        M = Linv @ (0.5 * (A + A.T)) @ Linv.T
        lam = np.linalg.eigvalsh(0.5 * (M + M.T))
    except np.linalg.LinAlgError:
        return math.inf
    if not np.all(np.isfinite(lam)) or lam.min() <= 0:
        return math.inf
    return float(np.sqrt(np.sum(np.log(lam) ** 2)))


def _diverged(res: Dict[str, Any], out: Dict[str, Any], n: int) -> bool:
    """The module docstring's definition of a diverged run."""
    x_end, P_end = out["x"][-1], out["P"][-1]
    if not (np.all(np.isfinite(x_end)) and np.all(np.isfinite(P_end))):
        return True
    try:
        np.linalg.cholesky(0.5 * (P_end + P_end.T))
    except np.linalg.LinAlgError:
        return True
    nees = res["nees"]
    tail = nees[-max(1, int(math.ceil(DIVERGED_TAIL * nees.shape[0]))):]
    if np.all(np.nan_to_num(tail, nan=math.inf) > chi2_ppf(DIVERGED_PROBABILITY, n)):
        return True
    streak = longest = 0
    for k in range(out["predict_status"].shape[0]):
        calls = [int(out["predict_status"][k])] + [int(v[k]) for v in out["update_status"].values() if v[k] >= 0]
        for st in calls:
            streak = streak + 1 if st else 0
            longest = max(longest, streak)
    return longest >= REFUSAL_STREAK


def _out_from(st: StatSummary) -> Optional[int]:
    """First step from which the statistic is out on the side of its verdict (above the upper
    bound when overconfident, below the lower when too cautious) at half the remaining steps."""
    v = st.per_step
    ok = np.isfinite(v)
    if not ok.any() or st.verdict not in ("overconfident", "too cautious"):
        return None
    side = (v > st.upper) if st.verdict == "overconfident" else (v < st.lower)
    outside = (ok & side).astype(float)
    remaining = np.cumsum(ok[::-1].astype(float))[::-1]
    frac = np.cumsum(outside[::-1])[::-1] / np.maximum(remaining, 1.0)
    hit = np.nonzero((frac >= 0.5) & (outside > 0))[0]
    return int(st.steps[hit[0]]) if hit.size else None


def _linearization_run(spec: ModelSpec, sc: Scenario, out: Dict[str, Any], unscented: FilterSetup
                       ) -> Tuple[np.ndarray, np.ndarray]:
    """Per step of one run: the covariance distance of the EKF's and the unscented step from
    the EKF's estimate, after predict and after the step's updates."""
    from .reference import model_functions

    mf = model_functions(spec)
    ekf = FilterSetup.of("ekf", "double").reference(spec, functions=mf)
    ukf = unscented.reference(spec, functions=mf)
    pred = np.full(sc.steps, np.nan)
    step = np.full(sc.steps, np.nan)
    with np.errstate(all="ignore"):
        for k in range(sc.steps):
            x, P = out["x"][k], out["P"][k]
            if ekf.set_state(x, P) or ukf.set_state(x, P):
                continue
            if ekf.predict(sc.u[k], sc.dt) or ukf.predict(sc.u[k], sc.dt):
                continue
            pred[k] = covariance_distance(ekf.P, ukf.P)
            for name, z in sc.measurements[k]:
                ekf.update(name, z)
                ukf.update(name, z)
            step[k] = covariance_distance(ekf.P, ukf.P)
    return pred, step


def _truth_spec(spec: ModelSpec, truth_initial: Optional[Tuple[Sequence[float], Any]]) -> ModelSpec:
    """The spec the truth is drawn from: the model's, or one starting from ``truth_initial``
    (x0, P0) while the filters keep the model's initial estimate."""
    if truth_initial is None:
        return spec
    x0, P0 = truth_initial
    x0a = np.asarray(x0, dtype=float).reshape(-1)
    P0a = np.asarray(P0, dtype=float)
    if P0a.ndim == 1:
        P0a = np.diag(P0a)
    if x0a.shape != (len(spec.x0),) or P0a.shape != (len(spec.P0), len(spec.P0)):
        raise ModelError(f"the truth's initial state needs {len(spec.x0)} values and a "
                         f"{len(spec.P0)}x{len(spec.P0)} covariance")
    if not (np.all(np.isfinite(x0a)) and np.all(np.isfinite(P0a))):
        raise ModelError("the truth's initial state and covariance must be finite")
    if np.linalg.eigvalsh(0.5 * (P0a + P0a.T)).min() < -1e-12 * max(1.0, float(np.abs(P0a).max())):
        raise ModelError("the truth's initial covariance must be positive semidefinite")
    # a Gaussian start replaces a uniform prior box, if the model has one
    return dataclasses.replace(spec, x0=tuple(float(v) for v in x0a), P0=tuple(tuple(float(v) for v in r) for r in P0a),
                               prior_box=None)


def _head(sc: Scenario, steps: int) -> Scenario:
    k = min(steps, sc.steps)
    return Scenario(dt=sc.dt, t=sc.t[:k], u=sc.u[:k], x_true=sc.x_true[:k + 1], measurements=sc.measurements[:k])


def _cost_key(gen_files: Mapping[str, str], sc: Scenario) -> str:
    h = hashlib.sha256()
    h.update(f"estgen {__version__} {COST_TARGET} compare-cost 1\n".encode())
    for name in sorted(gen_files):
        h.update(name.encode() + b"\0" + gen_files[name].encode() + b"\0")
    h.update(np.asarray(sc.dt, dtype=float).tobytes() + sc.u.tobytes())
    for row in sc.measurements:
        for name, z in row:
            h.update(name.encode() + np.asarray(z, dtype=float).tobytes())
        h.update(b";")
    return h.hexdigest()[:32]


def measure_cost(spec: ModelSpec, name: str, sc: Scenario, **options: Any) -> Dict[str, int]:
    """The float build's cost on the Cortex-M4F, as ``estgen report --target cortex-m4f``
    measures it, replaying ``sc``. Cached by the generated C and the replayed data."""
    from .build import cache_dir
    from .filters import generate
    from .report import make_report

    gen = generate(spec, filter=name, precision="float", **options)
    path = Path(cache_dir()) / "compare-cost" / f"{_cost_key(gen.files, sc)}.json"
    try:
        cached = json.loads(path.read_text())
        return {k: int(cached[k]) for k in ("instructions_per_step", "flash_bytes", "ram_bytes", "stack_bytes")}
    except (OSError, ValueError, KeyError, TypeError):
        pass
    rep = make_report(spec, name, "float", COST_TARGET, scenario=sc, host=False, **options)
    if rep["missing"]:
        tools = ", ".join(sorted(rep["missing"]))
        raise ModelError(f"compare measures each filter on the emulated Cortex-M4F and needs {tools}; "
                         "install it (Debian: gcc-arm-none-eabi libnewlib-arm-none-eabi qemu-system-arm)")
    m4 = rep["instructions"].get("qemu-cortex-m4f", {})
    prefix = f"{spec.name}_{name}"
    step_fns = [fn for fn in rep["functions"] if fn == f"{prefix}_predict" or fn.startswith(f"{prefix}_update_")]
    if m4.get("per_step") is None:
        raise ModelError(f"the replay of the {name.upper()} on the emulated Cortex-M4F gave no instruction count")
    cost = {
        "instructions_per_step": int(round(m4["per_step"])),
        "flash_bytes": int(rep["flash"]["total"]),
        "ram_bytes": int(rep["ram_bytes"]),
        "stack_bytes": int(max(rep["functions"][fn].get("stack_bytes") or 0 for fn in step_fns)),
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(f".tmp{id(cost)}")
    tmp.write_text(json.dumps(cost))
    tmp.replace(path)
    return cost


# ---------------------------------------------------------------------------------------------
# The comparison


def compare(
    model: Any,
    filters: Optional[Sequence[str]] = None,
    runs: int = 20,
    steps: int = 200,
    seed: int = 0,
    *,
    precision: str = "float",
    use_reference: bool = False,
    options: Optional[Mapping[str, Mapping[str, Any]]] = None,
    gates: Optional[Mapping[str, float]] = None,
    commit_check: str = DEFAULT_COMMIT_CHECK,
    optimize: str = DEFAULT_OPTIMIZE,
    margin: float = DEFAULT_MARGIN,
    budget: Optional[Budget] = None,
    truth_initial: Optional[Tuple[Sequence[float], Any]] = None,
    dt: Optional[float] = None,
    cost_steps: int = COST_STEPS,
    burn_in: Optional[int] = None,
    workers: Optional[int] = None,
    progress: Optional[bool] = None,
) -> Comparison:
    """Run ``filters`` (default: every filter the model allows) on the same ``runs`` simulated
    truths of ``steps`` steps, measure their cost and recommend one (see the module docstring).

    The filters under test are the compiled C in ``precision`` (default float, the build that
    ships) or, with ``use_reference``, the numpy references. ``options`` gives a kind its own
    options, e.g. ``{"ukf": {"alpha": 0.5}, "pf": {"particles": 300}}`` (the registry's names;
    the linearization check uses the UKF's). ``gates``, ``commit_check`` and ``optimize`` are
    those of :func:`estgen.filters.generate`, for every compared filter: the C that runs and whose
    cost is measured is the C ``generate`` ships with them. ``truth_initial`` = (x0, P0) draws
    the truth's initial state from N(x0, P0) instead of the filters' initial estimate and
    covariance (as in published set-ups where the estimate starts off the truth).
    ``burn_in``: steps 1..burn_in are left out of the consistency verdicts, as in ``estgen
    simulate`` (default: the longest start-up transient, :func:`~estgen.simulate.settling_steps`,
    of any compared filter's run 0, so every filter is judged over the same steps).
    Runs are spread over ``workers`` processes (default: all cores; 1 runs in this process).
    ``progress``: report on stderr (default: when stderr is a terminal).
    """
    started = time.perf_counter()
    spec = as_spec(model)
    names = list(filters) if filters else available_filters(spec)
    if not names:
        raise ModelError(f"no filter kind accepts model {spec.name!r}")
    if len(set(names)) != len(names):
        raise ModelError(f"--filters names a filter twice: {','.join(names)}")
    options = dict(options or {})
    for name in options:
        # an unknown kind is a UsageError; a known one that is not compared here (left out by
        # --filters, or refused by the model) simply does not use its options
        filter_kind(name).options(**options[name])
    # each kind checks the model and its options; the cost is always that of the float build
    common = {"gates": dict(gates or {}), "commit_check": commit_check, "optimize": optimize}
    setups = {name: FilterSetup.of(name, precision, **common, **options.get(name, {})) for name in names}
    for setup in setups.values():
        setup.spec(spec)
    unscented = FilterSetup.of("ukf", "double", **options.get("ukf", {}))
    if "ekf" in names:
        unscented.spec(spec)
    runs, steps, seed = int(runs), int(steps), int(seed)
    if runs < 1 or steps < 1:
        raise ModelError(f"--runs and --steps must be >= 1, got {runs} and {steps}")
    if seed < 0:
        raise ModelError(f"--seed must be >= 0, got {seed}")
    if burn_in is not None and not 0 <= int(burn_in) < steps:
        raise ModelError(f"--burn-in must be between 0 and the steps - 1 ({steps - 1}), got {burn_in}")
    if precision not in ("float", "double"):
        raise ModelError(f"unknown precision {precision!r}; use 'float' or 'double'")
    if not (margin >= 0 and math.isfinite(margin)):
        raise ModelError(f"--margin must be a number >= 0, got {margin}")
    budget = budget or Budget()
    truth = _truth_spec(spec, truth_initial)
    show = wanted(force=True) if progress else (progress is None and wanted())

    factories = {name: _factory(spec, setup, use_reference) for name, setup in setups.items()}
    per: Dict[str, List[Dict[str, Any]]] = {name: [] for name in names}
    seconds = {name: 0.0 for name in names}
    lin_pred: List[np.ndarray] = []
    lin_step: List[np.ndarray] = []
    results: List[Optional[Dict[str, Any]]] = [None] * runs
    _CTX.clear()
    _CTX.update(spec=spec, truth=truth, steps=steps, seed=seed, dt=dt, names=names, factories=factories,
                unscented=unscented)
    nworkers = min(runs, int(workers) if workers else (os.cpu_count() or 1))
    with Progress("compare", runs + len(names), show) as prog:
        try:
            if nworkers <= 1 or "fork" not in multiprocessing.get_all_start_methods():
                for r in range(runs):
                    prog.step(f"run {r + 1} of {runs}")
                    results[r] = _one_run(r)[1]
            else:
                # forked workers inherit the compiled filters; each run is independent, so the
                # result does not depend on the number of workers
                with multiprocessing.get_context("fork").Pool(nworkers) as pool:
                    for done, (r, res) in enumerate(pool.imap_unordered(_one_run, range(runs)), start=1):
                        prog.step(f"{done} of {runs} runs")
                        results[r] = res
        finally:
            _CTX.clear()
        for res in results:
            assert res is not None
            for name in names:
                per[name].append(res["filters"][name])
                seconds[name] += res["seconds"][name]
            if res["lin"] is not None:
                lin_pred.append(res["lin"][0])
                lin_step.append(res["lin"][1])
        scenario0 = make_scenario(truth, steps, seed=[seed, 0], dt=dt)  # run 0's again, for the replay
        costs: Dict[str, Dict[str, int]] = {}
        for name in names:
            prog.step(f"cost of the {name.upper()} on the emulated Cortex-M4F")
            costs[name] = measure_cost(spec, name, _head(scenario0, cost_steps), **common, **options.get(name, {}))

    impl = "reference" if use_reference else f"c-{precision}"
    if burn_in is None:
        # one judged window for all: the longest start-up transient of any filter's run 0
        burn_in = max(settling_steps(per[name][0]["run0"]["P"]) for name in names)
    outcomes: Dict[str, FilterOutcome] = {}
    for name in names:
        st = summarize_runs(spec, name, use_reference, precision, runs, steps, seed, scenario0.dt,
                            spec.param_defaults(), {}, per[name], seconds[name], burn_in)
        sq = np.array([r["sq_err"] for r in per[name]])  # (runs, steps, n)
        with np.errstate(all="ignore"):
            eot = np.sqrt(np.mean(sq, axis=0))
        outcomes[name] = FilterOutcome(
            name=name, options=setups[name].options.as_dict(), stats=st,
            diverged_runs=sum(1 for r in per[name] if r["diverged"]), error_over_time=eot,
            nees_out_from=_out_from(st.nees), cost=costs[name], budget_misses=budget.misses(costs[name]))
    lin = None
    if lin_pred:
        with np.errstate(all="ignore"):
            lin = Linearization(predict=_nanmean(np.array(lin_pred)), step=_nanmean(np.array(lin_step)),
                                runs=len(lin_pred))
    recommended, reason = _recommend(outcomes, margin, budget, lin)
    first = outcomes[names[0]].stats  # the error components: an attitude counts three
    return Comparison(model=spec.name, runs=runs, steps=steps, seed=seed, dt=scenario0.dt, implementation=impl,
                      margin=margin, budget=budget, states=list(first.states),
                      units=list(first.units), filters=outcomes, recommended=recommended,
                      reason=reason, linearization=lin, seconds=time.perf_counter() - started,
                      burn_in=int(burn_in))


# The context of the runs: set before the pool forks, so nothing unpicklable (compiled filters,
# sympy expressions, the model's input profile) has to be sent to a worker.
_CTX: Dict[str, Any] = {}


def _one_run(r: int) -> Tuple[int, Dict[str, Any]]:
    """Run ``r``: one scenario, every filter through it, and the linearization check."""
    ctx = _CTX
    spec: ModelSpec = ctx["spec"]
    sc = make_scenario(ctx["truth"], ctx["steps"], seed=[ctx["seed"], r], dt=ctx["dt"])
    done: Dict[str, Any] = {"filters": {}, "seconds": {}, "lin": None}
    for name in ctx["names"]:
        t0 = time.perf_counter()
        out = run_filter(ctx["factories"][name](run_seed(ctx["seed"], r)), sc)
        res = score_run(spec, sc, out, keep_run=(r == 0))
        res["diverged"] = _diverged(res, out, spec.ne)  # NEES dof: the error dimension
        done["filters"][name] = res
        done["seconds"][name] = time.perf_counter() - t0
        if name == "ekf" and r < LINEARIZATION_RUNS:
            done["lin"] = _linearization_run(spec, sc, out, ctx["unscented"])
    return r, done


def _nanmean(a: np.ndarray) -> np.ndarray:
    a = np.where(np.isfinite(a), a, np.nan) if a.size else a
    cnt = np.sum(np.isfinite(a), axis=0)
    out = np.full(a.shape[1:], np.nan)
    np.divide(np.nansum(a, axis=0), cnt, out=out, where=cnt > 0)
    return out


def _factory(spec: ModelSpec, setup: FilterSetup, use_reference: bool) -> Callable[[int], Any]:
    """A function of a run's seed returning a fresh filter at the model's initial state (the
    seed starts the generator of a kind that draws random numbers). The C is generated and
    compiled (or loaded from the build cache) once."""
    if use_reference:
        from .reference import model_functions

        mf = model_functions(spec)  # lambdified once, shared by every fresh reference
        return lambda seed: _with_run_seed(setup, seed).reference(spec, functions=mf)
    from .build import CFilter, compile_generated

    comp = compile_generated(setup.generate(spec))
    return lambda seed: CFilter(spec, comp, setup.name, **_with_run_seed(setup, seed).options.runtime())


# ---------------------------------------------------------------------------------------------
# The recommendation


def _accuracy(outcomes: Dict[str, FilterOutcome]) -> None:
    """Set each filter's accuracy ratio: its worst RMSE relative to the best filter's, by state."""
    states = next(iter(outcomes.values())).stats.states
    best = {s: min((o.stats.rmse[s] for o in outcomes.values() if math.isfinite(o.stats.rmse[s])),
                   default=math.nan) for s in states}
    for o in outcomes.values():
        ratios = {}
        for s in states:
            v, b = o.stats.rmse[s], best[s]
            if not math.isfinite(v):
                ratios[s] = math.inf
            elif b == 0:
                ratios[s] = 1.0 if v == 0 else math.inf
            else:
                ratios[s] = v / b
        o.worst_state = max(ratios, key=lambda s: ratios[s])
        o.accuracy_ratio = ratios[o.worst_state]


def _cost_order(o: FilterOutcome) -> Tuple[float, float]:
    c = o.cost or {}
    return (float(c.get("instructions_per_step", math.inf)), float(c.get("flash_bytes", math.inf)))


def _inconsistency(o: FilterOutcome, lin: Optional[Linearization]) -> str:
    """Why a filter is not consistent, in one phrase with the numbers."""
    nees = o.stats.nees
    parts = []
    if nees.verdict not in ("consistent", "no data"):
        when = f" from step {o.nees_out_from}" if o.nees_out_from else ""
        cause = nees.verdict
        if o.name == "ekf" and nees.verdict == "overconfident" and lin is not None and lin.first_over is not None:
            cause = (f"linearization error (the linearized covariance is {lin.worst:.2g} from the unscented one "
                     f"at step {lin.worst_step}, above {lin.limit:g} from step {lin.first_over})")
        parts.append(f"NEES {nees.mean:.3g} against bounds [{nees.lower:.3g}, {nees.upper:.3g}]{when}: {cause}")
    for sensor, s in o.stats.nis.items():
        if s.verdict not in ("consistent", "no data"):
            parts.append(f"NIS {sensor} {s.mean:.3g} against [{s.lower:.3g}, {s.upper:.3g}], "
                         f"inside at {100 * s.fraction_inside:.0f}% of its steps: {s.verdict}")
    return "; ".join(parts)


def _trouble(o: FilterOutcome) -> str:
    parts = []
    if o.diverged_runs:
        parts.append(f"diverged in {o.diverged_runs} of {o.stats.runs} runs")
    refused = sum(o.stats.refusals.values())
    if refused:
        parts.append(f"refused {refused} calls (" + ", ".join(f"{k} x{v}" for k, v in sorted(o.stats.refusals.items()))
                     + ")")
    return "; ".join(parts)


def _nearly_consistent(o: FilterOutcome) -> bool:
    """Consistent, or every statistic inside its bounds at NEARLY_INSIDE of its steps or more.
    With few runs the fraction inside is noisy, and filters that compute the same estimate (an
    EKF and a UKF on a linear model) fail or pass together: a narrow miss must not hand the
    pick to a filter that costs a hundred times more and passed by chance."""
    if o.consistent:
        return True
    stats = [o.stats.nees] + list(o.stats.nis.values())
    return all(s.verdict == "no data" or s.fraction_inside >= NEARLY_INSIDE for s in stats)


def _recommend(outcomes: Dict[str, FilterOutcome], margin: float, budget: Budget,
               lin: Optional[Linearization]) -> Tuple[str, str]:
    """Pick the filter and write every filter's reason; returns (name, overall reason)."""
    _accuracy(outcomes)
    ordered = sorted(outcomes.values(), key=_cost_order)
    fits = [o for o in ordered if not o.budget_misses]
    good = [o for o in fits if _nearly_consistent(o) and not o.diverged_runs and o.accuracy_ratio <= 1.0 + margin]
    limit = f"within {100 * margin:.0f}% of the best RMSE in every state"
    if good:
        pick = good[0]
        head = f"{pick.name.upper()}: the cheapest filter that is consistent, never diverged, {limit}"
        if not budget.empty:
            head += " and fits the budget"
        if not pick.consistent:
            head += (f" (it misses the {100 * INSIDE_REQUIRED:.0f}% rule narrowly, which few runs do by chance: "
                     f"{_inconsistency(pick, lin)})")
    else:
        # nothing meets every condition. Of those that fit, the best-behaved group (consistent
        # first, then without diverged runs); in it the cheapest within the margin, else the
        # most accurate.
        pool = fits or ordered
        rank = min((not o.consistent, o.diverged_runs > 0) for o in pool)
        group = [o for o in pool if (not o.consistent, o.diverged_runs > 0) == rank]  # still cost-ordered
        within = [o for o in group if o.accuracy_ratio <= 1.0 + margin]
        pick = within[0] if within else min(group, key=lambda o: (o.accuracy_ratio, _cost_order(o)))
        which = f"the cheapest {limit}" if within else "the most accurate"
        that_fits = "" if budget.empty else " that fits the budget"
        if not fits:
            head = f"{pick.name.upper()}: no filter fits the budget; this is {which}, for a part with more room"
        elif pick.consistent:
            head = (f"{pick.name.upper()}: no filter{that_fits} is consistent, never diverged and {limit}; "
                    f"this is {which} of the consistent ones")
        else:
            head = (f"{pick.name.upper()}: no filter{that_fits} is consistent; this is {which}, "
                    f"use it with care ({_inconsistency(pick, lin) or _trouble(pick)})")
    pc = pick.cost or {}
    head += (f" ({pc.get('instructions_per_step')} instructions per step, {pc.get('flash_bytes')} B flash, "
             f"RAM {pc.get('ram_bytes')} B + stack {pc.get('stack_bytes')} B)")
    pick.reason = head
    sentences = [head + "."]
    for o in ordered:
        if o is pick:
            continue
        if o.budget_misses:
            why = "does not fit: " + "; ".join(o.budget_misses)
            if _nearly_consistent(o) and not o.diverged_runs and o.accuracy_ratio <= 1.0 + margin:
                why += f" (it is consistent and {limit}: a larger part or a lower rate would take it)"
        elif not o.consistent:
            why = _inconsistency(o, lin)
        elif o.diverged_runs:
            why = _trouble(o)
        elif o.accuracy_ratio > 1.0 + margin:
            best = min(outcomes.values(), key=lambda b: b.stats.rmse[o.worst_state])
            why = (f"RMSE of {o.worst_state} {o.stats.rmse[o.worst_state]:.3g} is {o.accuracy_ratio:.2f} times "
                   f"the best ({best.name.upper()} {best.stats.rmse[o.worst_state]:.3g})")
        else:
            oc = o.cost or {}
            ratio = oc.get("instructions_per_step", 0) / max(1, pc.get("instructions_per_step", 1))
            why = (f"consistent and as accurate, but costs {oc.get('instructions_per_step')} instructions per step, "
                   f"{ratio:.1f} times the {pick.name.upper()}'s")
        extra = _trouble(o)
        if extra and extra not in why:
            why += f" ({extra})"
        o.reason = f"{o.name.upper()}: {why}"
        sentences.append(o.reason + ".")
    return pick.name, " ".join(sentences)


# ---------------------------------------------------------------------------------------------
# Output


def _fmt(v: Optional[float], spec: str = ".4g") -> str:
    return "-" if v is None or (isinstance(v, float) and not math.isfinite(v)) else format(v, spec)


def format_comparison(c: Comparison) -> str:
    """The terminal table: accuracy, consistency, cost, the linearization check and the pick."""
    names = list(c.filters)
    w = max(12, *(len(n) + 2 for n in names))
    sw = max(len(s) for s in c.states)
    lines = [f"{c.model}: {', '.join(n.upper() for n in names)} on the same {c.runs} runs x {c.steps} steps "
             f"(dt = {c.dt:g} s, seed {c.seed}); filters run as {c.implementation}; {c.seconds:.1f} s", ""]
    lines.append("RMSE per state" + " " * max(0, sw - 12) + "".join(f"{n.upper():>{w}}" for n in names))
    for s, unit in zip(c.states, c.units):
        row = f"  {s:<{sw}}" + " " * max(0, 12 - sw) + "".join(f"{_fmt(c.filters[n].stats.rmse[s]):>{w}}" for n in names)
        lines.append(row + (f"  {unit}" if unit else ""))
    lines.append(f"  {'worst / best':<{max(sw, 12)}}" + "".join(f"{_fmt(c.filters[n].accuracy_ratio, '.4g'):>{w}}"
                                                           for n in names))
    lines.append("")
    lines.append(f"  {'filter':<6} {'NEES mean':>10} {'95% bounds':>20} {'inside':>7} {'verdict':>14} "
                 f"{'NIS inside':>11} {'diverged':>9} {'refused':>8}")
    for n in names:
        o = c.filters[n]
        ne = o.stats.nees
        nis = min((s.fraction_inside for s in o.stats.nis.values() if math.isfinite(s.fraction_inside)), default=math.nan)
        lines.append(f"  {n.upper():<6} {_fmt(ne.mean, '10.4g')} {'[' + _fmt(ne.lower, '.3f') + ', ' + _fmt(ne.upper, '.3f') + ']':>20} "
                     f"{_fmt(100 * ne.fraction_inside, '6.1f')}% {('consistent' if o.consistent else ne.verdict if ne.verdict != 'consistent' else 'NIS out'):>14} "
                     f"{_fmt(100 * nis, '10.1f')}% {o.diverged_runs:>4}/{o.stats.runs:<4} {sum(o.stats.refusals.values()):>8}")
    lines.append(f"  (consistent: NEES and every NIS inside their bounds at {100 * INSIDE_REQUIRED:.0f}% of the "
                 f"steps after the first {c.burn_in} (start-up) or more; NIS inside: the worst sensor)")
    lines.append("")
    lines.append(f"cost of the float build on the Cortex-M4F (QEMU, {COST_STEPS} replayed steps)")
    lines.append(f"  {'filter':<6} {'instr/step':>11} {'flash B':>9} {'RAM B':>7} {'stack B':>8}  budget")
    for n in names:
        o = c.filters[n]
        k = o.cost or {}
        fit = "fits" if not o.budget_misses else "over: " + "; ".join(o.budget_misses)
        if c.budget.empty:
            fit = "-"
        lines.append(f"  {n.upper():<6} {k.get('instructions_per_step', '-'):>11} {k.get('flash_bytes', '-'):>9} "
                     f"{k.get('ram_bytes', '-'):>7} {k.get('stack_bytes', '-'):>8}  {fit}")
    if c.linearization is not None:
        lz = c.linearization
        lines.append("")
        over = (f"above {lz.limit:g} at {100 * lz.fraction_over:.1f}% of the steps, first at step {lz.first_over}"
                if lz.first_over is not None else f"never above {lz.limit:g}")
        lines.append(f"linearization check (EKF against the unscented transform, Förstner-Moonen distance of the "
                     f"covariances, {lz.runs} runs): worst {_fmt(lz.worst, '.3g')} at step {lz.worst_step}; {over}")
    lines.append("")
    lines.append(f"recommended: {c.recommended.upper()}")
    for n in [c.recommended] + [m for m in names if m != c.recommended]:
        lines.append(f"  {c.filters[n].reason}")
    return "\n".join(lines)


def plot_comparison(c: Comparison, path: str) -> None:
    """Write a PNG: accuracy against cost (one point per filter), the RMSE over time of every
    state per filter, the run-averaged NEES per filter against its bounds, and the linearization
    check. Needs matplotlib (the ``plot`` extra)."""
    plt = pyplot()
    names = list(c.filters)
    n = len(c.states)
    rows = 2 + n + (1 if c.linearization is not None else 0)
    fig, axes = plt.subplots(rows, 1, figsize=(9, 2.4 * rows), squeeze=False)
    axes = axes[:, 0]
    colors = {name: f"C{i}" for i, name in enumerate(names)}
    ax = axes[0]
    for name in names:
        o = c.filters[name]
        x = (o.cost or {}).get("instructions_per_step", math.nan)
        ax.scatter([x], [o.accuracy_ratio], color=colors[name], s=60, marker="o" if o.consistent else "x")
        ax.annotate(name.upper() + ("" if o.consistent else " (inconsistent)"), (x, o.accuracy_ratio),
                    textcoords="offset points", xytext=(6, 4))
    ax.axhline(1.0 + c.margin, color="grey", ls="--", lw=0.8, label=f"best + {100 * c.margin:.0f}%")
    if c.budget.cycles_per_step is not None:
        ax.axvline(c.budget.cycles_per_step / c.budget.cycles_per_instruction, color="tab:red", ls=":", lw=0.8,
                   label="cycle budget")
    ax.set_xscale("log")
    ax.margins(x=0.25, y=0.3)
    ax.set_xlabel("instructions per step, float build on the Cortex-M4F")
    ax.set_ylabel("worst RMSE / best")
    ax.set_title(f"{c.model}: accuracy against cost; recommended {c.recommended.upper()}")
    ax.legend(loc="best", fontsize="small")
    t = np.arange(1, c.steps + 1) * c.dt
    for i, (s, unit) in enumerate(zip(c.states, c.units)):
        ax = axes[1 + i]
        for name in names:
            ax.plot(t, c.filters[name].error_over_time[:, i], color=colors[name], lw=1.0, label=name.upper())
        vals = np.concatenate([c.filters[name].error_over_time[:, i] for name in names])
        vals = vals[np.isfinite(vals) & (vals > 0)]
        if vals.size and vals.max() > 100 * vals.min():
            ax.set_yscale("log")  # errors that settle by decades: the late differences stay visible
        ax.set_ylabel(f"RMSE {s}" + (f" [{unit}]" if unit else ""))
        ax.set_xlabel("time [s]")
        if i == 0:
            ax.set_title(f"error over time (RMSE over {c.runs} runs)")
            ax.legend(loc="upper right", fontsize="small")
    ax = axes[1 + n]
    for name in names:
        st = c.filters[name].stats.nees
        ax.plot(st.steps * c.dt, st.per_step, color=colors[name], lw=1.0, label=f"{name.upper()}")
    first = c.filters[names[0]].stats.nees
    ax.axhline(first.lower, color="tab:red", ls="--", lw=0.8, label="95% bounds")
    ax.axhline(first.upper, color="tab:red", ls="--", lw=0.8)
    ax.set_yscale("log")
    ax.set_ylabel("run-averaged NEES")
    ax.set_xlabel("time [s]")
    ax.legend(loc="upper right", fontsize="small")
    if c.linearization is not None:
        ax = axes[2 + n]
        lz = c.linearization
        ax.plot(t, lz.predict, lw=1.0, label="after predict")
        ax.plot(t, lz.step, lw=1.0, label="after the step's updates")
        ax.axhline(lz.limit, color="tab:red", ls="--", lw=0.8, label=f"limit {lz.limit:g}")
        ax.set_ylabel("distance")
        ax.set_xlabel("time [s]")
        ax.set_title("linearization check: EKF covariance against the unscented one (Förstner-Moonen)")
        ax.legend(loc="upper right", fontsize="small")
    save_figure(fig, path)


# ---------------------------------------------------------------------------------------------
# Command line


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add ``estgen compare``'s options to a (sub)parser."""
    parser.add_argument("model", metavar="MODEL", help="the model file")
    parser.add_argument("--filters", default=None, metavar="F1,F2,...",
                        help="the filters to compare, comma-separated (default: every filter the model allows)")
    parser.add_argument("--runs", type=int, default=20, help="Monte Carlo runs (default 20)")
    parser.add_argument("--steps", type=int, default=200, help="steps per run (default 200)")
    parser.add_argument("--seed", type=seed_value, default=0, help="random seed (default 0)")
    parser.add_argument("--burn-in", type=int, default=None, metavar="N",
                        help="leave steps 1..N out of the consistency verdicts (default: the longest start-up "
                             "transient of the compared filters, at most 20%% of the run)")
    # --precision (of the C under test; the cost is always that of the float build), --commit-check,
    # --optimize and --gate: declared once for every command
    CommonOptions.add_arguments(parser, "float")
    parser.add_argument("--reference", action="store_true", help="run the numpy references instead of the C")
    for kind in KINDS.values():  # every kind's own options, declared once in the registry
        for flag in kind.Options.FLAGS:
            parser.add_argument(flag.option, dest=flag.field, type=flag.type, default=None, metavar=flag.metavar,
                                help=flag.help)
    parser.add_argument("--dt", type=float, default=None, help="simulation step in seconds")
    parser.add_argument("--margin", type=float, default=DEFAULT_MARGIN,
                        help=f"RMSE within this fraction of the best counts as as accurate (default {DEFAULT_MARGIN:g})")
    parser.add_argument("--budget-cycles", type=float, default=None, metavar="N",
                        help="cycles the filter may take per step")
    parser.add_argument("--clock-mhz", type=float, default=None, help="core clock; with --rate-hz gives the cycle budget")
    parser.add_argument("--rate-hz", type=float, default=None, help="filter step rate; with --clock-mhz")
    parser.add_argument("--cpi", type=float, default=1.0,
                        help="cycles per instruction assumed against the cycle budget (default 1, the M4's best case)")
    parser.add_argument("--flash-kb", type=float, default=None, help="flash the filter may take, KiB")
    parser.add_argument("--ram-kb", type=float, default=None, help="RAM the filter may take (struct + stack), KiB")
    parser.add_argument("--workers", type=int, default=None, help="processes for the runs (default: all cores)")
    parser.add_argument("--json", metavar="FILE", default=None, help="write the comparison as JSON")
    parser.add_argument("--plot", metavar="FILE.png", default=None, help="write a plot (needs matplotlib)")
    parser.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--progress", action="store_true", help="show progress even when stderr is not a terminal")


def budget_from_args(args: argparse.Namespace) -> Budget:
    """The :class:`Budget` the options describe."""
    limits: Dict[str, Any] = {}
    for opt, key in (("flash_kb", "flash_bytes"), ("ram_kb", "ram_bytes")):
        v = getattr(args, opt)
        if v is not None:
            if not (v > 0 and math.isfinite(v)):
                raise ModelError(f"--{opt.replace('_', '-')} must be > 0, got {v}")
            limits[key] = int(v * 1024)
    if not (args.cpi > 0 and math.isfinite(args.cpi)):
        raise ModelError(f"--cpi must be > 0, got {args.cpi}")
    limits["cycles_per_instruction"] = args.cpi
    if args.budget_cycles is not None:
        if args.clock_mhz is not None or args.rate_hz is not None:
            raise ModelError("give either --budget-cycles or --clock-mhz with --rate-hz, not both")
        if not args.budget_cycles > 0:
            raise ModelError(f"--budget-cycles must be > 0, got {args.budget_cycles}")
        return Budget(cycles_per_step=args.budget_cycles, **limits)
    if (args.clock_mhz is None) != (args.rate_hz is None):
        raise ModelError("--clock-mhz and --rate-hz go together")
    if args.clock_mhz is not None:
        return Budget.from_clock(args.clock_mhz, args.rate_hz, **limits)
    return Budget(**limits)


def options_from_args(args: argparse.Namespace) -> Dict[str, Dict[str, Any]]:
    """Each kind's own options from its flags (those of a kind that is not compared go unused)."""
    out: Dict[str, Dict[str, Any]] = {}
    for kind in KINDS.values():
        for flag in kind.Options.FLAGS:
            value = getattr(args, flag.field, None)
            if value is not None:
                out.setdefault(kind.name, {})[flag.field] = value
    return out


def run(args: argparse.Namespace) -> int:
    """Run ``estgen compare`` with parsed ``args``: 0 once it ran; bad input raises
    :class:`ModelError` for the CLI to print (exit 2)."""
    filters = [f.strip().lower() for f in args.filters.split(",") if f.strip()] if args.filters else None
    if args.filters is not None and not filters:
        raise ModelError("--filters: name at least one filter, e.g. --filters ekf,ukf")
    check_outputs(args)
    common = CommonOptions.from_args(args)
    res = compare(args.model, filters, args.runs, args.steps, args.seed, precision=common.precision,
                  use_reference=args.reference, options=options_from_args(args), gates=common.gate_map,
                  commit_check=common.commit_check, optimize=common.optimize,
                  margin=args.margin, budget=budget_from_args(args), dt=args.dt, burn_in=args.burn_in,
                  workers=args.workers,
                  progress=True if args.progress else (False if args.quiet else None))
    write_outputs(args, res.to_json, lambda path: plot_comparison(res, path), lambda: format_comparison(res))
    return 0
