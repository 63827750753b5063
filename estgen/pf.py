"""The particle filter: its options and its numpy reference.

A bootstrap (sampling importance resampling) particle filter (Gordon, Salmond & Smith, IEE
Proc. F 140(2), 1993) carrying N particles and their log-weights:

* predict moves every live particle through f and adds process noise ``Lq z`` (``Lq Lq' = Q``,
  a Cholesky factor that tolerates a semidefinite Q: a zero pivot gives a zero column, and no
  draw is made for it). A particle whose prediction is not finite is dropped (weight zero, state
  kept); when no live particle is left, predict refuses (NON_FINITE) and nothing changes.
* update adds the Gaussian log-likelihood ``-0.5 |Lr^-1 (z - h(x_i))|^2`` (``Lr Lr' = R``) to each
  log-weight, subtracts the largest (so the best particle has weight exactly 1 and no weight set
  underflows to all zeros, Arulampalam et al., IEEE Trans. Signal Process. 50(2), 2002), and
  resamples when the effective sample size ``(sum w)^2 / sum w^2`` falls below ``threshold N``.
  No finite log-weight left is the DEGENERATE refusal, and nothing changes.
* resampling is systematic (Kitagawa, J. Comput. Graph. Stat. 5(1), 1996): one uniform U, the
  positions ``(U + k) / N``; particle i is copied as many times as positions fall in its slice of
  the cumulative weights, in place and in O(N): particles copied more than once fill, in
  increasing order, the slots of particles not copied.
* regularization at resampling (the regularized particle filter of Musso, Oudjane & Le Gland,
  in Doucet, de Freitas & Gordon (eds.), Sequential Monte Carlo Methods in Practice, 2001; the
  algorithm as in Arulampalam et al. 2002, sec. V-C): after resampling every particle moves by
  ``h D z``, z standard normal, ``D D' = S`` the covariance of the resampled cloud rounded to
  :data:`KERNEL_BITS` bits (:func:`kernel_covariance`; Musso et al. and Arulampalam et al. take
  the weighted covariance before resampling, of which this is a sample, less sensitive to the
  last bits of the weights), h the bandwidth of the Gaussian kernel that is optimal for a Gaussian density
  (``h_opt = (4 / (N (n + 2)))^(1 / (n + 4))``, Silverman, Density Estimation, 1986) times
  ``regularization`` (default 1). The resampled cloud is then a draw from a kernel density
  estimate of the posterior instead of copies of a few particles, so a cloud does not collapse
  where the process noise cannot spread it again (a parameter estimated as a constant state, a
  precise sensor against a wide prior). It widens the posterior by the factor ``1 + h^2`` at each
  resampling, the price of not collapsing. A jittered particle that would land further than
  twice :func:`particle_reach` from the estimate keeps its copy.
* instead of the kernel, optional roughening after resampling (Gordon, Salmond & Smith 1993):
  each component j gets ``K E_j N^(-1/n) z`` with ``E_j`` the spread (max - min) of the
  particles in j. Giving ``roughening`` turns the kernel off unless ``regularization`` is given
  too, which is refused: one jitter or the other.
* ``x`` and ``P`` are the weighted mean and (biased) weighted covariance of the particles
  (circular mean and wrapped deviations for angle states), recomputed after every call. The
  mean is accumulated as deviations from the first live particle, so that a float cloud far
  from the origin loses no digits and a cloud of identical particles has P exactly 0.
* ``set_state(x, P)`` draws N standard normal vectors, whitens them with their own sample mean
  and covariance, and colours them with ``chol(P)``: the particle mean and covariance then equal
  x and P to rounding.

Noise symbols (``model.noise``): predict draws the process symbols ``w = Aw z`` (``Aw Aw' = Qw``,
semidefinite as above) for every particle and evaluates ``f(x, u, w, dt)``, then adds the
additive ``Lq z``; per particle the draws are w's first, then Q's. A sensor with noise symbols
v is weighted by the Gaussian likelihood linearized in v at the particle, ``z ~ N(h(x, 0),
R_eff)`` with ``R_eff = M Rv M' + R`` and ``M = dh/dv`` at ``(x_i, v = 0)``: exact where h is
affine in v (e.g. a scale error ``h (1 + v)``), and the per-particle normalization
``-log det Lr`` is kept because R_eff then differs between particles. A particle whose R_eff is
not positive definite gets weight zero.

The NIS of an update is that of the Gaussian fitted to the predicted measurements: with the
residuals ``r_i = z - h(x_i)`` and prior weights, ``y = mean r``, ``S = cov r + R`` (the
weighted mean of R_eff for a sensor with noise symbols),
``NIS = y' S^-1 y`` (used for the optional chi-square gate and the consistency statistics; it is
chi-square distributed only where the posterior is close to Gaussian).

The generated C does the same steps in the same order with the same random numbers
(:mod:`estgen.rng`), so the double build agrees with this reference to rounding.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Any, Callable, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import sympy as sp

from .errors import ModelError
from .model import ModelSpec
from .reference import ModelFunctions, _ReferenceBase, _finite, _wrap_masked, wrap_angle
from .rng import Rng
from .status import Status

__all__ = ["PfOptions", "pf_options", "ReferencePF", "psd_cholesky", "systematic_counts", "fill_in_place",
           "kernel_bandwidth", "kernel_covariance", "particle_reach", "lower_times", "MAX_PARTICLES", "DEFAULT_PARTICLES", "DEFAULT_SEED", "DEFAULT_REGULARIZATION"]

MAX_PARTICLES = 1_000_000
DEFAULT_PARTICLES = 500
DEFAULT_SEED = 1
#: the kernel bandwidth at resampling as a multiple of the optimal one (0: no kernel)
DEFAULT_REGULARIZATION = 1.0
#: a pivot of Q's Cholesky factorization within +-PSD_TOL * Q_jj is taken as zero (semidefinite Q)
PSD_TOL = {"double": 1e-12, "float": 1e-5}
#: the same for the regularization kernel's factor of the particles' covariance, which is
#: singular after a resampling that left fewer distinct particles than states: a direction with
#: less than this fraction of a state's variance gets no jitter
KERNEL_TOL = {"double": 1e-9, "float": 1e-4}


@dataclass(frozen=True)
class PfOptions:
    """Compile-time choices of the particle filter."""

    particles: int = DEFAULT_PARTICLES
    #: resample when the effective sample size falls below this fraction of N
    resample_threshold: float = 0.5
    #: roughening constant K (0: none); Gordon, Salmond & Smith used K = 0.2
    roughening: float = 0.0
    #: the regularization kernel's bandwidth as a multiple of the optimal one (0: none)
    regularization: float = DEFAULT_REGULARIZATION

    def bandwidth(self, n: int) -> float:
        """h of the kernel at resampling for n states, 0 without one (see :func:`kernel_bandwidth`)."""
        return self.regularization * kernel_bandwidth(self.particles, n) if self.regularization > 0.0 else 0.0


def kernel_bandwidth(N: int, n: int) -> float:
    """The bandwidth of the Gaussian kernel that minimizes the mean integrated square error
    of the kernel density estimate of a Gaussian density from N samples in n dimensions:
    ``(4 / (N (n + 2)))^(1 / (n + 4))`` (Silverman, Density Estimation for Statistics and
    Data Analysis, 1986, eq. 4.14; the h_opt of Musso, Oudjane & Le Gland 2001)."""
    return (4.0 / (N * (n + 2.0))) ** (1.0 / (n + 4.0))


def pf_options(n: int, options: Mapping[str, Any]) -> PfOptions:
    """Validate the particle filter's options (particles, resample_threshold, roughening,
    regularization). ``regularization`` None (the default) is 1 without roughening and 0 with
    it; both above 0 are refused. Raises :class:`ModelError` for unknown options or values out
    of range."""
    known = {"particles", "resample_threshold", "roughening", "regularization"}
    unknown = sorted(set(options) - known)
    if unknown:
        raise ModelError(f"unknown particle filter option(s) {unknown}; it takes particles, resample_threshold, "
                         f"roughening and regularization")
    N = options.get("particles", DEFAULT_PARTICLES)
    if N is None:
        N = DEFAULT_PARTICLES
    if isinstance(N, bool) or not isinstance(N, numbers.Integral):
        raise ModelError(f"particles must be a whole number, got {N!r}")
    N = int(N)
    if not max(2, n + 1) <= N <= MAX_PARTICLES:
        raise ModelError(f"particles must lie in {max(2, n + 1)}..{MAX_PARTICLES} for {n} states, got {N}")
    vals = {}
    rough_given = options.get("roughening") not in (None, 0, 0.0)
    reg_default = 0.0 if rough_given else DEFAULT_REGULARIZATION
    for k, default in (("resample_threshold", 0.5), ("roughening", 0.0), ("regularization", reg_default)):
        v = options.get(k, default)
        if v is None:
            v = default
        if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(float(v)):
            raise ModelError(f"particle filter {k} must be a finite number, got {v!r}")
        vals[k] = float(v)
    if not 0.0 < vals["resample_threshold"] <= 1.0:
        raise ModelError(f"resample_threshold is a fraction of N in (0, 1], got {vals['resample_threshold']}")
    if vals["roughening"] < 0.0:
        raise ModelError(f"roughening must be >= 0, got {vals['roughening']}")
    if not 0.0 <= vals["regularization"] <= 10.0:
        raise ModelError(f"regularization is the kernel bandwidth as a multiple of the optimal one, in [0, 10], "
                         f"got {vals['regularization']}")
    if vals["roughening"] > 0.0 and vals["regularization"] > 0.0:
        raise ModelError("roughening and regularization are two ways of jittering the resampled particles: "
                         "give one (regularization 0 to use roughening)")
    return PfOptions(N, vals["resample_threshold"], vals["roughening"], vals["regularization"])


def psd_cholesky(A: np.ndarray, tol: float = PSD_TOL["double"]) -> Optional[np.ndarray]:
    """Lower L with L L' = A for a symmetric positive semidefinite A: a pivot in
    [-tol A_jj, tol A_jj] gives a zero column (that direction carries no noise; a pivot that
    small is rounding, whose square root would be noise of order sqrt(tol)). None when a pivot
    is more negative (A is not semidefinite). The same loop as the generated C."""
    n = A.shape[0]
    L = np.zeros((n, n))
    for j in range(n):
        d = float(A[j, j])
        for k in range(j):  # subtracted one by one, as the C does: the same rounding
            d -= L[j, k] * L[j, k]
        if d > tol * A[j, j]:
            ljj = math.sqrt(d)
            L[j, j] = ljj
            for i in range(j + 1, n):
                e = float(A[i, j])
                for k in range(j):
                    e -= L[i, k] * L[j, k]
                L[i, j] = e / ljj
        elif d < -tol * A[j, j] or not math.isfinite(d):
            return None
    return L


def particle_reach(precision: str, particles: int) -> float:
    """How far a particle may lie from the estimate: ``sqrt(REAL_MAX / N) / 16`` (REAL_MAX from
    numpy.finfo). predict drops a particle that moves further than this from the present mean,
    the jitter after resampling keeps a particle's copy where it would land further than twice
    this, and set_state refuses a P whose particles could land further. Then every two live
    particles lie within 4 reaches of each other, and the weighted covariance of N of them
    cannot overflow: sum w d^2 <= N (4 reach)^2 = REAL_MAX / 16."""
    big = float(np.finfo(np.float32 if precision == "float" else np.float64).max)
    return math.sqrt(big / particles) / 16.0


#: significant bits kept of the covariance that shapes the regularization kernel
KERNEL_BITS = 16


def kernel_covariance(P: np.ndarray) -> np.ndarray:
    """P rounded to :data:`KERNEL_BITS` significant bits (as the C: frexp, rint, ldexp). The
    kernel's factor feeds the particles' covariance back into the particles, where a difference
    in the last bits (the C against this reference, float against double) would grow by about
    1 + h cond(P) at every resampling; rounded, both sides jitter with the same factor unless an
    entry lies within rounding of a 2^-16 step, and the kernel's shape needs no more digits."""
    m, e = np.frexp(P)
    return np.ldexp(np.rint(np.ldexp(m, KERNEL_BITS)), e - KERNEL_BITS)


