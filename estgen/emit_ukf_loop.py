"""The UKF's loop form (``--optimize``; see docs/performance.md, "Speed and size").

The straight-line form (:mod:`estgen.derive_ukf`) writes the unscented transform out for every
sigma point, which makes its flash grow as about n^3. Here the same algorithm, exactly the
reference's (:class:`estgen.reference.ReferenceUKF`), runs as loops with constant bounds:

* the model's f (and each sensor's h) is one static function, one sigma point in, one image
  out, its subexpressions shared by ``sympy.cse``; with noise symbols it takes the augmented
  point [x; w] (or [x; v]);
* one loop over the 2N+1 sigma points ``x``, ``x +- gamma L_i`` builds each point from a column
  of the Cholesky factor (the loop factorization ``<prefix>_cholesky``) or of the noise factor A
  and keeps its image in a local array, one row per component;
* the weighted mean (circular for angles), the deviations about it (wrapped for angles), the
  packed covariance, the cross covariance ``C = sum_i Wc_i dX_i dZ_i'`` (``dX_i`` is the scaled
  column itself, so only the state columns enter) and the update tail (factor of S, NIS, gain,
  ``P - K S K'`` as ``P - B B'`` with ``B = C Ls^-T``) are loops.

Q, R and the noise factor are printed once per call, at the mean (as in the straight-line form).
Models with attitudes keep the straight-line error-space transform.
"""

from __future__ import annotations

from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

import sympy as sp

from . import quat
from .derive import Stmt, angle_wraps, c_names, model_block, packed_index, packed_size
from .errorstate import inject
from .derive_ukf import UkfWeights
from .emit import Emitter, OpCount
from .model import ModelSpec, SensorSpec, noise_factor

__all__ = ["loop_functions", "loop_predict", "loop_update", "loop_certificate", "LoopCode"]


class LoopCode:
    """Lines of one call in the loop form, with its estimated operation count and the bytes of
    its named local arrays (the header states them)."""

    def __init__(self, lines: List[str], rest: List[str], ops: OpCount, stack_bytes: int, uses_par: bool) -> None:
        self.lines = lines
        self.rest = rest
        self.ops = ops
        self.stack_bytes = stack_bytes
        self.uses_par = uses_par


def _uses(stmts: Sequence[Any], prefix: str) -> bool:
    return any(str(s).startswith(prefix) for st in stmts for s in st.expr.free_symbols)


def _model_function(em: Emitter, name: str, outputs: List[Tuple[str, str, sp.Expr]], out: str,
                    with_u: bool, inputs: Sequence[Tuple[str, str]] = (), wraps: Sequence[str] = ()) -> Dict[str, Any]:
    """One static model function: its parameter list, body lines and the ops of one call.
    ``inputs``: further array parameters after x, (name, the argument a sigma-point call passes);
    ``wraps``: targets wrapped to (-pi, pi]."""
    stmts, _ = model_block(outputs)
    stmts = [Stmt("wrap", st.target, st.expr) if st.kind == "assign" and st.target in wraps else st for st in stmts]
    oc = OpCount()
    lines = em.lines(stmts, oc)
    real = em.real
    params = [f"const {real} *x"] + [f"const {real} *{a}" for a, _ in inputs]
    args = ["xa"] + [arg for _, arg in inputs]
    if with_u and _uses(stmts, "u["):
        params.append(f"const {real} *u")
        args.append("u")
    if with_u and _uses(stmts, "dt"):
        params.append(f"{real} dt")
        args.append("dt")
    par = _uses(stmts, "par->")
    if par:
        params.append(f"const {em.prefix}_par_t *par")
        args.append("par")
    params.append(f"{real} *{out}")
    if not _uses(stmts, "x["):
        lines.insert(0, "(void)x;")
    return {"name": name, "params": ", ".join(params), "args": ", ".join(args), "lines": lines,
            "ops": oc, "uses_par": par}


