"""The benchmark's baseline: a fixed-size dense C filter, written the way an engineer writes one
by hand.

The model functions and their Jacobians are written out (printed from sympy, every entry of F
and H assigned, zeros included, common subexpressions shared as a careful engineer would), and
all covariance algebra is plain triple loops over full n x n arrays:

* EKF predict: ``P = F P F' + Q`` (``+ G Qw G'`` with noise symbols, G = df/dw at w = 0).
* EKF update: ``S = H P H' + R`` (R plus ``M Rv M'`` with noise symbols), Cholesky ``S = L L'``, ``K = P H' S^-1`` by two triangular
  solves, Joseph form ``P = (I - K H) P (I - K H)' + K R K'``.
* UKF: full Cholesky of ``(n + lambda) P`` (of the augmented ``blockdiag(P, Qw)`` with noise
  symbols, n their total), 2n+1 sigma points through f (or h), weighted means
  (circular for angles), dense outer-product sums, ``K = C S^-1``, ``P = P - K S K'``.

After either step P is symmetrized and angles are wrapped, as the numpy reference does
(:mod:`estgen.reference`). tests/test_baseline.py checks this C against that reference before
any figure from it is trusted. This is benchmark code: it does not follow the generator's rules
(no packed storage, no input validation beyond what a hand-written filter has).

The C interface (prefix ``<model>_dekf`` or ``<model>_dukf``)::

    <p>_t s;  <p>_init(&s);  <p>_predict(&s, u, dt);  <p>_update_<sensor>(&s, z);
    s.x[i], s.P[i][j]   (full storage)

Return codes are :class:`estgen.Status` values.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import sympy as sp

from estgen.derive import c_names
from estgen.emit import CPrinter, c_literal
from estgen.errors import ModelError
from estgen.filters import check_filter_support
from estgen.model import ModelSpec, SensorSpec, as_spec
from estgen.derive_ukf import UkfWeights
from estgen.reference import sigma_weights
from estgen.status import Status

__all__ = ["BaselineSource", "render_baseline", "build_baseline", "BaselineFilter", "baseline_prefix"]

_HERE = os.path.dirname(os.path.abspath(__file__))


@dataclass
class BaselineSource:
    """The rendered baseline: header and source text and the C prefix."""

    prefix: str
    header: str
    source: str
    cdef: str
    filter: str
    precision: str


def baseline_prefix(spec: ModelSpec, filter: str) -> str:
    return f"{spec.name}_d{filter}"


class _W:
    """A tiny indenting line writer."""

    def __init__(self) -> None:
        self.lines: List[str] = []
        self.level = 0

    def __call__(self, text: str = "") -> None:
        self.lines.append(("    " * self.level + text) if text else "")

    def open(self, text: str) -> None:
        self(text + " {")
        self.level += 1

    def close(self, tail: str = "") -> None:
        self.level -= 1
        self("}" + tail)

    def text(self) -> str:
        return "\n".join(self.lines) + "\n"


class _Ctx:
    def __init__(self, spec: ModelSpec, filter: str, precision: str) -> None:
        self.spec = spec
        self.filter = filter
        self.precision = precision
        self.real = "float" if precision == "float" else "double"
        self.fs = "f" if precision == "float" else ""
        self.pr = CPrinter(precision)
        self.p = baseline_prefix(spec, filter)
        self.P = self.p.upper()
        self.n = spec.n

    def lit(self, v: float) -> str:
        return c_literal(v, self.precision)

    def block(self, w: _W, outputs: Sequence[Tuple[str, sp.Expr]], names: Dict[sp.Symbol, sp.Symbol],
              prefix: str = "t") -> None:
        """Assign ``target = expr`` for each output, sharing subexpressions among them."""
        exprs = [sp.sympify(e).xreplace(names) for _, e in outputs]
        repl, red = sp.cse(exprs, symbols=sp.numbered_symbols(prefix), order="canonical")
        for sym, ex in repl:
            w(f"const {self.real} {sym} = {self.pr.doprint(ex)};")
        for (target, _), ex in zip(outputs, red):
            w(f"{target} = {self.pr.doprint(ex)};")


def _header(c: _Ctx) -> Tuple[str, str]:
    spec, r, p, P = c.spec, c.real, c.p, c.P
    w = _W()
    w(f"/* {p}.h -- dense baseline {c.filter.upper()} for benchmarking (benchmarks/baseline.py). */")
    w(f"#ifndef {P}_H")
    w(f"#define {P}_H")
    w(f"#define {P}_N {c.n}")
    w(f"#define {P}_NU {spec.nu}")
    decl: List[str] = []
    decl.append(f"typedef struct {{ {r} " + (", ".join(pp.name for pp in spec.params) if spec.params else "unused_")
                + f"; }} {p}_par_t;")
    decl.append(f"typedef struct {{ {r} x[{c.n}]; {r} P[{c.n}][{c.n}]; {p}_par_t par; }} {p}_t;")
    decl.append(f"void {p}_init({p}_t *s);")
    decl.append(f"int {p}_predict({p}_t *s, const {r} *u, {r} dt);")
    for s in spec.sensors:
        decl.append(f"int {p}_update_{s.name}({p}_t *s, const {r} *z);")
    for d in decl:
        w(d)
    w(f"#endif /* {P}_H */")
    return w.text(), "\n".join(decl) + "\n"


def _preamble(c: _Ctx, w: _W) -> None:
    r, fs = c.real, c.fs
    w(f'#include "{c.p}.h"')
    w("#include <math.h>")
    w("#include <string.h>")
    w()
    if any(st.angle for st in c.spec.states) or any(any(s.angles) for s in c.spec.sensors):
        w(f"static {r} wrap_angle({r} a)")
        w.open("")
        w(f"return a - {c.lit(2 * np.pi)} * ceil{fs}((a - {c.lit(np.pi)}) / {c.lit(2 * np.pi)});")
        w.close()
        w()
    w(f"static int all_finite(const {r} *v, int len)")
    w.open("")
    w("int i;")
    w("for (i = 0; i < len; ++i) { if (!isfinite(v[i])) { return 0; } }")
    w("return 1;")
    w.close()
    w()
    spec = c.spec
    w(f"void {c.p}_init({c.p}_t *s)")
    w.open("")
    w("memset(s, 0, sizeof *s);")
    for i, v in enumerate(spec.x0):
        w(f"s->x[{i}] = {c.lit(v)};")
    for i in range(c.n):
        for j in range(c.n):
            if float(spec.P0[i][j]) != 0.0:
                w(f"s->P[{i}][{j}] = {c.lit(spec.P0[i][j])};")
    for pp in spec.params:
        w(f"s->par.{pp.name} = {c.lit(pp.default)};")
    w.close()
    w()


def _commit(c: _Ctx, w: _W, xn: str, Pn: str) -> None:
    """Wrap angle states, symmetrize, refuse non-finite results, store."""
    n = c.n
    for i, st in enumerate(c.spec.states):
        if st.angle:
            w(f"{xn}[{i}] = wrap_angle({xn}[{i}]);")
    w(f"for (i = 0; i < {n}; ++i) {{ for (j = i + 1; j < {n}; ++j) {{")
    w(f"    const {c.real} avg = {c.lit(0.5)} * ({Pn}[i][j] + {Pn}[j][i]); {Pn}[i][j] = avg; {Pn}[j][i] = avg;")
    w("} }")
    w(f"if (!all_finite({xn}, {n}) || !all_finite(&{Pn}[0][0], {n * n})) {{ return {int(Status.NON_FINITE)}; }}")
    w(f"memcpy(s->x, {xn}, sizeof s->x);")
    w(f"for (i = 0; i < {n}; ++i) {{ for (j = 0; j < {n}; ++j) {{ s->P[i][j] = {Pn}[i][j]; }} }}")
    w(f"return {int(Status.OK)};")


def _chol(c: _Ctx, w: _W, A: str, L: str, dim: int, scale: Optional[str] = None) -> None:
    """Dense lower Cholesky L L' = scale * A, refusing a non-positive pivot."""
    r = c.real
    sc = f"{scale} * " if scale else ""
    w(f"memset({L}, 0, sizeof {L});")
    w(f"for (j = 0; j < {dim}; ++j) {{")
    w(f"    {r} d = {sc}{A}[j][j];")
    w(f"    for (k = 0; k < j; ++k) {{ d -= {L}[j][k] * {L}[j][k]; }}")
    w(f"    if (!(d > {c.lit(0.0)}) || !isfinite(d)) {{ return {int(Status.NOT_POSITIVE_DEFINITE)}; }}")
    w(f"    {L}[j][j] = sqrt{c.fs}(d);")
    w(f"    for (i = j + 1; i < {dim}; ++i) {{")
    w(f"        {r} e = {sc}{A}[i][j];")
    w(f"        for (k = 0; k < j; ++k) {{ e -= {L}[i][k] * {L}[j][k]; }}")
    w(f"        {L}[i][j] = e / {L}[j][j];")
    w("    }")
    w("}")


