"""The numpy reference filters: the textbook EKF and UKF in plain dense float64.

These are what the generated C is proved against, so they favour the obvious formulation over
speed: lambdified model functions, full covariance matrices, Cholesky solves and the Joseph form.

Angles: a state or measurement component marked as an angle is wrapped to (-pi, pi] with
``wrap(a) = pi - mod(pi - a, 2 pi)`` (``mod`` with a positive divisor lies in [0, 2 pi), so the
result lies in (-pi, pi]; the one rounding case that lands on -pi is moved to +pi).

Every call that returns a non-zero :class:`~estgen.status.Status` leaves the filter exactly as
it was: the new state is computed aside and stored only once every check has passed.
"""

from __future__ import annotations

import abc
import math
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np
import sympy as sp

from .chi2 import chi2_ppf
from .derive_ukf import UkfWeights
from .errors import ModelError
from .model import ModelSpec, noise_factor, wrap_angle
from .status import Status

__all__ = [
    "ReferenceEKF",
    "ReferenceUKF",
    "ModelFunctions",
    "model_functions",
    "wrap_angle",
    "sigma_weights",
    "sigma_points",
    "unscented_transform",
    "gate_threshold",
]



def _wrap_masked(v: np.ndarray, mask: np.ndarray) -> np.ndarray:
    if mask.any():
        v = v.copy()
        v[mask] = wrap_angle(v[mask])
    return v


def gate_threshold(probability: float, m: int) -> float:
    """The chi-square gate: an innovation is rejected when its NIS exceeds this value
    (the ``probability`` quantile of chi-square with ``m`` degrees of freedom; the same
    routine the generator uses, so reference and C gate at the same value)."""
    return chi2_ppf(probability, m)


# ---------------------------------------------------------------------------------------------
# Model functions


def _lambdify(args: Sequence[sp.Symbol], mat: sp.Matrix) -> Callable[..., Any]:
    # cse keeps the RK4-discretized expressions from being evaluated term by term
    return sp.lambdify(args, mat, modules="numpy", cse=True)


def _jacobian_fn(args: Sequence[sp.Symbol], mat: sp.Matrix, xs: Sequence[sp.Symbol], what: str
                 ) -> Callable[..., Any]:
    """The Jacobian as a numpy function; for a model only the UKF can run (floor, Mod: sympy
    leaves an unprintable Derivative) a function that refuses when called, so the UKF, which
    never calls it, still gets the model's other functions."""
    try:
        return _lambdify(args, mat.jacobian(sp.Matrix(xs)))
    except (ValueError, TypeError, RuntimeError):  # sympy printers raise these for a Derivative
        def refuse(*_: Any) -> Any:
            raise ModelError(f"{what} cannot be differentiated; use the UKF for this model")
        return refuse


