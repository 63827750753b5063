"""Stage 2 for the UKF: the scaled unscented transform unrolled into straight-line statements.

The algorithm is exactly the reference's (:class:`estgen.reference.ReferenceUKF`): sigma points
``x``, ``x +- gamma L_i`` with ``L L' = P`` (lower Cholesky) and ``gamma = sqrt(n + lambda)``;
weighted mean (circular for angles); covariance from the weighted deviations; fresh sigma points
for every update; ``K = C S^-1``; ``P - K S K'``. What changes is only how the sums are arranged,
so that structure the model already has costs nothing at run time:

* Symmetric pairs. With ``d+`` and ``d-`` the deviations of the images of ``x + gamma L_i`` and
  ``x - gamma L_i``, ``d+ d+' + d- d-' = 2 (s s' + t t')`` with ``s = (d+ + d-)/2`` and
  ``t = (d+ - d-)/2``. The weights ``2 w = 1/(n + lambda)`` are folded into ``s`` and ``t``
  (scaled by ``sqrt(2 w)``), so the covariance is ``Wc0 d0 d0' + sum_i (s_i s_i' + t_i t_i')``.
* Linear components. A component of f (or h) that is affine in x, ``a' x + b``, maps the sigma
  points exactly (Julier & Uhlmann, Proc. IEEE 92(3), 2004): its mean is ``a' x + b``, its ``s``
  and ``d0`` vanish and its scaled ``t_i`` is ``a' L_i``. Between two such components the
  covariance is ``a' P b``, read straight from P; no sigma point is evaluated for them.
* Triangular factor. ``L_i`` is zero above row i, so the i-th sigma pair differs from x only in
  states i..n-1; an image that does not depend on those states equals the centre's, and sympy's
  common-subexpression elimination over all 2n+1 images shares it (and every partial result).

* Affine pieces. Inside a nonlinear component, a sum affine in two or more states (and any
  affine argument of sin or cos) has the value ``a(x) +- a' gamma L_i`` at the i-th pair: one
  short dot product with a triangular column per pair. When both sin and cos of such an argument
  occur, the pair's four values come from sin and cos of the centre and of the offset by the
  angle-sum identities (two calls per pair, not four); tanh and exp of such an argument come
  from their addition theorems (one call per pair, not two; tanh falls back to direct calls
  when the offset is large, where the identity would lose digits).

A nonlinear component is evaluated at all 2n+1 points; an angle component takes the circular
mean ``atan2(sum w sin, sum w cos)`` and wrapped deviations, as the reference does. For an affine
angle component with images ``c +- d_i`` those sums are ``sin c (Wm0/w + 2 sum cos d_i)`` and
``cos c (...)``: n cosines instead of 4n + 2 calls.

The update uses the Cholesky factor ``S = Ls Ls'``: with ``B = C Ls^-T`` and ``b = Ls^-1 y``,
``K y = B b``, ``K S K' = B B'`` and ``NIS = b' b``; one triangular solve per row of C and no
explicit gain (for a scalar sensor, ``K = C / S`` directly).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field
from typing import Callable, Dict, List, Optional, Sequence, Set, Tuple

import sympy as sp

from .derive import Stmt, c_names, packed_index
from .errors import UsageError
from .ir import is_trivial as _is_trivial
from .model import ModelSpec, SensorSpec, noise_factor
from .progress import stage
from .unrolled import Block as _Block
from .unrolled import cholesky as _cholesky

__all__ = ["UkfWeights", "UkfPredictCode", "UkfUpdateCode", "UkfCode", "derive_ukf", "check_values"]


@dataclass(frozen=True)
class UkfWeights:
    """Weights of the scaled unscented transform (Julier 2002; Wan & van der Merwe 2000):
    ``lambda = alpha^2 (n + kappa) - n``, ``Wm0 = lambda / (n + lambda)``,
    ``Wc0 = Wm0 + 1 - alpha^2 + beta``, ``Wm_i = Wc_i = 1 / (2 (n + lambda))`` for i = 1..2n."""

    n: int
    alpha: float
    beta: float
    kappa: float

    def __post_init__(self) -> None:
        """Every check of the parameters: numbers, alpha > 0 and ``n + lambda > 0`` (else the
        sigma points would coincide or be imaginary)."""
        check_values(self.alpha, self.beta, self.kappa)
        if not self.c > 0.0 or not math.isfinite(self.w):
            raise UsageError(f"UKF n + lambda = alpha^2 (n + kappa) must be > 0 (n = {self.n}, got {self.c:g}); "
                             f"raise kappa above {-self.n}")

    @property
    def lam(self) -> float:
        return self.alpha * self.alpha * (self.n + self.kappa) - self.n

    @property
    def c(self) -> float:
        """n + lambda, the spread factor of the sigma points' covariance."""
        return self.n + self.lam

    @property
    def gamma(self) -> float:
        """sqrt(n + lambda): sigma points are x +- gamma L_i."""
        return math.sqrt(self.c)

    @property
    def w(self) -> float:
        """The weight of each of the 2n outer points (mean and covariance alike)."""
        return 0.5 / self.c

    @property
    def wm0(self) -> float:
        return self.lam / self.c

    @property
    def wc0(self) -> float:
        return self.lam / self.c + 1.0 - self.alpha * self.alpha + self.beta

    def mean_weights(self) -> List[float]:
        return [self.wm0] + [self.w] * (2 * self.n)

    def cov_weights(self) -> List[float]:
        return [self.wc0] + [self.w] * (2 * self.n)