def loop_functions(spec: ModelSpec, em: Emitter) -> Dict[str, Dict[str, Any]]:
    """The static f (key "f") and h of every sensor (key = sensor name), over the augmented point."""
    n = spec.n
    names = c_names(spec, "x")
    fnames = dict(names)
    fnames.update({w: sp.Symbol(f"w[{k}]") for k, w in enumerate(spec.w_syms)})
    noise = [("w", f"&xa[{n}]")] if spec.nw else []
    out = {"f": _model_function(em, "f", [("assign", f"xn[{i}]", spec.f[i].xreplace(fnames)) for i in range(n)],
                                "xn", True, noise)}
    out["f"]["doc"] = "f at one sigma point [x; w]: xn = its image" if spec.nw else "f at one sigma point: xn = its image"
    for s in spec.sensors:
        hnames = dict(names)
        hnames.update({v: sp.Symbol(f"v[{k}]") for k, v in enumerate(s.v)})
        fn = _model_function(em, f"h_{s.name}", [("assign", f"zh[{k}]", s.h[k].xreplace(hnames))
                                                 for k in range(s.m)], "zh", False, [("v", f"&xa[{n}]")] if s.v else [])
        fn["doc"] = (f"h of sensor {s.name} at one sigma point" + (" [x; v]" if s.v else "") + ": zh = its image")
        out[s.name] = fn
    if spec.attitudes:
        xs = [sp.Symbol(f"x[{i}]") for i in range(n)]
        es = [sp.Symbol(f"e[{k}]") for k in range(spec.ne)]
        rs = [sp.Symbol(f"r[{i}]") for i in range(n)]
        fn = _model_function(em, "inject", [("assign", f"xo[{i}]", v) for i, v in enumerate(inject(spec, xs, es))],
                             "xo", False, [("e", "ev")])
        fn["doc"] = "x [+] e: plain states added, each attitude right-multiplied by exp(e) and renormalized"
        out["inject"] = fn
        minus: List[Tuple[str, str, sp.Expr]] = []
        wraps = []
        for kind, xi, ei in spec.error_blocks():
            if kind == "real":
                minus.append(("assign", f"d[{ei}]", xs[xi] - rs[xi]))
                if spec.states[xi].angle:
                    wraps.append(f"d[{ei}]")
            else:
                rel = quat.log(quat.mul(quat.conj(rs[xi:xi + 4]), xs[xi:xi + 4]))
                minus += [("assign", f"d[{ei + c}]", v) for c, v in enumerate(rel)]
        fn = _model_function(em, "boxminus", minus, "d", False, [("r", "r")], wraps)
        fn["doc"] = "x [-] r: the error d with x = r [+] d (attitudes: log(conj(q_r) q_x); angles wrapped)"
        out["boxminus"] = fn
    return out


def _noise_block(em: Emitter, spec: ModelSpec, cov: sp.Matrix, tag: str) -> Tuple[List[str], OpCount, bool]:
    """An[r][k] = the noise factor A (A A' = cov, lower), evaluated at the mean."""
    names = c_names(spec, "x")
    A = noise_factor(cov)
    k = cov.shape[0]
    outs = [("assign", f"An[{r}][{c}]", A[r, c].xreplace(names)) for r in range(k) for c in range(r + 1)]
    stmts, _ = model_block(outs, tag)
    oc = OpCount()
    return em.lines(stmts, oc), oc, _uses(stmts, "par->")


def _add_block(em: Emitter, spec: ModelSpec, entries: List[Tuple[str, sp.Expr]], tag: str
               ) -> Tuple[List[str], OpCount, bool]:
    """target = target + expr for every non-zero expr (Q or R added to a sum)."""
    names = c_names(spec, "x")
    # a zero that only shows after the substitution (0.0 * dt) is dropped too
    outs = [("assign", t, sp.Symbol(t) + e.xreplace(names)) for t, e in entries
            if e != 0 and sp.Symbol(t) + e.xreplace(names) != sp.Symbol(t)]
    stmts, _ = model_block(outs, tag)
    oc = OpCount()
    return em.lines(stmts, oc), oc, _uses(stmts, "par->")


