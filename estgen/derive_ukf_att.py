"""Stage 2 for the UKF of a model with attitudes: the unscented transform in the error space.

The covariance P has the error dimension ne (three per attitude, see :mod:`estgen.errorstate`).
Sigma points are drawn in that space and mapped onto the states, ``chi_i = x ⊞ e_i`` with
``e_0 = 0`` and ``e = +-gamma L_j`` (``L L' = P``): plain states add, each attitude becomes
``q ⊗ quat.exp(e_q)``.

Means of quaternions are formed relative to a reference point, the image ``Y_0`` of the central
sigma point: every image is expressed as its error from ``Y_0``,
``d_i = Y_i ⊟ Y_0`` (``quat.log(conj(Y0_q) ⊗ Y_i_q)`` for an attitude, a wrapped difference for
an angle, a plain difference otherwise), those errors are averaged with the mean weights,
``dbar = sum Wm_i d_i``, and the mean is ``Y_0 ⊞ dbar`` (renormalized). The covariance is
``sum Wc_i (d_i - dbar)(d_i - dbar)' + Q``. One pass, no iteration: the average of rotation
vectors about ``Y_0`` differs from the intrinsic (Karcher) mean by terms of third order in the
spread, far below the transform's own second-order accuracy for the spreads a filter carries
(Crassidis & Markley, J. Guidance Control Dyn. 26(4), 2003, use the same reference-point
construction with other attitude parameters). Angle components of a sensor are averaged the same
way about the central image.

The update draws fresh sigma points, ``C = sum Wc_i e_i (z_i - zbar)'``, and the correction
``K y`` is injected into x (``x ⊞ K y``) in the same commit as ``P - K S K'``, which the
shared covariance reset (:func:`estgen.derive.reset_covariance`, called by the emitter after these
statements) then re-references to the corrected attitude.
"""

from __future__ import annotations

from typing import Dict, List, Sequence, Tuple

import sympy as sp

from . import quat
from .derive import Stmt, c_names, packed_index
from .derive_ukf import (UkfCode, UkfPredictCode, UkfUpdateCode, UkfWeights, _augmented, _count_locals,
                         _gain_and_commit, _used)
from .errorstate import inject, normalize
from .model import ModelSpec, SensorSpec
from .progress import stage
from .unrolled import Block as _Block

__all__ = ["derive_ukf_attitude"]


def _sym(name: str) -> sp.Symbol:
    return sp.Symbol(name)


def _offsets(blk: _Block, spec: ModelSpec, noise: Sequence[sp.Symbol], cov: sp.Matrix, wts: UkfWeights, tag: str
             ) -> Tuple[List[List[sp.Expr]], UkfWeights]:
    """The 2 N + 1 sigma offsets e_i of the error space, augmented by the noise symbols
    (``N = ne + len(noise)``, covariance blockdiag(P, cov), factor blockdiag(L, A) with
    :func:`estgen.derive_ukf._augmented`): e_0 = 0, then +col j, -col j; and the weights of N."""
    ne = spec.ne
    L, wts, _ = _augmented(blk, spec, noise, cov, wts, tag, ne)
    N = wts.n
    cols = []
    for j in range(N):
        col = [sp.S.Zero] * N
        for r in range(j, N):
            if L[(r, j)] != 0:
                col[r] = L[(r, j)] if wts.gamma == 1.0 else blk.value(f"{tag}g{r}_{j}", sp.Float(wts.gamma) * L[(r, j)])
        cols.append(col)
    return [[sp.S.Zero] * N] + cols + [[-c for c in col] for col in cols], wts


def _sigma_state(spec: ModelSpec, x: Sequence[sp.Expr], e: Sequence[sp.Expr]) -> List[sp.Expr]:
    """x ⊞ e for a sigma point (an attitude needs no renormalization: q and exp(e) are unit)."""
    out = list(x)
    for kind, xi, ei in spec.error_blocks():
        if kind == "real":
            out[xi] = x[xi] + e[ei]
        elif any(v != 0 for v in e[ei:ei + 3]):
            out[xi:xi + 4] = quat.mul(x[xi:xi + 4], quat.exp(e[ei:ei + 3]))
    return out