def check_values(alpha: object, beta: object, kappa: object) -> None:
    """Refuse sigma-point parameters that are not finite numbers, and ``alpha <= 0``."""
    for k, v in (("alpha", alpha), ("beta", beta), ("kappa", kappa)):
        if isinstance(v, bool) or not isinstance(v, numbers.Real):  # numpy scalars register as Real
            raise UsageError(f"UKF {k} must be a number, got {v!r}")
        if not math.isfinite(float(v)):
            raise UsageError(f"UKF {k} must be a finite number, got {v!r}")
    if not float(alpha) > 0.0:  # type: ignore[arg-type]
        raise UsageError(f"UKF alpha must be > 0, got {alpha}; the default is 1")


@dataclass
class UkfPredictCode:
    stmts: List[Stmt]
    uses_par: bool
    uses_u: bool
    angle_scratch: int  # length of the ``ea`` scratch array (wrapped angle deviations)
    sigma_locals: int  # named locals holding sigma offsets, images and deviations


@dataclass
class UkfUpdateCode:
    sensor: SensorSpec
    stmts: List[Stmt]
    uses_par: bool
    m: int
    angle_scratch: int
    sigma_locals: int


@dataclass
class UkfCode:
    spec: ModelSpec
    weights: UkfWeights
    predict: UkfPredictCode
    updates: List[UkfUpdateCode] = field(default_factory=list)


def _scaled(coef: float, e: sp.Expr) -> sp.Expr:
    """``coef * e`` without sympy distributing the number over a sum (one multiply, not many)."""
    if e == 0 or coef == 0.0:
        return sp.S.Zero
    if coef == 1.0:
        return e
    if e.is_Add:
        return sp.Mul(sp.Float(coef), e, evaluate=False)
    return sp.Float(coef) * e


def _sym(name: str) -> sp.Symbol:
    return sp.Symbol(name)


@dataclass
class _Spread:
    """One output component's mean and scaled deviations (see the module docstring)."""

    linear: bool
    mean: sp.Expr
    t: List[sp.Expr]
    s: List[sp.Expr]
    d0: sp.Expr


def _linear_rows(funcs: sp.Matrix, xs: List[sp.Symbol], angle: Sequence[bool]) -> Dict[int, List[sp.Expr]]:
    """Components affine in x (coefficients free of x) and not angles: index -> row of d/dx."""
    out: Dict[int, List[sp.Expr]] = {}
    xset = set(xs)
    for k in range(funcs.shape[0]):
        if angle[k]:
            continue
        try:
            row = [sp.diff(funcs[k], v) for v in xs]
        except Exception:  # a function sympy cannot differentiate is not linear for our purpose
            continue
        if any(isinstance(r, sp.Basic) and (r.free_symbols & xset or r.has(sp.Derivative, sp.Subs,
                                                                             sp.DiracDelta, sp.Heaviside))
               for r in row):
            continue
        out[k] = row
    return out


def _affine(e: sp.Expr, xset: Set[sp.Symbol]) -> bool:
    try:
        return all(not (sp.diff(e, v).free_symbols & xset) and not sp.diff(e, v).has(sp.Heaviside, sp.DiracDelta)
                   for v in e.free_symbols & xset)
    except Exception:  # not differentiable by sympy: not affine for our purpose
        return False


def _atomize(e: sp.Expr, xs: List[sp.Symbol], xset: Set[sp.Symbol], atoms: Dict[sp.Expr, sp.Symbol],
             tag: str) -> sp.Expr:
    """``e`` with each maximal sum affine in two or more states, and each affine argument of
    sin or cos, replaced by a placeholder symbol."""
    used = e.free_symbols & xset
    if not used or not e.args:
        return e
    trig_arg = isinstance(e, _PAIRED) and _affine(e.args[0], xset)
    if trig_arg:
        return e.func(_atom(e.args[0], atoms, tag))
    if e.is_Add and len(used) >= 2 and _affine(e, xset):
        return _atom(e, atoms, tag)
    try:
        return e.func(*[_atomize(a, xs, xset, atoms, tag) for a in e.args])
    except Exception:  # a node that cannot be rebuilt from its arguments: keep it whole
        return e


