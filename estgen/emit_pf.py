"""Stage 2 and 3 for the particle filter: the model functions as straight-line C (f, Q, and per
sensor h and R, each a static function the particle loops call) and ``templates/pf.c.j2``, the
filter itself (see :mod:`estgen.pf` for the algorithm; the C performs the same steps in the
same order with the same random numbers). The header and the cffi declarations are the shared
ones, with the particle arrays and the generator state added to the struct.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Dict, List, Optional

import numpy as np
import sympy as sp

from .derive import Stmt, c_names, model_block, packed_index, packed_size
from .emit import Emitter, Generated, OpCount, _common_context, _render
from .model import ModelSpec
from .progress import stage
from .pf import DEFAULT_SEED, KERNEL_BITS, KERNEL_TOL, PSD_TOL, PfOptions, particle_reach

if TYPE_CHECKING:
    from .filters import FilterSetup

__all__ = ["generate_pf"]


def _model_functions(spec: ModelSpec, em: Emitter, ops: Dict[str, OpCount]) -> Dict[str, Any]:
    """The straight-line bodies of f (into xn), Q (packed, into Q) and per sensor h (into hz) and
    R (packed, into R), with the op count of one evaluation of each."""
    names = c_names(spec, "x")
    names.update({w: sp.Symbol(f"w[{k}]") for k, w in enumerate(spec.w_syms)})
    n, nw = spec.n, spec.nw

    def block(outputs: List[Any], key: str) -> Dict[str, Any]:
        stmts, _ = model_block(outputs)
        oc = OpCount()
        lines = em.lines(stmts, oc)
        ops[key] = oc
        used = {str(s) for st in stmts for s in st.expr.free_symbols}
        return {"lines": lines, "uses_par": any(u.startswith("par->") for u in used),
                "uses_u": any(u.startswith("u[") for u in used), "uses_dt": "dt" in used,
                "uses_x": any(u.startswith("x[") for u in used), "uses_w": any(u.startswith("w[") for u in used)}

    out: Dict[str, Any] = {}
    out["f"] = block([("assign", f"xn[{i}]", spec.f[i].xreplace(names)) for i in range(n)], "f")
    out["q"] = block([("assign", f"Q[{packed_index(i, j, n)}]", spec.Q[i, j].xreplace(names))
                      for i in range(n) for j in range(i, n)], "q")
    out["qw"] = block([("assign", f"Qw[{packed_index(i, j, nw)}]", spec.Qw[i, j].xreplace(names))
                       for i in range(nw) for j in range(i, nw)], "qw")
    hs = []
    for s in spec.sensors:
        outs = [("assign", f"hz[{c}]", s.h0[c].xreplace(names)) for c in range(s.m)]
        rv = None
        if s.v:
            # M = dh/dv at v = 0, row-major m x nv: the linearized likelihood's R_eff = M Rv M' + R
            M = s.h.jacobian(list(s.v)).xreplace({v: 0 for v in s.v})
            outs += [("assign", f"Mv[{c * s.nv + k}]", M[c, k].xreplace(names)) for c in range(s.m)
                     for k in range(s.nv)]
            rv = block([("assign", f"Rv[{packed_index(a, b, s.nv)}]", s.Rv[a, b].xreplace(names))
                        for a in range(s.nv) for b in range(a, s.nv)], f"rv_{s.name}")
        h = block(outs, f"h_{s.name}")
        r = block([("assign", f"R[{packed_index(a, b, s.m)}]", s.R[a, b].xreplace(names))
                   for a in range(s.m) for b in range(a, s.m)], f"r_{s.name}")
        hs.append({"h": h, "r": r, "rv": rv, "nv": s.nv, "nvp": packed_size(s.nv)})
    out["sensors"] = hs
    return out


def _prior(spec: ModelSpec, em: Emitter) -> Dict[str, Any]:
    """How init draws particle i's component j: from the box (lower + width u) or from the
    Gaussian (x0 + row j of chol(P0) times the normals z[0..j])."""
    n = spec.n
    if spec.prior_box is not None:
        lo, hi = spec.prior_box
        return {"box": True, "lo": [em.lit(a) for a in lo], "width": [em.lit(b - a) for a, b in zip(lo, hi)]}
    L0 = np.linalg.cholesky(np.array(spec.P0, dtype=float))
    rows = []
    for j in range(n):
        e = sp.Float(spec.x0[j]) if spec.x0[j] != 0.0 else sp.S.Zero
        for k in range(j + 1):
            if L0[j, k] != 0.0:
                e = e + sp.Float(float(L0[j, k])) * sp.Symbol(f"z[{k}]")
        rows.append(em.expr(e))
    return {"box": False, "rows": rows}


def generate_pf(spec: ModelSpec, setup: "FilterSetup", opts: PfOptions) -> Generated:
    """Generate the particle filter's header and source for ``spec`` with the validated
    ``opts``: particles (N), resample_threshold, roughening, regularization (see
    :func:`estgen.pf.pf_options`).
    ``Generated.ops`` holds the op counts of one evaluation of each model function (keys "f",
    "q", "h_<sensor>", "r_<sensor>"): the per-particle part of a step's cost.
    """
    ctx = _common_context(spec, setup)
    em: Emitter = ctx["emitter"]
    precision = setup.precision
    N, n = opts.particles, spec.n
    stage(f"derive and print the model functions ({precision})")
    ops: Dict[str, OpCount] = {}
    fns = _model_functions(spec, em, ops)
    for sctx, sf, s in zip(ctx["sensors"], fns["sensors"], spec.sensors):
        sctx.update(sf)
        sctx["mp"] = packed_size(s.m)
        sctx["angle_mask"] = list(s.angles)
    ctx["f"] = fns["f"]
    ctx["q"] = fns["q"]
    ctx["qw"] = fns["qw"]
    ctx["nw"] = spec.nw
    ctx["nwp"] = packed_size(spec.nw)
    ctx["particles"] = N
    ctx["precedence"] = [
        "When several apply, the first check in call order wins: BAD_INPUT (arguments), BAD_DT",
        "(predict), then NON_FINITE / NOT_POSITIVE_DEFINITE of Q, Qw or R; predict then refuses with",
        "NON_FINITE when no live particle has a finite prediction within REACH of the estimate;",
        "update with DEGENERATE when no particle has a finite weight, then NON_FINITE of the NIS and",
        "GATED (both only where the NIS is formed: the _nis variants and gated sensors); set_state",
        "with NON_FINITE when P could draw particles beyond REACH (P_jj n N > REACH^2).",
    ]
    ctx["default_seed"] = DEFAULT_SEED
    ctx["prior"] = _prior(spec, em)
    ctx["updates"] = ctx["sensors"]
    ctx["mmax"] = max(s.m for s in spec.sensors)
    ctx["thr_n"] = em.lit(opts.resample_threshold * N)
    ctx["roughening"] = opts.roughening
    ctx["rough_scale"] = em.lit(opts.roughening * float(N) ** (-1.0 / n)) if opts.roughening > 0.0 else None
    bw = opts.bandwidth(n)
    ctx["bandwidth"] = em.lit(bw) if bw > 0.0 else None
    ctx["resample_threshold"] = repr(opts.resample_threshold)
    ctx["psd_tol"] = em.lit(PSD_TOL[precision])
    ctx["kernel_tol"] = em.lit(KERNEL_TOL[precision])
    ctx["kernel_bits"] = KERNEL_BITS
    ctx["reach"] = em.lit(particle_reach(precision, N))
    ctx["nN"] = em.lit(float(n * N))
    ctx["u_scale"] = em.lit(2.0 ** -31 if precision == "double" else 2.0 ** -24)
    ctx["two"] = em.lit(2.0)
    ctx["half"] = em.lit(0.5)
    ctx["minus_two"] = em.lit(-2.0)
    ctx["huge"] = "HUGE_VALF" if precision == "float" else "HUGE_VAL"
    size_real = 4 if precision == "float" else 8
    ctx["memory_note"] = [
        f"Particles: N = {N}, stored in the struct ({N} x {n} states, {N} log-weights, {N} weights):",
        f"{N * (n + 2) * size_real} of its {ctx['struct_bytes']} bytes. Resampling when ESS < "
        f"{opts.resample_threshold:g} N (systematic, in place);",
        ("roughening K = %g." % opts.roughening) if opts.roughening > 0.0 else
        (f"regularized: a Gaussian kernel of bandwidth h = {bw:.4g} ({opts.regularization:g} times the optimal) "
         "jitters the resampled particles." if bw > 0.0 else "no jitter after resampling."),
        "Random numbers: Lehmer 48271 mod 2^31-1 (Park-Miller-Stockmeyer) and Marsaglia's polar method;",
        f"{ctx['prefix']}_reseed(s, seed) restarts the generator, e.g. from a hardware entropy source.",
    ]
    ctx["ops"] = {k: v.as_dict() for k, v in ops.items()}
    gen = _render(ctx)
    gen.particles = N  # type: ignore[attr-defined]
    return gen