class ModelFunctions:
    """The model's f, F = df/dx, Q, and per sensor h, H = dh/dx and R as numpy functions; with
    noise symbols also L = df/dw, Qw and its factor, and per sensor M = dh/dv, Rv and its
    factor. Jacobians are taken at w = 0 (v = 0); f and h take the noise values (default 0).

    Parameters are an explicit argument (a tuple in ``spec.params`` order), so the truth of a
    simulation and a filter under test can share these functions yet use different parameters.
    """

    def __init__(self, spec: ModelSpec) -> None:
        self.spec = spec
        xs, us, ps, dt = spec.x_syms, spec.u_syms, spec.p_syms, spec.dt
        ws = spec.w_syms
        self.n = spec.n
        self.nu = spec.nu
        self.nw = len(ws)
        fargs = [*xs, *us, dt, *ps]
        self._f = _lambdify(fargs + ws, spec.f)
        self._F = _jacobian_fn(fargs, spec.f0, xs, "process()")
        self._Q = _lambdify([dt, *ps], spec.Q)
        zero_w = {w: 0 for w in ws}
        self._L = _lambdify(fargs, spec.f.jacobian(ws).xreplace(zero_w)) if ws else None
        self._Qw = _lambdify([dt, *ps], spec.Qw)
        self._Aw = _lambdify([dt, *ps], noise_factor(spec.Qw))
        self._h: Dict[str, Callable[..., Any]] = {}
        self._H: Dict[str, Callable[..., Any]] = {}
        self._R: Dict[str, Callable[..., Any]] = {}
        self._Mv: Dict[str, Callable[..., Any]] = {}
        self._Rv: Dict[str, Callable[..., Any]] = {}
        self._Av: Dict[str, Callable[..., Any]] = {}
        for s in spec.sensors:
            vs = list(s.v)
            self._h[s.name] = _lambdify([*xs, *ps, *vs], s.h)
            self._H[s.name] = _jacobian_fn([*xs, *ps], s.h0, xs, f"sensor {s.name!r}")
            self._R[s.name] = _lambdify(list(ps), s.R)
            if vs:
                self._Mv[s.name] = _lambdify([*xs, *ps], s.h.jacobian(vs).xreplace({v: 0 for v in vs}))
                self._Rv[s.name] = _lambdify(list(ps), s.Rv)
                self._Av[s.name] = _lambdify(list(ps), noise_factor(s.Rv))
        self.ne = spec.ne
        if spec.attitudes:
            from .errorstate import boxplus_symbolic, error_map, reset_jacobian, retraction_jacobian

            bx, be, plus = boxplus_symbolic(spec)
            self._plus = _lambdify([*bx, *be], sp.Matrix(plus))
            self._M = _lambdify(bx, retraction_jacobian(spec, bx))
            inv2 = {xi: 1 / sum((bx[k] ** 2 for k in range(xi, xi + 4)), sp.S.Zero) for xi in spec.attitudes}
            self._E = _lambdify(bx, error_map(spec, bx, inv2))
            self._G = _lambdify(be, reset_jacobian(spec, be))
            from . import quat

            ref = list(sp.symbols(f"br0:{spec.n}"))
            minus: List[sp.Expr] = []
            for kind, xi, _ in spec.error_blocks():
                if kind == "real":
                    minus.append(bx[xi] - ref[xi])
                else:
                    minus.extend(quat.log(quat.mul(quat.conj(ref[xi:xi + 4]), bx[xi:xi + 4])))
            self._minus = _lambdify([*bx, *ref], sp.Matrix(minus))
            self._minus_list = _lambdify([*bx, *ref], minus)  # entries one by one (arrays in, arrays out)
            self._err_angles = np.array([kind == "real" and spec.states[xi].angle
                                         for kind, xi, _ in spec.error_blocks()], dtype=bool)

    def boxminus(self, y: np.ndarray, ref: np.ndarray) -> np.ndarray:
        """``y ⊟ ref``, shape (ne,): the error e with ``y = ref ⊞ e`` (attitudes:
        quat.log(conj(ref_q) ⊗ y_q), the shorter way round; angles wrapped)."""
        if not self.spec.attitudes:
            return _wrap_masked(y - ref, np.array(self.spec.angle_states, dtype=bool))
        return _wrap_masked(self._arr(self._minus(*y, *ref), (self.ne,)), self._err_angles)

    def boxplus(self, x: np.ndarray, e: np.ndarray) -> np.ndarray:
        """``x ⊞ e``: plain states added, attitudes right-multiplied by exp(dtheta), shape (n,)."""
        if not self.spec.attitudes:
            return x + e
        return self._arr(self._plus(*x, *e), (self.n,))

    def boxminus_rows(self, Y: np.ndarray, R: np.ndarray) -> np.ndarray:
        """:meth:`boxminus` row by row, vectorized: (k, n) and (k, n) -> (k, ne)."""
        if not self.spec.attitudes:
            return _wrap_masked((Y - R).T, np.array(self.spec.angle_states, dtype=bool)).T
        cols = self._minus_list(*Y.T, *R.T)
        out = np.stack([np.broadcast_to(np.asarray(c, dtype=float), (Y.shape[0],)) for c in cols], axis=1)
        if self._err_angles.any():
            out[:, self._err_angles] = wrap_angle(out[:, self._err_angles])
        return out

    def normalize(self, x: np.ndarray) -> np.ndarray:
        """``x`` with every attitude scaled to a unit quaternion."""
        x = np.array(x, dtype=float)
        for i in self.spec.attitudes:
            x[i:i + 4] /= np.linalg.norm(x[i:i + 4])
        return x

    def reset_jacobian(self, dx: np.ndarray) -> np.ndarray:
        """``G`` (ne, ne) of an injected correction ``dx``: I - [dtheta/2 x] on each attitude's
        block, identity elsewhere (:func:`estgen.errorstate.reset_jacobian`); identity without
        attitudes."""
        if not self.spec.attitudes:
            return np.eye(self.ne)
        return self._arr(self._G(*dx), (self.ne, self.ne))

    def F_err(self, x: np.ndarray, u: np.ndarray, dt: float, p: Tuple[float, ...]) -> np.ndarray:
        """The error-state transition ``E(f(x)) df/dx M(x)`` (ne, ne); df/dx without attitudes."""
        F = self.F(x, u, dt, p)
        if not self.spec.attitudes:
            return F
        y = self.f(x, u, dt, p)
        return self._arr(self._E(*y), (self.ne, self.n)) @ F @ self._arr(self._M(*x), (self.n, self.ne))

    def H_err(self, sensor: str, x: np.ndarray, p: Tuple[float, ...]) -> np.ndarray:
        """``dh/dx M(x)`` (m, ne); dh/dx without attitudes."""
        H = self.H(sensor, x, p)
        if not self.spec.attitudes:
            return H
        return H @ self._arr(self._M(*x), (self.n, self.ne))

    def L_err(self, x: np.ndarray, u: np.ndarray, dt: float, p: Tuple[float, ...]) -> np.ndarray:
        """``E(f(x)) df/dw`` (ne, nw) at w = 0; df/dw without attitudes."""
        L = self.L(x, u, dt, p)
        if not self.spec.attitudes:
            return L
        y = self.f(x, u, dt, p)
        return self._arr(self._E(*y), (self.ne, self.n)) @ L

    def param_tuple(self, params: Mapping[str, float]) -> Tuple[float, ...]:
        """Parameter values in model order."""
        return tuple(float(params[p.name]) for p in self.spec.params)

    @staticmethod
    def _arr(value: Any, shape: Tuple[int, ...]) -> np.ndarray:
        return np.array(value, dtype=float).reshape(shape)

    def f(self, x: np.ndarray, u: np.ndarray, dt: float, p: Tuple[float, ...],
          w: Optional[np.ndarray] = None) -> np.ndarray:
        """The discrete map x[k+1] = f(x, u, w, dt), shape (n,); ``w`` (the noise symbols of
        the process, length nw) defaults to zero."""
        wv = np.zeros(self.nw) if w is None else w
        return self._arr(self._f(*x, *u, dt, *p, *wv), (self.n,))

    def F(self, x: np.ndarray, u: np.ndarray, dt: float, p: Tuple[float, ...]) -> np.ndarray:
        """The Jacobian df/dx at w = 0, shape (n, n)."""
        return self._arr(self._F(*x, *u, dt, *p), (self.n, self.n))

    def L(self, x: np.ndarray, u: np.ndarray, dt: float, p: Tuple[float, ...]) -> np.ndarray:
        """The Jacobian df/dw at w = 0, shape (n, nw)."""
        if self._L is None:
            return np.zeros((self.n, 0))
        return self._arr(self._L(*x, *u, dt, *p), (self.n, self.nw))

    def Q(self, dt: float, p: Tuple[float, ...]) -> np.ndarray:
        """The additive process noise covariance, shape (ne, ne) (the error dimension)."""
        return self._arr(self._Q(dt, *p), (self.spec.ne, self.spec.ne))

    def Qw(self, dt: float, p: Tuple[float, ...]) -> np.ndarray:
        """The covariance of the process noise symbols, shape (nw, nw)."""
        return self._arr(self._Qw(dt, *p), (self.nw, self.nw))

    def Aw(self, dt: float, p: Tuple[float, ...]) -> np.ndarray:
        """The factor of Qw the UKF spreads its sigma points with (:func:`estgen.model.noise_factor`)."""
        return self._arr(self._Aw(dt, *p), (self.nw, self.nw))

    def h(self, sensor: str, x: np.ndarray, p: Tuple[float, ...], v: Optional[np.ndarray] = None) -> np.ndarray:
        """The sensor's measurement function h(x, v), shape (m,); ``v`` defaults to zero."""
        s = self.spec.sensor(sensor)
        vv = np.zeros(s.nv) if v is None else v
        return self._arr(self._h[sensor](*x, *p, *vv), (s.m,))

    def H(self, sensor: str, x: np.ndarray, p: Tuple[float, ...]) -> np.ndarray:
        """The sensor's Jacobian dh/dx at v = 0, shape (m, n)."""
        m = self.spec.sensor(sensor).m
        return self._arr(self._H[sensor](*x, *p), (m, self.n))

    def M(self, sensor: str, x: np.ndarray, p: Tuple[float, ...]) -> np.ndarray:
        """The sensor's Jacobian dh/dv at v = 0, shape (m, nv)."""
        s = self.spec.sensor(sensor)
        if not s.nv:
            return np.zeros((s.m, 0))
        return self._arr(self._Mv[sensor](*x, *p), (s.m, s.nv))

    def R(self, sensor: str, p: Tuple[float, ...]) -> np.ndarray:
        """The sensor's additive noise covariance, shape (m, m)."""
        m = self.spec.sensor(sensor).m
        return self._arr(self._R[sensor](*p), (m, m))

    def Rv(self, sensor: str, p: Tuple[float, ...]) -> np.ndarray:
        """The covariance of the sensor's noise symbols, shape (nv, nv)."""
        nv = self.spec.sensor(sensor).nv
        return self._arr(self._Rv[sensor](*p), (nv, nv)) if nv else np.zeros((0, 0))

    def Av(self, sensor: str, p: Tuple[float, ...]) -> np.ndarray:
        """The factor of Rv the UKF spreads its sigma points with."""
        nv = self.spec.sensor(sensor).nv
        return self._arr(self._Av[sensor](*p), (nv, nv)) if nv else np.zeros((0, 0))