def _gain_and_nis(c: _Ctx, w: _W, s: SensorSpec, C: str, L: str = "L") -> None:
    """K = C S^-1 from S = L L' (two triangular solves per row of C), nis = |L^-1 y|^2, the gate."""
    r, n, m = c.real, c.n, s.m
    w(f"for (i = 0; i < {m}; ++i) {{ {r} e = y[i]; for (k = 0; k < i; ++k) {{ e -= {L}[i][k] * b[k]; }} b[i] = e / {L}[i][i]; }}")
    w(f"nis = {c.lit(0.0)};")
    w(f"for (i = 0; i < {m}; ++i) {{ nis += b[i] * b[i]; }}")
    w(f"if (!isfinite(nis)) {{ return {int(Status.NON_FINITE)}; }}")
    if s.gate is not None:
        from estgen.chi2 import chi2_ppf
        w(f"if (nis > {c.lit(chi2_ppf(s.gate, m))}) {{ return {int(Status.GATED)}; }}")
    w(f"for (j = 0; j < {n}; ++j) {{")
    w(f"    for (i = 0; i < {m}; ++i) {{ {r} e = {C}[j][i]; for (k = 0; k < i; ++k) {{ e -= {L}[i][k] * a[k]; }} a[i] = e / {L}[i][i]; }}")
    w(f"    for (i = {m} - 1; i >= 0; --i) {{ {r} e = a[i]; for (k = i + 1; k < {m}; ++k) {{ e -= {L}[k][i] * K[j][k]; }} K[j][i] = e / {L}[i][i]; }}")
    w("}")