#: functions whose values at a sigma pair c +- d follow from their values at c and d
_PAIRED = (sp.sin, sp.cos, sp.tanh, sp.exp)
#: the tanh identity divides by 1 +- tanh(c) tanh(d): used while |tanh d| < this (a loss of
#: at most one digit), else tanh is called directly
_TANH_SAFE = 0.9


def _tanh_pair(blk: _Block, name: str, i: int, centre: sp.Expr, tc: sp.Expr, dlt: sp.Expr
               ) -> Tuple[sp.Expr, sp.Expr]:
    """tanh(c + d), tanh(c - d) = (T +- t) / (1 +- T t) with T = tanh c, t = tanh d
    (the addition theorem): one call for the pair instead of two."""
    td = blk.value(f"{name}t{i}", sp.tanh(dlt))
    q = blk.value(f"{name}q{i}", tc * td)
    safe = sp.Abs(td) < _TANH_SAFE
    plus = sp.Piecewise(((tc + td) / (1 + q), safe), (sp.tanh(centre + dlt), True))
    minus = sp.Piecewise(((tc - td) / (1 - q), safe), (sp.tanh(centre - dlt), True))
    return blk.value(f"{name}p{i}", plus), blk.value(f"{name}m{i}", minus)


def _atom(e: sp.Expr, atoms: Dict[sp.Expr, sp.Symbol], tag: str) -> sp.Symbol:
    if e not in atoms:
        atoms[e] = sp.Symbol(f"__{tag}atom{len(atoms)}")
    return atoms[e]


def _trig_pairs(blk: _Block, name: str, i: int, centre: Tuple[sp.Expr, sp.Expr], dlt: sp.Expr
                ) -> Tuple[sp.Expr, sp.Expr, sp.Expr, sp.Expr]:
    """sin and cos of c + d and c - d from sin c, cos c, sin d, cos d (angle-sum identities):
    two transcendental calls for the pair instead of four."""
    sc, cc = centre
    sd = blk.value(f"{name}sd{i}", sp.sin(dlt))
    cd = blk.value(f"{name}cd{i}", sp.cos(dlt))
    a = blk.value(f"{name}x{i}", sc * cd)
    b = blk.value(f"{name}y{i}", cc * sd)
    c = blk.value(f"{name}z{i}", cc * cd)
    d = blk.value(f"{name}w{i}", sc * sd)
    return (blk.value(f"{name}sp{i}", a + b), blk.value(f"{name}sm{i}", a - b),
            blk.value(f"{name}cp{i}", c - d), blk.value(f"{name}cm{i}", c + d))


def _lower(e: sp.Expr) -> sp.Expr:
    """Forms whose C rendering would differ from sympy's meaning: sign (an int expression in C,
    a conversion warning in a float build) as a choice of real constants; Mod (sympy's has the
    divisor's sign, C's fmod the dividend's) as a - b floor(a / b)."""
    e = e.replace(sp.sign, lambda a: sp.Piecewise((sp.S.One, a > 0), (sp.S.NegativeOne, a < 0), (sp.S.Zero, True)))
    return e.replace(sp.Mod, lambda a, b: a - b * sp.floor(a / b))