def model_functions(spec: ModelSpec) -> ModelFunctions:
    """:class:`ModelFunctions` for ``spec``, lambdified once per spec object (Monte Carlo
    builds one filter per run; lambdifying each time would dominate the run time)."""
    return spec.derived("model_functions", lambda: ModelFunctions(spec))


# ---------------------------------------------------------------------------------------------
# The scaled unscented transform (Julier 2002; Wan & van der Merwe 2000)


def sigma_weights(n: int, alpha: float, beta: float, kappa: float) -> Tuple[float, np.ndarray, np.ndarray]:
    """``(lambda, Wm, Wc)`` of the scaled unscented transform for dimension ``n``."""
    lam = alpha * alpha * (n + kappa) - n
    c = n + lam
    wm = np.full(2 * n + 1, 0.5 / c)
    wc = wm.copy()
    wm[0] = lam / c
    wc[0] = lam / c + 1.0 - alpha * alpha + beta
    return lam, wm, wc


def sigma_points(x: np.ndarray, P: np.ndarray, lam: float) -> Optional[np.ndarray]:
    """The 2n+1 sigma points as rows: x, x + L[:, i], x - L[:, i] with L L' = (n + lambda) P
    (lower Cholesky). None when (n + lambda) P is not positive definite."""
    n = x.shape[0]
    try:
        L = np.linalg.cholesky((n + lam) * P)
    except np.linalg.LinAlgError:
        return None
    X = np.empty((2 * n + 1, n))
    X[0] = x
    X[1:n + 1] = x + L.T
    X[n + 1:] = x - L.T
    return X