def _sum_loop(acc: str, term: str, var: str, start: int, stop: int) -> List[str]:
    """``acc += term`` for ``var`` in [start, stop), in order (``term`` formats ``{i}``). Not
    unrolled: measured, two or four terms per pass left the host instruction count unchanged."""
    return [f"for ({var} = {start}u; {var} < {stop}u; ++{var}) {{", f"    {acc} += {term.format(i=var)};", "}"]


def _indent(lines: List[str], depth: int = 1) -> List[str]:
    return ["    " * depth + line for line in lines]


def _sigma_loop(em: Emitter, ctx: Dict[str, Any], spec: ModelSpec, nw: int, wts: UkfWeights, fn: Dict[str, Any],
                out: str, store: List[str]) -> List[str]:
    """The loop over the 2N+1 sigma points of [x; noise] (N = ne + nw): point i in xa (with
    attitudes x [+] e, the error-space offset e in ev), its image through ``fn`` in ``out``, then
    the ``store`` lines (which keep it in column i of the image array)."""
    prefix, real = ctx["prefix"], em.real
    n, ne = spec.n, spec.ne
    att = bool(spec.attitudes)
    na = ne + nw
    g = em.lit(wts.gamma)
    tgt = "ev" if att else "xa"
    lines = [f"for (i = 0u; i < {2 * na + 1}u; ++i) {{"]
    lines.append("    memset(ev, 0, sizeof ev);" if att else f"    memcpy(xa, x, {n}u * sizeof xa[0]);")
    if nw:
        lines += [f"    for (r = {n}u; r < {n + nw}u; ++r) {{", f"        xa[r] = {em.lit(0.0)};", "    }"]
    col = [
        f"const {real} *lc = &Lf[{prefix}_pku(c, c)];  /* column c of L, rows c..{ne - 1} */",
        f"for (r = c; r < {ne}u; ++r) {{",
        f"    {tgt}[r] += g * lc[r - c];",
        "}",
    ]
    lines += [
        "    if (i > 0u) {",
        f"        const size_t c = (i - 1u) % {na}u;",
        f"        const {real} g = (i <= {na}u) ? {g} : -{g};",
    ]
    if nw:
        slot = "xa[r]" if n == ne else f"xa[r + {n - ne}u]"
        lines += [f"        if (c < {ne}u) {{"] + _indent(col, 3) + ["        } else {",
                  f"            for (r = c; r < {na}u; ++r) {{  /* column c - {ne} of A */",
                  f"                {slot} += g * An[r - {ne}u][c - {ne}u];",
                  "            }", "        }"]
    else:
        lines += _indent(col, 2)
    lines.append("    }")
    if att:
        lines.append(f"    {prefix}_inject(x, ev, xa);")
    lines.append(f"    {prefix}_{fn['name']}({fn['args']}, {out});")
    return lines + _indent(store) + ["}"]


def _copy_column(img: str, src: str, m: int, minus: str = "") -> List[str]:
    """img[a][i] = src[a] (- minus[a]) for a < m."""
    tail = f" - {minus}[a]" if minus else ""
    return [f"for (a = 0u; a < {m}u; ++a) {{", f"    {img}[a][i] = {src}[a]{tail};", "}"]


def _linear_mean(em: Emitter, img: str, mean: str, m: int, ns: int, wts: UkfWeights) -> List[str]:
    """mean[a] = Wm0 img[a][0] + Wi sum_i img[a][i]."""
    return [
        f"for (a = 0u; a < {m}u; ++a) {{",
        f"    {em.real} acc = {em.lit(0.0)};",
    ] + _indent(_sum_loop("acc", img + "[a][{i}]", "i", 1, ns)) + [
        f"    {mean}[a] = {em.lit(wts.wm0)} * {img}[a][0] + {em.lit(wts.w)} * acc;",
        "}",
    ]


def _subtract(img: str, mean: str, m: int, ns: int) -> List[str]:
    return [
        f"for (a = 0u; a < {m}u; ++a) {{",
        f"    for (i = 0u; i < {ns}u; ++i) {{",
        f"        {img}[a][i] -= {mean}[a];",
        "    }",
        "}",
    ]


