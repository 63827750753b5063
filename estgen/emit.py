"""Stage 3: C emission.

Python computes the math (:mod:`estgen.derive`); the Jinja templates in ``templates/`` hold the
shape of the C. Every expression reaches the C through :class:`CPrinter`, a subclass of sympy's
C99 printer; nothing from a model file reaches the C except validated identifiers and numeric
literals printed here.

:func:`generate` returns a :class:`Generated` (file name -> text, plus figures such as operation
counts and struct size). Output is deterministic: same model and estgen version, same bytes.
"""

from __future__ import annotations

import hashlib
import os
import re
from dataclasses import dataclass, field
from functools import lru_cache
from typing import TYPE_CHECKING, Any, Dict, List, Optional, Sequence, Tuple

import jinja2
import numpy as np
import sympy as sp
from sympy.codegen.ast import float32, float64, real
from sympy.printing.c import C99CodePrinter
from sympy.printing.str import StrPrinter

from ._version import __version__
from .chi2 import chi2_ppf
from .derive import (CERT_KAPPA, EKF_BLOCK_UPDATE_SECTIONS, EKF_PREDICT_SECTIONS, Stmt, angle_wraps, derive_ekf,
                     ekf_sequential_sections, packed_index, packed_size, reset_covariance, with_sections)
from .errors import ModelError
from .ir import Loop, Node
from .unrolled import commit_check
from .layout import Field, StructLayout
from .model import ModelSpec, unit_problem
from .progress import detail, stage
from .status import ADVICE, KIND_STATUSES, PRECEDENCE, Status

if TYPE_CHECKING:  # annotation only: the filter kinds import this module, never the reverse
    from .filters import FilterSetup

__all__ = ["CPrinter", "OpCount", "Emitter", "Generated", "generate_ekf", "gate_split", "c_literal"]


def c_literal(value: float, precision: str) -> str:
    """The shortest C floating literal that round-trips in the target precision.

    Double: Python's shortest repr of the float64. Float: the shortest decimal that reads back
    as the same float32 (``4.0000000000000007e-10`` prints as ``4.0e-10F``), so a reviewer sees
    the value the compiler stores. Positional between 1e-4 and 1e16, else scientific (Python's
    repr rule); always with a '.' so it reads as a floating literal.
    """
    v = float(value)
    if v != v or v in (float("inf"), float("-inf")):
        raise ValueError("non-finite literal")
    if precision == "float":
        if abs(v) > float(np.finfo(np.float32).max):
            raise ValueError(f"{v!r} overflows float32")
        f32 = np.float32(v)
        if not np.isfinite(f32):
            raise ValueError(f"{v!r} overflows float32")
        mag = abs(float(f32))
        if mag == 0.0 or 1e-4 <= mag < 1e16:
            return np.format_float_positional(f32, unique=True, trim="0") + "F"
        return np.format_float_scientific(f32, unique=True, trim="0") + "F"
    text = repr(v)
    if "e" not in text and "." not in text:
        text += ".0"
    if "e" in text and "." not in text.split("e")[0]:
        mant, ex = text.split("e")
        text = f"{mant}.0e{ex}"
    return text


class CPrinter(C99CodePrinter):
    """sympy's C99 printer, typed for float or double, with cheap integer powers and exact
    literals (no double constants in a float build, no pow() for squares)."""

    def __init__(self, precision: str = "double", names: Optional[Dict[str, str]] = None) -> None:
        self.precision = precision
        #: symbol name -> the C text printed for it (index names, renamed temporaries)
        self.names: Dict[str, str] = dict(names or {})
        ftype = float32 if precision == "float" else float64
        # order="none": terms in sympy's own canonical argument order (deterministic, and far
        # cheaper than sorting every sum for printing)
        super().__init__(settings={"type_aliases": {real: ftype}, "order": "none"})

    def _lit(self, v: float) -> str:
        return c_literal(v, self.precision)

    def _print_Symbol(self, expr: sp.Symbol) -> str:
        name = self.names.get(expr.name)
        return name if name is not None else super()._print_Symbol(expr)

    def _print_Float(self, expr: sp.Float) -> str:
        return self._lit(float(expr))

    def _print_Integer(self, expr: sp.Integer) -> str:
        return self._lit(float(int(expr)))

    def _print_Rational(self, expr: sp.Rational) -> str:
        return self._lit(float(expr))

    _print_Half = _print_Rational
    _print_One = _print_Integer
    _print_Zero = _print_Integer
    _print_NegativeOne = _print_Integer

    def _print_sign(self, expr: Any) -> str:
        # sympy's C printer gives ((a > 0) - (a < 0)), an int: a -Wconversion error in a float
        # build. A choice of real constants instead (the UKF's derivation lowers it the same way).
        (a,) = expr.args
        return self._print(sp.Piecewise((sp.S.One, a > 0), (sp.S.NegativeOne, a < 0), (sp.S.Zero, True)))

    def _print_Mod(self, expr: Any) -> str:
        # sympy's Mod takes the divisor's sign (Python's %); C's fmod the dividend's: a - b floor(a / b)
        a, b = expr.args
        return self._print(a - b * sp.floor(a / b))

    def _print_Pi(self, expr: Any) -> str:
        return self._lit(3.141592653589793)

    def _print_Exp1(self, expr: Any) -> str:
        return self._lit(2.718281828459045)

    def _print_Pow(self, expr: sp.Pow) -> str:
        # Results are parenthesized: sympy's Mul printer puts a Pow after '/' unbracketed.
        base, ex = expr.args
        sqrt = "sqrtf" if self.precision == "float" else "sqrt"
        if ex.is_Integer and 1 <= int(ex) <= 4:
            b = self.parenthesize(base, 60)
            return "(" + "*".join([b] * int(ex)) + ")"
        if ex.is_Integer and -4 <= int(ex) <= -1:
            inner = base if int(ex) == -1 else sp.Pow(base, -ex, evaluate=False)
            return f"({self._lit(1.0)}/{self.parenthesize(inner, 60)})"
        if ex == sp.S.Half:
            return f"{sqrt}({self._print(base)})"
        if ex == -sp.S.Half:
            return f"({self._lit(1.0)}/{sqrt}({self._print(base)}))"
        pw = "powf" if self.precision == "float" else "pow"
        return f"{pw}({self._print(base)}, {self._print(ex)})"