def _weighted_mean(Y: np.ndarray, wm: np.ndarray, angles: np.ndarray) -> np.ndarray:
    mean = wm @ Y
    if angles.any():
        # circular mean: the arithmetic mean of angles near +-pi would point the wrong way
        s = wm @ np.sin(Y[:, angles])
        c = wm @ np.cos(Y[:, angles])
        mean[angles] = np.arctan2(s, c)
    return mean


def _deviations(Y: np.ndarray, mean: np.ndarray, angles: np.ndarray) -> np.ndarray:
    d = Y - mean
    if angles.any():
        d[:, angles] = wrap_angle(d[:, angles])
    return d


def unscented_transform(
    func: Callable[[np.ndarray], np.ndarray],
    x: np.ndarray,
    P: np.ndarray,
    *,
    alpha: float = 1.0,
    beta: float = 2.0,
    kappa: float = 0.0,
    angles: Optional[Sequence[bool]] = None,
) -> Tuple[np.ndarray, np.ndarray]:
    """Mean and covariance of ``func(X)`` for X ~ (x, P) by the scaled unscented transform.

    ``angles`` marks output components that are angles (circular mean, wrapped deviations).
    Raises ``numpy.linalg.LinAlgError`` when P is not positive definite.
    """
    x = np.asarray(x, dtype=float)
    P = np.asarray(P, dtype=float)
    lam, wm, wc = sigma_weights(x.shape[0], alpha, beta, kappa)
    X = sigma_points(x, P, lam)
    if X is None:
        raise np.linalg.LinAlgError("P is not positive definite")
    Y = np.array([np.asarray(func(xi), dtype=float).reshape(-1) for xi in X])
    mask = np.zeros(Y.shape[1], bool) if angles is None else np.asarray(angles, bool)
    mean = _weighted_mean(Y, wm, mask)
    d = _deviations(Y, mean, mask)
    return mean, (d.T * wc) @ d