def _product(c: _Ctx, w: _W, out: str, rows: int, cols: int, init: str, terms: Sequence[Tuple[int, str]]) -> None:
    """out[i][j] = init + sum over each (length, term) of term summed for k < length: the dense
    triple loop every product here is written as."""
    w(f"for (i = 0; i < {rows}; ++i) {{ for (j = 0; j < {cols}; ++j) {{")
    w(f"    {c.real} acc = {init};")
    for length, term in terms:
        w(f"    for (k = 0; k < {length}; ++k) {{ acc += {term}; }}")
    w(f"    {out} = acc;")
    w("} }")


def _ekf_source(c: _Ctx) -> str:
    spec, r, n, p = c.spec, c.real, c.n, c.p
    names = c_names(spec, "x")
    w = _W()
    _preamble(c, w)
    F = spec.f0.jacobian(spec.x_syms)
    ws = spec.w_syms
    nw = len(ws)
    G = spec.f.jacobian(ws).xreplace({v: 0 for v in ws}) if ws else sp.zeros(n, 0)
    w(f"int {p}_predict({p}_t *s, const {r} *u, {r} dt)")
    w.open("")
    w(f"{r} xn[{n}], F[{n}][{n}], Q[{n}][{n}], FP[{n}][{n}], Pn[{n}][{n}];")
    if nw:
        w(f"{r} G[{n}][{nw}], Qw[{nw}][{nw}], GQ[{n}][{nw}];")
    w(f"const {r} *x = s->x;")
    w(f"const {p}_par_t *par = &s->par;")
    w("int i, j, k;")
    w("(void)u; (void)par;")
    w(f"if (!isfinite(dt) || !(dt > {c.lit(0.0)})) {{ return {int(Status.BAD_DT)}; }}")
    outs: List[Tuple[str, sp.Expr]] = [(f"xn[{i}]", spec.f0[i]) for i in range(n)]
    outs += [(f"F[{i}][{j}]", F[i, j]) for i in range(n) for j in range(n)]
    outs += [(f"Q[{i}][{j}]", spec.Q[i, j]) for i in range(n) for j in range(n)]
    outs += [(f"G[{i}][{j}]", G[i, j]) for i in range(n) for j in range(nw)]
    outs += [(f"Qw[{i}][{j}]", spec.Qw[i, j]) for i in range(nw) for j in range(nw)]
    c.block(w, outs, names)
    _product(c, w, "FP[i][j]", n, n, c.lit(0.0), [(n, "F[i][k] * s->P[k][j]")])
    if nw:
        _product(c, w, "GQ[i][j]", n, nw, c.lit(0.0), [(nw, "G[i][k] * Qw[k][j]")])
        _product(c, w, "Pn[i][j]", n, n, "Q[i][j]", [(n, "FP[i][k] * F[j][k]"), (nw, "GQ[i][k] * G[j][k]")])
    else:
        _product(c, w, "Pn[i][j]", n, n, "Q[i][j]", [(n, "FP[i][k] * F[j][k]")])
    _commit(c, w, "xn", "Pn")
    w.close()
    for s in spec.sensors:
        m, nv = s.m, s.nv
        H = s.h0.jacobian(spec.x_syms)
        M = s.h.jacobian(list(s.v)).xreplace({v: 0 for v in s.v}) if nv else sp.zeros(m, 0)
        w()
        w(f"int {p}_update_{s.name}({p}_t *s, const {r} *z)")
        w.open("")
        w(f"{r} hz[{m}], H[{m}][{n}], R[{m}][{m}], y[{m}], PHt[{n}][{m}], S[{m}][{m}], L[{m}][{m}];")
        w(f"{r} K[{n}][{m}], KR[{n}][{m}], a[{m}], b[{m}], IKH[{n}][{n}], T[{n}][{n}], xn[{n}], Pn[{n}][{n}];")
        w(f"{r} nis;")
        if nv:
            w(f"{r} M[{m}][{nv}], Rv[{nv}][{nv}], MR[{m}][{nv}], R0[{m}][{m}];")
        w(f"const {r} *x = s->x;")
        w(f"const {p}_par_t *par = &s->par;")
        w("int i, j, k;")
        w("(void)par;")
        w(f"if (!all_finite(z, {m})) {{ return {int(Status.BAD_INPUT)}; }}")
        outs = [(f"hz[{i}]", s.h0[i]) for i in range(m)]
        outs += [(f"H[{i}][{j}]", H[i, j]) for i in range(m) for j in range(n)]
        outs += [(f"{'R0' if nv else 'R'}[{i}][{j}]", s.R[i, j]) for i in range(m) for j in range(m)]
        outs += [(f"M[{i}][{j}]", M[i, j]) for i in range(m) for j in range(nv)]
        outs += [(f"Rv[{i}][{j}]", s.Rv[i, j]) for i in range(nv) for j in range(nv)]
        c.block(w, outs, names)
        if nv:  # R_eff = M Rv M' + R
            _product(c, w, "MR[i][j]", m, nv, c.lit(0.0), [(nv, "M[i][k] * Rv[k][j]")])
            _product(c, w, "R[i][j]", m, m, "R0[i][j]", [(nv, "MR[i][k] * M[j][k]")])
        for i in range(m):
            if s.angles[i]:
                w(f"y[{i}] = wrap_angle(z[{i}] - hz[{i}]);")
            else:
                w(f"y[{i}] = z[{i}] - hz[{i}];")
        _product(c, w, "PHt[i][j]", n, m, c.lit(0.0), [(n, "s->P[i][k] * H[j][k]")])
        _product(c, w, "S[i][j]", m, m, "R[i][j]", [(n, "H[i][k] * PHt[k][j]")])
        _chol(c, w, "S", "L", m)
        _gain_and_nis(c, w, s, "PHt")
        w(f"for (i = 0; i < {n}; ++i) {{ {r} acc = x[i]; for (k = 0; k < {m}; ++k) {{ acc += K[i][k] * y[k]; }} xn[i] = acc; }}")
        _product(c, w, "IKH[i][j]", n, n, f"(i == j) ? {c.lit(1.0)} : {c.lit(0.0)}", [(m, "-K[i][k] * H[k][j]")])
        _product(c, w, "T[i][j]", n, n, c.lit(0.0), [(n, "IKH[i][k] * s->P[k][j]")])
        _product(c, w, "KR[i][j]", n, m, c.lit(0.0), [(m, "K[i][k] * R[k][j]")])
        _product(c, w, "Pn[i][j]", n, n, c.lit(0.0), [(n, "T[i][k] * IKH[j][k]"), (m, "KR[i][k] * K[j][k]")])
        _commit(c, w, "xn", "Pn")
        w.close()
    return w.text()