def _images(blk: _Block, spec: ModelSpec, funcs: sp.Matrix, offsets: List[List[sp.Expr]],
            extra: Sequence[Tuple[str, sp.Expr]], tag: str, noise: Sequence[sp.Symbol] = ()
            ) -> Tuple[List[List[sp.Expr]], Dict[str, sp.Expr]]:
    """funcs at every sigma point (common subexpressions shared over all of them); the noise
    symbols take the offsets' entries after the ne error components."""
    names = c_names(spec, "x")
    x = [names[s] for s in spec.x_syms]
    ne = spec.ne
    items: List[Tuple[str, sp.Expr]] = []
    for i, e in enumerate(offsets):
        chi = _sigma_state(spec, x, e[:ne])
        sub = dict(names)
        sub.update({s: chi[k] for k, s in enumerate(spec.x_syms)})
        sub.update({w: e[ne + j] for j, w in enumerate(noise)})
        for k in range(funcs.shape[0]):
            items.append((f"{tag}y{i}_{k}", funcs[k].xreplace(sub)))
    vals = blk.cse(items + [(nm, e.xreplace(names)) for nm, e in extra], f"{tag}t")
    imgs = [[vals[f"{tag}y{i}_{k}"] for k in range(funcs.shape[0])] for i in range(len(offsets))]
    return imgs, {nm: vals[nm] for nm, _ in extra}


class _Wraps:
    """Wrapped differences go through the ``ea`` scratch array (the wrap helper writes in place)."""

    def __init__(self, blk: _Block) -> None:
        self.blk = blk
        self.count = 0

    def __call__(self, e: sp.Expr) -> sp.Symbol:
        slot = f"ea[{self.count}]"
        self.blk.add("wrap", slot, e)
        self.count += 1
        return _sym(slot)


def _state_errors(blk: _Block, spec: ModelSpec, imgs: List[List[sp.Expr]], wrap: _Wraps, tag: str
                  ) -> List[List[sp.Expr]]:
    """d_i = Y_i ⊟ Y_0 for every image (ne entries each; d_0 = 0)."""
    ref = imgs[0]
    out = [[sp.S.Zero] * spec.ne]
    for i in range(1, len(imgs)):
        d: List[sp.Expr] = [sp.S.Zero] * spec.ne
        for kind, xi, ei in spec.error_blocks():
            if kind == "real":
                diff = imgs[i][xi] - ref[xi]
                d[ei] = wrap(diff) if spec.states[xi].angle else blk.value(f"{tag}d{i}_{ei}", diff)
            else:
                rel = [blk.value(f"{tag}r{i}_{ei}_{c}", v)
                       for c, v in enumerate(quat.mul(quat.conj(ref[xi:xi + 4]), imgs[i][xi:xi + 4]))]
                for c, v in enumerate(quat.log(rel)):
                    d[ei + c] = blk.value(f"{tag}d{i}_{ei + c}", v)
        out.append(d)
    return out


def _mean_and_spread(blk: _Block, d: List[List[sp.Expr]], wts: UkfWeights, tag: str
                     ) -> Tuple[List[sp.Expr], List[List[sp.Expr]]]:
    """dbar = sum Wm_i d_i (d_0 = 0) and the deviations d_i - dbar."""
    size = len(d[0])
    dbar = [blk.value(f"{tag}mu{k}", sp.Float(wts.w) * sum((d[i][k] for i in range(1, len(d))), sp.S.Zero))
            for k in range(size)]
    dev = [[blk.value(f"{tag}D{i}_{k}", d[i][k] - dbar[k]) for k in range(size)] for i in range(len(d))]
    return dbar, dev


def _cov(dev_a: List[List[sp.Expr]], dev_b: List[List[sp.Expr]], a: int, b: int, wts: UkfWeights) -> sp.Expr:
    outer = sum((dev_a[i][a] * dev_b[i][b] for i in range(1, len(dev_a))), sp.S.Zero)
    return sp.Float(wts.wc0) * dev_a[0][a] * dev_b[0][b] + sp.Float(wts.w) * outer


def derive_ukf_attitude_predict(spec: ModelSpec, wts: UkfWeights) -> UkfPredictCode:
    """xn = Y_0 ⊞ dbar; Pn = sum Wc (d_i - dbar)(d_i - dbar)' + Q (see the module text)."""
    ne = spec.ne
    blk = _Block()
    offs, wts = _offsets(blk, spec, spec.w_syms, spec.Qw, wts, "f")
    qitems = [(f"Q{i}_{j}", spec.Q[i, j]) for i in range(ne) for j in range(i, ne) if not spec.Q[i, j].is_Number]
    imgs, qv = _images(blk, spec, spec.f, offs, qitems, "f", spec.w_syms)
    wrap = _Wraps(blk)
    d = _state_errors(blk, spec, imgs, wrap, "f")
    dbar, dev = _mean_and_spread(blk, d, wts, "f")
    ref = imgs[0]
    for kind, xi, ei in spec.error_blocks():
        if kind == "real":
            blk.add("wrap" if spec.states[xi].angle else "assign", f"xn[{xi}]", ref[xi] + dbar[ei])
        else:
            q = normalize(quat.mul(ref[xi:xi + 4], quat.exp(dbar[ei:ei + 3])))
            parts = blk.cse([(f"fn{xi}_{c}", v) for c, v in enumerate(q)], "fz")
            for c in range(4):
                blk.add("assign", f"xn[{xi + c}]", parts[f"fn{xi}_{c}"])
    for a in range(ne):
        for b in range(a, ne):
            qab = spec.Q[a, b] if spec.Q[a, b].is_Number else qv[f"Q{a}_{b}"]
            blk.add("assign", f"Pn[{packed_index(a, b, ne)}]", _cov(dev, dev, a, b, wts) + qab)
    stmts = blk.pruned()
    return UkfPredictCode(stmts, _used(stmts, "par->"), _used(stmts, "u["), wrap.count,
                          _count_locals(stmts, ("fg", "fy", "fd", "fr", "fD", "fmu")))