def _transform(blk: _Block, spec: ModelSpec, funcs: sp.Matrix, angle: Sequence[bool], wts: UkfWeights,
               L: Dict[Tuple[int, int], sp.Expr], extra: Sequence[Tuple[str, sp.Expr]], tag: str,
               noise: Sequence[sp.Symbol] = ()
               ) -> Tuple[List[_Spread], Dict[int, List[sp.Expr]], Dict[str, sp.Expr], int, int]:
    """Sigma-point images of ``funcs`` (user symbols) and their spreads.

    With ``noise`` symbols the transform is of the augmented vector ``[x; noise]`` (centre
    ``[x; 0]``; ``L`` and ``wts`` are then those of the augmented dimension).

    Returns the spreads, the linear rows (with C-named coefficients, over the augmented vector),
    the values of ``extra`` (named expressions in user symbols sharing the common-subexpression
    pass), the length of the angle scratch array and the number of sigma-point locals declared.
    """
    xs = spec.x_syms + list(noise)
    n = len(xs)
    names: Dict[sp.Symbol, sp.Expr] = {**c_names(spec, "x"), **{v: sp.S.Zero for v in noise}}
    funcs = funcs.applyfunc(_lower)
    lin_user = _linear_rows(funcs, xs, angle)
    nl = [k for k in range(funcs.shape[0]) if k not in lin_user]
    support = sorted({xs.index(v) for k in nl for v in funcs[k].free_symbols if v in xs})
    before = len(blk.stmts)
    # sigma offsets gamma * L[m, i] for the states the nonlinear components read
    off: Dict[Tuple[int, int], sp.Expr] = {}
    for i in range(n):
        for m in support:
            if m >= i:
                off[(m, i)] = L[(m, i)] if wts.gamma == 1.0 else blk.value(f"{tag}g{m}_{i}",
                                                                           sp.Float(wts.gamma) * L[(m, i)])
    # affine pieces of the nonlinear components move along the sigma points linearly: their
    # value at x +- gamma L_i is a(x) +- a' (gamma L_i), a sparse dot product with a triangular
    # column instead of a full one per point
    xset = set(xs)
    # an affine angle component: images c +- d_i, so sum sin = sin c (Wm0/w + 2 sum cos d_i)
    lin_angle = {k for k in nl if angle[k] and funcs[k].free_symbols & xset and _affine(funcs[k], xset)}
    atoms: Dict[sp.Expr, sp.Symbol] = {}
    shaped = {k: _atomize(funcs[k], xs, xset, atoms, tag) for k in nl if k not in lin_angle}
    centre_map = dict(names)
    plus_atoms: List[Dict[sp.Symbol, sp.Expr]] = [dict() for _ in range(n)]
    minus_atoms: List[Dict[sp.Symbol, sp.Expr]] = [dict() for _ in range(n)]
    both = [sym for sym in atoms.values() if any(f.has(sp.sin(sym)) for f in shaped.values())
            and any(f.has(sp.cos(sym)) for f in shaped.values())]
    for j, (e, sym) in enumerate(atoms.items()):
        centre_a = blk.value(f"{tag}a{j}", e.xreplace(names))
        centre_map[sym] = centre_a
        trig = sym in both
        if trig:
            sc = blk.value(f"{tag}as{j}", sp.sin(centre_a))
            cc = blk.value(f"{tag}ak{j}", sp.cos(centre_a))
            centre_map[sp.sin(sym)], centre_map[sp.cos(sym)] = sc, cc
        th = ex = None
        if any(f.has(sp.tanh(sym)) for f in shaped.values()):
            th = blk.value(f"{tag}at{j}", sp.tanh(centre_a))
            centre_map[sp.tanh(sym)] = th
        if any(f.has(sp.exp(sym)) for f in shaped.values()):
            ex = blk.value(f"{tag}ae{j}", sp.exp(centre_a))
            centre_map[sp.exp(sym)] = ex
        coef: Dict[int, sp.Expr] = {}
        for m in sorted(xs.index(v) for v in e.free_symbols & xset):
            cm = sp.diff(e, xs[m])
            coef[m] = cm if cm.is_Number else blk.value(f"{tag}ac{j}_{m}", cm.xreplace(names))
        for i in range(n):
            dlt = blk.value(f"{tag}ad{j}_{i}", sum((coef[m] * off[(m, i)] for m in coef if m >= i), sp.S.Zero))
            plus_atoms[i][sym] = centre_a + dlt
            minus_atoms[i][sym] = centre_a - dlt
            if trig:
                if dlt == 0:
                    sp_, sm_, cp_, cm_ = sc, sc, cc, cc
                else:
                    sp_, sm_, cp_, cm_ = _trig_pairs(blk, f"{tag}r{j}_", i, (sc, cc), dlt)
                plus_atoms[i][sp.sin(sym)], plus_atoms[i][sp.cos(sym)] = sp_, cp_
                minus_atoms[i][sp.sin(sym)], minus_atoms[i][sp.cos(sym)] = sm_, cm_
            if th is not None:
                tp_, tm_ = (th, th) if dlt == 0 else _tanh_pair(blk, f"{tag}n{j}_", i, centre_a, th, dlt)
                plus_atoms[i][sp.tanh(sym)], minus_atoms[i][sp.tanh(sym)] = tp_, tm_
            if ex is not None:
                if dlt == 0:
                    ep_, em_ = ex, ex
                else:
                    # exp(c +- d) = exp(c) exp(d)^(+-1): one call for the pair
                    ed = blk.value(f"{tag}o{j}_{i}", sp.exp(dlt))
                    ep_ = blk.value(f"{tag}op{j}_{i}", ex * ed)
                    em_ = blk.value(f"{tag}om{j}_{i}", ex / ed)
                plus_atoms[i][sp.exp(sym)], minus_atoms[i][sp.exp(sym)] = ep_, em_
    items: List[Tuple[str, sp.Expr]] = []
    for k in range(funcs.shape[0]):
        items.append((f"{tag}c{k}", shaped[k].xreplace(centre_map) if k in shaped else funcs[k].xreplace(names)))
    for i in range(n):
        plus = dict(names)
        minus = dict(names)
        plus.update(plus_atoms[i])
        minus.update(minus_atoms[i])
        for m in support:
            if m >= i:
                xm = names[xs[m]]
                plus[xs[m]] = xm + off[(m, i)]
                minus[xs[m]] = xm - off[(m, i)]
        for k in nl:
            if k in lin_angle:
                continue
            items.append((f"{tag}p{i}_{k}", shaped[k].xreplace(plus)))
            items.append((f"{tag}m{i}_{k}", shaped[k].xreplace(minus)))
    lin_items: List[Tuple[str, sp.Expr]] = []
    for k, row in lin_user.items():
        for j, a in enumerate(row):
            if not (isinstance(a, sp.Basic) and a.is_Number):
                lin_items.append((f"{tag}A{k}_{j}", sp.sympify(a).xreplace(names)))
    extra_named = [(nm, e.xreplace(names)) for nm, e in extra]
    vals = blk.cse(items + lin_items + extra_named, f"{tag}t")
    lin: Dict[int, List[sp.Expr]] = {}
    for k, row in lin_user.items():
        lin[k] = [sp.sympify(a) if sp.sympify(a).is_Number else vals[f"{tag}A{k}_{j}"] for j, a in enumerate(row)]
    g = 0.5 / wts.gamma  # sqrt(2 w) / 2
    spreads: List[_Spread] = []
    n_angle = 0
    for k in range(funcs.shape[0]):
        centre = vals[f"{tag}c{k}"]
        if k in lin:
            row = lin[k]
            t = []
            for i in range(n):
                e = sum((row[m] * L[(m, i)] for m in range(i, n) if row[m] != 0), sp.S.Zero)
                t.append(blk.value(f"{tag}T{i}_{k}", e))
            spreads.append(_Spread(True, centre, t, [sp.S.Zero] * n, sp.S.Zero))
            continue
        r0 = wts.wm0 / wts.w
        if k in lin_angle:
            coef: Dict[int, sp.Expr] = {}
            for m in sorted(xs.index(v) for v in funcs[k].free_symbols & xset):
                cm = sp.diff(funcs[k], xs[m])
                coef[m] = cm if cm.is_Number else blk.value(f"{tag}lc{k}_{m}", cm.xreplace(names))
            dl = [blk.value(f"{tag}ld{i}_{k}", sum((coef[m] * off[(m, i)] for m in coef if m >= i), sp.S.Zero))
                  for i in range(n)]
            yp = [centre + d for d in dl]
            ym = [centre - d for d in dl]
            kk = blk.value(f"{tag}kk{k}", sp.Float(r0) + 2 * sum((sp.cos(d) for d in dl), sp.S.Zero))
            mean = blk.value(f"{tag}mu{k}", sp.atan2(sp.sin(centre) * kk, sp.cos(centre) * kk))
        else:
            yp = [vals[f"{tag}p{i}_{k}"] for i in range(n)]
            ym = [vals[f"{tag}m{i}_{k}"] for i in range(n)]
        if angle[k]:
            if k not in lin_angle:
                # circular mean; the common factor w of the outer weights cancels in atan2
                ssum = _scaled(r0, sp.sin(centre)) + sum((sp.sin(yp[i]) + sp.sin(ym[i]) for i in range(n)), sp.S.Zero)
                csum = _scaled(r0, sp.cos(centre)) + sum((sp.cos(yp[i]) + sp.cos(ym[i]) for i in range(n)), sp.S.Zero)
                mean = blk.value(f"{tag}mu{k}", sp.atan2(ssum, csum))
            slot = n_angle
            blk.add("wrap", f"ea[{slot}]", centre - mean)
            d0 = _sym(f"ea[{slot}]")
            n_angle += 1
            t, s = [], []
            for i in range(n):
                if yp[i] == ym[i]:
                    dp = dm = _sym(f"ea[{n_angle}]")
                    blk.add("wrap", f"ea[{n_angle}]", yp[i] - mean)
                    n_angle += 1
                else:
                    blk.add("wrap", f"ea[{n_angle}]", yp[i] - mean)
                    blk.add("wrap", f"ea[{n_angle + 1}]", ym[i] - mean)
                    dp, dm = _sym(f"ea[{n_angle}]"), _sym(f"ea[{n_angle + 1}]")
                    n_angle += 2
                t.append(blk.value(f"{tag}u{i}_{k}", _scaled(g, dp - dm)))
                s.append(blk.value(f"{tag}v{i}_{k}", _scaled(g, dp + dm)))
            spreads.append(_Spread(False, mean, t, s, d0))
            continue
        pair = [blk.value(f"{tag}q{i}_{k}", yp[i] + ym[i]) for i in range(n)]
        total = sum(pair, sp.S.Zero)
        mean = blk.value(f"{tag}mu{k}", _scaled(wts.wm0, centre) + _scaled(wts.w, total))
        d0 = blk.value(f"{tag}e{k}", centre - mean)
        twice = blk.value(f"{tag}h{k}", 2.0 * g * mean)
        t, s = [], []
        for i in range(n):
            t.append(blk.value(f"{tag}u{i}_{k}", _scaled(g, yp[i] - ym[i])))
            s.append(blk.value(f"{tag}v{i}_{k}", sp.Float(g) * pair[i] - twice))
        spreads.append(_Spread(False, mean, t, s, d0))
    extra_vals = {nm: vals[nm] for nm, _ in extra}
    sigma_locals = sum(1 for st in blk.stmts[before:] if st.kind == "decl")
    return spreads, lin, extra_vals, n_angle, sigma_locals