def _covariance(em: Emitter, img: str, dest: str, m: int, ns: int, wts: UkfWeights, packed: bool) -> List[str]:
    """dest = Wc0 d0 d0' + Wi sum_i di di' (packed upper triangle, or the lower triangle of a square)."""
    lines = [f"for (a = 0u; a < {m}u; ++a) {{",
             f"    for (b = a; b < {m}u; ++b) {{" if packed else "    for (b = 0u; b <= a; ++b) {",
             f"        {em.real} acc = {em.lit(0.0)};"]
    lines += _indent(_sum_loop("acc", img + "[a][{i}] * " + img + "[b][{i}]", "i", 1, ns), 2)
    value = f"{em.lit(wts.wc0)} * {img}[a][0] * {img}[b][0] + {em.lit(wts.w)} * acc"
    lines += [f"        {dest}[q] = {value};", "        ++q;"] if packed else [f"        {dest}[a][b] = {value};"]
    return lines + ["    }", "}"]


def _circular_means(em: Emitter, ctx: Dict[str, Any], img: str, mean: str, ns: int, wts: UkfWeights,
                    angles: Sequence[bool]) -> List[str]:
    """mean[k] = atan2(sum Wm sin, sum Wm cos) for every angle component k."""
    prefix, real, fs = ctx["prefix"], em.real, ctx["fsuf"]
    zero, wm0, wi = em.lit(0.0), em.lit(wts.wm0), em.lit(wts.w)
    lines: List[str] = []
    for k, ang in enumerate(angles):
        if ang:
            lines += [
                f"{{   /* component {k} is an angle: circular mean */",
                f"    {real} ss = {zero};",
                f"    {real} cs = {zero};",
                f"    for (i = 1u; i < {ns}u; ++i) {{",
                f"        ss += sin{fs}({img}[{k}u][i]);",
                f"        cs += cos{fs}({img}[{k}u][i]);",
                "    }",
                f"    {em.target(f'{mean}[{k}]')} = {prefix}_wrap(atan2{fs}({wm0} * sin{fs}({img}[{k}u][0]) + {wi} * ss, "
                f"{wm0} * cos{fs}({img}[{k}u][0]) + {wi} * cs));",
                "}",
            ]
    return lines


def _wrap_rows(ctx: Dict[str, Any], img: str, ns: int, angles: Sequence[bool]) -> List[str]:
    out: List[str] = []
    for k, ang in enumerate(angles):
        if ang:
            out += [f"for (i = 0u; i < {ns}u; ++i) {{", f"    {img}[{k}u][i] = {ctx['prefix']}_wrap({img}[{k}u][i]);", "}"]
    return out


def _sum_ops(m: int, ns: int, n_angles: int, mp: int) -> OpCount:
    """Operations of the mean, deviation and covariance loops (m components, ns sigma points)."""
    return OpCount(add=m * ns + m * ns + mp * ns + n_angles * (2 * ns + 2), mul=2 * m + mp * (ns + 2) + 4 * n_angles,
                   transcendental=n_angles * (2 * ns + 2 + ns))


def _sigma_decls(real: str, spec: ModelSpec, nw: int, what: str, cov: str) -> List[str]:
    """The sigma point's arrays: xa (and, with attitudes, the error-space offset ev), and the
    factor of the noise covariance ``cov`` of the noise vector ``what``."""
    lines = [f"{real} xa[{spec.n + nw}];  /* the sigma point{' [x; ' + what + ']' if nw else ''} */"]
    if spec.attitudes:
        lines.append(f"{real} ev[{spec.ne}];  /* its error-space offset e: xa = x [+] e */")
    if nw:
        lines.append(f"{real} An[{nw}][{nw}];  /* noise factor: A A' = {cov} */")
    return lines