def lower_times(Z: np.ndarray, L: np.ndarray, start: Optional[np.ndarray] = None) -> np.ndarray:
    """Rows of ``start + Z @ L.T`` for a lower-triangular L, each sum taken in the C's order
    (``e = start_j; e += L[j][k] z[k]`` for k = 0..j), so that the reference rounds as the C
    does (start: zeros when None)."""
    out = np.zeros(Z.shape[:-1] + (L.shape[0],))
    for j in range(L.shape[0]):
        e = np.zeros(Z.shape[:-1]) if start is None else start[..., j]
        for k in range(j + 1):
            e = e + L[j, k] * Z[..., k]
        out[..., j] = e
    return out


def systematic_counts(w: np.ndarray, U: float) -> np.ndarray:
    """How often systematic resampling copies each particle: positions ``(U + k) / N``,
    k = 0..N-1, against the cumulative normalized weights (sequential sums, as the C)."""
    N = w.shape[0]
    cum = np.cumsum(w)
    inv = 1.0 / cum[-1]
    c = np.cumsum(w * inv)
    pos = (U + np.arange(N, dtype=float)) / float(N)
    idx = np.minimum(np.searchsorted(c, pos, side="left"), N - 1)
    return np.bincount(idx, minlength=N)


def fill_in_place(X: np.ndarray, counts: np.ndarray) -> None:
    """Apply resampling counts in place: every extra copy of a particle goes, in increasing
    particle order, to the next slot whose particle was not drawn."""
    free = np.flatnonzero(counts == 0)
    sources = np.repeat(np.arange(counts.shape[0]), np.maximum(counts - 1, 0))
    X[free] = X[sources]


