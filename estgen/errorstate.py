"""The error-state (multiplicative) description of attitude states, shared by the EKF and UKF
derivations and the reference filters.

A state vector ``x`` (n entries, four per attitude) has an error ``e`` (ne entries, three per
attitude): ``x_true = x ⊞ e`` with ``q_true = q ⊗ quat.exp(dtheta)`` for an attitude (body-frame
error, right-multiplied) and ``x_true = x + e`` for a plain state (Markley, J. Guidance Control
Dyn. 26(2), 2003; Sola, "Quaternion kinematics for the error-state Kalman filter", 2017).

The EKF's Jacobians are those of the error: ``F_err = d(f(x ⊞ e) ⊟ f(x))/de`` at e = 0, which by
the chain rule is ``E(f(x)) * df/dx * M(x)``:

* ``M(x) = d(x ⊞ e)/de`` at e = 0: identity for a plain state, ``1/2 L(q)[:, 1:4]`` for an
  attitude (``L(q)`` the matrix of ``q ⊗ .``; ``d exp(dtheta)/d dtheta = [0; I/2]`` at zero);
* ``E(y) = d(y' ⊟ y)/dy'`` at y' = y: identity for a plain state and, for an attitude, with the
  next quaternion normalized (as the filters do), ``2 vec(conj(y) ⊗ dy) / |y|^2``: the rows 1..3
  of ``2 L(conj(y)) / |y|^2``. The part of dy along y (a change of norm) drops out, as it must.

``H_err = dh/dx * M(x)`` for a sensor.

After an update injects a correction ``mu`` (``x+ = x ⊞ mu``), the error is re-referenced to
the new estimate: ``e' = (x ⊞ e) ⊟ (x ⊞ mu)``, for an attitude ``log(exp(-mu) ⊗ exp(dtheta))``.
Its Jacobian at ``e = mu`` is, to first order in ``mu``, the reset Jacobian
``G = blockdiag(I - [mu/2 ×], I)`` (Markley 2003; Sola 2017, sec. 7.2), and ``P <- G P G'``.
"""

from __future__ import annotations

from typing import Dict, List, Sequence, Tuple

import sympy as sp

from . import quat
from .model import ModelSpec

__all__ = ["left_matrix", "retraction_jacobian", "error_map", "reset_jacobian", "inject", "normalize",
           "boxplus_symbolic"]


def left_matrix(q: Sequence[sp.Expr]) -> sp.Matrix:
    """``L(q)`` with ``q ⊗ p = L(q) p``."""
    r = sp.symbols("r0:4")
    return sp.Matrix(quat.mul(q, r)).jacobian(r)


def retraction_jacobian(spec: ModelSpec, x: Sequence[sp.Expr]) -> sp.Matrix:
    """``M(x) = d(x ⊞ e)/de`` at e = 0, n x ne."""
    M = sp.zeros(spec.n, spec.ne)
    for kind, xi, ei in spec.error_blocks():
        if kind == "real":
            M[xi, ei] = sp.S.One
        else:
            L = left_matrix(x[xi:xi + 4])
            for r in range(4):
                for c in range(3):
                    M[xi + r, ei + c] = L[r, c + 1] / 2
    return M


def error_map(spec: ModelSpec, y: Sequence[sp.Expr], inv_norm2: Dict[int, sp.Expr]) -> sp.Matrix:
    """``E(y)``, ne x n: the error of a perturbed ``y`` to first order (see the module text).
    ``inv_norm2[xi]`` is ``1/|y_q|^2`` for the attitude at x index ``xi`` (a symbol or expression)."""
    E = sp.zeros(spec.ne, spec.n)
    for kind, xi, ei in spec.error_blocks():
        if kind == "real":
            E[ei, xi] = sp.S.One
        else:
            L = left_matrix(quat.conj(y[xi:xi + 4]))
            for r in range(3):
                for c in range(4):
                    E[ei + r, xi + c] = 2 * L[r + 1, c] * inv_norm2[xi]
    return E


def reset_jacobian(spec: ModelSpec, mu: Sequence[sp.Expr]) -> sp.Matrix:
    """``G``, ne x ne: identity except ``I - [mu_q/2 ×]`` on each attitude's block, where ``mu``
    is the injected correction (``[a ×] b = a × b``; see the module text)."""
    G = sp.eye(spec.ne)
    for kind, _, ei in spec.error_blocks():
        if kind == "attitude":
            a = [m / 2 for m in mu[ei:ei + 3]]
            skew = sp.Matrix([[0, -a[2], a[1]], [a[2], 0, -a[0]], [-a[1], a[0], 0]])
            G[ei:ei + 3, ei:ei + 3] = sp.eye(3) - skew
    return G


def normalize(q: Sequence[sp.Expr]) -> List[sp.Expr]:
    """``q / |q|``."""
    inv = 1 / sp.sqrt(sum((e * e for e in q), sp.S.Zero))
    return [e * inv for e in q]


def inject(spec: ModelSpec, x: Sequence[sp.Expr], e: Sequence[sp.Expr]) -> List[sp.Expr]:
    """``x ⊞ e``: plain states added, each attitude right-multiplied by ``quat.exp`` of its
    error and renormalized (expressions)."""
    out = list(x)
    for kind, xi, ei in spec.error_blocks():
        if kind == "real":
            out[xi] = x[xi] + e[ei]
        else:
            out[xi:xi + 4] = normalize(quat.mul(x[xi:xi + 4], quat.exp(e[ei:ei + 3])))
    return out


def boxplus_symbolic(spec: ModelSpec) -> Tuple[List[sp.Symbol], List[sp.Symbol], List[sp.Expr]]:
    """Symbols ``x`` (n), ``e`` (ne) and the expressions of ``x ⊞ e`` over them (for lambdify)."""
    xs = list(sp.symbols(f"bx0:{spec.n}"))
    es = list(sp.symbols(f"be0:{spec.ne}"))
    return xs, es, inject(spec, xs, es)