# ---------------------------------------------------------------------------------------------
# Filters


def _finite(*arrays: np.ndarray) -> bool:
    return all(bool(np.all(np.isfinite(a))) for a in arrays)


def _chol_solve(S: np.ndarray, B: np.ndarray) -> Optional[np.ndarray]:
    """``S^-1 B`` through the lower Cholesky factor S = L L', or None when S is not positive
    definite."""
    try:
        L = np.linalg.cholesky(S)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.diag(L) > 0.0):
        return None
    return np.linalg.solve(L.T, np.linalg.solve(L, B))


#: what an update's innovation step hands on: y, S, C = cov(x, z), and P' as a function of (K, S)
_Innovation = Tuple[np.ndarray, np.ndarray, np.ndarray, Callable[[np.ndarray, np.ndarray], np.ndarray]]


class _ReferenceBase(abc.ABC):
    """What the EKF and UKF share: state, parameters, argument checks and gating."""

    filter: str = ""

    def __init__(self, spec: ModelSpec, params: Optional[Mapping[str, float]] = None,
                 functions: Optional[ModelFunctions] = None) -> None:
        self.spec = spec
        self._fn = functions if functions is not None else model_functions(spec)
        self._params: Dict[str, float] = spec.param_defaults()
        for name, value in (params or {}).items():
            self.set_param(name, value)
        self._angles = np.array(spec.angle_states, dtype=bool)
        self._x = self._fn.normalize(_wrap_masked(np.array(spec.x0, dtype=float), self._angles))
        self._P = np.array(spec.P0, dtype=float)
        self._nis = math.nan
        self._gates: Dict[str, Optional[float]] = {
            s.name: (None if s.gate is None else gate_threshold(s.gate, s.m)) for s in spec.sensors
        }
        self._sensor_angles = {s.name: np.array(s.angles, dtype=bool) for s in spec.sensors}

    # -- read-only views ----------------------------------------------------------------------
    @property
    def x(self) -> np.ndarray:
        """The state estimate, a copy, shape (n,)."""
        return self._x.copy()

    @property
    def P(self) -> np.ndarray:
        """The state covariance, a copy, shape (ne, ne): n minus one per attitude."""
        return self._P.copy()

    @property
    def n(self) -> int:
        """The number of states."""
        return self.spec.n

    @property
    def sensors(self) -> List[str]:
        """Sensor names in model order."""
        return [s.name for s in self.spec.sensors]

    @property
    def params(self) -> Dict[str, float]:
        """The current parameter values (a copy)."""
        return dict(self._params)

    @property
    def nis(self) -> float:
        """y' S^-1 y of the last update that formed S (accepted or gated); nan before any."""
        return self._nis

    def set_param(self, name: str, value: float) -> None:
        """Change a runtime parameter. Unknown names raise KeyError."""
        if name not in self._params:
            raise KeyError(f"model {self.spec.name!r} has no parameter {name!r}; it has {sorted(self._params)}")
        self._params[name] = float(value)

    def set_state(self, x: Sequence[float], P: Any) -> int:
        """Replace the state and covariance. Returns BAD_INPUT for non-finite values and
        NOT_POSITIVE_DEFINITE when P is not symmetric positive definite."""
        n, ne = self.n, self.spec.ne
        xv = np.asarray(x, dtype=float).reshape(-1)
        Pm = np.asarray(P, dtype=float)
        if xv.shape != (n,) or Pm.shape != (ne, ne):
            raise ValueError(f"set_state needs x of length {n} and P of shape ({ne}, {ne}), "
                             f"got {xv.shape} and {Pm.shape}")
        if not _finite(xv, Pm):
            return int(Status.BAD_INPUT)
        if any(not 0.0 < np.linalg.norm(xv[i:i + 4]) < math.inf for i in self.spec.attitudes):
            return int(Status.BAD_INPUT)  # a zero quaternion has no direction to scale to (nor an overflowing one)
        scale = float(np.max(np.abs(np.diag(Pm)))) if n else 0.0
        if np.max(np.abs(Pm - Pm.T)) > 1e-9 * scale:
            return int(Status.NOT_POSITIVE_DEFINITE)
        Ps = 0.5 * (Pm + Pm.T)
        try:
            np.linalg.cholesky(Ps)
        except np.linalg.LinAlgError:
            return int(Status.NOT_POSITIVE_DEFINITE)
        self._x = self._fn.normalize(_wrap_masked(xv.copy(), self._angles))
        self._P = Ps
        return int(Status.OK)

    # -- argument checks ----------------------------------------------------------------------
    def _p(self) -> Tuple[float, ...]:
        return self._fn.param_tuple(self._params)

    def _check_predict(self, u: Sequence[float], dt: float) -> Tuple[Optional[int], np.ndarray, float]:
        uv = np.asarray(u if u is not None else [], dtype=float).reshape(-1)
        if uv.shape != (self.spec.nu,):
            raise ValueError(f"predict needs u of length {self.spec.nu}, got {uv.shape[0]}")
        dtf = float(dt)
        if not (_finite(uv) and math.isfinite(dtf)):
            return int(Status.BAD_INPUT), uv, dtf
        if dtf <= 0.0:
            return int(Status.BAD_DT), uv, dtf
        return None, uv, dtf

    def _check_update(self, sensor: str, z: Sequence[float]) -> Tuple[Optional[int], np.ndarray]:
        s = self.spec.sensor(sensor)  # KeyError for an unknown name
        zv = np.asarray(z, dtype=float).reshape(-1)
        if zv.shape != (s.m,):
            raise ValueError(f"sensor {sensor!r} gives {s.m} values, got {zv.shape[0]}")
        if not _finite(zv):
            return int(Status.BAD_INPUT), zv
        return None, zv

    def update(self, sensor: str, z: Sequence[float]) -> int:
        """Measurement update with sensor ``sensor``. Returns a :class:`Status` code; unknown
        sensors raise KeyError and a z of the wrong length ValueError."""
        bad, zv = self._check_update(sensor, z)
        if bad is not None:
            return bad
        with np.errstate(all="ignore"):
            terms = self._innovation(sensor, zv)
            if isinstance(terms, int):
                return terms
            y, S, C, covariance = terms
            bad, K = self._finish_update(sensor, y, S, C)
            if bad is not None:
                return bad
            xn = self._fn.boxplus(self._x, K @ y)  # the error injected (attitudes: q ⊗ exp(dtheta))
            Pn = covariance(K, S)
        return self._commit(xn, Pn)

    @abc.abstractmethod
    def _innovation(self, sensor: str, z: np.ndarray) -> Union[int, _Innovation]:
        """(y, S, C = cov(x, z), covariance(K, S) -> P') or a refusal code."""

    def _finish_update(self, sensor: str, y: np.ndarray, S: np.ndarray, C: np.ndarray
                       ) -> Tuple[Optional[int], Optional[np.ndarray]]:
        """Shared tail of an update: K = C S^-1, NIS and the gate. Returns (refusal, K)."""
        if not _finite(S, C, y):
            return int(Status.NON_FINITE), None
        S = 0.5 * (S + S.T)
        sol = _chol_solve(S, np.column_stack([y, C.T]))
        if sol is None:
            return int(Status.NOT_POSITIVE_DEFINITE), None
        nis = float(y @ sol[:, 0])
        if not math.isfinite(nis):
            return int(Status.NON_FINITE), None
        self._nis = nis
        thr = self._gates[sensor]
        if thr is not None and nis > thr:
            return int(Status.GATED), None
        return None, sol[:, 1:].T

    def _commit(self, x: np.ndarray, P: np.ndarray) -> int:
        x = self._fn.normalize(_wrap_masked(x, self._angles))
        P = 0.5 * (P + P.T)
        if not _finite(x, P):
            return int(Status.NON_FINITE)
        self._x, self._P = x, P
        return int(Status.OK)

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.spec.name!r}, n={self.n})"