@dataclass
class OpCount:
    """Floating-point operations of straight-line code as printed (before C optimization)."""

    add: int = 0
    mul: int = 0
    div: int = 0
    sqrt: int = 0
    transcendental: int = 0
    compare: int = 0

    def __iadd__(self, other: "OpCount") -> "OpCount":
        for k in self.__dataclass_fields__:
            setattr(self, k, getattr(self, k) + getattr(other, k))
        return self

    def as_dict(self) -> Dict[str, int]:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}

    def scaled(self, times: int) -> "OpCount":
        """These counts ``times`` over (a loop body's)."""
        return OpCount(**{k: v * times for k, v in self.as_dict().items()})

    @property
    def total(self) -> int:
        return sum(self.as_dict().values())


def count_ops(expr: sp.Expr) -> OpCount:
    """Count operations of ``expr`` the way :class:`CPrinter` prints it: a numeric coefficient
    is a multiplication by a literal, negative powers in a product form one division."""
    oc = OpCount()

    def power(base: sp.Basic, k: sp.Rational) -> None:
        # cost of base**k for k > 0, as printed
        if k.is_Integer and 1 <= int(k) <= 4:
            oc.mul += int(k) - 1
        elif k == sp.S.Half:
            oc.sqrt += 1
        else:
            oc.transcendental += 1
        walk(base)

    def walk(e: sp.Basic) -> None:
        if e.is_Atom:
            return
        if e.is_Add:
            oc.add += len(e.args) - 1
        elif e.is_Mul:
            num = 0
            den = 0
            for a in e.args:
                if a.is_Pow and a.exp.is_Rational and a.exp.is_negative:
                    den += 1
                    power(a.base, -a.exp)
                else:
                    if a not in (sp.S.One, sp.S.NegativeOne):
                        num += 1
                    walk(a)
            oc.mul += max(0, num - 1) + max(0, den - 1)
            if den:
                oc.div += 1
            return
        elif e.is_Pow:
            b, x = e.args
            if x.is_Rational and x.is_negative:
                oc.div += 1
                power(b, -x)
            else:
                power(b, x)
            return
        elif isinstance(e, sp.Function):
            oc.transcendental += 1
        for a in e.args:
            walk(a)

    walk(expr)
    return oc


def safe_comment(text: Optional[str]) -> Optional[str]:
    """A unit a doc comment may carry as given (the model refuses any other: see
    :func:`estgen.model.unit_problem`); None stays None."""
    if text is None or unit_problem(text):
        return None
    return text


def safe_filename(path: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]", "_", os.path.basename(path)) or "model"


@lru_cache(maxsize=1)
def template_env() -> jinja2.Environment:
    """The Jinja environment over ``templates/`` (source checkout) or the installed copy."""
    here = os.path.dirname(os.path.abspath(__file__))
    src_dir = os.path.join(os.path.dirname(here), "templates")
    if os.path.isfile(os.path.join(src_dir, "filter.h.j2")):
        loader: jinja2.BaseLoader = jinja2.FileSystemLoader(src_dir)
    else:
        loader = jinja2.PackageLoader("estgen", "templates")
    return jinja2.Environment(
        loader=loader,
        undefined=jinja2.StrictUndefined,
        keep_trailing_newline=True,
        trim_blocks=True,
        lstrip_blocks=True,
        autoescape=False,
    )


def c_names_for(spec: ModelSpec, prefix: str) -> Dict[str, str]:
    """How the emitted C spells the state and input elements derivation names by position, so
    that a reviewer reads ``x[nav_ekf_ix_yaw]`` (the header's index enums) instead of ``x[8]``."""
    out: Dict[str, str] = {}
    for i, s in enumerate(spec.states):
        for arr in ("x", "xn", "xs"):
            out[f"{arr}[{i}]"] = f"{arr}[{prefix}_ix_{s.name}]"
    for i, s in enumerate(spec.inputs):
        out[f"u[{i}]"] = f"u[{prefix}_iu_{s.name}]"
    return out


