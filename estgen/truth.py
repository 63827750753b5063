"""The simulated truth: one place where the model's own equations, with its noise drawn, make the
true states and the measurements that verify, simulate, compare, soak and the benchmarks use.

    x[k+1] = f(x[k], u[k], w, dt) ⊞ q     q ~ N(0, Q(dt)) in the error space, w ~ N(0, Qw(dt))
    z      = h(x, v) + r                   r ~ N(0, R),  v ~ N(0, Rv)

``⊞`` adds plain states and right-multiplies an attitude by ``quat.exp`` of its part of ``q``;
angle states and angle measurement components are wrapped to (-pi, pi]. The noise symbols w and
v of a model are drawn only when it has them. :class:`Truth` takes the samples as arguments
(:meth:`Truth.step`, :meth:`Truth.measure`) and draws them in one documented order
(:meth:`Truth.draw_process`, :meth:`Truth.draw_sensor`), so a per-step simulation and a chunked
one see the same model and the same noise.
"""

from __future__ import annotations

from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import sympy as sp

from .errors import ModelError
from .model import ModelSpec
from .reference import model_functions, wrap_angle

__all__ = ["Truth"]


def psd_factor(C: np.ndarray) -> np.ndarray:
    """A with A A' = C for a symmetric positive semidefinite C (eigen-decomposition: works when C
    is singular, as a Q with a noise-free state is)."""
    C = np.asarray(C, dtype=float)
    if C.size == 0:
        return np.zeros(C.shape)
    w, V = np.linalg.eigh(0.5 * (C + C.T))
    return V * np.sqrt(np.clip(w, 0.0, None))


