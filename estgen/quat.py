"""Unit quaternions as sympy expressions, for attitude states (``model.attitude``).

Convention: a quaternion is ``(w, x, y, z)``, scalar first, Hamilton product
(``i*j = k``); an attitude quaternion rotates body-frame vectors into the reference frame,
``v_ref = q v_body q*``. The functions return lists of sympy expressions that a model file
uses in ``process`` and ``sensor``.

``exp`` (rotation vector -> unit quaternion) needs ``cos(|v|/2)`` and ``sin(|v|/2)/|v|``; the
second is 0/0 at a zero angle. Both are written as functions of ``t = v.v`` (both are entire
functions of ``t``: their Taylor series in ``t`` contain no square root), represented by
:class:`HalfAngle`. It prints as ``(t < 1) ? series(t) : closed_form(t)``: eight terms of the
Taylor series below one radian (truncation error under 1e-18, far below double rounding), the
closed form above it, where ``sqrt(t) >= 1`` cannot divide by zero. The C evaluates only the
chosen branch, so no division by zero is ever executed; the numpy form clamps ``t`` in the closed
branch since numpy evaluates both. Derivatives are again :class:`HalfAngle` functions (higher
order), so the EKF's Jacobians stay guarded too.
"""

from __future__ import annotations

from typing import Any, List, Sequence

import sympy as sp

__all__ = ["mul", "conj", "rotate", "exp", "log", "HalfAngle", "LogScale", "Q"]

#: A quaternion: four sympy expressions (w, x, y, z).
Q = List[sp.Expr]

_SERIES_TERMS = 8  # terms of the Taylor series in t below t = 1 (error < 0.25**8 / 16! ~ 1e-18)
_T = sp.Symbol("t", nonnegative=True)


def _q(q: Sequence[Any], what: str) -> Q:
    items = list(q)
    if len(items) != 4:
        raise ValueError(f"{what} must have 4 components (w, x, y, z), got {len(items)}")
    return [sp.sympify(e) for e in items]


def _v(v: Sequence[Any], what: str) -> List[sp.Expr]:
    items = list(v)
    if len(items) != 3:
        raise ValueError(f"{what} must have 3 components, got {len(items)}")
    return [sp.sympify(e) for e in items]


def mul(p: Sequence[Any], q: Sequence[Any]) -> Q:
    """Hamilton product ``p ⊗ q`` of two quaternions (w, x, y, z)."""
    pw, px, py, pz = _q(p, "mul: p")
    qw, qx, qy, qz = _q(q, "mul: q")
    return [
        pw * qw - px * qx - py * qy - pz * qz,
        pw * qx + px * qw + py * qz - pz * qy,
        pw * qy - px * qz + py * qw + pz * qx,
        pw * qz + px * qy - py * qx + pz * qw,
    ]


def conj(q: Sequence[Any]) -> Q:
    """Conjugate ``q*`` (the inverse of a unit quaternion)."""
    w, x, y, z = _q(q, "conj: q")
    return [w, -x, -y, -z]


def rotate(q: Sequence[Any], v: Sequence[Any]) -> List[sp.Expr]:
    """The vector part of ``q ⊗ (0, v) ⊗ q*``: ``v`` rotated by ``q`` (body to reference for an
    attitude). Exactly the product, also for a quaternion that is not unit (then scaled by |q|^2)."""
    qq = _q(q, "rotate: q")
    vv = _v(v, "rotate: v")
    r = mul(mul(qq, [sp.S.Zero, *vv]), conj(qq))
    return [sp.expand(e) for e in r[1:]]


def _closed(kind: int) -> sp.Expr:
    s = sp.sqrt(_T)
    return sp.cos(s / 2) if kind == 0 else sp.sin(s / 2) / s


def _horner(coeffs: Sequence[sp.Expr], t: sp.Expr) -> sp.Expr:
    """c0 + t*(c1 + t*(c2 + ...)), kept in that shape (sympy would distribute the products)."""
    acc = coeffs[-1]
    for c in reversed(coeffs[:-1]):
        acc = sp.Add(c, sp.Mul(t, acc, evaluate=False), evaluate=False)
    return acc


def _terms(printer: Any) -> int:
    """Series terms a printer needs: float needs 5 below t = 1 (0.25**5/10! ~ 3e-10)."""
    return 5 if getattr(printer, "precision", "double") == "float" else _SERIES_TERMS


def _series(kind: int, order: int, t: sp.Expr, count: int = _SERIES_TERMS) -> sp.Expr:
    """Taylor series in t of the ``order``-th derivative of cos(sqrt(t)/2) (kind 0) or
    sin(sqrt(t)/2)/sqrt(t) (kind 1), Horner-shaped."""
    terms = []
    for j in range(order, order + count):
        if kind == 0:
            c = sp.Rational((-1) ** j, 4 ** j * sp.factorial(2 * j))
        else:
            c = sp.Rational((-1) ** j, 2 * 4 ** j * sp.factorial(2 * j + 1))
        terms.append(c * sp.ff(j, order))  # d^order/dt^order t^j = j!/(j-order)! t^(j-order)
    return _horner(terms, t)


