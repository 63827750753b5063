"""Stage 2: symbolic derivation.

From a :class:`~estgen.model.ModelSpec` this builds, for each generated C function, a straight-line
list of :class:`Stmt` whose expressions are sympy expressions over symbols already named as the C
will name them (``x[0]``, ``P[3]``, ``par->area``, ``t12``). Jacobians come from sympy; the
covariance algebra is built entry by entry from symbolic matrices, so structural zeros drop out
and only the non-trivial products are emitted. Stage 3 (:mod:`estgen.emit`) prints these through
sympy's C99 printer into the templates.

Packed storage: the covariance P is kept as its upper triangle, row by row. Entry (i, j) with
i <= j sits at ``i*n - i*(i-1)/2 + (j - i)``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Dict, Iterable, List, Optional, Sequence, Tuple

import sympy as sp

from .ir import Stmt, comment
from .ir import is_trivial as _is_trivial
from .layout import packed_index, packed_size
from .model import ModelSpec, SensorSpec
from .progress import detail, stage
from .unrolled import Block, cholesky

__all__ = [
    "Stmt",
    "EkfPredictCode",
    "EkfUpdateCode",
    "EkfCode",
    "packed_index",
    "packed_size",
    "derive_ekf",
    "model_block",
    "angle_wraps",
    "c_names",
    "with_sections",
    "comment",
    "EKF_PREDICT_SECTIONS",
    "EKF_BLOCK_UPDATE_SECTIONS",
    "reset_covariance",
]


#: A section rule: a regular expression matched against "<kind> <target>" of a statement, and
#: the heading (a string, or a function of the rule's 0-based run count) put before each run of
#: statements it matches.
SectionRule = Tuple[str, object]

EKF_PREDICT_SECTIONS: Tuple[SectionRule, ...] = (
    (r"^decl t\d+$", "shared subexpressions of f(x, u, dt), F = df/dx and Q"),
    (r"^assign xn\[", "predicted state x' = f(x, u, dt)"),
    (r"^decl F\d+_\d+$", "Jacobian F = df/dx (entries that are not constant)"),
    (r"^decl Q\d+_\d+$", "process noise covariance Q (entries that are not constant)"),
    (r"^decl (G|W)\d+_\d+$", "noise symbols: G = df/dw at w = 0 and their covariance Qw (entries not constant)"),
    (r"^decl A\d+_\d+$", "A = F P (the entries P' reads)"),
    (r"^decl B\d+_\d+$", "B = G Qw (the entries P' reads)"),
    (r"^assign Pn\[", "covariance P' = A F' (+ B G') + Q, upper triangle, packed"),
    (r"^wrap xn\[", "angle states wrapped to (-pi, pi]"),
)

#: the shared head of every EKF update: h, H, R, the innovation, the final wraps
_EKF_UPDATE_HEAD: Tuple[SectionRule, ...] = (
    (r"^decl t\d+$", "shared subexpressions of h(x), H = dh/dx and R"),
    (r"^decl (hz\d+|H\d+_\d+|R\d+_\d+)$", "predicted measurement h(x), Jacobian H = dh/dx, noise R"),
    (r"^decl (M|V)\d+_\d+$", "noise symbols: M = dh/dv at v = 0 and their covariance Rv; R_eff = M Rv M' + R"),
    (r"^(assign|wrap) y\[", "innovation y = z - h(x)"),
    (r"^wrap xs\[", "angle states wrapped to (-pi, pi]"),
)

EKF_BLOCK_UPDATE_SECTIONS: Tuple[SectionRule, ...] = _EKF_UPDATE_HEAD + (
    (r"^assign W\[", "W = P H'"),
    (r"^decl S\d+_\d+$", "innovation covariance S = H W + R"),
    (r"^(decl|check) L[di]?\d", "Cholesky factor S = L L'"),
    (r"^(decl a\d+_\d+|assign K\[)", "gain K = W S^-1 (forward and back substitution per row)"),
    (r"^(decl b\d+|assign nis)$", "NIS = |L^-1 y|^2"),
    (r"^assign V\[", "V = K S - W"),
    (r"^assign xs\[", "updated state x + K y"),
    (r"^assign Ps\[", "Joseph form P + K V' - W K', upper triangle, packed"),
)


def ekf_sequential_sections(sensor: SensorSpec) -> Tuple[SectionRule, ...]:
    """Section rules of a sequential (diagonal R) update: one heading per scalar component."""
    def head(k: int) -> str:
        return (f"component z[{k}] of {sensor.name}: W = P H_{k}', s = H_{k} W + R_{k}{k}, K = W / s, "
                f"x += K r, Joseph-form P")
    return _EKF_UPDATE_HEAD + ((r"^assign W\[0\]$", head),)


def with_sections(stmts: Sequence[Stmt], rules: Sequence[SectionRule]) -> List[Stmt]:
    """``stmts`` with a :func:`comment` before each run of statements one rule matches.

    A statement no rule matches continues the current section; a matching statement opens a
    new section when the previous statement did not match the same rule."""
    compiled = [(re.compile(rx), text) for rx, text in rules]
    runs = [0] * len(compiled)
    out: List[Stmt] = []
    prev = None
    for st in stmts:
        key = f"{st.kind} {st.target}"
        hit = next((i for i, (rx, _) in enumerate(compiled) if rx.search(key)), None)
        if hit is not None and hit != prev:
            text = compiled[hit][1]
            out.append(comment(text(runs[hit]) if callable(text) else str(text)))
            runs[hit] += 1
        prev = hit
        out.append(st)
    return out


def c_names(spec: ModelSpec, x_array: str = "x") -> Dict[sp.Symbol, sp.Symbol]:
    """User symbols -> symbols printed as C lvalues (states read from ``x_array``)."""
    m: Dict[sp.Symbol, sp.Symbol] = {}
    for i, s in enumerate(spec.states):
        m[s.symbol] = sp.Symbol(f"{x_array}[{i}]")
    for i, s in enumerate(spec.inputs):
        m[s.symbol] = sp.Symbol(f"u[{i}]")
    for p in spec.params:
        m[p.symbol] = sp.Symbol(f"par->{p.name}")
    m[spec.dt] = sp.Symbol("dt")
    return m


def model_block(
    outputs: Sequence[Tuple[str, str, sp.Expr]], prefix: str = "t"
) -> Tuple[List[Stmt], Dict[str, sp.Expr]]:
    """Share common subexpressions among model expressions (``sympy.cse``).

    ``outputs`` holds (kind, target, expr) with kind "assign" (written to an array element) or
    "value" (a named value the covariance algebra uses: emitted as a const local when it is not
    trivial, else substituted in place). Returns the statements and, for each "value" target, the
    expression later code must use for it (a number, a symbol, or the new local's symbol).
    """
    exprs = [e for _, _, e in outputs]
    if exprs:
        detail("common subexpressions")
        repl, reduced = sp.cse(exprs, symbols=sp.numbered_symbols(prefix), order="canonical")
    else:
        repl, reduced = [], []
    stmts: List[Stmt] = [Stmt("decl", str(sym), ex) for sym, ex in repl]
    values: Dict[str, sp.Expr] = {}
    for (kind, target, _), ex in zip(outputs, reduced):
        if kind == "assign":
            stmts.append(Stmt("assign", target, ex))
        elif _is_trivial(ex):
            values[target] = ex
        else:
            stmts.append(Stmt("decl", target, ex))
            values[target] = sp.Symbol(target)
    return stmts, values


def _uses_params(stmts: Iterable[Stmt]) -> bool:
    return any(str(s).startswith("par->") for st in stmts for s in st.expr.free_symbols)


def _sym_P(n: int, name: str) -> sp.Matrix:
    return sp.Matrix(n, n, lambda i, j: sp.Symbol(f"{name}[{packed_index(i, j, n)}]"))


@dataclass
class EkfPredictCode:
    stmts: List[Stmt]
    uses_par: bool
    uses_u: bool
    #: the rounding certificate (see :func:`predict_certificate`): pairs (lhs, rhs) that must all
    #: hold as lhs <= rhs for the new P to be committed without a factorization; None: always factorize
    cert: Optional[List[Tuple[sp.Expr, sp.Expr]]] = None
    #: the compact form: statements up to F, G, Q (and B = G Qw), the non-zeros (i, k, F_ik) of F
    #: row by row, the non-zero entries of G Qw G' + Q as assignments to Pn, and the closing
    #: statements (attitude normalization, angle wraps)
    compact: Optional[Tuple[List[Stmt], List[Tuple[int, int, sp.Expr]], List[Stmt], List[Stmt]]] = None
    #: ``cert`` for the compact form: F's part of the row sums read from cr[i], ca[i] (see
    #: predict_certificate's loop_sums)
    cert_loop: Optional[List[Tuple[sp.Expr, sp.Expr]]] = None


#: how much cancellation the predict certificate tolerates: row i of F may make sum_k |F_ik| sqrt(P_kk)
#: at most sqrt(CERT_KAPPA) times sqrt(P'_ii); then the rounding error of P' is at most
#: gamma_k * CERT_KAPPA * trace(P') in the 2-norm (see predict_certificate)
CERT_KAPPA = 4


def predict_certificate(Fm: sp.Matrix, Qm: Dict[Tuple[int, int], sp.Expr], n: int,
                        Gm: Optional[sp.Matrix] = None, Qwm: Optional[sp.Matrix] = None,
                        loop_sums: bool = False) -> Optional[List[Tuple[sp.Expr, sp.Expr]]]:
    """Conditions under which the computed P' = fl(F P F' + Q) may be committed unfactorized.

    Exactly, F P F' + Q is positive semidefinite when P is and Q is: the predict does not
    subtract. Computed, each entry carries an error of at most gamma_k (|F| |P| |F|')_ij
    (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., 2002, sec. 3.5; k the
    number of terms of the longest entry), and with |P_kl| <= sqrt(P_kk P_ll) (P positive
    semidefinite) that is at most gamma_k g_i g_j, g_i = sum_k |F_ik| sqrt(P_kk). By Cauchy-Schwarz
    g_i^2 <= r_i a_i with r_i = sum_k |F_ik| and a_i = sum_k |F_ik| P_kk (no square roots). When
    r_i a_i <= CERT_KAPPA P'_ii for every i, the error matrix E has |E_ij| <= gamma_k CERT_KAPPA
    sqrt(P'_ii P'_jj), so ||E||_2 <= gamma_k CERT_KAPPA trace(P') <= gamma_k CERT_KAPPA n
    lambda_max(P'): the new P is positive definite up to a rounding of the same order as the
    backward error of a Cholesky factorization in the same precision (Higham, theorem 10.5),
    which is all a factorization could certify. The certificate fails only where F cancels
    (|F| |P| |F|' much larger than F P F'); the commit then factorizes.

    Q must be positive semidefinite for the exact argument: a constant Q is checked here (else
    None: always factorize), a diagonal Q of expressions adds the conditions 0 <= Q_ii, and an
    off-diagonal Q entry that is an expression makes it None. Process noise symbols (the term
    G Qw G') are the same argument for the stacked [F G] and diag(P, Qw): their columns join
    each row's sums, and Qw obeys the rules of Q.

    ``loop_sums``: the same conditions on the same rows, with F's part of row i's sums written as
    the symbols ``cr[i]`` (sum_k |F_ik|) and ``ca[i]`` (sum_k |F_ik| P_kk), which the compact
    predict computes in loops over its F arrays; the noise symbols' terms stay explicit.
    """
    import numpy as np

    nw = 0 if Gm is None else Gm.shape[1]
    if nw:
        assert Qwm is not None
        Qw = {(i, j): Qwm[i, j] for i in range(nw) for j in range(i, nw)}
        if any(not e.is_Number for (i, j), e in Qw.items() if i != j and e != 0):
            return None
    else:
        Qw = {}

    if any(not e.is_Number for (i, j), e in Qm.items() if i != j and e != 0):
        return None
    for mat, dim in ((Qm, n), (Qw, nw)):
        if dim and all(e.is_Number for e in mat.values()):
            Qn = np.zeros((dim, dim))
            for (i, j), e in mat.items():
                Qn[i, j] = Qn[j, i] = float(e)
            if float(np.linalg.eigvalsh(Qn)[0]) < 0.0:
                return None
    cert: List[Tuple[sp.Expr, sp.Expr]] = []
    for q in [Qm[(i, i)] for i in range(n)] + [Qw[(l, l)] for l in range(nw)]:
        if not q.is_Number and (sp.S.Zero, q) not in cert:
            cert.append((sp.S.Zero, q))
    # dt > 0 is checked before any of this runs: |dt| = dt
    dt_pos = {sp.Symbol("dt"): sp.Symbol("dt", positive=True)}
    for i in range(n):
        row = [(sp.Symbol(f"P[{packed_index(k, k, n)}]"), Fm[i, k].xreplace(dt_pos)) for k in range(n) if Fm[i, k] != 0]
        row += [(Qw[(l, l)], Gm[i, l].xreplace(dt_pos)) for l in range(nw) if Gm is not None and Gm[i, l] != 0]
        if len(row) <= 1:
            # g_i^2 = F_ik^2 P_kk <= P'_ii already (the rest is >= 0): nothing can cancel
            continue
        if loop_sums:
            nf = sum(1 for k in range(n) if Fm[i, k] != 0)  # the F terms come first in row
            r = sp.Symbol(f"cr[{i}]") + sum((sp.Abs(e) for _, e in row[nf:]), sp.S.Zero)
            a = sp.Symbol(f"ca[{i}]") + sum((sp.Abs(e) * var for var, e in row[nf:]), sp.S.Zero)
            cert.append((r * a, CERT_KAPPA * sp.Symbol(f"Pn[{packed_index(i, i, n)}]")))
            continue
        r = sum((sp.Abs(e) for _, e in row), sp.S.Zero)
        a = sum((sp.Abs(e) * var for var, e in row), sp.S.Zero)
        cert.append((r * a, CERT_KAPPA * sp.Symbol(f"Pn[{packed_index(i, i, n)}]")))
    return cert


@dataclass
class ScalarComponent:
    """One scalar component of a sequential update in its compact form: the non-zeros of its row
    of H as (column, value), its residual (corrected for the earlier components) and its R."""

    h: List[Tuple[int, sp.Expr]]
    r: sp.Expr
    R: sp.Expr


@dataclass
class EkfUpdateCode:
    sensor: SensorSpec
    sequential: bool
    stmts: List[Stmt]
    uses_par: bool
    m: int
    # sizes of scratch arrays the template declares (v_size 0: no V)
    w_size: int
    k_size: int
    dx_size: int = 0  # error-state correction accumulator (models with attitudes)
    #: the compact form of a sequential update: the statements before the components (h, H, y),
    #: each component's row of H, residual and variance, and the statements after them
    compact: Optional[Tuple[List[Stmt], List["ScalarComponent"], List[Stmt]]] = None
    v_size: int = 0  # the Joseph form's V (block update only)
    #: a full constant R = L L' whitened for the compact form: y = L^-1 y in place, run after
    #: ``compact``'s statements (its components then carry the rows of L^-1 H and unit variances)
    whiten: List[Stmt] = field(default_factory=list)


@dataclass
class EkfCode:
    spec: ModelSpec
    predict: EkfPredictCode
    updates: List[EkfUpdateCode] = field(default_factory=list)


def derive_ekf_predict(spec: ModelSpec) -> EkfPredictCode:
    """x' = f(x, u, 0, dt); P' = F P F' + G Qw G' + Q with F = df/dx and G = df/dw at w = 0
    (the noise symbols of the process), in packed storage.

    The product is formed as A = F P, then the upper triangle of A F' + B G' + Q with B = G Qw,
    so each product only touches the structurally non-zero entries of F and G; f, F, G, Q and
    Qw share one common-subexpression pass.
    """
    n = spec.n
    ne = spec.ne
    xs = spec.x_syms
    ws = spec.w_syms
    nw = len(ws)
    names = c_names(spec, "x")
    f = spec.f0
    F = f.jacobian(xs)
    G = spec.f.jacobian(ws).xreplace({w: sp.S.Zero for w in ws}) if ws else sp.zeros(n, 0)
    outputs: List[Tuple[str, str, sp.Expr]] = []
    for i in range(n):
        outputs.append(("assign", f"xn[{i}]", f[i].xreplace(names)))
    const_F: Dict[Tuple[int, int], sp.Expr] = {}
    for i in range(n):
        for j in range(n):
            e = F[i, j]
            if e.is_Number:
                const_F[(i, j)] = e
            else:
                outputs.append(("value", f"F{i}_{j}", e.xreplace(names)))
    const_Q: Dict[Tuple[int, int], sp.Expr] = {}
    for i in range(ne):
        for j in range(i, ne):
            e = spec.Q[i, j]
            if e.is_Number:
                const_Q[(i, j)] = e
            else:
                outputs.append(("value", f"Q{i}_{j}", e.xreplace(names)))
    Gm = _named_entries(outputs, G.xreplace(names), "G")
    Qwm = _named_entries(outputs, spec.Qw.xreplace(names), "W")
    stmts, values = model_block(outputs)
    Fm = sp.Matrix(n, n, lambda i, j: const_F.get((i, j), values.get(f"F{i}_{j}", sp.S.Zero)))
    Qm = {(i, j): const_Q.get((i, j), values.get(f"Q{i}_{j}", sp.S.Zero)) for i in range(ne) for j in range(i, ne)}
    vsym = {sp.Symbol(k): v for k, v in values.items()}
    Gm, Qwm = Gm.xreplace(vsym), Qwm.xreplace(vsym)
    if spec.attitudes:
        Fm, Em = _error_F(spec, Fm, stmts)
        Ge = Em * Gm  # the noise's error-state Jacobian E(xn) df/dw
        Gm = sp.Matrix(ne, nw, lambda i, k: _named(stmts, f"Ge{i}_{k}", Ge[i, k]))
    n = ne  # the covariance algebra below is in the error dimension
    # B = G Qw, the entries B[i, k] that some G[j, k], j >= i, reads
    Bref = sp.zeros(n, nw)
    for i in range(n):
        for k in range(nw):
            if not any(Gm[j, k] != 0 for j in range(i, n)):
                continue
            e = sum((Gm[i, l] * Qwm[l, k] for l in range(nw) if Gm[i, l] != 0 and Qwm[l, k] != 0), sp.S.Zero)
            if _is_trivial(e):
                Bref[i, k] = e
            else:
                stmts.append(Stmt("decl", f"B{i}_{k}", e))
                Bref[i, k] = sp.Symbol(f"B{i}_{k}")
    pre = list(stmts)  # the compact form starts from here (see EkfPredictCode.compact)
    P = _sym_P(n, "P")
    A = Fm * P
    Aref = sp.zeros(n, n)
    # A[i, k] is read by P'[i, j] = sum_k A[i, k] F[j, k] for j >= i only
    needed = {(i, k) for i in range(n) for k in range(n) if any(Fm[j, k] != 0 for j in range(i, n))}
    for i in range(n):
        for j in range(n):
            e = A[i, j]
            if (i, j) not in needed:
                continue
            if _is_trivial(e):
                Aref[i, j] = e
            else:
                name = f"A{i}_{j}"
                stmts.append(Stmt("decl", name, e))
                Aref[i, j] = sp.Symbol(name)
    for i in range(n):
        for j in range(i, n):
            e = sum((Aref[i, k] * Fm[j, k] for k in range(n) if Fm[j, k] != 0), sp.S.Zero) + Qm[(i, j)]
            e += sum((Bref[i, k] * Gm[j, k] for k in range(nw) if Gm[j, k] != 0), sp.S.Zero)
            stmts.append(Stmt("assign", f"Pn[{packed_index(i, j, n)}]", e))
    cert = predict_certificate(Fm, Qm, n, Gm, Qwm)
    cert_loop = predict_certificate(Fm, Qm, n, Gm, Qwm, loop_sums=True)
    tail = _normalize_attitudes(spec) + angle_wraps(spec, "xn")
    stmts += tail
    uses_u = any(str(s).startswith("u[") for st in stmts for s in st.expr.free_symbols)
    noise = []
    for i in range(n):
        for j in range(i, n):
            e = Qm[(i, j)] + sum((Bref[i, k] * Gm[j, k] for k in range(nw) if Gm[j, k] != 0), sp.S.Zero)
            if e != 0:
                noise.append(Stmt("assign", f"Pn[{packed_index(i, j, n)}]", e))
    fnz = [(i, k, Fm[i, k]) for i in range(n) for k in range(n) if Fm[i, k] != 0]
    return EkfPredictCode(stmts, _uses_params(stmts), uses_u, cert, compact=(pre, fnz, noise, tail),
                          cert_loop=cert_loop)


def _x(arr: str, n: int) -> List[sp.Symbol]:
    return [sp.Symbol(f"{arr}[{i}]") for i in range(n)]


def _named(stmts: List[Stmt], name: str, e: sp.Expr) -> sp.Expr:
    """``e`` itself when trivial, else a new const local ``name`` holding it."""
    if _is_trivial(e):
        return e
    stmts.append(Stmt("decl", name, e))
    return sp.Symbol(name)


def _error_F(spec: ModelSpec, Fm: sp.Matrix, stmts: List[Stmt]) -> Tuple[sp.Matrix, sp.Matrix]:
    """The error-state transition ``E(xn) * F * M(x)`` (see :mod:`estgen.errorstate`) from the
    Jacobian F = df/dx already in ``Fm``, and E(xn); xn holds f(x) before normalization."""
    from .errorstate import error_map, retraction_jacobian

    y = list(_x("xn", spec.n))
    half = {}
    for xi in spec.attitudes:
        q = y[xi:xi + 4]
        stmts.append(Stmt("decl", f"qn2_{xi}", sum((e * e for e in q), sp.S.Zero)))
        stmts.append(Stmt("decl", f"iqn2_{xi}", 2 / sp.Symbol(f"qn2_{xi}")))
        # E's entries are +-2 y_c/|y|^2: scaled once here
        y[xi:xi + 4] = [_named(stmts, f"ey{xi}_{c}", sp.Symbol(f"iqn2_{xi}") * q[c]) for c in range(4)]
        half[xi] = sp.S.Half
    T = Fm * retraction_jacobian(spec, _x("x", spec.n))
    T = sp.Matrix(T.shape[0], T.shape[1], lambda i, j: _named(stmts, f"T{i}_{j}", T[i, j]))
    Em = error_map(spec, y, half)
    Fe = Em * T
    return sp.Matrix(spec.ne, spec.ne, lambda i, j: _named(stmts, f"Fe{i}_{j}", Fe[i, j])), Em


def _normalize_attitudes(spec: ModelSpec) -> List[Stmt]:
    """Scale each predicted quaternion to unit norm (``qn2_<i>`` holds its squared norm)."""
    out: List[Stmt] = []
    for xi in spec.attitudes:
        out.append(Stmt("decl", f"iqn_{xi}", 1 / sp.sqrt(sp.Symbol(f"qn2_{xi}"))))
        for k in range(xi, xi + 4):
            out.append(Stmt("assign", f"xn[{k}]", sp.Symbol(f"xn[{k}]") * sp.Symbol(f"iqn_{xi}")))
    return out


def _error_H(spec: ModelSpec, Hm: sp.Matrix, stmts: List[Stmt]) -> sp.Matrix:
    """``H_err = dh/dx * M(x)`` (m x ne)."""
    from .errorstate import retraction_jacobian

    He = Hm * retraction_jacobian(spec, _x("x", spec.n))
    return sp.Matrix(He.shape[0], spec.ne, lambda i, j: _named(stmts, f"He{i}_{j}", He[i, j]))


def _inject(spec: ModelSpec) -> List[Stmt]:
    """xs = x ⊞ dx: the accumulated error injected into the prior in one go (attitudes
    right-multiplied by exp(dtheta) and renormalized). The covariance reset that goes with it is
    one shared function (:func:`reset_covariance`) each update calls after this."""
    from .errorstate import inject

    newx = inject(spec, _x("x", spec.n), _x("dx", spec.ne))
    stmts, _ = model_block([("assign", f"xs[{i}]", e) for i, e in enumerate(newx)], prefix="g")
    return stmts


def reset_covariance(spec: ModelSpec) -> List[Stmt]:
    """The body of the EKF's shared reset function: Ps <- G Ps G' with the reset Jacobian G = blockdiag(I - [dtheta/2 x], I) of the injected
    correction dx (Markley 2003; Sola 2017, sec. 7.2; :func:`estgen.errorstate.reset_jacobian`):
    the error is re-referenced to the new estimate. Only the attitude rows of G differ from I,
    so T = G Ps is formed on those rows and the packed entries that touch them are rewritten."""
    from .errorstate import reset_jacobian

    ne = spec.ne
    rows = [ei + r for kind, _, ei in spec.error_blocks() if kind == "attitude" for r in range(3)]
    blk = Block()
    half = [blk.value(f"rh{k}", sp.Symbol(f"dx[{k}]") / 2) if k in rows else sp.S.Zero for k in range(ne)]
    G = reset_jacobian(spec, [2 * h for h in half])
    P = _sym_P(ne, "Ps")
    T: Dict[Tuple[int, int], sp.Expr] = {}
    for i in rows:
        for j in range(ne):
            T[(i, j)] = blk.value(f"rT{i}_{j}", sum((G[i, k] * P[k, j] for k in range(ne) if G[i, k] != 0), sp.S.Zero))
    for i in range(ne):
        for j in range(i, ne):
            if i in rows and j in rows:
                e = sum((T[(i, l)] * G[j, l] for l in range(ne) if G[j, l] != 0), sp.S.Zero)
            elif i in rows or j in rows:
                e = T[(i, j)] if i in rows else T[(j, i)]
            else:
                continue
            blk.add("assign", f"Ps[{packed_index(i, j, ne)}]", e)
    return blk.stmts


def _named_entries(outputs: List[Tuple[str, str, sp.Expr]], mat: sp.Matrix, tag: str) -> sp.Matrix:
    """``mat`` with each non-numeric entry replaced by a placeholder named ``<tag>i_j`` that is
    appended to ``outputs`` as a value; ``xreplace`` the result with model_block's values."""
    out = sp.zeros(*mat.shape)
    for i in range(mat.shape[0]):
        for j in range(mat.shape[1]):
            e = mat[i, j]
            if e.is_Number:
                out[i, j] = e
            else:
                outputs.append(("value", f"{tag}{i}_{j}", e))
                out[i, j] = sp.Symbol(f"{tag}{i}_{j}")
    return out


def _h_block(spec: SensorSpec, mspec: ModelSpec) -> Tuple[List[Stmt], List[sp.Expr], sp.Matrix, Dict[Tuple[int, int], sp.Expr]]:
    """h(x, 0), H = dh/dx and R_eff = M Rv M' + R (M = dh/dv at v = 0) with shared
    subexpressions; h goes to hz[i]."""
    n, m = mspec.n, spec.m
    names = c_names(mspec, "x")
    h0 = spec.h0
    H = h0.jacobian(mspec.x_syms)
    vs = list(spec.v)
    outputs: List[Tuple[str, str, sp.Expr]] = []
    for i in range(m):
        outputs.append(("value", f"hz{i}", h0[i].xreplace(names)))
    for i in range(m):
        for j in range(n):
            if not H[i, j].is_Number:
                outputs.append(("value", f"H{i}_{j}", H[i, j].xreplace(names)))
    for i in range(m):
        for j in range(i, m):
            if not spec.R[i, j].is_Number:
                outputs.append(("value", f"R{i}_{j}", spec.R[i, j].xreplace(names)))
    M = spec.h.jacobian(vs).xreplace({v: sp.S.Zero for v in vs}) if vs else sp.zeros(m, 0)
    Mm = _named_entries(outputs, M.xreplace(names), "M")
    Rvm = _named_entries(outputs, spec.Rv.xreplace(names), "V")
    stmts, values = model_block(outputs)
    vsym = {sp.Symbol(k): v for k, v in values.items()}
    Mm, Rvm = Mm.xreplace(vsym), Rvm.xreplace(vsym)
    hv = [values.get(f"hz{i}", sp.S.Zero) for i in range(m)]
    Hm = sp.Matrix(m, n, lambda i, j: H[i, j] if H[i, j].is_Number else values[f"H{i}_{j}"])
    Rm = {(i, j): (spec.R[i, j] if spec.R[i, j].is_Number else values[f"R{i}_{j}"]) for i in range(m) for j in range(i, m)}
    nv = len(vs)
    for i in range(m):
        for j in range(i, m):
            Rm[(i, j)] += sum((Mm[i, a] * Rvm[a, b] * Mm[j, b] for a in range(nv) for b in range(nv)
                               if Mm[i, a] != 0 and Rvm[a, b] != 0 and Mm[j, b] != 0), sp.S.Zero)
    return stmts, hv, Hm, Rm


def _residuals(spec: SensorSpec, hv: List[sp.Expr]) -> List[Stmt]:
    out: List[Stmt] = []
    for i in range(spec.m):
        out.append(Stmt("assign", f"y[{i}]", sp.Symbol(f"z[{i}]") - hv[i]))
        if spec.angles[i]:
            out.append(Stmt("wrap", f"y[{i}]", sp.Symbol(f"y[{i}]")))
    return out


#: the largest condition number of a constant full R that is whitened (see whitening_factor):
#: the whitened residual then loses at most about sqrt(WHITEN_MAX_COND) roundings of accuracy,
#: what the block update's solve with S = H P H' + R loses on such an R as well
WHITEN_MAX_COND = 1e8


def whitening_factor(Rm: Dict[Tuple[int, int], sp.Expr], m: int) -> Optional[List[List[float]]]:
    """L^-1 for a constant positive definite R = L L' (L lower triangular), or None when R has an
    expression, is not positive definite or is worse conditioned than WHITEN_MAX_COND.

    With z_w = L^-1 z, h_w = L^-1 h the measurement noise is white with unit variances
    (E[L^-1 v v' L^-T] = I), so the components can be processed one at a time: the same posterior
    and the same NIS y' S^-1 y as the block update in exact arithmetic (Bierman, Factorization
    Methods for Discrete Sequential Estimation, 1977, ch. II: decorrelating a correlated
    measurement by the Cholesky factor of its covariance). Computed in plain Python floats (IEEE
    double, correctly rounded square roots) so the printed factor is byte-identical on every
    machine, whatever linear-algebra library numpy uses."""
    if m < 2 or not all(Rm[(i, j)].is_Number for i in range(m) for j in range(i, m)):
        return None
    R = [[float(Rm[(min(i, j), max(i, j))]) for j in range(m)] for i in range(m)]
    L = [[0.0] * m for _ in range(m)]
    for j in range(m):
        d = R[j][j] - sum(L[j][k] * L[j][k] for k in range(j))
        if not d > 0.0:
            return None
        L[j][j] = d ** 0.5
        for i in range(j + 1, m):
            L[i][j] = (R[i][j] - sum(L[i][k] * L[j][k] for k in range(j))) / L[j][j]
    iL = [[0.0] * m for _ in range(m)]
    for j in range(m):  # column j of L^-1 by forward substitution of L x = e_j
        iL[j][j] = 1.0 / L[j][j]
        for i in range(j + 1, m):
            iL[i][j] = -sum(L[i][k] * iL[k][j] for k in range(j, i)) / L[i][i]
    # cond_2(R) = cond_2(L)^2 <= (|L|_F |L^-1|_F)^2, an upper bound
    fro = sum(v * v for row in L for v in row) * sum(v * v for row in iL for v in row)
    return iL if fro <= WHITEN_MAX_COND else None


def derive_ekf_update(spec: SensorSpec, mspec: ModelSpec) -> EkfUpdateCode:
    """Measurement update in scratch copies xs, Ps of x and P (committed by the template).

    A diagonal R is processed one component at a time (sequential scalar updates): exactly the
    block update in exact arithmetic, with no matrix inverse and no m x m factorization. The
    residual of a later component is corrected for the state change of earlier ones,
    r_i = y_i - H_i (xs - x), because h and H stay linearized at the prior. A full R uses the
    block form with an unrolled Cholesky factorization of S.

    A scalar component updates P in the standard form P - K W' (W = P h, K = W / s), one product
    per packed entry. The Joseph form's advantage, first-order insensitivity to an error in K,
    buys nothing here beyond a rounding-level term: K is W / s to one rounding, and packed storage
    keeps P exactly symmetric. The block update, whose K comes from triangular solves, keeps the
    Joseph form, written for packed storage as P + K V' - W K' with W = P H', V = K S - W (equal
    to (I-KH) P (I-KH)' + K R K' for any gain K). After either, the commit factorizes the new P.
    """
    n, m = mspec.n, spec.m
    stmts, hv, Hm, Rm = _h_block(spec, mspec)
    att = bool(mspec.attitudes)
    if att:
        # error state: the correction accumulates in dx (ne) and is injected at the end
        Hm = _error_H(mspec, Hm, stmts)
        n = mspec.ne
    stmts += _residuals(spec, hv)
    Ps = _sym_P(n, "Ps")
    X = [sp.Symbol(f"x[{i}]") for i in range(n)]
    XS = [sp.Symbol(f"xs[{i}]") for i in range(n)]
    D = _x("dx", n)
    delta = D if att else [XS[k] - X[k] for k in range(n)]
    iL = None if spec.diagonal else whitening_factor(Rm, m)
    whiten: List[Stmt] = []
    wcomps: List[ScalarComponent] = []
    if iL is not None:
        # the compact form of a full constant R: whitened, then the scalar components (R_w = I)
        for i in reversed(range(m)):  # in place: y_i reads y_k, k <= i, not yet overwritten
            e = sum((sp.Float(iL[i][k]) * sp.Symbol(f"y[{k}]") for k in range(i + 1) if iL[i][k] != 0.0), sp.S.Zero)
            whiten.append(Stmt("assign", f"y[{i}]", e))
        Hw = sp.Matrix(m, n, lambda i, j: sum((sp.Float(iL[i][k]) * Hm[k, j] for k in range(i + 1)
                                               if iL[i][k] != 0.0 and Hm[k, j] != 0), sp.S.Zero))
        for c in range(m):
            nz = [j for j in range(n) if Hw[c, j] != 0]
            r_expr = sp.Symbol(f"y[{c}]")
            if c > 0:
                r_expr = r_expr - sum((Hw[c, j] * delta[j] for j in nz), sp.S.Zero)
            wcomps.append(ScalarComponent([(j, Hw[c, j]) for j in nz], r_expr, sp.S.One))
    if spec.diagonal:
        # the compact form (one shared static function per filter; see EkfUpdateCode.compact)
        compact: List[ScalarComponent] = []
        for c in range(m):
            Hrow = [Hm[c, j] for j in range(n)]
            nz = [j for j in range(n) if Hrow[j] != 0]
            r_expr = sp.Symbol(f"y[{c}]")
            if c > 0:
                r_expr = r_expr - sum((Hrow[j] * delta[j] for j in nz), sp.S.Zero)
            compact.append(ScalarComponent([(j, Hrow[j]) for j in nz], r_expr, Rm[(c, c)]))
        pre = list(stmts)
        for c in range(m):
            Hrow = [Hm[c, j] for j in range(n)]
            nz = [j for j in range(n) if Hrow[j] != 0]
            for k in range(n):
                stmts.append(Stmt("assign", f"W[{k}]", sum((Ps[k, j] * Hrow[j] for j in nz), sp.S.Zero)))
            W = [sp.Symbol(f"W[{k}]") for k in range(n)]
            s_expr = sum((Hrow[j] * W[j] for j in nz), sp.S.Zero) + Rm[(c, c)]
            stmts.append(Stmt("decl", f"s{c}", s_expr))
            stmts.append(Stmt("check", f"s{c}", sp.Symbol(f"s{c}")))
            s = sp.Symbol(f"s{c}")
            stmts.append(Stmt("decl", f"is{c}", 1 / s))
            isv = sp.Symbol(f"is{c}")
            r_expr = sp.Symbol(f"y[{c}]")
            if c > 0:
                r_expr = r_expr - sum((Hrow[j] * delta[j] for j in nz), sp.S.Zero)
            stmts.append(Stmt("decl", f"r{c}", r_expr))
            r = sp.Symbol(f"r{c}")
            stmts.append(Stmt("assign", "nis", sp.Symbol("nis") + r * r * isv))
            for k in range(n):
                stmts.append(Stmt("assign", f"K[{k}]", W[k] * isv))
            K = [sp.Symbol(f"K[{k}]") for k in range(n)]
            for k in range(n):
                if att:
                    stmts.append(Stmt("assign", f"dx[{k}]", K[k] * r if c == 0 else D[k] + K[k] * r))
                else:
                    stmts.append(Stmt("assign", f"xs[{k}]", XS[k] + K[k] * r))
            # standard form P - K W' (one product per packed entry): see the docstring
            for i in range(n):
                for j in range(i, n):
                    stmts.append(Stmt("assign", f"Ps[{packed_index(i, j, n)}]", Ps[i, j] - K[i] * W[j]))
        tail = _inject(mspec) if att else []
        stmts += tail
        return EkfUpdateCode(spec, True, stmts, _uses_params(stmts), m, n, n, n if att else 0, v_size=0,
                             compact=(pre, compact, tail))

    # block update with a full R
    wpre = list(stmts)
    Wm = sp.Matrix(n, m, lambda k, c: sp.Symbol(f"W[{k * m + c}]"))
    for k in range(n):
        for c in range(m):
            nz = [j for j in range(n) if Hm[c, j] != 0]
            stmts.append(Stmt("assign", f"W[{k * m + c}]", sum((Ps[k, j] * Hm[c, j] for j in nz), sp.S.Zero)))
    S = {}
    for a in range(m):
        for b in range(a, m):
            nz = [j for j in range(n) if Hm[a, j] != 0]
            e = sum((Hm[a, j] * Wm[j, b] for j in nz), sp.S.Zero) + Rm[(a, b)]
            stmts.append(Stmt("decl", f"S{a}_{b}", e))
            S[(a, b)] = S[(b, a)] = sp.Symbol(f"S{a}_{b}")
    # Cholesky S = L L' (lower), unrolled by the shared builder; the solves use every 1 / L_jj (piv)
    chol = Block()
    piv: Dict[int, sp.Expr] = {}
    L = cholesky(chol, m, S, "L", inverses=piv)
    stmts += chol.stmts
    # nis = |L^-1 y|^2 first: the gate is evaluated before the gain and the posterior
    b: List[sp.Symbol] = []
    for i in range(m):
        e = (sp.Symbol(f"y[{i}]") - sum((L[(i, j)] * b[j] for j in range(i)), sp.S.Zero)) * piv[i]
        stmts.append(Stmt("decl", f"b{i}", e))
        b.append(sp.Symbol(f"b{i}"))
    stmts.append(Stmt("assign", "nis", sum((bi * bi for bi in b), sp.S.Zero)))
    # K = W S^-1: for each row k solve L a = W_k, then L' K_k = a
    Km = sp.Matrix(n, m, lambda k, c: sp.Symbol(f"K[{k * m + c}]"))
    for k in range(n):
        a: List[sp.Symbol] = []
        for i in range(m):
            e = (Wm[k, i] - sum((L[(i, j)] * a[j] for j in range(i)), sp.S.Zero)) * piv[i]
            stmts.append(Stmt("decl", f"a{k}_{i}", e))
            a.append(sp.Symbol(f"a{k}_{i}"))
        for i in reversed(range(m)):
            e = (a[i] - sum((L[(j, i)] * Km[k, j] for j in range(i + 1, m)), sp.S.Zero)) * piv[i]
            stmts.append(Stmt("assign", f"K[{k * m + i}]", e))
    Vm = sp.Matrix(n, m, lambda k, c: sp.Symbol(f"V[{k * m + c}]"))
    for k in range(n):
        for c in range(m):
            e = sum((Km[k, j] * S[(c, j)] for j in range(m)), sp.S.Zero) - Wm[k, c]
            stmts.append(Stmt("assign", f"V[{k * m + c}]", e))
    for k in range(n):
        e = sum((Km[k, c] * sp.Symbol(f"y[{c}]") for c in range(m)), sp.S.Zero)
        stmts.append(Stmt("assign", f"dx[{k}]", e) if att else Stmt("assign", f"xs[{k}]", XS[k] + e))
    for i in range(n):
        for j in range(i, n):
            e = Ps[i, j] + sum((Km[i, c] * Vm[j, c] - Wm[i, c] * Km[j, c] for c in range(m)), sp.S.Zero)
            stmts.append(Stmt("assign", f"Ps[{packed_index(i, j, n)}]", e))
    tail = _inject(mspec) if att else []
    stmts += tail
    return EkfUpdateCode(spec, False, stmts, _uses_params(stmts), m, n * m, n * m, n if att else 0, v_size=n * m,
                         compact=(wpre, wcomps, tail) if iL is not None else None, whiten=whiten)


def derive_ekf(spec: ModelSpec) -> EkfCode:
    """Everything the EKF templates need for ``spec``."""
    stage("derive predict: f, F = df/dx, Q")
    code = EkfCode(spec, derive_ekf_predict(spec))
    for s in spec.sensors:
        stage(f"derive update {s.name}: h, H = dh/dx, R")
        code.updates.append(derive_ekf_update(s, spec))
    return code


def angle_wraps(spec: ModelSpec, target: str) -> List[Stmt]:
    """Wrap the angle states of array ``target`` to (-pi, pi]."""
    return [Stmt("wrap", f"{target}[{i}]", sp.Symbol(f"{target}[{i}]")) for i, s in enumerate(spec.states) if s.angle]