def derive_ukf_attitude_update(sensor: SensorSpec, spec: ModelSpec, wts: UkfWeights) -> UkfUpdateCode:
    """Fresh sigma points x ⊞ e_i through h; C = sum Wc e_i (z_i - zbar)'; x ⊞ K y."""
    ne, m = spec.ne, sensor.m
    blk = _Block()
    offs, wts = _offsets(blk, spec, sensor.v, sensor.Rv, wts, "h")
    N = wts.n
    ritems = [(f"R{i}_{j}", sensor.R[i, j]) for i in range(m) for j in range(i, m) if not sensor.R[i, j].is_Number]
    imgs, rv = _images(blk, spec, sensor.h, offs, ritems, "h", sensor.v)
    wrap = _Wraps(blk)
    d: List[List[sp.Expr]] = [[sp.S.Zero] * m]
    for i in range(1, len(imgs)):
        d.append([wrap(imgs[i][k] - imgs[0][k]) if sensor.angles[k] else blk.value(f"hd{i}_{k}", imgs[i][k] - imgs[0][k])
                  for k in range(m)])
    dbar, dev = _mean_and_spread(blk, d, wts, "h")
    for k in range(m):
        zhat = imgs[0][k] + dbar[k]
        blk.add("wrap" if sensor.angles[k] else "assign", f"y[{k}]", _sym(f"z[{k}]") - zhat)
    y = [_sym(f"y[{k}]") for k in range(m)]
    P = sp.Matrix(ne, ne, lambda i, j: _sym(f"P[{packed_index(i, j, ne)}]"))
    R = {(i, j): (sensor.R[i, j] if sensor.R[i, j].is_Number else rv[f"R{i}_{j}"]) for i in range(m) for j in range(i, m)}
    # C = sum_i Wc_i e_i dev_i' with e_0 = 0 and e_{j+N} = -e_j (the state part of e only)
    C: Dict[Tuple[int, int], sp.Expr] = {}
    for a in range(ne):
        for k in range(m):
            e = sum((offs[1 + j][a] * (dev[1 + j][k] - dev[1 + N + j][k]) for j in range(N) if offs[1 + j][a] != 0),
                    sp.S.Zero)
            C[(a, k)] = blk.value(f"C{a}_{k}", sp.Float(wts.w) * e)
    S: Dict[Tuple[int, int], sp.Expr] = {}
    for k in range(m):
        for l in range(k, m):
            S[(k, l)] = S[(l, k)] = blk.value(f"S{k}_{l}", _cov(dev, dev, k, l, wts) + R[(k, l)])

    def assign_x(corr: List[sp.Expr]) -> None:
        # an array: the shared covariance reset reads it after Ps is written (emit.set_reset)
        for a in range(ne):
            blk.add("assign", f"dx[{a}]", corr[a])
        dx = [_sym(f"dx[{a}]") for a in range(ne)]
        names = c_names(spec, "x")
        newx = inject(spec, [names[s] for s in spec.x_syms], dx)
        vals = blk.cse([(f"xs{i}", e) for i, e in enumerate(newx)], "g")
        for i in range(spec.n):
            blk.add("wrap" if spec.states[i].angle else "assign", f"xs[{i}]", vals[f"xs{i}"])

    _gain_and_commit(blk, ne, m, P, C, S, y, assign_x)
    stmts = blk.pruned()
    return UkfUpdateCode(sensor, stmts, _used(stmts, "par->"), m, wrap.count,
                         _count_locals(stmts, ("hg", "hy", "hd", "hD", "hmu")))


def derive_ukf_attitude(spec: ModelSpec, wts: UkfWeights) -> UkfCode:
    """Everything the UKF template needs for a model with attitude states: the error-space transform."""
    stage("derive predict: f at the sigma points, mean, covariance")
    code = UkfCode(spec, wts, derive_ukf_attitude_predict(spec, wts))
    for s in spec.sensors:
        stage(f"derive update {s.name}: h at the sigma points, gain, covariance")
        code.updates.append(derive_ukf_attitude_update(s, spec, wts))
    return code