class Emitter:
    """Renders statements of one filter/precision into C lines and tallies their cost."""

    def __init__(self, prefix: str, precision: str, names: Optional[Dict[str, str]] = None,
                 reserved: Sequence[str] = ()) -> None:
        self.prefix = prefix
        #: model names (parameters, states, inputs) a local temporary must not share, so that a
        #: residual ``r0`` never sits beside ``par->r0``: such a temporary gets a ``_t`` suffix
        self.reserved = frozenset(reserved)
        self.precision = precision
        self.real = "float" if precision == "float" else "double"
        self.printer = CPrinter(precision, names)
        self.upper = prefix.upper()

    def target(self, name: str) -> str:
        """The C spelling of a statement's target (see :func:`c_names_for`)."""
        return self.printer.names.get(name, name)

    def declare(self, name: str) -> str:
        """The C name of a new local temporary (renamed when it shares a model name)."""
        if name in self.reserved and name not in self.printer.names:
            alias = name + "_t"
            while alias in self.reserved:
                alias += "_t"
            self.printer.names[name] = alias
        return self.target(name)

    def lit(self, v: float) -> str:
        return c_literal(v, self.precision)

    def expr(self, e: sp.Expr) -> str:
        return self.printer.doprint(e)

    def lines(self, stmts: Sequence[Node], ops: Optional[OpCount] = None) -> List[str]:
        out: List[str] = []
        for st in stmts:
            if isinstance(st, Loop):
                body_ops = OpCount()
                out.append(f"for (size_t {st.var} = {st.start}u; {st.var} < {st.stop}u; ++{st.var}) {{")
                out += ["    " + line for line in self.lines(st.body, body_ops)]
                out.append("}")
                if ops is not None:
                    ops += body_ops.scaled(st.stop - st.start)
                continue
            if ops is not None:
                ops += count_ops(st.expr)
            if st.kind == "decl":
                out.append(f"const {self.real} {self.declare(st.target)} = {self.expr(st.expr)};")
            elif st.kind == "assign":
                out.append(f"{self.target(st.target)} = {self.expr(st.expr)};")
            elif st.kind == "comment":
                out.append(f"/* {st.target} */")
            elif st.kind == "check":
                v = self.expr(st.expr)
                out.append(f"if (!isfinite({v})) {{ return {self.upper}_NON_FINITE; }}")
                out.append(f"if (!({v} > {self.lit(0.0)})) {{ return {self.upper}_NOT_POSITIVE_DEFINITE; }}")
                if ops is not None:
                    ops.compare += 2
            elif st.kind == "wrap":
                out.append(f"{self.target(st.target)} = {self.prefix}_wrap({self.expr(st.expr)});")
                if ops is not None:
                    ops.transcendental += 1
                    ops.add += 2
                    ops.mul += 2
            else:
                raise ValueError(st.kind)
        return out


@dataclass
class Generated:
    """What the generator produced for one model, filter and precision."""

    files: Dict[str, str]
    prefix: str
    filter: str
    precision: str
    layout: StructLayout  # the filter struct: header, cdef and the harness read it
    ops: Dict[str, Dict[str, int]] = field(default_factory=dict)
    cdef: str = ""
    lines_of_c: int = 0
    header: str = ""
    source: str = ""

    @property
    def struct_bytes(self) -> int:
        """sizeof the filter struct (all filter state)."""
        return self.layout.size_bytes(self.precision)


def model_sha256(path: Optional[str]) -> str:
    """SHA-256 of the model file's bytes (what ``sha256sum`` prints), or "none" without a file."""
    if not path or not os.path.isfile(path):
        return "none"
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def options_line(filt: str, precision: str, commit_check: str = "subtractive",
                 gates: Optional[Dict[str, float]] = None, **options: Any) -> str:
    """The generate options that made a file, as command-line text in a fixed order (recorded
    in the header; ``generate --check`` compares it to tell option drift from content drift)."""
    parts = [f"--filter {filt}", f"--precision {precision}", f"--commit-check {commit_check}"]
    for name, prob in sorted((gates or {}).items()):
        parts.append(f"--gate {name}={prob!r}")
    for key, val in sorted(options.items()):
        if val is not None:
            parts.append(f"--{key.replace('_', '-')} {val!r}" if isinstance(val, float) else f"--{key.replace('_', '-')} {val}")
    return " ".join(parts)


#: Power of Ten rule 4 (G. J. Holzmann, "The Power of Ten", IEEE Computer 39(6), 2006): no
#: function longer than what fits on a sheet of paper, about 60 lines
FUNCTION_LINES_LIMIT = 60
_C_FUNCTION = re.compile(r"^(?:static )?[A-Za-z_][\w ]*?\b(\w+)\([^;]*\)\n\{\n(.*?)^\}\n", re.M | re.S)