def _ukf_source(c: _Ctx, alpha: float, beta: float, kappa: float) -> str:
    spec, r, n, p, fs = c.spec, c.real, c.n, c.p, c.fs
    UkfWeights(n, alpha, beta, kappa)  # validates the parameters
    names = c_names(spec, "x")
    w = _W()
    _preamble(c, w)
    # one weight table per augmented dimension (n, n + nw, n + nv): noise symbols are read from
    # the sigma point's entries after the states
    dims = sorted({n + spec.nw} | {n + s.nv for s in spec.sensors} | {n})
    for dim in dims:
        _, wm, wc = sigma_weights(dim, alpha, beta, kappa)
        w(f"static const {r} WM{dim}[{2 * dim + 1}] = {{" + ", ".join(c.lit(v) for v in wm) + "};")
        w(f"static const {r} WC{dim}[{2 * dim + 1}] = {{" + ", ".join(c.lit(v) for v in wc) + "};")
    w()
    fnames = {**names, **{v: sp.Symbol(f"x[{n + j}]") for j, v in enumerate(spec.w_syms)}}
    w(f"static void model_f(const {r} *x, const {r} *u, {r} dt, const {p}_par_t *par, {r} *out)")
    w.open("")
    w("(void)u; (void)dt; (void)par;")
    c.block(w, [(f"out[{i}]", spec.f[i]) for i in range(n)], fnames)
    w.close()
    for s in spec.sensors:
        w()
        w(f"static void model_h_{s.name}(const {r} *x, const {p}_par_t *par, {r} *out)")
        w.open("")
        w("(void)x; (void)par;")
        hnames = {**names, **{v: sp.Symbol(f"x[{n + j}]") for j, v in enumerate(s.v)}}
        c.block(w, [(f"out[{i}]", s.h[i]) for i in range(s.m)], hnames)
        w.close()
    w()

    def sigma(dim: int, cov: sp.Matrix) -> None:
        """X: the sigma points of [x; noise] with covariance blockdiag(P, cov)."""
        lam = sigma_weights(dim, alpha, beta, kappa)[0]
        k = dim - n
        w(f"memset(Pa, 0, sizeof Pa);")
        w(f"for (i = 0; i < {n}; ++i) {{ for (j = 0; j < {n}; ++j) {{ Pa[i][j] = s->P[i][j]; }} }}")
        if k:
            c.block(w, [(f"Pa[{n + i}][{n + j}]", cov[i, j]) for i in range(k) for j in range(k)], names, prefix="q")
        _chol(c, w, "Pa", "L", dim, scale=c.lit(dim + lam))
        w(f"for (j = 0; j < {dim}; ++j) {{ X[0][j] = j < {n} ? s->x[j] : {c.lit(0.0)}; }}")
        w(f"for (i = 0; i < {dim}; ++i) {{ for (j = 0; j < {dim}; ++j) {{")
        w(f"    X[1 + i][j] = X[0][j] + L[j][i];")
        w(f"    X[1 + {dim} + i][j] = X[0][j] - L[j][i];")
        w("} }")

    def mean(Y: str, out: str, dim: int, angles: Sequence[bool], npts: int, WM: str) -> None:
        w(f"for (j = 0; j < {dim}; ++j) {{ {r} acc = {c.lit(0.0)}; for (k = 0; k < {npts}; ++k) {{ acc += {WM}[k] * {Y}[k][j]; }} {out}[j] = acc; }}")
        for j, ang in enumerate(angles):
            if ang:
                w(f"{{ {r} sn = {c.lit(0.0)}, cs = {c.lit(0.0)};")
                w(f"  for (k = 0; k < {npts}; ++k) {{ sn += {WM}[k] * sin{fs}({Y}[k][{j}]); cs += {WM}[k] * cos{fs}({Y}[k][{j}]); }}")
                w(f"  {out}[{j}] = atan2{fs}(sn, cs); }}")

    def deviations(Y: str, mu: str, D: str, dim: int, angles: Sequence[bool], npts: int) -> None:
        w(f"for (k = 0; k < {npts}; ++k) {{ for (j = 0; j < {dim}; ++j) {{ {D}[k][j] = {Y}[k][j] - {mu}[j]; }} }}")
        for j, ang in enumerate(angles):
            if ang:
                w(f"for (k = 0; k < {npts}; ++k) {{ {D}[k][{j}] = wrap_angle({D}[k][{j}]); }}")

    na = n + spec.nw
    npts = 2 * na + 1
    w(f"int {p}_predict({p}_t *s, const {r} *u, {r} dt)")
    w.open("")
    w(f"{r} Pa[{na}][{na}], L[{na}][{na}], X[{npts}][{na}], Y[{npts}][{n}], D[{npts}][{n}], Q[{n}][{n}], xn[{n}], Pn[{n}][{n}];")
    w(f"const {p}_par_t *par = &s->par;")
    w("int i, j, k;")
    w("(void)par;")
    w(f"if (!isfinite(dt) || !(dt > {c.lit(0.0)})) {{ return {int(Status.BAD_DT)}; }}")
    sigma(na, spec.Qw)
    w(f"for (k = 0; k < {npts}; ++k) {{ model_f(X[k], u, dt, par, Y[k]); }}")
    c.block(w, [(f"Q[{i}][{j}]", spec.Q[i, j]) for i in range(n) for j in range(n)], names)
    mean("Y", "xn", n, spec.angle_states, npts, f"WM{na}")
    deviations("Y", "xn", "D", n, spec.angle_states, npts)
    _product(c, w, "Pn[i][j]", n, n, "Q[i][j]", [(npts, f"WC{na}[k] * D[k][i] * D[k][j]")])
    _commit(c, w, "xn", "Pn")
    w.close()
    for s in spec.sensors:
        m = s.m
        na = n + s.nv
        npts = 2 * na + 1
        w()
        w(f"int {p}_update_{s.name}({p}_t *s, const {r} *z)")
        w.open("")
        w(f"{r} Pa[{na}][{na}], L[{na}][{na}], X[{npts}][{na}], Z[{npts}][{m}], DZ[{npts}][{m}], zh[{m}], R[{m}][{m}], S[{m}][{m}];")
        w(f"{r} LS[{m}][{m}], C[{n}][{m}], K[{n}][{m}], KS[{n}][{m}], y[{m}], a[{m}], b[{m}], xn[{n}], Pn[{n}][{n}], nis;")
        w(f"const {p}_par_t *par = &s->par;")
        w("int i, j, k;")
        w("(void)par;")
        w(f"if (!all_finite(z, {m})) {{ return {int(Status.BAD_INPUT)}; }}")
        sigma(na, s.Rv)
        w(f"for (k = 0; k < {npts}; ++k) {{ model_h_{s.name}(X[k], par, Z[k]); }}")
        c.block(w, [(f"R[{i}][{j}]", s.R[i, j]) for i in range(m) for j in range(m)], names)
        mean("Z", "zh", m, s.angles, npts, f"WM{na}")
        deviations("Z", "zh", "DZ", m, s.angles, npts)
        _product(c, w, "S[i][j]", m, m, "R[i][j]", [(npts, f"WC{na}[k] * DZ[k][i] * DZ[k][j]")])
        _product(c, w, "C[i][j]", n, m, c.lit(0.0), [(npts, f"WC{na}[k] * (X[k][i] - s->x[i]) * DZ[k][j]")])
        for i in range(m):
            if s.angles[i]:
                w(f"y[{i}] = wrap_angle(z[{i}] - zh[{i}]);")
            else:
                w(f"y[{i}] = z[{i}] - zh[{i}];")
        _chol(c, w, "S", "LS", m)
        _gain_and_nis(c, w, s, "C", "LS")
        w(f"for (i = 0; i < {n}; ++i) {{ {r} acc = s->x[i]; for (k = 0; k < {m}; ++k) {{ acc += K[i][k] * y[k]; }} xn[i] = acc; }}")
        _product(c, w, "KS[i][j]", n, m, c.lit(0.0), [(m, "K[i][k] * S[k][j]")])
        _product(c, w, "Pn[i][j]", n, n, "s->P[i][j]", [(m, "-KS[i][k] * K[j][k]")])
        _commit(c, w, "xn", "Pn")
        w.close()
    return w.text()