def _cov(a: _Spread, b: _Spread, wts: UkfWeights) -> sp.Expr:
    e = sp.S.Zero
    if a.d0 != 0 and b.d0 != 0 and wts.wc0 != 0.0:
        e += sp.Float(wts.wc0) * a.d0 * b.d0
    for i in range(len(a.t)):
        e += a.s[i] * b.s[i] + a.t[i] * b.t[i]
    return e


def _used(stmts: Sequence[Stmt], prefix: str) -> bool:
    return any(str(s).startswith(prefix) for st in stmts for s in st.expr.free_symbols)


def _count_locals(stmts: Sequence[Stmt], tags: Sequence[str]) -> int:
    return sum(1 for st in stmts if st.kind == "decl" and st.target.startswith(tuple(tags)))


def derive_ukf_predict(spec: ModelSpec, wts: UkfWeights) -> UkfPredictCode:
    """x' = weighted mean of f at the sigma points; P' = their weighted covariance + Q."""
    n = spec.n
    blk = _Block()
    L, wts, Paug = _augmented(blk, spec, spec.w_syms, spec.Qw, wts, "f")
    angle = spec.angle_states
    qitems = [(f"Q{i}_{j}", spec.Q[i, j]) for i in range(n) for j in range(i, n) if not spec.Q[i, j].is_Number]
    spreads, lin, qv, n_angle, _ = _transform(blk, spec, spec.f, angle, wts, L, qitems, "f", spec.w_syms)
    na = wts.n
    Q = {(i, j): (spec.Q[i, j] if spec.Q[i, j].is_Number else qv[f"Q{i}_{j}"]) for i in range(n) for j in range(i, n)}
    for k, sp_ in enumerate(spreads):
        if angle[k]:
            blk.add("wrap", f"xn[{k}]", sp_.mean)
        else:
            blk.add("assign", f"xn[{k}]", sp_.mean)
    # A P for the linear rows (P of the augmented vector), entries materialized once (read by A P A')
    AP: Dict[Tuple[int, int], sp.Expr] = {}
    for a, row in lin.items():
        for m in range(na):
            if any(lin[b][m] != 0 for b in lin if b >= a):
                e = sum((row[j] * Paug(j, m) for j in range(na) if row[j] != 0), sp.S.Zero)
                AP[(a, m)] = blk.value(f"AP{a}_{m}", e)
    for a in range(n):
        for b in range(a, n):
            if a in lin and b in lin:
                e = sum((AP[(a, m)] * lin[b][m] for m in range(na) if lin[b][m] != 0), sp.S.Zero)
            else:
                e = _cov(spreads[a], spreads[b], wts)
            blk.add("assign", f"Pn[{packed_index(a, b, n)}]", e + Q[(a, b)])
    stmts = blk.pruned()
    return UkfPredictCode(stmts, _used(stmts, "par->"), _used(stmts, "u["), n_angle,
                          _count_locals(stmts, ("fg", "fp", "fm", "fq", "fu", "fv", "fe", "fh", "fT", "fmu")))