class Truth:
    """The truth of ``spec`` at step ``dt`` with parameters ``params`` (default: the model's)."""

    def __init__(self, spec: ModelSpec, dt: float, params: Optional[Mapping[str, float]] = None) -> None:
        self.spec = spec
        self.dt = float(dt)
        self.fn = model_functions(spec)
        self.pvals = dict(spec.param_defaults(), **(params or {}))
        self.p = self.fn.param_tuple(self.pvals)
        self.Aq = psd_factor(self.fn.Q(self.dt, self.p))
        self.Aw = psd_factor(self.fn.Qw(self.dt, self.p))
        self.Ar = {s.name: psd_factor(self.fn.R(s.name, self.p)) for s in spec.sensors}
        self.Av = {s.name: psd_factor(self.fn.Rv(s.name, self.p)) for s in spec.sensors}
        self.angles = np.array(spec.angle_states, dtype=bool)
        self._zangles = {s.name: np.array(s.angles, dtype=bool) for s in spec.sensors}
        self._f_scalar: Optional[Callable[..., Any]] = None
        self._h_rows: Dict[str, List[Callable[..., Any]]] = {}

    # -- drawing -------------------------------------------------------------------------------
    def initial(self, rng: np.random.Generator) -> np.ndarray:
        """A true initial state: x0 ⊞ N(0, P0), or uniform over the box of ``initial_uniform``."""
        spec = self.spec
        if spec.prior_box is not None:
            lo, hi = (np.array(b, dtype=float) for b in spec.prior_box)
            x = lo + (hi - lo) * rng.random(spec.n)
        else:
            e0 = psd_factor(np.array(spec.P0, dtype=float)) @ rng.standard_normal(spec.ne)
            x = self.fn.boxplus(np.array(spec.x0, dtype=float), e0)
        return np.where(self.angles, wrap_angle(x), x)

    def draw_process(self, rng: np.random.Generator, count: Optional[int] = None
                     ) -> Tuple[np.ndarray, Optional[np.ndarray]]:
        """(q, w) for one step, or for ``count`` steps as rows: q first, then w (only when the
        model has noise symbols, so additive models keep their random streams)."""
        return self._draw(rng, self.Aq, self.spec.ne, count), (
            self._draw(rng, self.Aw, self.spec.nw, count) if self.spec.nw else None)

    def draw_sensor(self, rng: np.random.Generator, sensor: str, count: Optional[int] = None
                    ) -> Tuple[np.ndarray, Optional[np.ndarray]]:
        """(r, v) for one measurement of ``sensor``, or ``count`` of them as rows: r, then v."""
        s = self.spec.sensor(sensor)
        return self._draw(rng, self.Ar[sensor], s.m, count), (
            self._draw(rng, self.Av[sensor], s.nv, count) if s.nv else None)

    @staticmethod
    def _draw(rng: np.random.Generator, A: np.ndarray, k: int, count: Optional[int]) -> np.ndarray:
        """A z with z ~ N(0, I_k): one vector, or ``count`` rows."""
        if count is None:
            return A @ rng.standard_normal(k)
        return rng.standard_normal((count, k)) @ A.T

    # -- the model ------------------------------------------------------------------------------
    def step(self, x: np.ndarray, u: Sequence[float], q: np.ndarray, w: Optional[np.ndarray], step: int,
             scalar: bool = False) -> np.ndarray:
        """x[k+1] from x[k] = ``x`` with the drawn ``q`` and ``w``. ``scalar`` evaluates f with
        Python's math module (parameters and dt substituted: fast for long runs; overflow raises).
        A truth that leaves the model's domain is a :class:`ModelError` naming ``step``."""
        if scalar:
            try:
                fx = self._scalar_f()(*x, *u, *(w if w is not None else ()))
            except (OverflowError, ValueError, ZeroDivisionError) as err:
                raise ModelError(f"the simulated truth left the model's domain at step {step} "
                                 f"(t = {step * self.dt:g}): {err}", self.spec.where.get("process")) from None
            xn = np.asarray(fx, dtype=float).reshape(self.spec.n)
        else:
            xn = self.fn.f(np.asarray(x, dtype=float), np.asarray(u, dtype=float), self.dt, self.p, w)
        xn = self.fn.boxplus(xn, q)
        if self.angles.any():
            xn[self.angles] = wrap_angle(xn[self.angles])
        if not np.all(np.isfinite(xn)):
            raise ModelError(f"the simulated truth became non-finite at step {step} (t = {step * self.dt:g}); "
                             "check the model's dynamics and the input profile", self.spec.where.get("process"))
        return xn

    def measure(self, sensor: str, X: np.ndarray, r: np.ndarray, v: Optional[np.ndarray]) -> np.ndarray:
        """z = h(x, v) + r for one state (X of shape (n,)) or for rows of states (k, n) with rows
        of r and v; angle components wrapped."""
        X = np.asarray(X, dtype=float)
        if X.ndim == 1:
            z = self.fn.h(sensor, X, self.p, v) + r
        else:
            s = self.spec.sensor(sensor)
            Vt = v.T if v is not None else ()
            rows = [np.broadcast_to(np.asarray(fn(*X.T, *Vt), dtype=float), (X.shape[0],))
                    for fn in self._h_batch(sensor)]
            z = np.stack(rows, axis=1).reshape(X.shape[0], s.m) + r
        zang = self._zangles[sensor]
        if zang.any():
            z[..., zang] = wrap_angle(z[..., zang])
        return z

    def _scalar_f(self) -> Callable[..., Any]:
        if self._f_scalar is None:
            spec = self.spec
            subs = {p.symbol: self.pvals[p.name] for p in spec.params}
            f_num = [sp.sympify(e).subs(subs).subs(spec.dt, self.dt) for e in spec.f]
            self._f_scalar = sp.lambdify([*spec.x_syms, *spec.u_syms, *spec.w_syms], f_num, modules="math", cse=True)
        return self._f_scalar

    def _h_batch(self, sensor: str) -> List[Callable[..., Any]]:
        if sensor not in self._h_rows:
            spec, s = self.spec, self.spec.sensor(sensor)
            subs = {p.symbol: self.pvals[p.name] for p in spec.params}
            self._h_rows[sensor] = [sp.lambdify([*spec.x_syms, *s.v], sp.sympify(e).subs(subs), modules="numpy")
                                    for e in s.h]
        return self._h_rows[sensor]