def render_baseline(model: Any, filter: str = "ekf", precision: str = "double", *, alpha: float = 1.0,
                    beta: float = 2.0, kappa: float = 0.0) -> BaselineSource:
    """The dense baseline C for ``model`` (a ModelSpec or model file path)."""
    spec = as_spec(model)
    check_filter_support(spec, filter)
    if spec.attitudes:
        raise ModelError(f"the dense baseline filters plain states only; model {spec.name!r} has attitude "
                         f"(quaternion) states, which need the error-state filter estgen generates")
    c = _Ctx(spec, filter, precision)
    header, cdef = _header(c)
    if filter == "ekf":
        source = _ekf_source(c)
    elif filter == "ukf":
        source = _ukf_source(c, alpha, beta, kappa)
    else:
        raise ValueError(f"unknown filter {filter!r}")
    return BaselineSource(c.p, header, source, cdef, filter, precision)


# ---------------------------------------------------------------------------------------------
# A cffi harness, for checking the baseline against the reference


class BaselineFilter:
    """The compiled baseline with the reference filter's predict/update/x/P interface."""

    def __init__(self, spec: ModelSpec, src: BaselineSource, ffi: Any, lib: Any) -> None:
        self.spec = spec
        self.n = spec.n
        self._ffi, self._lib = ffi, lib
        self._real = "float" if src.precision == "float" else "double"
        self._s = ffi.new(f"{src.prefix}_t *")
        getattr(lib, f"{src.prefix}_init")(self._s)
        self._predict = getattr(lib, f"{src.prefix}_predict")
        self._updates = {s.name: (getattr(lib, f"{src.prefix}_update_{s.name}"), s.m) for s in spec.sensors}

    def _arr(self, v: Sequence[float]) -> Any:
        vals = [float(a) for a in np.asarray(v, dtype=float).ravel()]
        return self._ffi.new(f"{self._real}[]", vals) if vals else self._ffi.NULL

    def predict(self, u: Sequence[float], dt: float) -> int:
        return int(self._predict(self._s, self._arr(u if u is not None else []), float(dt)))

    def update(self, sensor: str, z: Sequence[float]) -> int:
        fn, m = self._updates[sensor]
        if len(z) != m:
            raise ValueError(f"sensor {sensor!r} gives {m} values")
        return int(fn(self._s, self._arr(z)))

    @property
    def x(self) -> np.ndarray:
        return np.array([self._s.x[i] for i in range(self.n)], dtype=float)

    @property
    def P(self) -> np.ndarray:
        return np.array([[self._s.P[i][j] for j in range(self.n)] for i in range(self.n)], dtype=float)