class ReferenceEKF(_ReferenceBase):
    """Extended Kalman filter: linearize f and h at the current estimate (Jacobians by sympy)."""

    filter = "ekf"

    def predict(self, u: Sequence[float], dt: float) -> int:
        """x = f(x, u, 0, dt); P = F P F' + L Qw L' + Q(dt). Returns a :class:`Status` code."""
        bad, uv, dtf = self._check_predict(u, dt)
        if bad is not None:
            return bad
        p = self._p()
        with np.errstate(all="ignore"):
            xn = self._fn.f(self._x, uv, dtf, p)
            F = self._fn.F_err(self._x, uv, dtf, p)
            Q = self._fn.Q(dtf, p)
            L = self._fn.L_err(self._x, uv, dtf, p)
            Qw = self._fn.Qw(dtf, p)
            if not _finite(xn, F, Q, L, Qw):
                return int(Status.NON_FINITE)
            Pn = F @ self._P @ F.T + L @ Qw @ L.T + Q
        return self._commit(xn, Pn)

    def _innovation(self, sensor: str, z: np.ndarray) -> Union[int, _Innovation]:
        """Linearize h at x and v = 0, R_eff = M Rv M' + R; the covariance update is the Joseph form
        (attitudes: then the reset P <- G P G', see :meth:`ModelFunctions.reset_jacobian`)."""
        p = self._p()
        x, P = self._x, self._P
        hx = self._fn.h(sensor, x, p)
        H = self._fn.H_err(sensor, x, p)
        M = self._fn.M(sensor, x, p)
        R = self._fn.R(sensor, p) + M @ self._fn.Rv(sensor, p) @ M.T
        if not _finite(hx, H, R):
            return int(Status.NON_FINITE)
        y = _wrap_masked(z - hx, self._sensor_angles[sensor])
        PHt = P @ H.T

        def joseph(K: np.ndarray, S: np.ndarray) -> np.ndarray:
            A = np.eye(P.shape[0]) - K @ H
            Pj = A @ P @ A.T + K @ R @ K.T  # stays PSD under rounding, unlike (I - KH) P
            if not self.spec.attitudes:
                return Pj
            G = self._fn.reset_jacobian(K @ y)  # the error re-referenced to x ⊞ K y
            return G @ Pj @ G.T

        return y, H @ PHt + R, PHt, joseph