class HalfAngle(sp.Function):
    """``HalfAngle(kind, order, t)``: the ``order``-th derivative in ``t`` of ``cos(sqrt(t)/2)``
    (kind 0) or of ``sin(sqrt(t)/2)/sqrt(t)`` (kind 1); guarded at t = 0 (see the module text)."""

    nargs = 3

    @classmethod
    def eval(cls, kind: Any, order: Any, t: Any) -> Any:
        if t.is_zero:
            return _series(int(kind), int(order), sp.S.Zero)
        return None

    def fdiff(self, argindex: int = 3) -> sp.Expr:
        if argindex != 3:
            raise sp.ArgumentIndexError(self, argindex)
        kind, order, t = self.args
        return HalfAngle(kind, order + 1, t)

    def _forms(self, t: sp.Expr, count: int = _SERIES_TERMS) -> tuple:
        kind, order = int(self.args[0]), int(self.args[1])
        closed = sp.diff(_closed(kind), _T, order)
        return _series(kind, order, t, count), closed, _T

    def as_guarded(self, clamp: bool) -> sp.Piecewise:
        """The guarded expression: the series below t = 1, the closed form above (with
        ``clamp``, the closed form is fed max(t, 1), for printers that evaluate both branches)."""
        t = self.args[2]
        ser, closed, sym = self._forms(t)
        arg = sp.Max(t, sp.S.One) if clamp else t
        return sp.Piecewise((ser, t < 1), (closed.xreplace({sym: arg}), True))

    def _eval_evalf(self, prec: int) -> Any:
        t = self.args[2].evalf(prec)
        if not t.is_Number:
            return None
        return self.as_guarded(False).xreplace({self.args[2]: t}).evalf(prec)

    def _ccode(self, printer: Any) -> str:
        t = self.args[2]
        ser, closed, sym = self._forms(t, _terms(printer))
        one = printer._print(sp.S.One)
        return (f"(({printer._print(t)} < {one}) ? ({printer._print(ser)}) : "
                f"({printer._print(closed.xreplace({sym: t}))}))")

    def _numpycode(self, printer: Any) -> str:
        return printer._print(self.as_guarded(True))

    _pythoncode = _numpycode
    _mpmathcode = _numpycode
    _lambdacode = _numpycode


def exp(v: Sequence[Any]) -> Q:
    """Rotation vector ``v`` (rad) -> unit quaternion ``(cos(|v|/2), sin(|v|/2) v/|v|)``; exact at
    and near a zero angle (see the module text)."""
    vv = _v(v, "exp: v")
    t = sum((e * e for e in vv), sp.S.Zero)
    c = HalfAngle(0, 0, t)
    s = HalfAngle(1, 0, t)
    return [c, s * vv[0], s * vv[1], s * vv[2]]


class LogScale(sp.Function):
    """``LogScale(s, w) = 2 atan(sqrt(s)/w) / sqrt(s)`` for ``w > 0``: the factor that maps the
    vector part of a unit quaternion with scalar part ``w`` and ``|vector|^2 = s`` to its rotation
    vector (the inverse of :func:`exp`). Below s = w^2/16 (angles under about 28 deg) the Taylor
    series of atan(r)/r in r^2 = s/w^2 (14 terms, truncation error < 0.0625**14 ~ 1e-17), the
    closed form above, so s = 0 divides by nothing."""

    nargs = 2

    def _forms(self, count: int = 14) -> tuple:
        s, w = self.args
        r = s / (w * w)
        acc = _horner([sp.Rational((-1) ** j, 2 * j + 1) for j in range(count)], r)
        return 2 * acc / w, 2 * sp.atan(sp.sqrt(s) / w) / sp.sqrt(s), 16 * s < w * w

    def _eval_evalf(self, prec: int) -> Any:
        ser, closed, cond = self._forms()
        return sp.Piecewise((ser, cond), (closed, True)).evalf(prec)

    def _ccode(self, printer: Any) -> str:
        # float: 6 terms (0.0625**6/13 ~ 5e-9)
        ser, closed, cond = self._forms(6 if getattr(printer, "precision", "double") == "float" else 14)
        return f"(({printer._print(cond)}) ? ({printer._print(ser)}) : ({printer._print(closed)}))"

    def _numpycode(self, printer: Any) -> str:
        s, w = self.args
        ser, _, cond = self._forms()
        safe = sp.Max(s, w * w / 16)
        closed = 2 * sp.atan(sp.sqrt(safe) / w) / sp.sqrt(safe)
        return printer._print(sp.Piecewise((ser, cond), (closed, True)))

    _pythoncode = _numpycode
    _lambdacode = _numpycode


def log(q: Sequence[Any]) -> List[sp.Expr]:
    """Rotation vector of a unit quaternion whose scalar part is positive (the inverse of
    :func:`exp` for angles below pi)."""
    w, x, y, z = _q(q, "log: q")
    k = LogScale(x * x + y * y + z * z, w)
    return [k * x, k * y, k * z]