def build_baseline(model: Any, filter: str = "ekf", precision: str = "double", work_dir: Optional[str] = None,
                   **ukf: float) -> BaselineFilter:
    """Render, compile (cffi, -O2) and load the baseline for ``model``."""
    import cffi

    spec = as_spec(model)
    src = render_baseline(spec, filter, precision, **ukf)
    key = hashlib.sha256((src.header + src.source + sys.version + cffi.__version__).encode()).hexdigest()[:12]
    modname = f"_bl_{src.prefix}_{precision}_{key}"
    root = work_dir or os.path.join(tempfile.gettempdir(), "estgen_baseline")
    os.makedirs(root, exist_ok=True)
    target = os.path.join(root, modname)
    so = None
    if os.path.isdir(target):
        so = next((os.path.join(target, f) for f in os.listdir(target) if f.startswith(modname) and f.endswith(".so")), None)
    if so is None:
        work = tempfile.mkdtemp(prefix=modname + ".", dir=root)
        with open(os.path.join(work, f"{src.prefix}.h"), "w") as fh:
            fh.write(src.header)
        with open(os.path.join(work, f"{src.prefix}.c"), "w") as fh:
            fh.write(src.source)
        ffi = cffi.FFI()
        ffi.cdef(src.cdef)
        ffi.set_source(modname, f'#include "{src.prefix}.h"\n', sources=[os.path.join(work, f"{src.prefix}.c")],
                       include_dirs=[work], extra_compile_args=["-O2", "-std=c99"], libraries=["m"])
        import contextlib

        with open(os.devnull, "w") as devnull, contextlib.redirect_stdout(devnull):
            built = ffi.compile(tmpdir=work, verbose=False)
        try:
            os.rename(work, target)
        except OSError:
            shutil.rmtree(work, ignore_errors=True)
        so = next(os.path.join(target, f) for f in os.listdir(target) if f.startswith(modname) and f.endswith(".so"))
    spec_ = importlib.util.spec_from_file_location(modname, so)
    assert spec_ is not None and spec_.loader is not None
    mod = importlib.util.module_from_spec(spec_)
    spec_.loader.exec_module(mod)
    return BaselineFilter(spec, src, mod.ffi, mod.lib)