def long_functions(source: str, limit: int = FUNCTION_LINES_LIMIT) -> List[Tuple[str, int]]:
    """(name, body lines) of every function in ``source`` longer than ``limit`` lines."""
    return [(m.group(1), m.group(2).count("\n")) for m in _C_FUNCTION.finditer(source)
            if m.group(2).count("\n") > limit]


class _ModelNamePrinter(StrPrinter):
    """sympy's text printer with noise symbols under the names the model file gave them (the
    spec carries them renamed, so that a noise symbol may share a state's name; renaming at
    print time keeps two such symbols apart instead of merging them)."""

    def __init__(self, names: Dict[sp.Symbol, str]) -> None:
        super().__init__()
        self._model_names = names

    def _print_Symbol(self, expr: sp.Symbol) -> str:
        return self._model_names.get(expr) or super()._print_Symbol(expr)


def _component_text(expr: sp.Expr, names: Dict[sp.Symbol, str], width: int = 60) -> str:
    """A sensor component's model function as sympy prints it over the model's own names
    (``names``: the noise symbols'), when it is short and cannot end a C comment."""
    text = _ModelNamePrinter(names).doprint(expr)
    if len(text) > width or "*/" in text or "/*" in text or "//" in text:
        return "(long expression: see the model file)"
    return text


#: --optimize speed: the largest state (error) dimension whose Cholesky factorization stays
#: unrolled; above it the n^3/6 straight-line multiply-adds outgrow an instruction cache
UNROLL_CHOLESKY_MAX = 12
#: --optimize speed: the largest dimension whose scalar update P -= K W' stays unrolled (above it,
#: the shared function; a sensor with a constant full R is then whitened into it too)
UNROLL_SCALAR_UPDATE_MAX = 12
#: --optimize speed: F denser than this (non-zeros / n^2), with at least DENSE_F_MIN_N states, gets
#: the loop form of F P F' (straight-line code then saves nothing on structure and grows as n^3);
#: a compact F P F' of such an F (either form) loops over a full local F, zeros included, not over
#: a table of its non-zeros (an indirection per multiply-add that buys nothing when most are non-zero)
DENSE_F_FILL = 0.5
DENSE_F_MIN_N = 8


#: --optimize size: below this dimension the straight-line forms are already the smaller ones
#: (measured on the M4F: a 3-state loop factorization and scalar update take more flash)
COMPACT_MIN_N = 6


def size_forms(optimize: str, ne: int) -> bool:
    """True when --optimize size takes the compact forms for a filter of (error) dimension ``ne``."""
    return optimize == "size" and ne >= COMPACT_MIN_N


def compact_forms(optimize: str, ne: int) -> Dict[str, bool]:
    """Which blocks take their compact (loop) form (docs/performance.md, "Speed and size"):
    under "size" every block that has one, from COMPACT_MIN_N states; under "speed" the
    factorization above UNROLL_CHOLESKY_MAX states (the filter kinds add their own blocks)."""
    size = size_forms(optimize, ne)
    forms = {"chol": size or ne > UNROLL_CHOLESKY_MAX, "scalar_update": False, "predict": False}
    forms["pku"] = forms["chol"]
    return forms