def _gain_and_commit(blk: _Block, n: int, m: int, P: sp.Matrix, C: Dict[Tuple[int, int], sp.Expr],
                     S: Dict[Tuple[int, int], sp.Expr], y: List[sp.Symbol], assign_x: Callable[[List[sp.Expr]], object]) -> None:
    """The update's tail from C = cov(x, z) (n x m) and S: NIS, the correction K y (handed to
    ``assign_x``, which writes xs) and Ps = P - K S K' (see the module text)."""
    if m == 1:
        # scalar innovation: K = C / S, no square root
        blk.add("decl", "Sd0", S[(0, 0)])
        blk.add("check", "Sd0", _sym("Sd0"))
        iS = blk.value("iS", 1 / _sym("Sd0"))
        blk.add("assign", "nis", y[0] * y[0] * iS)
        K = [blk.value(f"K{a}", C[(a, 0)] * iS) for a in range(n)]
        assign_x([K[a] * y[0] for a in range(n)])
        for a in range(n):
            for b in range(a, n):
                blk.add("assign", f"Ps[{packed_index(a, b, n)}]", P[a, b] - K[a] * C[(b, 0)])
    else:
        Ls: Dict[Tuple[int, int], sp.Expr] = {}
        inv: Dict[int, sp.Expr] = {}
        for j in range(m):
            d = S[(j, j)] - sum((Ls[(j, k)] ** 2 for k in range(j)), sp.S.Zero)
            blk.add("decl", f"Sd{j}", d)
            blk.add("check", f"Sd{j}", _sym(f"Sd{j}"))
            Ls[(j, j)] = blk.value(f"Ls{j}_{j}", sp.sqrt(_sym(f"Sd{j}")))
            inv[j] = blk.value(f"Lsi{j}", 1 / Ls[(j, j)])
            for i in range(j + 1, m):
                e = S[(i, j)] - sum((Ls[(i, k)] * Ls[(j, k)] for k in range(j)), sp.S.Zero)
                Ls[(i, j)] = blk.value(f"Ls{i}_{j}", e * inv[j])
        bv: List[sp.Expr] = []
        for k in range(m):
            e = (y[k] - sum((Ls[(k, j)] * bv[j] for j in range(k)), sp.S.Zero)) * inv[k]
            bv.append(blk.value(f"b{k}", e))
        blk.add("assign", "nis", sum((bk * bk for bk in bv), sp.S.Zero))
        B: Dict[Tuple[int, int], sp.Expr] = {}
        for a in range(n):
            for k in range(m):
                e = (C[(a, k)] - sum((Ls[(k, j)] * B[(a, j)] for j in range(k)), sp.S.Zero)) * inv[k]
                B[(a, k)] = blk.value(f"B{a}_{k}", e)
        assign_x([sum((B[(a, k)] * bv[k] for k in range(m)), sp.S.Zero) for a in range(n)])
        for a in range(n):
            for b in range(a, n):
                e = P[a, b] - sum((B[(a, k)] * B[(b, k)] for k in range(m)), sp.S.Zero)
                blk.add("assign", f"Ps[{packed_index(a, b, n)}]", e)


