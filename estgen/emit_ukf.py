"""Stage 3 for the UKF: print the unrolled unscented transform (:mod:`estgen.derive_ukf`) into
``templates/ukf.c.j2``. Shares the header, the cffi declarations and the public helpers with the
EKF (:mod:`estgen.emit`), so both filters have the same interface and status codes.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Dict, List, Tuple

from .derive import with_sections
from .derive_ukf import UKF_PREDICT_SECTIONS, UKF_UPDATE_SECTIONS, UkfWeights, derive_ukf
from .derive_ukf_att import derive_ukf_attitude
from .emit import (COMPACT_MIN_N, DENSE_F_FILL, Emitter, Generated, OpCount, _common_context, _render, gate_split,
                   reset_call, set_reset)
from .emit_ukf_loop import loop_certificate, loop_functions, loop_predict, loop_update
from .model import ModelSpec
from .progress import stage
from .unrolled import factor_function

if TYPE_CHECKING:
    from .filters import FilterSetup

__all__ = ["generate_ukf", "uses_loop_form"]

#: --optimize size: the UKF's loop form from this many states (the straight-line transform is the
#: smaller one below it, as for the other compact forms)
UKF_LOOP_SIZE_MIN_N = COMPACT_MIN_N
#: --optimize speed: the loop form from this many states without deriving the straight-line
#: transform (measured: 117 KB of M4F flash at 24 states, far over UKF_STRAIGHT_FLASH_MAX)
UKF_LOOP_SPEED_MIN_N = 20
#: --optimize speed: a model this large whose f couples most states (coupling > DENSE_F_FILL)
#: takes the loop form without deriving the straight-line one (dense16: 230 KB, tens of seconds)
UKF_DENSE_LOOP_MIN_N = 16
#: --optimize speed: below UKF_LOOP_SPEED_MIN_N the straight-line transform (fewer instructions at
#: every measured size) is kept while its estimated M4F flash stays within this many bytes
UKF_STRAIGHT_FLASH_MAX = 64 * 1024
#: M4F flash (-O2, float) per byte of the straight-line source: 0.41 to 0.60 over seven models
#: of 8 to 24 states (docs/performance.md), so the estimate is good to about 25 %
UKF_FLASH_PER_SOURCE_BYTE = 0.5


def coupling(spec: ModelSpec) -> float:
    """The fraction of (component of f, state) pairs where the component depends on the state."""
    xset = set(spec.x_syms)
    return sum(len(spec.f[i].free_symbols & xset) for i in range(spec.n)) / float(spec.n * spec.n)


def uses_loop_form(spec: ModelSpec, optimize: str) -> bool:
    """True when the UKF of ``spec`` is generated in the loop form (:mod:`estgen.emit_ukf_loop`)
    under ``--optimize optimize`` whatever the straight-line form's size (by the covariance's
    dimension: n minus one per attitude): under "size" from UKF_LOOP_SIZE_MIN_N, under "speed"
    from UKF_LOOP_SPEED_MIN_N, or from UKF_DENSE_LOOP_MIN_N when f couples more than DENSE_F_FILL
    of its (component, state) pairs (the straight-line form then grows as n^3 and takes long to
    derive: 230 KB and tens of seconds at 16 states). Under "speed" a smaller model also takes the
    loop form when :func:`straight_flash_estimate` of its straight-line form exceeds
    UKF_STRAIGHT_FLASH_MAX."""
    if optimize == "size":
        return spec.ne >= UKF_LOOP_SIZE_MIN_N
    return spec.ne >= UKF_LOOP_SPEED_MIN_N or (spec.ne >= UKF_DENSE_LOOP_MIN_N and coupling(spec) > DENSE_F_FILL)


def straight_flash_estimate(source: str) -> float:
    """Estimated M4F flash in bytes of a straight-line UKF source (UKF_FLASH_PER_SOURCE_BYTE)."""
    return UKF_FLASH_PER_SOURCE_BYTE * len(source)


def _augmented_note(spec: ModelSpec, wts: UkfWeights, em: Emitter) -> List[str]:
    """Header lines for the calls whose sigma points are those of an augmented vector."""
    out: List[str] = []
    calls = [("predict", "[x; w]", [v.name for v in spec.noise if v.enters == "process"])]
    calls += [(f"update_{s.name}", "[x; v]", [v.name for v in spec.noise if v.enters == s.name]) for s in spec.sensors]
    for call, vec, names in calls:
        if names:
            aug = UkfWeights(wts.n + len(names), wts.alpha, wts.beta, wts.kappa)
            out.append(f"{call}: sigma points of {vec} with the noise symbols {' '.join(names)}: 2N+1 = "
                       f"{2 * aug.n + 1}, Wm0 = {em.lit(aug.wm0)}, Wc0 = {em.lit(aug.wc0)}, Wm_i = {em.lit(aug.w)}.")
    return out


def _stack_bytes(stmts_decls: int, arrays: int, size_real: int) -> int:
    return (stmts_decls + arrays) * size_real


def generate_ukf(spec: ModelSpec, setup: "FilterSetup", wts: UkfWeights) -> Generated:
    """Generate the UKF's header and source for ``spec`` with the validated weights ``wts``.

    The form follows ``--optimize`` (:func:`uses_loop_form`). The op counts in ``Generated.ops``
    are of the code as printed (keys "predict", "update_<sensor>"; loop bodies times their
    counts), the shared factorization and commit check included in each. The returned object also carries
    ``sigma_stack`` = {"predict": bytes, "update": bytes}, the named locals the header states.
    """
    if uses_loop_form(spec, setup.common.optimize):
        return _generate_loop(spec, setup, wts, _common_context(spec, setup))
    gen = _generate_straight(spec, setup, wts, _common_context(spec, setup))
    if setup.common.optimize == "speed" and straight_flash_estimate(gen.source) > UKF_STRAIGHT_FLASH_MAX:
        return _generate_loop(spec, setup, wts, _common_context(spec, setup))
    return gen


def _generate_straight(spec: ModelSpec, setup: "FilterSetup", wts: UkfWeights, ctx: Dict[str, Any]) -> Generated:
    """The straight-line form (:mod:`estgen.derive_ukf`, :mod:`estgen.derive_ukf_att`)."""
    em: Emitter = ctx["emitter"]
    precision = setup.precision
    code = derive_ukf_attitude(spec, wts) if spec.attitudes else derive_ukf(spec, wts)
    stage(f"print C ({precision})")
    size_real = 4 if precision == "float" else 8
    n, np_ = ctx["n"], ctx["np"]
    ne = ctx["ne"]  # sigma points live in the error space (ne = n without attitudes)
    ops: Dict[str, Dict[str, int]] = {}
    pc = OpCount()
    p_lines = em.lines(with_sections(code.predict.stmts, UKF_PREDICT_SECTIONS), pc)
    # the factorization of P every call starts with, and the commit check, are static functions
    # run by every call: their cost counts in each
    fc = OpCount()
    ctx["factor"] = em.lines(factor_function(ne), fc)
    pc += fc
    pc += OpCount(**ctx["commit_ops"][ctx["commit_fns"]["predict"]])
    ops["predict"] = pc.as_dict()
    p_decls = sum(1 for st in code.predict.stmts if st.kind == "decl")
    # named storage of predict: xn, Pn, the wrapped-angle scratch and every const local
    p_bytes = _stack_bytes(p_decls, n + 2 * np_ + code.predict.angle_scratch, size_real)
    ctx["predict"] = {"lines": p_lines, "uses_par": code.predict.uses_par, "uses_u": code.predict.uses_u,
                      "ea": code.predict.angle_scratch, "cert": []}
    ups: List[Dict[str, Any]] = []
    u_bytes = 0
    reset_ops = set_reset(spec, ctx)  # attitudes: P re-referenced after the injection (shared with the EKF)
    for uc, sctx in zip(code.updates, ctx["sensors"]):
        oc = OpCount()
        head, rest = gate_split(with_sections(uc.stmts, UKF_UPDATE_SECTIONS))
        body, after = em.lines(head, oc), em.lines(rest, oc)
        oc += fc
        if ctx["reset"]:
            after.append(reset_call(ctx["prefix"]))
            oc += reset_ops
        oc += OpCount(**ctx["commit_ops"][ctx["commit_fns"]["update"]])
        ops[f"update_{uc.sensor.name}"] = oc.as_dict()
        decls = sum(1 for st in uc.stmts if st.kind == "decl")
        u_bytes = max(u_bytes, _stack_bytes(decls, n + 2 * np_ + uc.m + 1 + uc.angle_scratch + (ne if spec.attitudes else 0), size_real))
        ups.append({**sctx, "lines": body, "rest": after, "uses_par": uc.uses_par, "ea": uc.angle_scratch,
                    "dx_size": ne if spec.attitudes else 0})
    where = [
        f"Sigma points: 2n+1 = {2 * ne + 1}, never stored as arrays. Their offsets gamma*L, their images",
        "and deviations are const locals of predict and update (straight-line code), so they live",
        f"on the stack of those calls: the named locals total {p_bytes} bytes in predict and {u_bytes} bytes",
        "in the largest update. The real frame depends on the compiler (registers hold many, spills",
        "add some): measure it on the target, e.g. gcc -fstack-usage.",
    ]
    return _finish(ctx, spec, wts, ups, ops, where, (p_bytes, u_bytes), [])


def _weights_context(em: Emitter, wts: UkfWeights) -> Dict[str, str]:
    return {"wm0": em.lit(wts.wm0), "wm": em.lit(wts.w), "wc0": em.lit(wts.wc0), "gamma": em.lit(wts.gamma),
            "alpha": em.lit(wts.alpha), "beta": em.lit(wts.beta), "kappa": em.lit(wts.kappa), "lam": em.lit(wts.lam)}


def _generate_loop(spec: ModelSpec, setup: "FilterSetup", wts: UkfWeights, ctx: Dict[str, Any]) -> Generated:
    """The loop form (:mod:`estgen.emit_ukf_loop`): static f and h, loops over the sigma points."""
    em: Emitter = ctx["emitter"]
    size_real = 4 if setup.precision == "float" else 8
    n, np_ = ctx["n"], ctx["np"]
    ctx["compact"]["chol"] = ctx["compact"]["pku"] = True
    fns = loop_functions(spec, em)
    fc = OpCount()
    em.lines(factor_function(ctx["ne"]), fc)  # the loop factorization does the same arithmetic
    ctx["factor"] = []
    ops: Dict[str, Dict[str, int]] = {}
    lp = loop_predict(spec, em, ctx, wts, fns)
    pc = OpCount()
    pc += lp.ops
    pc += fc
    cert = loop_certificate(spec, wts, em) if setup.common.commit_check == "subtractive" else None
    if cert is not None:
        # the sum of non-negatively weighted outer products needs no factorization (see loop_certificate)
        ctx["commit_fns"]["predict"] = "certified"
        pc += OpCount(compare=len(cert))
        pc += OpCount(**ctx["commit_ops"]["commit_diag"])
    else:
        pc += OpCount(**ctx["commit_ops"][ctx["commit_fns"]["predict"]])
    ops["predict"] = pc.as_dict()
    p_bytes = _stack_bytes(0, n + 2 * np_, size_real) + lp.stack_bytes
    ctx["predict"] = {"lines": lp.lines, "uses_par": lp.uses_par or any("par->" in c for c in cert or []),
                      "uses_u": spec.nu > 0, "ea": 0, "cert": cert or []}
    ups: List[Dict[str, Any]] = []
    u_bytes = 0
    reset_ops = set_reset(spec, ctx)
    for s, sctx in zip(spec.sensors, ctx["sensors"]):
        lu = loop_update(spec, s, em, ctx, wts, fns)
        oc = OpCount()
        oc += lu.ops
        oc += fc
        if ctx["reset"]:
            lu.rest.append(reset_call(ctx["prefix"]))  # dx is the loop update's correction array
            oc += reset_ops
        oc += OpCount(**ctx["commit_ops"][ctx["commit_fns"]["update"]])
        ops[f"update_{s.name}"] = oc.as_dict()
        u_bytes = max(u_bytes, _stack_bytes(0, n + 2 * np_ + s.m + 1, size_real) + lu.stack_bytes)
        ups.append({**sctx, "lines": lu.lines, "rest": lu.rest, "uses_par": lu.uses_par, "ea": 0, "dx_size": 0})
    where = [
        f"Sigma points: 2n+1 = {2 * ctx['ne'] + 1} (loop form, --optimize {setup.common.optimize}): built one at a time",
        "from x and a column of the Cholesky factor, passed through the static model function, and",
        "their images kept in a local array (n or m rows of 2N+1) with the factor and the sums: the",
        f"named locals total {p_bytes} bytes in predict and {u_bytes} bytes in the largest update. The real",
        "frame depends on the compiler: measure it on the target, e.g. gcc -fstack-usage.",
    ]
    return _finish(ctx, spec, wts, ups, ops, where, (p_bytes, u_bytes), [fns["f"]] + [fns[s.name] for s in spec.sensors]
                   + [fns[k] for k in ("inject", "boxminus") if k in fns])


def _finish(ctx: Dict[str, Any], spec: ModelSpec, wts: UkfWeights, ups: List[Dict[str, Any]],
            ops: Dict[str, Dict[str, int]], where: List[str], stack: Tuple[int, int],
            loop_fns: List[Dict[str, Any]]) -> Generated:
    """Render either form: ``where`` says where the sigma points live, ``stack`` the named bytes
    of predict and of the largest update, ``loop_fns`` the loop form's static model functions."""
    em: Emitter = ctx["emitter"]
    ctx["updates"] = ups
    ctx["ops"] = ops
    ctx["loop_fns"] = loop_fns
    w = ctx["weights"] = _weights_context(em, wts)
    ctx["memory_note"] = where + [
        f"Weights: Wm0 = {w['wm0']}, Wc0 = {w['wc0']}, Wm_i = Wc_i = {w['wm']} (i = 1..{2 * ctx['ne']});",
        f"alpha = {w['alpha']}, beta = {w['beta']}, kappa = {w['kappa']}.",
    ] + _augmented_note(spec, wts, em)
    ctx["sigma_stack"] = {"predict": stack[0], "update": stack[1]}
    gen = _render(ctx)
    gen.sigma_stack = dict(ctx["sigma_stack"])  # type: ignore[attr-defined]
    return gen