def _common_context(spec: ModelSpec, setup: "FilterSetup") -> Dict[str, Any]:
    """What every filter's templates share. The options in ``setup`` are validated already."""
    filt, precision, commit_check = setup.name, setup.precision, setup.common.commit_check
    optimize = setup.common.optimize
    command = options_line(filt, precision, commit_check, setup.common.gate_map,
                           **{"optimize": optimize, **setup.options.changed()})
    for s in spec.sensors:
        if s.name.endswith("_nis"):
            raise ModelError(f"sensor name {s.name!r} must not end in '_nis' (it would clash with a generated function)",
                             s.where)
    prefix = f"{spec.name}_{filt}"
    em = Emitter(prefix, precision, c_names_for(spec, prefix),
                 [p.name for p in spec.params] + [s.name for s in spec.states] + [s.name for s in spec.inputs])
    n = spec.n
    ne = spec.ne  # the covariance's dimension: n minus one per attitude
    np_ = packed_size(ne)
    params = [{"name": p.name, "default": em.lit(p.default), "unit": safe_comment(p.unit)} for p in spec.params]
    layout = StructLayout.kalman(
        prefix, em.real, n, ne,
        [Field(p["name"], "real", (), f"default {p['default']}" + (f" [{p['unit']}]" if p["unit"] else ""))
         for p in params],
        setup.kind.extra_fields(spec, setup))
    struct_bytes = layout.size_bytes(precision)
    states = [
        {"i": i, "name": s.name, "unit": safe_comment(s.unit), "angle": s.angle} for i, s in enumerate(spec.states)
    ]
    inputs = [{"i": i, "name": s.name, "unit": safe_comment(s.unit)} for i, s in enumerate(spec.inputs)]
    x0 = [em.lit(v) for v in spec.x0]
    P0 = [(packed_index(i, j, ne), em.lit(spec.P0[i][j])) for i in range(ne) for j in range(i, ne)]
    sensors = []
    noise_names = {ns.symbol: ns.name for ns in spec.noise}
    for s in spec.sensors:
        gate = None
        if s.gate is not None:
            gate = em.lit(chi2_ppf(s.gate, s.m))
        comps = [{"k": k, "text": _component_text(s.h[k], noise_names), "unit": safe_comment(s.units[k] if k < len(s.units) else None),
                  "angle": bool(s.angles[k])} for k in range(s.m)]
        sensors.append({
            "name": s.name, "m": s.m, "gate_prob": repr(s.gate) if s.gate is not None else None, "gate": gate,
            "angles": [i for i, a in enumerate(s.angles) if a], "components": comps,
            "noise_names": [noise_names[v] for v in s.v],
        })
    # a kind's own refusals (the particle filter's DEGENERATE) are listed only in its header
    statuses = [{"name": st.name, "value": int(st), "advice": ADVICE[st]} for st in Status
                if st not in KIND_STATUSES or st in setup.kind.statuses]
    full_ops = OpCount()
    diag_ops = OpCount()
    commit_pd = em.lines(pivot_check(ne, "P"), full_ops)
    # a diagonal entry in (0, max/16): finite and positive, and small enough that the predict
    # certificate's bound |P'_ij| <= CERT_KAPPA sqrt(P'_ii P'_jj) (1 + rounding) keeps every entry finite
    big = em.lit(float(np.finfo(np.float32 if precision == "float" else np.float64).max) / 16.0)
    commit_diag = []
    for i in range(ne):
        k = packed_index(i, i, ne)
        commit_diag.append(f"if (!(P[{k}] < {big})) {{ return {em.upper}_NON_FINITE; }}")
        commit_diag.append(f"if (!(P[{k}] > {em.lit(0.0)})) {{ return {em.upper}_NOT_POSITIVE_DEFINITE; }}")
    diag_ops.compare += 2 * ne
    # which static check each kind of call runs before it commits (the filter's emitter may
    # change "predict" when its predict subtracts)
    # (generate_ekf turns the predict's into "certified" when it has a rounding certificate)
    subtracting = {"cholesky": "commit_pd", "diagonal": "commit_diag", "subtractive": "commit_pd"}[commit_check]
    adding = "commit_diag" if commit_check == "diagonal" else "commit_pd"
    commit_fns = {"predict": adding, "update": subtracting}
    commit_ops = {"commit_pd": full_ops.as_dict(), "commit_diag": diag_ops.as_dict()}
    return {
        "version": __version__,
        "model_file": safe_filename(spec.source),
        "model_sha256": model_sha256(spec.source),
        "command": command,
        "precedence": list(PRECEDENCE),
        "name": spec.name,
        "filt": filt,
        "title": setup.kind.title,
        "template": setup.kind.template,
        "kind_partial": setup.kind.header_partial,
        "FILT": filt.upper(),
        "prefix": prefix,
        "PREFIX": prefix.upper(),
        "real": em.real,
        "precision": precision,
        "n": n,
        "ne": ne,
        "np": np_,
        "attitudes": list(spec.attitudes),
        "augmented": bool(spec.noise),  # noise symbols: the UKF draws augmented sigma points
        "error_names": list(spec.error_names),
        "nu": spec.nu,
        "states": states,
        "inputs": inputs,
        "params": params,
        "x0": x0,
        "P0": P0,
        "sensors": sensors,
        "statuses": statuses,
        "struct_bytes": struct_bytes,
        "layout": layout,
        "zero": em.lit(0.0),
        "one": em.lit(1.0),
        "pi": em.lit(3.141592653589793),
        "two_pi": em.lit(6.283185307179586),
        "fsuf": "f" if precision == "float" else "",
        "has_angles": any(s.angle for s in spec.states) or any(any(s.angles) for s in spec.sensors),
        "angle_states": [i for i, s in enumerate(spec.states) if s.angle],
        "emitter": em,
        # the static commit check every call (and set_state) runs; its cost counts in each call
        "commit_pd": commit_pd,
        "commit_diag": commit_diag,
        "commit_check": commit_check,
        "optimize": optimize,
        "compact": compact_forms(optimize, ne),
        "reset": [],  # the attitude covariance reset of the EKF and UKF (set_reset fills it)
        "cert_kappa": CERT_KAPPA,
        "commit_fns": commit_fns,
        "commit_ops": commit_ops,
    }


def _render(ctx: Dict[str, Any]) -> Generated:
    detail("templates")
    env = template_env()
    source = env.get_template(ctx["template"]).render(**ctx)
    header = env.get_template("filter.h.j2").render(long_functions=long_functions(source),
                                                      lines_limit=FUNCTION_LINES_LIMIT, **ctx)
    cdef = env.get_template("cdef.j2").render(**ctx)
    prefix = ctx["prefix"]
    files = {f"{prefix}.h": header, f"{prefix}.c": source}
    lines = header.count("\n") + source.count("\n")
    return Generated(files, prefix, ctx["filt"], ctx["precision"], ctx["layout"], ctx.get("ops", {}), cdef,
                     lines, header, source)