def loop_predict(spec: ModelSpec, em: Emitter, ctx: Dict[str, Any], wts: UkfWeights,
                 fns: Dict[str, Dict[str, Any]]) -> LoopCode:
    """The predict's lines in the loop form (placed after the factorization of P into Lf).

    Without attitudes: the images Y_i, their weighted mean (circular for angle states) and the
    deviations about it. With attitudes (the algorithm of :mod:`estgen.derive_ukf_att`): the
    errors d_i = Y_i [-] Y_0 about the central image, dbar = sum Wm_i d_i, xn = Y_0 [+] dbar."""
    n, ne, nw = spec.n, spec.ne, spec.nw
    att = bool(spec.attitudes)
    na = ne + nw
    aug = UkfWeights(na, wts.alpha, wts.beta, wts.kappa)
    ns = 2 * na + 1
    real = em.real
    prefix = ctx["prefix"]
    f = fns["f"]
    lines = [
        "/* loop form: the 2N+1 sigma points through the static f, one at a time; "
        + ("their errors about the central image in Dt */" if att else "their images in Yt */"),
        "{",
        f"    {real} Yt[{ne}][{ns}];  /* " + ("error d_i = Y_i [-] Y_0" if att else "image") + " of sigma point i, component a, at Yt[a][i] */",
        f"    {real} yv[{n}];",
    ]
    lines += _indent(_sigma_decls(real, spec, nw, "w", "Qw"))
    if att:
        lines += [f"    {real} Y0[{n}];  /* image of the central point */", f"    {real} dv[{ne}];"]
    ops = OpCount()
    uses_par = f["uses_par"]
    lines += ["    size_t i;", "    size_t a;", "    size_t b;", "    size_t r;", "    size_t q = 0u;"]
    if att:
        lines.append("    memset(Y0, 0, sizeof Y0);  /* set by the first sigma point; cleared for the compiler's flow analysis */")
    if nw:
        nl, oc, par = _noise_block(em, spec, spec.Qw, "qa")
        lines += _indent(nl)
        ops += oc
        uses_par = uses_par or par
    if att:
        store = ["if (i == 0u) {", "    memcpy(Y0, yv, sizeof Y0);", "}", f"{prefix}_boxminus(yv, Y0, dv);"]
        store += _copy_column("Yt", "dv", ne)
        ops += (fns["inject"]["ops"]).scaled(ns)
        ops += (fns["boxminus"]["ops"]).scaled(ns)
    else:
        store = _copy_column("Yt", "yv", n)
    lines += _indent(_sigma_loop(em, ctx, spec, nw, aug, f, "yv", store))
    ops += f["ops"].scaled(ns)
    ops += OpCount(add=ns * ne // 2 + ns * ne, mul=ns * ne // 2)
    if att:
        lines.append("    /* dbar = sum Wm_i d_i, deviations d_i - dbar */")
        lines += _indent(_linear_mean(em, "Yt", "dv", ne, ns, aug) + _subtract("Yt", "dv", ne, ns))
    else:
        lines.append("    /* weighted mean (circular for angle states), deviations about it (wrapped) */")
        lines += _indent(_linear_mean(em, "Yt", "xn", n, ns, aug)
                         + _circular_means(em, ctx, "Yt", "xn", ns, aug, spec.angle_states)
                         + _subtract("Yt", "xn", n, ns) + _wrap_rows(ctx, "Yt", ns, spec.angle_states))
    ops += _sum_ops(ne, ns, 0 if att else sum(spec.angle_states), packed_size(ne))
    lines.append("    /* P' = Wc0 d0 d0' + Wi sum_i di di' + Q, packed upper triangle */")
    lines += _indent(_covariance(em, "Yt", "Pn", ne, ns, aug, True))
    ql, oc, par = _add_block(em, spec, [(f"Pn[{packed_index(i, j, ne)}]", spec.Q[i, j]) for i in range(ne)
                                        for j in range(i, ne)], "qq")
    lines += _indent(ql)
    if att:
        lines.append(f"    {prefix}_inject(Y0, dv, xn);  /* xn = Y_0 [+] dbar */")
        lines += _indent(em.lines(angle_wraps(spec, "xn")))
    lines.append("}")
    ops += oc
    uses_par = uses_par or par
    stack = (ne * ns + n + nw + n + nw * nw + (n + 2 * ne if att else 0)) * (4 if real == "float" else 8)
    return LoopCode(lines, [], ops, stack, uses_par)


def loop_update(spec: ModelSpec, sensor: SensorSpec, em: Emitter, ctx: Dict[str, Any], wts: UkfWeights,
                fns: Dict[str, Dict[str, Any]]) -> LoopCode:
    """An update's lines in the loop form: through the NIS (``lines``) and after the gate (``rest``).
    With attitudes the images are taken about the central one (``Z_0``), the correction injected
    (``x [+] K y``), as in :mod:`estgen.derive_ukf_att`; ``dx`` holds the correction for the
    covariance reset the emitter appends (:func:`estgen.emit.set_reset`)."""
    n, ne, nv, m = spec.n, spec.ne, sensor.nv, sensor.m
    att = bool(spec.attitudes)
    na = ne + nv
    aug = UkfWeights(na, wts.alpha, wts.beta, wts.kappa)
    ns = 2 * na + 1
    real, zero, one = em.real, em.lit(0.0), em.lit(1.0)
    prefix, upper, fs = ctx["prefix"], em.upper, ctx["fsuf"]
    h = fns[sensor.name]
    uses_par = h["uses_par"]
    ops = OpCount()
    lines = [
        "/* loop form: the 2N+1 sigma points through the static h, one at a time; their images in Zt */",
        f"{real} Zt[{m}][{ns}];  /* image of sigma point i, component a, at Zt[a][i]"
        + (" (less the central one's) */" if att else " */"),
        f"{real} zv[{m}];",
        f"{real} zm[{m}];  /* " + ("mean offset from the central image */" if att else "predicted measurement */"),
        f"{real} Sv[{m}][{m}];  /* innovation covariance S (lower triangle) */",
        f"{real} Lsi[{m}];  /* 1 / Ls[k][k] */",
    ] + ([f"{real} Ls[{m}][{m}];  /* its Cholesky factor */"] if m > 1 else []) + [
        f"{real} bv[{m}];  /* Ls^-1 y */",
        f"{real} Cx[{ne}][{m}];  /* cross covariance C = cov(x, z), then B = C Ls^-T in place */",
    ] + _sigma_decls(real, spec, nv, "v", "Rv")
    if att:
        lines += [f"{real} Z0[{m}];  /* image of the central point */", f"{real} dx[{ne}];  /* the correction K y */"]
    lines += ["size_t i;", "size_t a;", "size_t b;", "size_t r;", "size_t k;", "size_t q;"]
    if att:
        lines.append("memset(Z0, 0, sizeof Z0);  /* set by the first sigma point; cleared for the compiler's flow analysis */")
    if nv:
        nl, oc, par = _noise_block(em, spec, sensor.Rv, "ra")
        lines += nl
        ops += oc
        uses_par = uses_par or par
    if att:
        store = ["if (i == 0u) {", "    memcpy(Z0, zv, sizeof Z0);", "}"] + _copy_column("Zt", "zv", m, "Z0")
        store += [f"Zt[{k}u][i] = {prefix}_wrap(Zt[{k}u][i]);" for k in range(m) if sensor.angles[k]]
        ops += fns["inject"]["ops"].scaled(ns)
    else:
        store = _copy_column("Zt", "zv", m)
    lines += _sigma_loop(em, ctx, spec, nv, aug, h, "zv", store)
    ops += h["ops"].scaled(ns)
    if att:
        lines.append("/* mean offset from the central image, deviations about it */")
        lines += _linear_mean(em, "Zt", "zm", m, ns, aug) + _subtract("Zt", "zm", m, ns)
    else:
        lines.append("/* weighted mean (circular for angle components), deviations about it (wrapped) */")
        lines += (_linear_mean(em, "Zt", "zm", m, ns, aug) + _circular_means(em, ctx, "Zt", "zm", ns, aug, sensor.angles)
                  + _subtract("Zt", "zm", m, ns) + _wrap_rows(ctx, "Zt", ns, sensor.angles))
    ops += _sum_ops(m, ns, 0 if att else sum(sensor.angles), packed_size(m))
    for k in range(m):
        zhat = f"(Z0[{k}] + zm[{k}])" if att else f"zm[{k}]"
        lines.append(f"y[{k}] = {prefix}_wrap(z[{k}] - {zhat});" if sensor.angles[k] else f"y[{k}] = z[{k}] - {zhat};")
    lines.append("/* S = Wc0 d0 d0' + Wi sum_i di di' + R */")
    lines += _covariance(em, "Zt", "Sv", m, ns, aug, False)
    rl, oc, par = _add_block(em, spec, [(f"Sv[{j}][{i}]", sensor.R[i, j]) for i in range(m) for j in range(i, m)],
                             "rr")
    lines += rl
    ops += oc
    uses_par = uses_par or par
    lines += [
        "/* C = sum_i Wc_i dX_i dZ_i': dX of the pair i is +-gamma column i of L (zero for noise columns) */",
        "memset(Cx, 0, sizeof Cx);",
        f"for (i = 0u; i < {ne}u; ++i) {{",
        f"    const {real} *lc = &Lf[{prefix}_pku(i, i)];  /* column i of L, rows i..{ne - 1} */",
        f"    for (k = 0u; k < {m}u; ++k) {{",
        f"        const {real} dz = {em.lit(aug.w * aug.gamma)} * (Zt[k][i + 1u] - Zt[k][i + {na + 1}u]);",
        f"        for (a = i; a < {ne}u; ++a) {{",
        "            Cx[a][k] += lc[a - i] * dz;",
        "        }",
        "    }",
        "}",
    ] + _factor_and_nis(em, ctx, m)
    rest = [
        "/* B = C Ls^-T (in place), " + ("x [+] B b" if att else "x + B b") + ", P - B B' (= P - K S K') */",
        f"for (a = 0u; a < {ne}u; ++a) {{",
    ]
    if m == 1:
        rest += ["    Cx[a][0] *= Lsi[0];", "    dx[a] = Cx[a][0] * bv[0];" if att else "    xs[a] = x[a] + Cx[a][0] * bv[0];"]
    else:
        rest += [
            f"    {real} e = {zero};",
            f"    for (k = 0u; k < {m}u; ++k) {{",
            "        for (b = 0u; b < k; ++b) {",
            "            Cx[a][k] -= Ls[k][b] * Cx[a][b];",
            "        }",
            "        Cx[a][k] *= Lsi[k];",
            "        e += Cx[a][k] * bv[k];",
            "    }",
            ("    dx[a] = e;" if att else "    xs[a] = x[a] + e;"),
        ]
    rest += [
        "}",
    ]
    if att:
        rest.append(f"{prefix}_inject(x, dx, xs);")
    rest += [
        "q = 0u;",
        f"for (a = 0u; a < {ne}u; ++a) {{",
        f"    for (b = a; b < {ne}u; ++b) {{",
        f"        {real} e = P[q];",
        f"        for (k = 0u; k < {m}u; ++k) {{",
        "            e -= Cx[a][k] * Cx[b][k];",
        "        }",
        "        Ps[q] = e;",
        "        ++q;",
        "    }",
        "}",
    ]
    rest += em.lines(angle_wraps(spec, "xs"))
    ops += OpCount(add=ne * (ne + 1) // 2 * (2 * m + 1) + ne * (ne + 1) // 2 * m,
                   mul=ne * (ne + 1) // 2 * (m + 1) + 2 * ne * m, sqrt=m, div=m, compare=2 * m)
    size = (m * ns + n + nv + 3 * m + 2 * m * m + m + ne * m + nv * nv + (m + 2 * ne if att else 0)) * \
        (4 if real == "float" else 8)
    return LoopCode(lines, rest, ops, size, uses_par)


def _factor_and_nis(em: Emitter, ctx: Dict[str, Any], m: int) -> List[str]:
    """Factor S = Ls Ls' (pivots checked: NON_FINITE, NOT_POSITIVE_DEFINITE), b = Ls^-1 y and the
    NIS b' b; a scalar sensor without the loops (they would run zero times)."""
    real, zero, one, fs, upper = em.real, em.lit(0.0), em.lit(1.0), ctx["fsuf"], em.upper
    checks = ["if (!isfinite(d)) {", f"    return {upper}_NON_FINITE;", "}",
              f"if (!(d > {zero})) {{", f"    return {upper}_NOT_POSITIVE_DEFINITE;", "}"]
    if m == 1:
        return ["/* S is a scalar: its square root and the NIS */", "{", f"    const {real} d = Sv[0][0];"] + \
            _indent(checks) + [f"    Lsi[0] = {one} / sqrt{fs}(d);", "}",
                              "bv[0] = y[0] * Lsi[0];", "nis = bv[0] * bv[0];"]
    return [
        "/* factor S = Ls Ls' (pivots checked) */",
        f"for (b = 0u; b < {m}u; ++b) {{",
        f"    {real} d = Sv[b][b];",
        "    for (k = 0u; k < b; ++k) {",
        "        d -= Ls[b][k] * Ls[b][k];",
        "    }",
    ] + _indent(checks) + [
        f"    Ls[b][b] = sqrt{fs}(d);",
        f"    Lsi[b] = {one} / Ls[b][b];",
        f"    for (a = b + 1u; a < {m}u; ++a) {{",
        f"        {real} e = Sv[a][b];",
        "        for (k = 0u; k < b; ++k) {",
        "            e -= Ls[a][k] * Ls[b][k];",
        "        }",
        "        Ls[a][b] = e * Lsi[b];",
        "    }",
        "}",
        "/* NIS = y' S^-1 y = b' b with b = Ls^-1 y */",
        f"nis = {zero};",
        f"for (a = 0u; a < {m}u; ++a) {{",
        f"    {real} e = y[a];",
        "    for (k = 0u; k < a; ++k) {",
        "        e -= Ls[a][k] * bv[k];",
        "    }",
        "    bv[a] = e * Lsi[a];",
        "    nis += bv[a] * bv[a];",
        "}",
    ]


def loop_certificate(spec: ModelSpec, wts: UkfWeights, em: Emitter) -> Optional[List[str]]:
    """The conditions (C text, over the predict's locals) under which the loop form's predict may
    commit P' unfactorized, or None when it must factorize.

    P' = Wc0 d0 d0' + Wi sum_i di di' + Q. With Wc0 >= 0 and Wi > 0 the sum is positive
    semidefinite for whatever deviations d were computed (the same rounded d enter every entry),
    and by Cauchy-Schwarz each entry's accumulated rounding error is at most
    gamma_k (Wc0 |d0a d0b| + Wi sum |dia dib|) <= gamma_k sqrt(S_aa S_bb) (Higham 2002, sec. 3.5):
    the bound docs/performance.md derives for the EKF's certified predict, with factor 1. Q must
    be positive semidefinite: a constant Q is checked here, a diagonal Q of expressions gives the
    conditions 0 <= Q_ii, an off-diagonal expression gives None. Qw needs no condition: it enters
    through its factor, as sigma points."""
    aug = UkfWeights(spec.ne + spec.nw, wts.alpha, wts.beta, wts.kappa)
    if not (aug.wc0 >= 0.0 and aug.w > 0.0):
        return None
    n = spec.ne
    Q = spec.Q
    if any(not Q[i, j].is_Number for i in range(n) for j in range(n) if i != j and Q[i, j] != 0):
        return None
    const = np.array([[float(Q[i, j]) if Q[i, j].is_Number else 0.0 for j in range(n)] for i in range(n)])
    if n and float(np.linalg.eigvalsh(const)[0]) < 0.0:
        return None
    names = c_names(spec, "x")
    conds = [f"({em.lit(0.0)} <= {em.expr(Q[i, i].xreplace(names))})" for i in range(n) if not Q[i, i].is_Number]
    return list(dict.fromkeys(conds))  # equal variances (three axes) checked once