def derive_ukf_update(sensor: SensorSpec, spec: ModelSpec, wts: UkfWeights) -> UkfUpdateCode:
    """Fresh sigma points from (x, P) through h; y = z - zhat; x += K y; P -= K S K'."""
    n, m = spec.n, sensor.m
    blk = _Block()
    L, wts, Paug = _augmented(blk, spec, list(sensor.v), sensor.Rv, wts, "h")
    ritems = [(f"R{i}_{j}", sensor.R[i, j]) for i in range(m) for j in range(i, m) if not sensor.R[i, j].is_Number]
    spreads, lin, rv, n_angle, _ = _transform(blk, spec, sensor.h, sensor.angles, wts, L, ritems, "h", sensor.v)
    na = wts.n
    R = {(i, j): (sensor.R[i, j] if sensor.R[i, j].is_Number else rv[f"R{i}_{j}"]) for i in range(m) for j in range(i, m)}
    for k in range(m):
        if sensor.angles[k]:
            blk.add("wrap", f"y[{k}]", _sym(f"z[{k}]") - spreads[k].mean)
        else:
            blk.add("assign", f"y[{k}]", _sym(f"z[{k}]") - spreads[k].mean)
    y = [_sym(f"y[{k}]") for k in range(m)]
    P = sp.Matrix(n, n, lambda i, j: _sym(f"P[{packed_index(i, j, n)}]"))
    # cross-covariance C = cov(x, z): P H' for a linear component, sum_i L_i t_i' otherwise
    C: Dict[Tuple[int, int], sp.Expr] = {}
    for k in range(m):
        for a in range(n):
            if k in lin:
                e = sum((P[a, j] * lin[k][j] for j in range(n) if lin[k][j] != 0), sp.S.Zero)
            else:
                e = sum((L[(a, i)] * spreads[k].t[i] for i in range(a + 1)), sp.S.Zero)
            C[(a, k)] = blk.value(f"C{a}_{k}", e)
    S: Dict[Tuple[int, int], sp.Expr] = {}
    for k in range(m):
        for l in range(k, m):
            if k in lin and l in lin:
                e = sum((lin[k][j] * C[(j, l)] for j in range(n) if lin[k][j] != 0), sp.S.Zero)
                # the noise block of the augmented covariance
                e += sum((lin[k][j] * Paug(j, q) * lin[l][q] for j in range(n, na) for q in range(n, na)
                          if lin[k][j] != 0 and lin[l][q] != 0), sp.S.Zero)
            else:
                e = _cov(spreads[k], spreads[l], wts)
            S[(k, l)] = S[(l, k)] = blk.value(f"S{k}_{l}", e + R[(k, l)])
    _gain_and_commit(blk, n, m, P, C, S, y, lambda corr: [blk.add("assign", f"xs[{a}]", _sym(f"x[{a}]") + corr[a])
                                                     for a in range(n)])
    for i, st in enumerate(spec.states):
        if st.angle:
            blk.add("wrap", f"xs[{i}]", _sym(f"xs[{i}]"))
    stmts = blk.pruned()
    return UkfUpdateCode(sensor, stmts, _used(stmts, "par->"), m, n_angle,
                         _count_locals(stmts, ("hg", "hp", "hm", "hq", "hu", "hv", "he", "hh", "hT", "hmu")))