def gate_split(stmts: Sequence[Stmt]) -> Tuple[List[Stmt], List[Stmt]]:
    """An update's statements up to the one completing the NIS, and the rest: the template
    reports the NIS and evaluates the gate between the two, before the posterior is formed."""
    k = max((i for i, st in enumerate(stmts) if st.kind == "assign" and st.target == "nis"), default=-1) + 1
    if k == 0:
        raise ValueError("an update without a NIS")
    return list(stmts[:k]), list(stmts[k:])


@lru_cache(maxsize=64)
def pivot_check(n: int, P: str) -> Tuple[Stmt, ...]:
    """The unrolled Cholesky pivot check every commit goes through (shared by both filters;
    cached: it depends on the size alone)."""
    return tuple(commit_check(n, P))


def _compact_predict(em: Emitter, ctx: Dict[str, Any], compact: Any, dense: bool, cert_sums: bool) -> List[str]:
    """The predict's lines in the compact form: f, F, G, Q as before, then P' = F P F' + G Qw G' + Q
    as loops. ``dense`` (F more than DENSE_F_FILL full): plain constant-bound loops over a full
    local F, zeros included; else loops over F's non-zeros (static const row starts and columns, a
    local value array). ``cert_sums``: also F's part of the rounding certificate's row sums,
    cr[i] = sum_k |F_ik| and ca[i] = sum_k |F_ik| P_kk, in a loop over the same F (see
    derive.predict_certificate's loop_sums)."""
    pre, fnz, noise, tail = compact
    ne = ctx["ne"]
    real, zero = em.real, em.lit(0.0)
    out = em.lines(with_sections(pre, EKF_PREDICT_SECTIONS))
    if cert_sums:
        out += [f"{real} cr[{ne}];  /* the rounding certificate's row sums over F (see the commit check) */",
                f"{real} ca[{ne}];"]
    if dense:
        vals = {(i, k): e for i, k, e in fnz}
        rows = ["{" + ", ".join(em.expr(vals.get((i, k), sp.S.Zero)) for k in range(ne)) + "}" for i in range(ne)]
        out += [
            "/* P' = F P F' + G Qw G' + Q: the noise terms straight-line, then F P F' as plain loops over",
            "   a full local F (more than half of it is non-zero); --optimize compact form, see the header */",
            "{",
            f"    const {real} Fd[{ne}][{ne}] = {{",
        ]
        out += [f"        {r}{',' if i + 1 < ne else ''}" for i, r in enumerate(rows)]
        out += ["    };"]
    else:
        starts = [0] * (ne + 1)
        for i, _, _ in fnz:
            starts[i + 1] += 1
        for i in range(ne):
            starts[i + 1] += starts[i]
        nnz = len(fnz)
        out += [
            "/* P' = F P F' + G Qw G' + Q: the noise terms straight-line, then loops over F's non-zeros",
            "   (row starts Fr, columns Fc, values Fv); --optimize compact form, see the header */",
            "{",
            f"    static const uint16_t Fr[{ne + 1}] = {{{', '.join(f'{v}u' for v in starts)}}};",
            f"    static const uint16_t Fc[{nnz}] = {{{', '.join(f'{k}u' for _, k, _ in fnz)}}};",
            f"    const {real} Fv[{nnz}] = {{{', '.join(em.expr(e) for _, _, e in fnz)}}};",
            "    size_t cp;",
        ]
    out += [
        f"    {real} arow[{ne}];",
        f"    {real} Pf[{ne}][{ne}];  /* P unpacked: the products run along its rows */",
        "    size_t ci;",
        "    size_t cj;",
        "    size_t ck;",
        "    size_t q = 0u;",
        f"    for (ci = 0u; ci < {ne}u; ++ci) {{",
        f"        for (cj = ci; cj < {ne}u; ++cj) {{",
        "            Pf[ci][cj] = P[q];",
        "            Pf[cj][ci] = P[q];",
        "            ++q;",
        "        }",
        "    }",
        "    memset(Pn, 0, sizeof Pn);",
    ]
    out += ["    " + line for line in em.lines(noise)]
    if dense:
        # row i of A = F P as a sum of rows of P (independent iterations: compilers vectorize it),
        # then P'_ij = A_i . F_j for j >= i (the upper triangle only)
        out += [
            "    q = 0u;",
            f"    for (ci = 0u; ci < {ne}u; ++ci) {{",
            f"        for (cj = 0u; cj < {ne}u; ++cj) {{",
            f"            arow[cj] = {zero};",
            "        }",
            f"        for (ck = 0u; ck < {ne}u; ++ck) {{",
            f"            const {real} fik = Fd[ci][ck];",
            f"            for (cj = 0u; cj < {ne}u; ++cj) {{",
            "                arow[cj] += fik * Pf[ck][cj];",
            "            }",
            "        }",
        ]
        out += _upper_triangle_products(ne, real, f"ck = 0u; ck < {ne}u; ++ck", "arow[ck] * Fd[cj][ck]")
        if cert_sums:
            out += _certificate_sums(ne, real, zero, ctx["fsuf"], f"ck = 0u; ck < {ne}u; ++ck", "Fd[ci][ck]", "ck")
        return out + ["}"] + em.lines(tail)
    out += [
        "    q = 0u;",
        f"    for (ci = 0u; ci < {ne}u; ++ci) {{",
        f"        for (ck = 0u; ck < {ne}u; ++ck) {{",
        f"            {real} acc = {zero};",
        f"            for (cp = Fr[ci]; cp < Fr[ci + 1u] && cp < {nnz}u; ++cp) {{",
        "                acc += Fv[cp] * Pf[Fc[cp]][ck];",
        "            }",
        "            arow[ck] = acc;",
        "        }",
    ]
    out += _upper_triangle_products(ne, real, f"cp = Fr[cj]; cp < Fr[cj + 1u] && cp < {nnz}u; ++cp",
                                    "arow[Fc[cp]] * Fv[cp]")
    if cert_sums:
        out += _certificate_sums(ne, real, zero, ctx["fsuf"], f"cp = Fr[ci]; cp < Fr[ci + 1u] && cp < {nnz}u; ++cp",
                                 "Fv[cp]", "Fc[cp]")
    return out + ["}"] + em.lines(tail)