def _loglik(Re: np.ndarray, r: np.ndarray) -> float:
    """``-|Lr^-1 r|^2 / 2 - log det Lr`` (Lr Lr' = Re), or -inf when Re is not positive definite."""
    try:
        Lr = np.linalg.cholesky(Re)
    except np.linalg.LinAlgError:
        return -math.inf
    b = np.linalg.solve(Lr, r)
    return float(-0.5 * (b @ b) - np.sum(np.log(np.diag(Lr))))


#: sympy's "numpy" printer maps these to Python's scalar-only ``math`` functions; the particle
#: filter evaluates every particle at once, so they are vectorized (still libm's values, as the
#: scalar references and the C get)
_VECTORIZED_MATH = {"erf": np.vectorize(math.erf, otypes=[float]),
                    "erfc": np.vectorize(math.erfc, otypes=[float]),
                    "gamma": np.vectorize(math.gamma, otypes=[float]),
                    "lgamma": np.vectorize(math.lgamma, otypes=[float])}


def _lambdify_list(args: Sequence[sp.Symbol], exprs: Sequence[sp.Expr]) -> Callable[..., List[Any]]:
    return sp.lambdify(args, list(exprs), modules=[_VECTORIZED_MATH, "numpy"], cse=True)


def _columns(values: Sequence[Any], count: int) -> np.ndarray:
    """Entries of a lambdified list (arrays or scalars) as a (count, len) array."""
    return np.column_stack([np.broadcast_to(np.asarray(v, dtype=float), (count,)) for v in values])