#: section headings of the UKF's predict and update (see :func:`estgen.derive.with_sections`)
UKF_PREDICT_SECTIONS = (
    (r"^decl fn[fc]\d", "noise symbols: factor A (A A' = Qw) for the augmented sigma points [x; w]"),
    (r"^decl fg\d", "sigma-point offsets gamma L_i (L L' = P)"),
    (r"^decl ft\d", "shared subexpressions of f at the sigma points"),
    (r"^(assign|wrap) xn\[", "predicted state: weighted mean of the sigma points through f"),
    (r"^decl AP\d", "A P for the rows of f that are linear in x"),
    (r"^assign Pn\[", "covariance P': weighted covariance of the images + Q, upper triangle, packed"),
)
UKF_UPDATE_SECTIONS = (
    (r"^decl hn[fc]\d", "noise symbols: factor A (A A' = Rv) for the augmented sigma points [x; v]"),
    (r"^decl hg\d", "sigma-point offsets gamma L_i (L L' = P)"),
    (r"^decl ht\d", "shared subexpressions of h at the sigma points"),
    (r"^(assign|wrap) y\[", "innovation y = z - weighted mean of the sigma points through h"),
    (r"^decl C\d", "cross covariance C = cov(x, z)"),
    (r"^decl S\d+_\d+$", "innovation covariance S (+ R)"),
    (r"^(decl|check) (Sd|Ls|Lsi|iS)", "factor S (pivots checked)"),
    (r"^(decl b\d+|assign nis)$", "NIS = y' S^-1 y"),
    (r"^decl (K|B)\d", "gain"),
    (r"^assign xs\[", "updated state x + K y"),
    (r"^assign Ps\[", "covariance P - K S K', upper triangle, packed"),
    (r"^wrap xs\[", "angle states wrapped to (-pi, pi]"),
)


def _augmented(blk: _Block, spec: ModelSpec, noise: Sequence[sp.Symbol], cov: sp.Matrix, wts: UkfWeights, tag: str,
               n: Optional[int] = None
               ) -> Tuple[Dict[Tuple[int, int], sp.Expr], UkfWeights, Callable[[int, int], sp.Expr]]:
    """The factor, weights and covariance of the vector the transform spreads: ``x`` alone, or
    ``[x; noise]`` with covariance blockdiag(P, cov), whose lower factor is blockdiag(Lf, A)
    with A the noise factor (:func:`estgen.model.noise_factor`: square roots of a diagonal cov,
    constants when the cov is), and whose weights are those of dimension n + nw. ``n``: the
    covariance dimension (default the state count; the error dimension for attitudes)."""
    n, k = (spec.n if n is None else n), len(noise)
    L = _factor_symbols(n)
    names = c_names(spec, "x")
    A = noise_factor(cov)
    same: Dict[sp.Expr, sp.Expr] = {}  # equal variances (three axes of one sensor): one square root
    for i in range(k):
        for j in range(i + 1):
            e = A[i, j].xreplace(names)
            if e not in same:
                same[e] = blk.value(f"{tag}nf{i}_{j}", e)
            L[(n + i, n + j)] = same[e]
        for j in range(n):
            L[(n + i, j)] = sp.S.Zero
    aug = UkfWeights(n + k, wts.alpha, wts.beta, wts.kappa) if k else wts
    cvals: Dict[Tuple[int, int], sp.Expr] = {}

    def entry(i: int, j: int) -> sp.Expr:
        if i < n and j < n:
            return _sym(f"P[{packed_index(i, j, n)}]")
        if i < n or j < n:
            return sp.S.Zero
        a, b = sorted((i - n, j - n))
        if (a, b) not in cvals:
            cvals[(a, b)] = blk.value(f"{tag}nc{a}_{b}", cov[a, b].xreplace(names))
        return cvals[(a, b)]

    return L, aug, entry


def _factor_symbols(n: int) -> Dict[Tuple[int, int], sp.Expr]:
    """L[i, j] (i >= j) as the entries of the array ``Lf`` that :func:`factor_function` fills
    (packed like P: entry (i, j) of L at the packed index of (j, i))."""
    return {(i, j): _sym(f"Lf[{packed_index(j, i, n)}]") for i in range(n) for j in range(i + 1)}


def derive_ukf(spec: ModelSpec, wts: UkfWeights) -> UkfCode:
    """Everything the UKF template needs for ``spec`` (models without attitudes; with them,
    :func:`estgen.derive_ukf_att.derive_ukf_attitude`)."""
    stage("derive predict: f at the sigma points, mean, covariance")
    code = UkfCode(spec, wts, derive_ukf_predict(spec, wts))
    for s in spec.sensors:
        stage(f"derive update {s.name}: h at the sigma points, gain, covariance")
        code.updates.append(derive_ukf_update(s, spec, wts))
    return code