def _certificate_sums(ne: int, real: str, zero: str, fsuf: str, loop: str, value: str, col: str) -> List[str]:
    """cr[i] = sum_k |F_ik|, ca[i] = sum_k |F_ik| P_kk over the entries ``loop`` visits (F_ik is
    ``value``, k is ``col``): the F part of derive.predict_certificate's row sums."""
    return [
        f"    for (ci = 0u; ci < {ne}u; ++ci) {{",
        f"        {real} rs = {zero};",
        f"        {real} as = {zero};",
        f"        for ({loop}) {{",
        f"            const {real} fa = fabs{fsuf}({value});",
        "            rs += fa;",
        f"            as += fa * Pf[{col}][{col}];",
        "        }",
        "        cr[ci] = rs;",
        "        ca[ci] = as;",
        "    }",
    ]


def _upper_triangle_products(ne: int, real: str, loop: str, term: str) -> List[str]:
    """The close of both F P F' loop forms: P'_ij += the sum over ``loop`` of ``term`` (row i of
    A = F P times row j of F) for j >= i, in packed order; closes the row loop (not the block)."""
    return [
        f"        for (cj = ci; cj < {ne}u; ++cj) {{",
        f"            {real} acc = Pn[q];",
        f"            for ({loop}) {{",
        f"                acc += {term};",
        "            }",
        "            Pn[q] = acc;",
        "            ++q;",
        "        }",
        "    }",
    ]


def _compact_sequential(em: Emitter, prefix: str, uc: Any, rules: Any) -> Tuple[List[str], List[str]]:
    """A sequential update's lines in the compact form: h, H and y as before, then one call of
    the shared static scalar-update function per component (its row of H in a static const
    column table and a local value array); and the lines after the NIS is complete (the gate goes
    between)."""
    pre, comps, tail = uc.compact
    target = "dx" if uc.dx_size else "xs"
    out = em.lines(with_sections(pre, rules))
    if uc.whiten:
        out.append("/* whitened: y = L^-1 y with the constant R = L L', so that the components are independent")
        out.append("   with unit variance; H's rows below are those of L^-1 H */")
        out += em.lines(uc.whiten)
    if uc.dx_size:
        out.append("memset(dx, 0, sizeof dx);")
    for c, comp in enumerate(comps):
        nh = len(comp.h)
        cols = ", ".join(f"{j}u" for j, _ in comp.h)
        vals = ", ".join(em.expr(e) for _, e in comp.h)
        out += [
            f"/* component z[{c}]: the shared scalar update */",
            "{",
            f"    static const uint16_t hc[{nh}] = {{{cols}}};",
            f"    const {em.real} hv[{nh}] = {{{vals}}};",
            f"    const {em.real} rc = {em.expr(comp.r)};",
            f"    const int st = {prefix}_scalar_update({target}, Ps, hv, hc, {nh}u, rc, {em.expr(comp.R)}, &nis);",
            f"    if (st != {em.upper}_OK) {{",
            "        return st;",
            "    }",
            "}",
        ]
    return out, em.lines(tail)


def set_reset(spec: ModelSpec, ctx: Dict[str, Any]) -> OpCount:
    """Attitude models with sensors: print the covariance reset (:func:`estgen.derive.reset_covariance`)
    into ``ctx["reset"]``, the body of the one static ``<prefix>_reset(Ps, dx)`` that every EKF and
    UKF update calls after injecting its correction (common_c.j2 ``reset_function``). Returns the
    cost of one call (zero when there is no reset)."""
    ops = OpCount()
    ctx["reset"] = ctx["emitter"].lines(reset_covariance(spec), ops) if spec.attitudes and spec.sensors else []
    return ops


def reset_call(prefix: str) -> str:
    """The C statement that applies the reset to the scratch ``Ps`` with the injected ``dx``."""
    return f"{prefix}_reset(Ps, dx);  /* P re-referenced to the corrected attitude */"


