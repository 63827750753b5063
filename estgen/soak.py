"""Soak test: run the generated C for a long simulated horizon and check its invariants every step.

The truth comes from the model itself, as in :func:`estgen.simulate.make_scenario`
(``x[k+1] = f(x[k], u[k], dt) + w``, ``z = h(x) + v``, each sensor at its own rate), but is
produced in chunks so that 10^6 steps take seconds rather than hours: the process map is a
scalar ``math`` lambdification (sequential by nature), the measurements are evaluated for a
whole chunk at once with numpy, and the compiled filter is driven through cffi with pointers
into preallocated arrays, so nothing is allocated per step.

After every step the filter's state is copied out of the C struct; per chunk, numpy then checks
that every x is finite and every P is positive definite (a batched Cholesky factorization; P is
stored packed, so it is symmetric by construction). The normalized estimation error squared
(NEES) is reported as well, as a consistency figure (its mean is about n for a consistent filter).

``estgen soak MODEL --filter F --precision P --steps N`` runs it from the command line.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any, Callable, Dict, List, Optional, Tuple

import numpy as np

from . import filters
from .errors import ModelError
from .filters import FilterSetup
from .filters import get as get_kind
from .layout import unpack
from .model import ModelSpec, as_spec
from .reference import wrap_angle
from .status import Status
from .truth import Truth

if TYPE_CHECKING:  # only for the annotation; emit imports sympy printers at run time
    from .emit import Generated

__all__ = ["SoakResult", "soak", "batch_posdef", "within_rounding", "add_arguments", "run", "PROFILES"]

#: input profiles: the model's own scenario inputs, or those inputs with their sign flipped every
#: ``period`` seconds (keeps integrating states such as a cell's charge inside their range)
PROFILES = ("model", "mirror")


@dataclass
class SoakResult:
    """What a soak run found. ``ok`` is true when every step kept x finite and P positive
    definite, and no call was refused except by a gate."""

    model: str
    filter: str
    precision: str
    steps: int
    seed: int
    dt: float
    profile: str
    n: int = 0
    nonfinite_steps: int = 0
    not_posdef_steps: int = 0
    #: steps whose P numpy's Cholesky refused although it is positive definite within rounding
    #: (see :func:`within_rounding`); not counted as failures
    borderline_steps: int = 0
    first_failure: Optional[int] = None
    predict_status: Dict[str, int] = field(default_factory=dict)
    update_status: Dict[str, Dict[str, int]] = field(default_factory=dict)
    #: measurements the simulated truth made non-finite (the model left its domain); not the filter's fault
    bad_measurements: int = 0
    mean_nees: float = float("nan")
    min_cholesky_pivot: float = float("inf")
    max_abs_state: float = 0.0
    seconds: float = 0.0
    #: per chunk of steps: the mean NEES and the largest |x| (where the run went wrong, and how far the truth went)
    chunk_nees: List[Optional[float]] = field(default_factory=list)
    chunk_max_abs_state: List[float] = field(default_factory=list)
    #: largest | |q| - 1 | of any attitude quaternion the C held after a step
    max_attitude_norm_error: float = 0.0

    @property
    def refusals(self) -> int:
        """Refused calls other than GATED (a gate rejecting an outlier is the filter working)."""
        bad = sum(v for k, v in self.predict_status.items() if k != Status.OK.name)
        for counts in self.update_status.values():
            bad += sum(v for k, v in counts.items() if k not in (Status.OK.name, Status.GATED.name))
        return bad

    @property
    def ok(self) -> bool:
        return self.nonfinite_steps == 0 and self.not_posdef_steps == 0 and self.refusals == 0

    def as_dict(self) -> Dict[str, Any]:
        d = asdict(self)
        d["ok"] = self.ok
        d["refusals"] = self.refusals
        for k in ("mean_nees", "min_cholesky_pivot"):
            if not math.isfinite(d[k]):
                d[k] = None
        return d


def batch_posdef(P: np.ndarray) -> Tuple[np.ndarray, Optional[np.ndarray]]:
    """For a stack of symmetric matrices (k, n, n): a boolean mask of the positive definite ones
    and, when all are, their Cholesky factors (numpy's LAPACK potrf)."""
    try:
        return np.ones(P.shape[0], dtype=bool), np.linalg.cholesky(P)
    except np.linalg.LinAlgError:
        pass
    mask = np.zeros(P.shape[0], dtype=bool)
    for i in range(P.shape[0]):
        try:
            np.linalg.cholesky(P[i])
            mask[i] = True
        except np.linalg.LinAlgError:
            pass
    return mask, None


def within_rounding(P: np.ndarray, precision: str) -> bool:
    """True when the symmetric ``P``, refused by numpy's Cholesky, is still positive definite up to
    the rounding error of a Cholesky factorization in ``precision``: its least eigenvalue obeys
    |lambda_min| <= 2 (n + 1)^2 u lambda_max (Higham, Accuracy and Stability of Numerical
    Algorithms, 2nd ed., 2002, theorems 10.5 and 10.7). No factorization in that precision, the
    C's or LAPACK's, can tell such a matrix from a positive definite one, so they may disagree."""
    u = float(np.finfo(np.float32 if precision == "float" else np.float64).eps) / 2
    w = np.linalg.eigvalsh(P)
    n = P.shape[0]
    return bool(w[-1] > 0 and w[0] >= -2.0 * (n + 1) ** 2 * u * w[-1])


class _Truth:
    """The model's truth and measurements (:class:`estgen.truth.Truth`), produced chunk by chunk
    from one seeded generator: f in Python's math module (sequential by nature), h for a whole
    chunk at once with numpy."""

    def __init__(self, spec: ModelSpec, dt: float, seed: int, profile: str, period: float) -> None:
        self.spec = spec
        self.dt = dt
        self.profile = profile
        self.period = period
        self.rng = np.random.default_rng(seed)
        self.truth = Truth(spec, dt)
        self.angles = self.truth.angles
        self.k = 0
        self.x = self.truth.initial(self.rng)

    def inputs(self, t: float) -> List[float]:
        spec = self.spec
        if spec.input_profile is None:
            return [0.0] * spec.nu
        u = [float(v) for v in spec.input_profile(t)]
        if len(u) != spec.nu:
            raise ModelError(f"scenario inputs({t:g}) returned {len(u)} values; the model has {spec.nu} inputs")
        if self.profile == "mirror" and int(t // self.period) % 2 == 1:
            u = [-v for v in u]
        return u

    def chunk(self, count: int) -> Tuple[np.ndarray, np.ndarray, Dict[str, np.ndarray]]:
        """(u (count, nu), x_true after each step (count, n), {sensor: z (count, m), NaN rows where
        the sensor does not report})."""
        spec = self.spec
        U = np.empty((count, spec.nu))
        X = np.empty((count, spec.n))
        Q, W = self.truth.draw_process(self.rng, count)
        x = [float(v) for v in self.x]
        for i in range(count):
            U[i] = u = self.inputs((self.k + i) * self.dt)
            X[i] = self.truth.step(x, u, Q[i], None if W is None else W[i], self.k + i + 1, scalar=True)
            x = X[i].tolist()
        Z: Dict[str, np.ndarray] = {}
        steps_done = self.k + 1 + np.arange(count)
        with np.errstate(all="ignore"):
            for s in spec.sensors:
                r, v = self.truth.draw_sensor(self.rng, s.name, count)
                z = self.truth.measure(s.name, X, r, v)
                z[steps_done % s.every != 0] = np.nan
                Z[s.name] = z
        self.k += count
        self.x = X[-1].copy()
        return U, X, Z


def soak(model: Any, filter: str = "ekf", precision: str = "float", steps: int = 10**6, seed: int = 0,
         dt: Optional[float] = None, chunk: int = 10000, profile: str = "model", period: float = 1000.0,
         gates: Optional[Dict[str, float]] = None, progress: Optional[Callable[[int, int], None]] = None,
         generated: Optional["Generated"] = None, commit_check: str = "subtractive", **options: Any) -> SoakResult:
    """Run the compiled filter ``steps`` steps on the model's simulated truth and check x finite and
    P positive definite after every step. ``gates``, ``commit_check`` and ``options`` (the kind's
    own, e.g. the UKF's alpha, beta, kappa) are those of :func:`estgen.filters.generate`;
    ``generated`` is C already generated for this model and filter (else it is generated here)."""
    from .build import compile_generated

    spec = as_spec(model)
    if steps < 1:
        raise ModelError(f"the number of steps must be >= 1, got {steps}")
    if profile not in PROFILES:
        raise ModelError(f"unknown profile {profile!r}; use one of {', '.join(PROFILES)}")
    if not (math.isfinite(period) and period > 0):
        raise ModelError(f"the mirror period must be > 0 seconds, got {period}")
    dtv = float(dt) if dt is not None else float(spec.scenario_dt or 0.01)
    if not (math.isfinite(dtv) and dtv > 0):
        raise ModelError(f"dt must be a number > 0, got {dt}")
    if generated is not None:
        gen = generated
        if (gen.filter, gen.precision) != (filter, precision):
            raise ValueError(f"generated is {gen.filter}/{gen.precision}, not {filter}/{precision}")
    else:
        gen = FilterSetup.of(filter, precision, gates, commit_check, **options).generate(spec)
    comp = compile_generated(gen)
    ffi, lib = comp.ffi, comp.lib
    real = "float" if precision == "float" else "double"
    dtype = np.float32 if precision == "float" else np.float64
    layout = gen.layout
    n, nu, ne = spec.n, spec.nu, layout.ne
    npk = layout.field("P").count
    prefix = gen.prefix

    s = ffi.new(f"{prefix}_t *")
    if "seed" in get_kind(filter).Options().runtime():  # a kind's generator starts from the soak's seed
        getattr(lib, f"{prefix}_init_seed")(s, int(seed) & 0xFFFFFFFF)
    else:
        getattr(lib, f"{prefix}_init")(s)
    x_view = layout.view(ffi, s, "x")  # live views of the struct
    p_view = layout.view(ffi, s, "P")
    predict = getattr(lib, f"{prefix}_predict")
    updates = [(sd.name, getattr(lib, f"{prefix}_update_{sd.name}"), sd.m) for sd in spec.sensors]
    dt_c = float(dtype(dtv))

    res = SoakResult(spec.name, filter, precision, steps, seed, dtv, profile, ne)
    pst: Dict[int, int] = {}
    ust: Dict[str, Dict[int, int]] = {name: {} for name, _, _ in updates}
    truth = _Truth(spec, dtv, seed, profile, period)
    angles = truth.angles
    nees_sum, nees_count = 0.0, 0
    t0 = time.perf_counter()
    done = 0
    while done < steps:
        count = min(chunk, steps - done)
        U, X, Z = truth.chunk(count)
        Uc = np.ascontiguousarray(U, dtype=dtype)
        u_base = ffi.cast(f"{real} *", ffi.from_buffer(Uc)) if nu else ffi.NULL
        zc = {}
        for name, _, m in updates:
            zarr = np.ascontiguousarray(Z[name], dtype=dtype)
            has = ~np.isnan(Z[name]).all(axis=1)
            bad = has & ~np.isfinite(Z[name]).all(axis=1)
            res.bad_measurements += int(bad.sum())
            zc[name] = (zarr, ffi.cast(f"{real} *", ffi.from_buffer(zarr)), has.tolist())
        Xc = np.empty((count, n), dtype=dtype)
        Pc = np.empty((count, npk), dtype=dtype)
        for i in range(count):
            st = predict(s, u_base + i * nu if nu else ffi.NULL, dt_c)
            pst[st] = pst.get(st, 0) + 1
            for name, fn, m in updates:
                zarr, zptr, has = zc[name]
                if has[i]:
                    st = fn(s, zptr + i * m)
                    cnt = ust[name]
                    cnt[st] = cnt.get(st, 0) + 1
            Xc[i] = x_view
            Pc[i] = p_view
        # the invariants, checked in float64 on exactly the values the C holds
        x64 = Xc.astype(np.float64)
        finite = np.isfinite(x64).all(axis=1) & np.isfinite(Pc.astype(np.float64)).all(axis=1)
        P64 = unpack(np.where(np.isfinite(Pc), Pc, 0.0), ne)
        for a in spec.attitudes:  # |q| as the C holds it (float64 arithmetic on its values)
            if finite.any():
                dev = np.abs(np.linalg.norm(x64[finite, a:a + 4], axis=1) - 1.0)
                res.max_attitude_norm_error = max(res.max_attitude_norm_error, float(dev.max()))
        pd_mask, L = batch_posdef(P64)
        factored = pd_mask & finite  # the rows numpy's Cholesky accepted: pivots and NEES come from these
        for i in np.flatnonzero(~pd_mask & finite):
            if within_rounding(P64[i], precision):
                pd_mask[i] = True
                res.borderline_steps += 1
        pd_mask &= finite
        res.nonfinite_steps += int((~finite).sum())
        res.not_posdef_steps += int((~pd_mask).sum())
        fails = np.flatnonzero(~(finite & pd_mask))
        if fails.size and res.first_failure is None:
            res.first_failure = done + int(fails[0]) + 1
        if factored.any():
            # a chunk with some failing steps still reports the pivots and NEES of the others
            # (a particle filter whose particles collapsed has a singular P at those steps only)
            if L is None or not factored.all():
                L = np.linalg.cholesky(P64[factored])
            res.min_cholesky_pivot = min(res.min_cholesky_pivot, float(np.diagonal(L, axis1=1, axis2=2).min()))
            e = truth.truth.fn.boxminus_rows(X, x64) if spec.attitudes else x64 - X
            if angles.any() and not spec.attitudes:
                e[:, angles] = wrap_angle(e[:, angles])
            sol = np.linalg.solve(L, e[factored][..., None])[..., 0]
            chunk_sum = float(np.sum(sol * sol))
            nees_sum += chunk_sum
            nees_count += int(factored.sum())
            res.chunk_nees.append(chunk_sum / int(factored.sum()))
        else:
            res.chunk_nees.append(None)
        if finite.any():
            biggest = float(np.abs(x64[finite]).max())
            res.max_abs_state = max(res.max_abs_state, biggest)
            res.chunk_max_abs_state.append(biggest)
        done += count
        if progress is not None:
            progress(done, steps)
    res.seconds = time.perf_counter() - t0
    res.mean_nees = nees_sum / nees_count if nees_count else float("nan")
    res.predict_status = {Status(k).name if k in Status._value2member_map_ else str(k): v for k, v in sorted(pst.items())}
    res.update_status = {name: {Status(k).name if k in Status._value2member_map_ else str(k): v
                                for k, v in sorted(c.items())} for name, c in ust.items()}
    return res


def format_result(res: SoakResult) -> str:
    """The soak summary: the run, a table of calls by status, the invariants, the verdict."""
    lines = [
        f"soak {res.model} {res.filter} {res.precision}: {res.steps} steps of dt {res.dt:g} s "
        f"(profile {res.profile}, seed {res.seed}) in {res.seconds:.1f} s",
        "",
    ]
    codes = [st.name for st in Status if st != Status.OK]
    seen = [c for c in codes if res.predict_status.get(c) or any(u.get(c) for u in res.update_status.values())]
    head = f"  {'call':<24} {'calls':>10} {'OK':>10}" + "".join(f" {c:>12}" for c in seen)
    lines += [head, "  " + "-" * (len(head) - 2)]
    rows = [("predict", res.predict_status)] + [(f"update {k}", v) for k, v in res.update_status.items()]
    for label, counts in rows:
        total = sum(counts.values())
        lines.append(f"  {label:<24} {total:>10} {counts.get('OK', 0):>10}"
                     + "".join(f" {counts.get(c, 0):>12}" for c in seen))
    lines += [
        "",
        f"  {'x non-finite at':<40} {res.nonfinite_steps} steps",
        f"  {'P not positive definite at':<40} {res.not_posdef_steps} steps"
        + (f" (first at step {res.first_failure})" if res.first_failure is not None else "")
        + (f"; {res.borderline_steps} more within rounding" if res.borderline_steps else ""),
        f"  {'smallest Cholesky pivot of P':<40} {res.min_cholesky_pivot:.3g}",
        f"  {'largest |x|':<40} {res.max_abs_state:.3g}",
        f"  {'mean NEES':<40} {res.mean_nees:.3g} (about {res.n} when consistent)",
    ]
    if res.max_attitude_norm_error > 0.0:
        lines.append(f"  {'largest | |q| - 1 | of an attitude':<40} {res.max_attitude_norm_error:.3g}")
    if len(res.chunk_nees) > 1:
        first, last = res.chunk_nees[0], res.chunk_nees[-1]
        fmt = (lambda v: "-" if v is None else f"{v:.3g}")  # noqa: E731
        lines.append(f"  {'mean NEES, first / last chunk':<40} {fmt(first)} / {fmt(last)}")
    if res.bad_measurements:
        lines.append(f"  {res.bad_measurements} simulated measurements were non-finite (the truth left the model's domain)")
    lines += ["", "  result: " + ("OK: x finite and P positive definite at every step" if res.ok
                                  else f"FAILED ({res.refusals} refused calls)")]
    return "\n".join(lines)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The ``estgen soak`` options."""
    parser.add_argument("model", metavar="MODEL", help="the model file (Python defining `model`)")
    filters.add_arguments(parser, "float")
    parser.add_argument("--steps", type=int, default=10**6, help="simulated steps (default 1000000)")
    parser.add_argument("--seed", type=filters.seed_value, default=0, help="random seed (default 0)")
    parser.add_argument("--dt", type=float, default=None, help="step in seconds (default: the model's scenario dt)")
    parser.add_argument("--profile", choices=PROFILES, default="model",
                        help="inputs: the model's scenario ('model', default) or its sign flipped every --period "
                             "seconds ('mirror', for integrating states such as a charge)")
    parser.add_argument("--period", type=float, default=1000.0, help="mirror period in seconds (default 1000)")
    parser.add_argument("--json", metavar="FILE", help="also write the result as JSON")
    parser.add_argument("-q", "--quiet", action="store_true", help="print the verdict line only, no progress")
    parser.add_argument("--progress", action="store_true", help="show progress even when stderr is not a terminal")


def run(args: argparse.Namespace) -> int:
    """``estgen soak``: 0 all invariants held, 1 some did not."""
    from .model import load_model
    from .progress import wanted

    spec = load_model(args.model)
    started = time.perf_counter()
    shown = wanted(args.quiet, args.progress)  # a CI log gets no progress lines (docs/commands.md)

    def show(done: int, total: int) -> None:
        if shown:
            el = time.perf_counter() - started
            print(f"\r  {done}/{total} steps, {el:.0f} s", end="", file=sys.stderr, flush=True)

    res = soak(spec, steps=args.steps, seed=args.seed, dt=args.dt, profile=args.profile, period=args.period,
               progress=show, **FilterSetup.from_args(args).kwargs(runtime=False))
    if shown:
        print(file=sys.stderr)
    text = format_result(res)
    print(text.splitlines()[-1].strip() if args.quiet else text)
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(res.as_dict(), fh, indent=2)
    return 0 if res.ok else 1