class ReferenceUKF(_ReferenceBase):
    """Unscented Kalman filter with the scaled unscented transform. With noise symbols the
    sigma points are those of the augmented vector ``[x; w]`` (predict) or ``[x; v]`` (an update
    of a sensor with noise symbols), with the weights of that dimension; additive Q and R are
    added to the transformed covariance."""

    filter = "ukf"

    def __init__(self, spec: ModelSpec, *, alpha: float = 1.0, beta: float = 2.0, kappa: float = 0.0,
                 params: Optional[Mapping[str, float]] = None, functions: Optional[ModelFunctions] = None) -> None:
        UkfWeights(spec.ne, alpha, beta, kappa)  # validates the parameters (UsageError)
        super().__init__(spec, params, functions)
        self.alpha, self.beta, self.kappa = float(alpha), float(beta), float(kappa)
        self._lam, self._wm, self._wc = sigma_weights(spec.ne, self.alpha, self.beta, self.kappa)

    @property
    def weights(self) -> Tuple[np.ndarray, np.ndarray]:
        """The mean and covariance weights (Wm, Wc), each of length 2n+1."""
        return self._wm.copy(), self._wc.copy()

    def _points(self, Anoise: np.ndarray, mean: Optional[np.ndarray] = None
                ) -> Union[int, Tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """Sigma points of ``[mean; noise]`` (rows; ``mean`` defaults to x, the error-space
        zero for attitudes) with covariance blockdiag(P, A A') and their weights; without noise
        symbols those of ``mean``. A refusal code when P is not positive definite or the noise
        factor is not finite."""
        centre0 = self._x if mean is None else mean
        k = Anoise.shape[0]
        if not k:
            X = sigma_points(centre0, self._P, self._lam)
            return int(Status.NOT_POSITIVE_DEFINITE) if X is None else (X, self._wm, self._wc)
        n = centre0.shape[0]
        lam, wm, wc = sigma_weights(n + k, self.alpha, self.beta, self.kappa)
        try:
            Lp = np.linalg.cholesky(self._P)
        except np.linalg.LinAlgError:
            return int(Status.NOT_POSITIVE_DEFINITE)
        if not _finite(Anoise):
            return int(Status.NON_FINITE)
        Laug = np.zeros((n + k, n + k))
        Laug[:n, :n], Laug[n:, n:] = Lp, Anoise
        Laug *= math.sqrt(n + k + lam)
        centre = np.concatenate([centre0, np.zeros(k)])
        return np.vstack([centre, centre + Laug.T, centre - Laug.T]), wm, wc

    def predict(self, u: Sequence[float], dt: float) -> int:
        """Propagate the sigma points (of ``[x; w]`` with noise symbols) through f; Q is added
        to their covariance."""
        bad, uv, dtf = self._check_predict(u, dt)
        if bad is not None:
            return bad
        p = self._p()
        if self.spec.attitudes:
            return self._predict_error_space(uv, dtf, p)
        with np.errstate(all="ignore"):
            pts = self._points(self._fn.Aw(dtf, p))
            if isinstance(pts, int):
                return pts
            X, wm, wc = pts
            n = self.n
            Y = np.array([self._fn.f(xi[:n], uv, dtf, p, xi[n:]) for xi in X])
            Q = self._fn.Q(dtf, p)
            if not _finite(Y, Q):
                return int(Status.NON_FINITE)
            xn = _weighted_mean(Y, wm, self._angles)
            d = _deviations(Y, xn, self._angles)
            Pn = (d.T * wc) @ d + Q
        return self._commit(xn, Pn)

    def _predict_error_space(self, uv: np.ndarray, dtf: float, p: Tuple[float, ...]) -> int:
        """Attitudes: sigma points x ⊞ e_i, errors of the images about the central one,
        Y_0 ⊞ (their weighted mean), covariance of the errors about that mean (the algorithm of
        :mod:`estgen.derive_ukf_att`)."""
        ne = self.spec.ne
        with np.errstate(all="ignore"):
            pts = self._points(self._fn.Aw(dtf, p), np.zeros(ne))
            if isinstance(pts, int):
                return pts
            E, wm, wc = pts
            Y = np.array([self._fn.f(self._fn.boxplus(self._x, e[:ne]), uv, dtf, p, e[ne:]) for e in E])
            Q = self._fn.Q(dtf, p)
            if not _finite(Y, Q):
                return int(Status.NON_FINITE)
            d = np.array([self._fn.boxminus(y, Y[0]) for y in Y])
            dbar = wm @ d
            dev = d - dbar
            xn = self._fn.boxplus(Y[0], dbar)
            Pn = (dev.T * wc) @ dev + Q
        return self._commit(xn, Pn)

    def _innovation(self, sensor: str, z: np.ndarray) -> Union[int, _Innovation]:
        """Fresh sigma points from (x, P) through h; the covariance update is P - K S K' (attitudes:
        then the reset P <- G P G', see :meth:`ModelFunctions.reset_jacobian`)."""
        p = self._p()
        x, P = self._x, self._P
        n = self.n
        zang = self._sensor_angles[sensor]
        if self.spec.attitudes:
            ne = self.spec.ne
            pts = self._points(self._fn.Av(sensor, p), np.zeros(ne))
            if isinstance(pts, int):
                return pts
            E, wm, wc = pts
            Z = np.array([self._fn.h(sensor, self._fn.boxplus(x, e[:ne]), p, e[ne:]) for e in E])
            R = self._fn.R(sensor, p)
            if not _finite(Z, R):
                return int(Status.NON_FINITE)
            dZ = Z - Z[0]  # about the central image, as the C does
            if zang.any():
                dZ[:, zang] = wrap_angle(dZ[:, zang])
            off = wm @ dZ
            dev = dZ - off
            S = (dev.T * wc) @ dev + R
            C = (E[:, :ne].T * wc) @ dev
            y = _wrap_masked(z - (Z[0] + off), zang)

            def reset(K: np.ndarray, S_: np.ndarray) -> np.ndarray:
                G = self._fn.reset_jacobian(K @ y)  # the error re-referenced to x ⊞ K y, as the EKF
                return G @ (P - K @ S_ @ K.T) @ G.T

            return y, S, C, reset
        pts = self._points(self._fn.Av(sensor, p))
        if isinstance(pts, int):
            return pts
        X, wm, wc = pts
        Z = np.array([self._fn.h(sensor, xi[:n], p, xi[n:]) for xi in X])
        R = self._fn.R(sensor, p)
        if not _finite(Z, R):
            return int(Status.NON_FINITE)
        zhat = _weighted_mean(Z, wm, zang)
        dZ = _deviations(Z, zhat, zang)
        # X - x is exactly the +-L column by construction: not wrapped, even for angles
        dX = X[:, :n] - x
        S = (dZ.T * wc) @ dZ + R
        C = (dX.T * wc) @ dZ
        return _wrap_masked(z - zhat, zang), S, C, lambda K, S_: P - K @ S_ @ K.T