def generate_ekf(spec: ModelSpec, setup: "FilterSetup") -> Generated:
    """Generate the EKF's header and source for ``spec`` (gates set, support checked)."""
    ctx = _common_context(spec, setup)
    em: Emitter = ctx["emitter"]
    # the derivation does not depend on the precision: derive once per spec, print twice
    code = spec.derived("derive_ekf", lambda: derive_ekf(spec))
    stage(f"print C ({setup.precision})")
    ops: Dict[str, Dict[str, int]] = {}
    pc = OpCount()
    p_lines = em.lines(with_sections(code.predict.stmts, EKF_PREDICT_SECTIONS), pc)
    forms = ctx["compact"]
    dense_f = False
    if code.predict.compact is not None and code.predict.compact[1]:
        fill = len(code.predict.compact[1]) / float(spec.ne * spec.ne)
        dense_f = fill > DENSE_F_FILL
        forms["predict"] = size_forms(setup.common.optimize, spec.ne) or (dense_f and spec.ne >= DENSE_F_MIN_N)
    cert = code.predict.cert
    if forms["predict"]:
        # the compact form sums the certificate's rows over F in a loop (same conditions, same rows)
        cert_sums = (setup.common.commit_check == "subtractive" and code.predict.cert_loop is not None
                     and any(sym.name.startswith("cr[") for lhs, _ in code.predict.cert_loop for sym in lhs.free_symbols))
        cert = code.predict.cert_loop if cert_sums else cert
        p_lines = _compact_predict(em, ctx, code.predict.compact, dense_f, cert_sums)
    ctx["predict"] = {"lines": p_lines, "uses_par": code.predict.uses_par,
                      "uses_u": code.predict.uses_u, "cert": []}
    if setup.common.commit_check == "subtractive":
        # the predict's rounding certificate (derive.predict_certificate), else a factorization
        if cert is None:
            ctx["commit_fns"]["predict"] = "commit_pd"
        else:
            ctx["commit_fns"]["predict"] = "certified"
            cert_ops = OpCount()
            ctx["predict"]["cert"] = [f"({em.expr(lhs)} <= {em.expr(rhs)})" for lhs, rhs in cert]
            for lhs, rhs in cert:
                cert_ops += count_ops(lhs)
                cert_ops += count_ops(rhs)
                cert_ops.compare += 1
            pc += cert_ops
            ctx["predict"]["uses_par"] = ctx["predict"]["uses_par"] or any(
                str(sym).startswith("par->") for pair in cert for e in pair for sym in e.free_symbols)
    pc += OpCount(**ctx["commit_ops"]["commit_diag" if ctx["commit_fns"]["predict"] == "certified"
                                      else ctx["commit_fns"]["predict"]])
    ops["predict"] = pc.as_dict()
    ups = []
    forms["scalar_update"] = size_forms(setup.common.optimize, spec.ne) or spec.ne > UNROLL_SCALAR_UPDATE_MAX
    forms["scalar_update_used"] = False
    reset_ops = set_reset(spec, ctx)
    for uc, sctx in zip(code.updates, ctx["sensors"]):
        oc = OpCount()
        rules = ekf_sequential_sections(uc.sensor) if uc.sequential else EKF_BLOCK_UPDATE_SECTIONS
        head, rest = gate_split(with_sections(uc.stmts + angle_wraps(spec, "xs"), rules))
        body, after = em.lines(head, oc), em.lines(rest, oc)
        w_size, k_size, v_size = uc.w_size, uc.k_size, uc.v_size
        form = ("sequential scalar updates (diagonal R), standard form P - K W'" if uc.sequential
                else "block update, Cholesky solve of S, Joseph form")
        if forms["scalar_update"] and uc.compact is not None and uc.compact[1] and all(comp.h for comp in uc.compact[1]):
            # every component through the shared function: the NIS is complete after the last
            body, after = _compact_sequential(em, ctx["prefix"], uc, rules)
            after += em.lines(angle_wraps(spec, "xs"))
            w_size = k_size = v_size = 0
            forms["scalar_update_used"] = True
            if uc.whiten:
                form = "constant full R = L L' whitened by L^-1, then sequential scalar updates, standard form P - K W'"
        if ctx["reset"]:
            after.append(reset_call(ctx["prefix"]))
            oc += reset_ops
        oc += OpCount(**ctx["commit_ops"][ctx["commit_fns"]["update"]])
        ops[f"update_{uc.sensor.name}"] = oc.as_dict()
        ups.append({**sctx, "lines": body, "rest": after, "uses_par": uc.uses_par, "w_size": w_size,
                    "k_size": k_size, "v_size": v_size, "form": form, "dx_size": uc.dx_size})
    ctx["updates"] = ups
    ctx["ops"] = ops
    return _render(ctx)


def output_names(spec: ModelSpec, filter: str) -> List[str]:
    """The files :func:`generate` writes for ``spec`` and ``filter``, known without generating
    (``generate --outputs``; the CMake package declares them at configure time)."""
    prefix = f"{spec.name}_{filter}"
    return [f"{prefix}.c", f"{prefix}.h"]