class ReferencePF(_ReferenceBase):
    """The numpy reference particle filter (double precision), step for step the generated C."""

    filter = "pf"

    def __init__(self, spec: ModelSpec, *, particles: int = DEFAULT_PARTICLES, resample_threshold: float = 0.5,
                 roughening: float = 0.0, regularization: Optional[float] = None, seed: int = DEFAULT_SEED,
                 params: Optional[Mapping[str, float]] = None, functions: Optional[ModelFunctions] = None) -> None:
        self.options = pf_options(spec.n, {"particles": particles, "resample_threshold": resample_threshold,
                                           "roughening": roughening, "regularization": regularization})
        super().__init__(spec, params, functions)
        n, N = spec.n, self.options.particles
        xs, us, ps, dt = spec.x_syms, spec.u_syms, spec.p_syms, spec.dt
        self._fv = _lambdify_list([*xs, *us, dt, *ps, *spec.w_syms], list(spec.f))
        self._hv = {s.name: _lambdify_list([*xs, *ps], list(s.h0)) for s in spec.sensors}
        self._mv = {s.name: _lambdify_list([*xs, *ps], list(s.h.jacobian(list(s.v)).xreplace({v: 0 for v in s.v})))
                    for s in spec.sensors if s.v}
        self.N = N
        self._reach = particle_reach("double", N)
        self.rng = Rng(seed)
        self._X = np.zeros((N, n))
        self._lw = np.zeros(N)
        self._w = np.ones(N)
        self._draw_prior()
        self._moments()

    # -- particles ----------------------------------------------------------------------------
    @property
    def particles(self) -> np.ndarray:
        """The particles, a copy, shape (N, n)."""
        return self._X.copy()

    @property
    def log_weights(self) -> np.ndarray:
        """The log-weights (largest 0; -inf for dropped particles), a copy."""
        return self._lw.copy()

    @property
    def weights(self) -> np.ndarray:
        """exp(log-weights), a copy (not normalized to sum 1: the largest is 1)."""
        return self._w.copy()

    def reseed(self, seed: int) -> None:
        """Restart the generator from ``seed`` (particles and weights stay)."""
        self.rng.reseed(seed)

    def _draw_prior(self) -> None:
        spec, n, N = self.spec, self.spec.n, self.N
        if spec.prior_box is not None:
            lo = np.array(spec.prior_box[0])
            hi = np.array(spec.prior_box[1])
            U = np.array([self.rng.uniform() for _ in range(N * n)]).reshape(N, n)
            X = lo + (hi - lo) * U
        else:
            L0 = np.linalg.cholesky(np.array(spec.P0, dtype=float))
            Z = self.rng.normals(N * n).reshape(N, n)
            X = np.array(spec.x0, dtype=float) + Z @ L0.T
        self._X = self._wrap_rows(X)
        self._lw = np.zeros(N)
        self._w = np.ones(N)

    def _wrap_rows(self, X: np.ndarray) -> np.ndarray:
        if self._angles.any():
            X = X.copy()
            X[:, self._angles] = wrap_angle(X[:, self._angles])
        return X

    def _moments(self) -> None:
        w, X = self._w, self._X
        live = w > 0.0
        wl, Xl = w[live], X[live]
        # every sum runs in particle order (cumsum), as the C's loops: the regularization kernel
        # feeds P back into the particles, so a different summation order would grow into a
        # deviation of the C from this reference
        tot = np.cumsum(wl)[-1]
        # the mean as the first live particle plus the weighted mean deviation from it: no
        # cancellation for a cloud far from the origin, and exactly that particle (P exactly 0)
        # when every particle is a copy of it
        x = Xl[0] + np.cumsum(wl[:, None] * (Xl - Xl[0]), axis=0)[-1] / tot
        if self._angles.any():
            xa = Xl[:, self._angles]
            x[self._angles] = np.arctan2(np.cumsum(wl[:, None] * np.sin(xa), axis=0)[-1],
                                         np.cumsum(wl[:, None] * np.cos(xa), axis=0)[-1])
        d = Xl - x
        if self._angles.any():
            d[:, self._angles] = wrap_angle(d[:, self._angles])
        self._x = x
        self._P = np.cumsum((wl[:, None] * d)[:, :, None] * d[:, None, :], axis=0)[-1] / tot

    # -- the filter ---------------------------------------------------------------------------
    def predict(self, u: Sequence[float], dt: float) -> int:
        """Move the live particles through f and add process noise (see the module text)."""
        bad, uv, dtf = self._check_predict(u, dt)
        if bad is not None:
            return bad
        p = self._p()
        with np.errstate(all="ignore"):
            Q = self._fn.Q(dtf, p)
            Qw = self._fn.Qw(dtf, p)
            if not _finite(Q, Qw):
                return int(Status.NON_FINITE)
            Lq = psd_cholesky(Q)
            Aw = psd_cholesky(Qw)
            if Lq is None or Aw is None:
                return int(Status.NOT_POSITIVE_DEFINITE)
            live = np.flatnonzero(self._w > 0.0)
            L = live.shape[0]
            snap = self.rng.snapshot()
            cw = np.flatnonzero(np.diag(Aw) > 0.0)  # a zero column takes no draw
            cq = np.flatnonzero(np.diag(Lq) > 0.0)
            D = self.rng.normals(L * (cw.size + cq.size)).reshape(L, cw.size + cq.size)
            Zw = np.zeros((L, self.spec.nw))
            Zw[:, cw] = D[:, :cw.size]
            Zq = np.zeros((L, self.n))
            Zq[:, cq] = D[:, cw.size:]
            W = lower_times(Zw, Aw)
            Xl = self._X[live]
            Xn = lower_times(Zq, Lq, _columns(self._fv(*Xl.T, *uv, dtf, *p, *W.T), L))
            Xn = self._wrap_rows(Xn)
            ok = np.all(np.isfinite(Xn), axis=1) & np.all(np.abs(Xn - self._x) <= self._reach, axis=1)
        if not ok.any():
            self.rng.restore(snap)
            return int(Status.NON_FINITE)
        self._X[live[ok]] = Xn[ok]
        dead = live[~ok]
        if dead.size:
            self._lw[dead] = -np.inf
            self._w[dead] = 0.0
            top = float(np.max(self._lw))
            if top != 0.0:
                self._lw = self._lw - top
                self._w = np.exp(self._lw)
        self._moments()
        return int(Status.OK)

    def update(self, sensor: str, z: Sequence[float]) -> int:
        """Weight by the likelihood of z, resample when the ESS is low (see the module text)."""
        bad, zv = self._check_update(sensor, z)
        if bad is not None:
            return bad
        s = self.spec.sensor(sensor)
        p = self._p()
        zang = self._sensor_angles[sensor]
        with np.errstate(all="ignore"):
            R = self._fn.R(sensor, p)
            Rv = self._fn.Rv(sensor, p)
            if not _finite(R, Rv):
                return int(Status.NON_FINITE)
            if not s.nv:
                try:
                    Lr = np.linalg.cholesky(R)
                except np.linalg.LinAlgError:
                    return int(Status.NOT_POSITIVE_DEFINITE)
            live = np.flatnonzero(self._w > 0.0)
            Xl = self._X[live]
            H = _columns(self._hv[sensor](*Xl.T, *p), live.shape[0])
            r = zv - H
            if zang.any():
                r[:, zang] = wrap_angle(r[:, zang])
            if s.nv:
                M = _columns(self._mv[sensor](*Xl.T, *p), live.shape[0]).reshape(-1, s.m, s.nv)
                Reff = R + np.einsum("kav,vw,kbw->kab", M, Rv, M)
                ll = np.array([_loglik(Re, ri) for Re, ri in zip(Reff, r)])
            else:
                Reff = np.broadcast_to(R, (live.shape[0], s.m, s.m))
                B = np.linalg.solve(Lr, r.T)
                ll = -0.5 * np.sum(B * B, axis=0)
            ok = np.isfinite(ll)
            new = np.full(self.N, -np.inf)
            new[live[ok]] = self._lw[live[ok]] + ll[ok]
            # NIS of the Gaussian fitted to the residuals (prior weights)
            wl = self._w[live[ok]]
            rl = r[ok]
            if wl.size:
                tot = np.cumsum(wl)[-1]
                r0 = rl[0]  # residuals about the first one: no cancellation when z is far off
                dy = (wl @ (rl - r0)) / tot
                y = r0 + dy
                Rm = np.einsum("k,kab->ab", wl, Reff[ok]) / tot if s.nv else R  # the weighted mean of R_eff
                S = (((rl - r0).T * wl) @ (rl - r0)) / tot - np.outer(dy, dy) + Rm
                S = 0.5 * (S + S.T)
                try:
                    Ls = np.linalg.cholesky(S)
                    b = np.linalg.solve(Ls, y)
                    nis = float(b @ b)
                except np.linalg.LinAlgError:
                    nis = math.nan
            else:
                nis = math.nan
        if not ok.any():
            return int(Status.DEGENERATE)
        if not math.isfinite(nis):
            return int(Status.NON_FINITE)
        self._nis = nis
        thr = self._gates[sensor]
        if thr is not None and nis > thr:
            return int(Status.GATED)
        top = float(np.max(new))
        self._lw = new - top
        self._w = np.exp(self._lw)
        ws = np.cumsum(self._w)[-1]
        w2 = np.cumsum(self._w * self._w)[-1]
        if ws * ws < self.options.resample_threshold * self.N * w2:
            self._resample()
        self._moments()
        return int(Status.OK)

    def _resample(self) -> None:
        N = self.N
        counts = systematic_counts(self._w, self.rng.uniform())
        fill_in_place(self._X, counts)
        self._lw = np.zeros(N)
        self._w = np.ones(N)
        h = self.options.bandwidth(self.n)
        if h > 0.0:
            # the kernel's shape: the covariance of the resampled cloud (the moments code, as the
            # C); a factorization that fails (rounding) leaves the particles unjittered
            self._moments()
            D = psd_cholesky(kernel_covariance(self._P), KERNEL_TOL["double"])
            if D is not None:
                Z = self.rng.normals(N * self.n).reshape(N, self.n)
                self._jitter(self._wrap_rows(self._X + h * lower_times(Z, D)))
        K = self.options.roughening
        if K > 0.0:
            scale = K * float(N) ** (-1.0 / self.n)
            sig = (np.max(self._X, axis=0) - np.min(self._X, axis=0)) * scale
            Z = self.rng.normals(N * self.n).reshape(N, self.n)
            self._jitter(self._wrap_rows(self._X + Z * sig))

    def _jitter(self, Y: np.ndarray) -> None:
        """Take the jittered particles Y, except where one lands further than two reaches from
        the estimate (:func:`particle_reach`): that particle keeps its copy."""
        ok = np.all(np.abs(Y - self._x) <= 2.0 * self._reach, axis=1)
        self._X[ok] = Y[ok]

    def _innovation(self, sensor: str, z: np.ndarray) -> Any:
        raise TypeError("the particle filter has no Gaussian innovation step; update() weights the particles")

    def set_state(self, x: Sequence[float], P: Any) -> int:
        """Redraw the particles with mean x and covariance P exactly (to rounding), equal weights."""
        n, N = self.n, self.N
        old = (self._x, self._P)
        bad = super().set_state(x, P)  # validates x and P, and keeps them in _x, _P
        if bad != Status.OK:
            return bad
        # |(L v)_j| <= sqrt(P_jj n N) for the whitened draws v (sum of v_k^2 over the N draws
        # is N per component): a P that could put a particle beyond the reach is refused
        if np.any(np.diag(self._P) * (n * N) > self._reach * self._reach):
            self._x, self._P = old
            return int(Status.NON_FINITE)
        xv = self._x
        L = np.linalg.cholesky(self._P)
        snap = self.rng.snapshot()
        Z = self.rng.normals(N * n).reshape(N, n)
        m = np.cumsum(Z, axis=0)[-1] / N
        C = (Z.T @ Z) / N - np.outer(m, m)
        try:
            A = np.linalg.cholesky(C)
        except np.linalg.LinAlgError:
            self.rng.restore(snap)
            return int(Status.NOT_POSITIVE_DEFINITE)
        W = np.linalg.solve(A, (Z - m).T).T
        self._X = self._wrap_rows(xv + W @ L.T)
        self._lw = np.zeros(N)
        self._w = np.ones(N)
        self._moments()
        return int(Status.OK)

    def __repr__(self) -> str:
        return f"ReferencePF({self.spec.name!r}, n={self.n}, particles={self.N})"

