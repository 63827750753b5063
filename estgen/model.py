"""Stage 1: the model description a user writes, its loading and its validation.

A model file is a Python file that builds an :class:`Model` named ``model``. The :class:`Model`
records what the user declared (and where, for error messages); :func:`validate` checks it and
returns a :class:`ModelSpec`, the plain dataclass every later stage works from.
"""

from __future__ import annotations

import dataclasses
import math
import os
import re
import sys
import traceback
from dataclasses import dataclass, field
from typing import Any, Callable, Dict, Iterable, List, Optional, Sequence, Tuple, Union

import numpy as np
import sympy as sp
from sympy.core.function import AppliedUndef

from .errors import ModelError, Where

__all__ = [
    "Model",
    "ModelSpec",
    "SensorSpec",
    "NoiseSymbol",
    "noise_factor",
    "Variable",
    "Param",
    "load_model",
    "validate",
    "as_spec",
    "check_differentiable",
    "NON_DIFFERENTIABLE",
]

_PKG_DIR = os.path.dirname(os.path.abspath(__file__))

# C99 keywords plus names the C headers we include define as macros or functions that a
# struct field or function-name part must not shadow.
_C_KEYWORDS = frozenset(
    """auto break case char const continue default do double else enum extern float for goto if
    inline int long register restrict return short signed sizeof static struct switch typedef
    union unsigned void volatile while _Bool _Complex _Imaginary bool true false
    asm class delete new this template typename namespace operator private public protected
    virtual friend try catch throw explicit mutable using""".split()
)
_C_MACROS = frozenset(
    """NULL NAN INFINITY HUGE_VAL HUGE_VALF HUGE_VALL isfinite isnan isinf isnormal signbit
    fpclassify isgreater isless islessequal isgreaterequal islessgreater isunordered offsetof
    errno assert math_errhandling MATH_ERRNO MATH_ERREXCEPT size_t ptrdiff_t wchar_t
    int8_t int16_t int32_t int64_t uint8_t uint16_t uint32_t uint64_t intptr_t uintptr_t
    intmax_t uintmax_t linux unix i386""".split()  # the last three: predefined by gcc/clang in GNU dialects
)
# Names sympy's lambdify printers ("numpy" and "math" modules) emit for functions and
# constants: a state, input or parameter with one of these names shadows the function there
# (a TypeError) or, for e and pi, silently replaces the constant. The C side is safe (it
# addresses x[i], u[i], par->name) but the reference must agree with it.
_RESERVED_MATH = frozenset(
    """abs arccos arccosh arcsin arcsinh arctan arctan2 arctanh ceil cos cosh erf erfc exp exp2 expm1
    factorial floor gamma hypot isinf isnan lgamma log log10 log1p log2 logaddexp logaddexp2 max min
    sign sin sinh sqrt tan tanh e euler_gamma inf nan pi select reduce maximum minimum mod less
    greater equal less_equal greater_equal not_equal logical_and logical_or logical_not real imag
    angle asin acos atan atan2 asinh acosh atanh fabs copysign fmod trunc""".split()  # + "math" module
)
_IDENT = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
_MACRO_LIKE = re.compile(r"^(FP_|INT|UINT|PTRDIFF|SIZE|WCHAR|SIG_ATOMIC|WINT)[A-Z0-9_]*$")

#: Functions an EKF cannot differentiate; models using them must use the UKF.
NON_DIFFERENTIABLE: Tuple[type, ...] = (
    sp.sign,
    sp.Abs,
    sp.Heaviside,
    sp.Piecewise,
    sp.floor,
    sp.ceiling,
    sp.Min,
    sp.Max,
    sp.Mod,
    sp.frac,
)


def wrap_angle(a: Any) -> Any:
    """Wrap angles (radians, scalar or array) to (-pi, pi]."""
    two_pi = 2.0 * math.pi
    w = math.pi - np.mod(math.pi - np.asarray(a, dtype=float), two_pi)
    # mod(tiny negative, 2 pi) rounds to 2 pi, giving -pi: move it to the closed end
    w = np.where(w <= -math.pi, w + two_pi, w)
    return float(w) if np.ndim(w) == 0 else w


def _caller_where() -> Where:
    """The first stack frame outside the estgen package: the line of the model file."""
    frame = sys._getframe(1)
    while frame is not None:
        fname = os.path.abspath(frame.f_code.co_filename)
        if not fname.startswith(_PKG_DIR + os.sep):
            return Where(frame.f_code.co_filename, frame.f_lineno)
        frame = frame.f_back
    return Where("<model>")


def _split_names(names: Union[str, Sequence[str]]) -> List[str]:
    if isinstance(names, str):
        return names.replace(",", " ").split()
    return [str(n) for n in names]


#: What a unit string may hold: it is printed as given into comments of the generated header
#: (inner spaces allowed, as in "kg m^2", when units are given as a list),
#: so it must not be able to end or open a comment, and it must stay short.
UNIT_PATTERN = re.compile(r"^[A-Za-z0-9^._%()/*+-](?:[A-Za-z0-9 ^._%()/*+-]{0,22}[A-Za-z0-9^._%()/*+-])?$")


def unit_problem(unit: str) -> Optional[str]:
    """Why ``unit`` cannot be printed as given in the C (None when it can)."""
    if not UNIT_PATTERN.match(unit):
        bad = sorted({c for c in unit if not re.match(r"[A-Za-z0-9^._%()/*+-]", c)})
        if len(unit) > 24:
            return "longer than 24 characters"
        if not unit:
            return "empty"
        return f"holds {', '.join(repr(c) for c in bad)}; use ASCII letters, digits and ^ . _ % ( ) / * + - (e.g. 'um' for micrometres, 'deg' for degrees, 'N*m' for newton metres)"
    if "*/" in unit or "/*" in unit or "//" in unit:
        return "would open or close a C comment"
    return None


def _split_units(units: Union[None, str, Sequence[Optional[str]]], names: Sequence[str]) -> List[Optional[str]]:
    """One unit per name: a string of units separated by spaces, or a list (None for no unit).
    A single unit is not copied to several names: names declared together may differ in kind."""
    count = len(names)
    if units is None:
        return [None] * count
    try:
        items = units.split() if isinstance(units, str) else list(units)
    except TypeError:
        raise ModelError(f"units must be a string or a list of strings, got {units!r}") from None
    if len(items) != count:
        example = " ".join(str(items[0]) if items else "m" for _ in names)
        hint = (f"; a single unit is not copied to every name (they may differ in kind): write units=\"{example}\""
                if len(items) == 1 else "")
        raise ModelError(f"{len(items)} unit{'s' if len(items) != 1 else ''} given for {count} names "
                         f"({' '.join(names)}); give one unit per name{hint}")
    out: List[Optional[str]] = []
    for u in items:
        if u is None:
            out.append(None)
            continue
        text = str(u)
        why = unit_problem(text)
        if why:
            raise ModelError(f"unit {text!r} cannot be printed in the generated C: it {why}")
        out.append(text)
    return out


@dataclass(frozen=True)
class Variable:
    """A state, input or parameter as declared."""

    name: str
    symbol: sp.Symbol
    unit: Optional[str] = None
    angle: bool = False
    where: Optional[Where] = None
    attitude: Optional[str] = None  # name of the attitude (unit quaternion) this state belongs to


@dataclass(frozen=True)
class Param:
    """A runtime parameter: a struct field in the C, its default set by ``init``."""

    name: str
    symbol: sp.Symbol
    default: float
    unit: Optional[str] = None
    where: Optional[Where] = None


@dataclass
class _NoiseDecl:
    names: List[str]
    symbols: List[sp.Symbol]
    cov: Any
    where: Where
    inputs: Optional[List[sp.Symbol]] = None  # measured inputs the symbols belong to


@dataclass
class _SensorDecl:
    name: str
    h: Any
    noise: Any
    every: Any
    angles: Any
    gate: Any
    units: Any
    where: Where


class Model:
    """A nonlinear state-space model, declared step by step in a model file.

    Noise is additive, ``x[k+1] = f(x[k], u[k], dt) + w``, ``w ~ N(0, Q)`` and, for each sensor,
    ``z = h(x) + v``, ``v ~ N(0, R)``, and may also enter through noise symbols declared with
    :meth:`noise` (or :meth:`inputs` with ``noise=``) and written into f or one sensor's h.
    """

    def __init__(self, name: str) -> None:
        self.name = name
        self._where = _caller_where()
        self._states: List[Variable] = []
        self._inputs: List[Variable] = []
        self._params: List[Param] = []
        self._dt = sp.Symbol("dt")
        self._process: Optional[Tuple[str, Any, str, Where]] = None
        self._Q: Optional[Tuple[Any, Where]] = None
        self._sensors: List[_SensorDecl] = []
        self._noise: List[_NoiseDecl] = []
        self._initial: Optional[Tuple[Any, Any, Where]] = None
        self._box: Optional[Tuple[Any, Any]] = None
        self._scenario_dt: Optional[float] = None
        self._input_profile: Optional[Callable[[float], Sequence[float]]] = None
        self._scenario_where: Optional[Where] = None
        self.source: Optional[str] = None  # path of the model file, set by load_model

    # -- declarations -------------------------------------------------------------------------
    def states(
        self,
        names: Union[str, Sequence[str]],
        *,
        angle: bool = False,
        units: Union[None, str, Sequence[Optional[str]]] = None,
    ) -> Tuple[sp.Symbol, ...]:
        """Declare states (in state-vector order). ``angle=True`` marks them as angles in
        radians: residuals and the state itself are wrapped to (-pi, pi]."""
        where = _caller_where()
        if not isinstance(angle, (bool, np.bool_)):
            raise ModelError(f"states(angle=...) must be True or False, got {angle!r}", where)
        return self._declare(self._states, names, units, bool(angle), where)

    def attitude(self, name: str) -> Tuple[sp.Symbol, sp.Symbol, sp.Symbol, sp.Symbol]:
        """Declare an attitude: a unit quaternion (w, x, y, z), Hamilton product, rotating body
        vectors into the reference frame. Returns its four symbols (named ``<name>_w`` ...), which
        take four consecutive entries of ``x``; the covariance holds three for it, the rotation
        vector ``dtheta`` of ``q_true = q_est ⊗ quat.exp(dtheta)`` (body frame). Build its next
        value in ``process`` with :func:`estgen.quat.mul` and :func:`estgen.quat.exp`."""
        where = _caller_where()
        if not isinstance(name, str) or not _IDENT.match(name):
            raise ModelError(f"attitude name {name!r} is not a safe C identifier; use letters, digits and '_', "
                             f"starting with a letter", where)
        out = []
        for part in "wxyz":
            sym = sp.Symbol(f"{name}_{part}")
            self._states.append(Variable(f"{name}_{part}", sym, None, False, where, attitude=name))
            out.append(sym)
        return (out[0], out[1], out[2], out[3])

    def inputs(
        self, names: Union[str, Sequence[str]], *, units: Union[None, str, Sequence[Optional[str]]] = None,
        noise: Any = None,
    ) -> Tuple[sp.Symbol, ...]:
        """Declare the inputs ``u`` (in vector order).

        ``noise`` (a list of variances, or a covariance matrix; may use parameters and dt) marks
        them as measured with zero-mean Gaussian error: the value passed to ``predict`` is
        ``u_meas = u_true + w``. Write the process with the returned symbols as the true input;
        estgen substitutes ``u_true = u_meas - w`` with one noise symbol ``<name>_noise`` per
        input, so the noise enters through the dynamics as any noise symbol does.
        """
        where = _caller_where()
        syms = self._declare(self._inputs, names, units, False, where)
        if noise is not None:
            nnames = [f"{s}_noise" for s in syms]
            self._noise.append(_NoiseDecl(nnames, [sp.Symbol(nm, real=True) for nm in nnames], noise, where, list(syms)))
        return syms

    def noise(self, names: Union[str, Sequence[str]], cov: Any) -> Tuple[sp.Symbol, ...]:
        """Declare zero-mean Gaussian noise symbols with covariance ``cov`` (a list of variances
        or a matrix; may use parameters and dt). Each symbol must appear in the process or in
        exactly one sensor's h; symbols of different calls are independent."""
        where = _caller_where()
        nnames = _split_names(names)
        syms = [sp.Symbol(nm, real=True) for nm in nnames]  # real: distinct from a state of the same name
        self._noise.append(_NoiseDecl(nnames, syms, cov, where))
        return tuple(syms)

    @staticmethod
    def _declare(target: List[Variable], names: Union[str, Sequence[str]],
                 units: Union[None, str, Sequence[Optional[str]]], angle: bool, where: Where) -> Tuple[sp.Symbol, ...]:
        """Append variables to ``target``; one symbol per name (duplicates are caught in validate)."""
        names_l = _split_names(names)
        try:
            units_l = _split_units(units, names_l)
        except ModelError as err:
            raise ModelError(err.message, where) from None
        out = []
        for nm, un in zip(names_l, units_l):
            sym = sp.Symbol(nm)
            target.append(Variable(nm, sym, un, angle, where))
            out.append(sym)
        return tuple(out)

    def param(self, name: str, default: Any, unit: Optional[str] = None, *, units: Optional[str] = None) -> sp.Symbol:
        """Declare a runtime parameter with its default value and, optionally, its unit
        (``unit=`` or ``units=``, as states and inputs spell it)."""
        where = _caller_where()
        sym = sp.Symbol(str(name))
        if unit is not None and units is not None and str(unit) != str(units):
            raise ModelError(f"parameter {name!r}: unit={unit!r} and units={units!r} disagree; give one", where)
        unit = unit if unit is not None else units
        unit_s = None if unit is None else str(unit)
        if unit_s is not None and unit_problem(unit_s):
            raise ModelError(f"parameter {name!r}: unit {unit_s!r} cannot be printed in the generated C: "
                             f"it {unit_problem(unit_s)}", where)
        self._params.append(Param(str(name), sym, default, unit_s, where))  # checked in validate
        return sym

    @property
    def dt(self) -> sp.Symbol:
        """The sample-time symbol: a runtime argument of ``predict`` (seconds)."""
        return self._dt

    def process(self, f: Any) -> None:
        """Discrete dynamics: ``x[k+1] = f(x[k], u[k], dt)``."""
        where = _caller_where()
        self._once(self._process, "the dynamics are", "process() or dynamics()", where)
        self._process = ("discrete", f, "", where)

    def dynamics(self, rates: Any, method: str = "rk4") -> None:
        """Continuous dynamics ``dx/dt = rates(x, u)``, discretized over ``dt`` by ``method``
        ("rk4" or "euler"); the Jacobian is taken of the discretized map."""
        where = _caller_where()
        self._once(self._process, "the dynamics are", "process() or dynamics()", where)
        self._process = ("continuous", rates, method, where)

    def process_noise(self, Q: Any) -> None:
        """Process noise covariance Q (n x n matrix, or a list for a diagonal)."""
        where = _caller_where()
        self._once(self._Q, "the process noise is", "process_noise()", where)
        self._Q = (Q, where)

    def sensor(
        self,
        name: str,
        h: Any,
        noise: Any = None,
        *,
        every: int = 1,
        angles: Any = None,
        gate: Optional[float] = None,
        units: Union[None, str, Sequence[Optional[str]]] = None,
    ) -> None:
        """A sensor ``z = h(x) + v``. ``noise`` is a list (diagonal R) or a full matrix; it may be
        left out when noise symbols in ``h`` reach every component.

        ``every``: in simulations the sensor reports every ``every``-th step.
        ``angles``: indices (or a list of booleans) of components that are angles.
        ``gate``: optional chi-square gate probability (e.g. 0.997).
        """
        self._sensors.append(_SensorDecl(str(name), h, noise, every, angles, gate, units, _caller_where()))

    def initial(self, x0: Any, P0: Any) -> None:
        """Initial state ``x0`` and covariance ``P0`` (matrix, or list for a diagonal)."""
        where = _caller_where()
        self._once(self._initial, "the initial state is", "initial()", where)
        self._initial = (x0, P0, where)

    def initial_uniform(self, lower: Any, upper: Any) -> None:
        """A uniform prior over the box ``lower <= x <= upper`` (one bound pair per state). The
        particle filter draws its particles from the box; the EKF and UKF start from the box's
        mean ``(lower + upper) / 2`` and covariance ``diag((upper - lower)^2 / 12)``."""
        where = _caller_where()
        self._once(self._initial, "the initial state is", "initial() or initial_uniform()", where)
        lo = _float_list(lower, "initial_uniform() lower", where)
        hi = _float_list(upper, "initial_uniform() upper", where)
        if len(lo) != len(hi):
            raise ModelError(f"initial_uniform() lower has {len(lo)} entries and upper {len(hi)}; give one pair per state",
                             where)
        for i, (a, b) in enumerate(zip(lo, hi)):
            if not a < b:
                raise ModelError(f"initial_uniform() needs lower < upper; entry {i} has lower {a!r}, upper {b!r}", where)
        x0 = [0.5 * (a + b) for a, b in zip(lo, hi)]
        var = [(b - a) * (b - a) / 12.0 for a, b in zip(lo, hi)]  # variance of a uniform on [a, b]
        self._initial = (x0, var, where)
        self._box = (tuple(lo), tuple(hi))

    def scenario(self, dt: float, inputs: Optional[Callable[[float], Sequence[float]]] = None) -> None:
        """Defaults for simulation: the step ``dt`` and an input profile ``inputs(t) -> u``."""
        self._scenario_dt = dt
        self._input_profile = inputs
        self._scenario_where = _caller_where()

    @staticmethod
    def _once(previous: Optional[tuple], what: str, call: str, where: Where) -> None:
        """A second declaration would silently replace the first: refuse it."""
        if previous is not None:
            prev = previous[-1]
            at = f" at line {prev.line}" if isinstance(prev, Where) and prev.line else ""
            raise ModelError(f"{what} already declared{at}; call {call} once", where)

    def __repr__(self) -> str:
        return f"Model({self.name!r}, n={len(self._states)})"


# ---------------------------------------------------------------------------------------------
# The validated, plain description


@dataclass(frozen=True)
class SensorSpec:
    """One validated sensor."""

    name: str
    h: sp.Matrix  # (m, 1)
    R: sp.Matrix  # (m, m), symmetric
    diagonal: bool  # R structurally diagonal: sequential scalar updates
    every: int
    angles: Tuple[bool, ...]
    gate: Optional[float]
    units: Tuple[Optional[str], ...]
    where: Where
    v: Tuple[sp.Symbol, ...] = ()  # noise symbols in h, in declaration order
    Rv: sp.Matrix = field(default_factory=lambda: sp.zeros(0, 0))  # their covariance (nv, nv)

    @property
    def m(self) -> int:
        return int(self.h.shape[0])

    @property
    def nv(self) -> int:
        return len(self.v)

    @property
    def h0(self) -> sp.Matrix:
        """h with every noise symbol at zero: the predicted measurement."""
        return self.h.xreplace({s: sp.S.Zero for s in self.v}) if self.v else self.h


@dataclass(frozen=True)
class NoiseSymbol:
    """One declared noise symbol: where it enters (``"process"`` or a sensor's name) and, for
    the noise of a measured input, that input's name (then ``u_true = u_meas - symbol``)."""

    name: str
    symbol: sp.Symbol
    enters: str
    input: Optional[str]
    where: Optional[Where]


@dataclass(frozen=True)
class ModelSpec:
    """A validated model: what every later stage consumes."""

    name: str
    source: str
    states: Tuple[Variable, ...]
    inputs: Tuple[Variable, ...]
    params: Tuple[Param, ...]
    dt: sp.Symbol
    f: sp.Matrix  # (n, 1) discrete map x[k+1] = f(x, u, dt)
    continuous: Optional[sp.Matrix]  # rates when declared with dynamics(), else None
    method: str  # "discrete", "rk4" or "euler"
    Q: sp.Matrix
    sensors: Tuple[SensorSpec, ...]
    x0: Tuple[float, ...]
    P0: Tuple[Tuple[float, ...], ...]
    scenario_dt: Optional[float]
    input_profile: Optional[Callable[[float], Sequence[float]]]
    where: Dict[str, Where] = field(default_factory=dict)
    #: the uniform prior box (lower, upper) of ``initial_uniform``; None for a Gaussian prior
    prior_box: Optional[Tuple[Tuple[float, ...], Tuple[float, ...]]] = None
    noise: Tuple[NoiseSymbol, ...] = ()  # every noise symbol, in declaration order
    Qw: sp.Matrix = field(default_factory=lambda: sp.zeros(0, 0))  # covariance of w_syms (nw, nw)
    #: absolute paths of the user's own Python files the model file imported (not the standard
    #: library, not installed packages, not estgen): what a build must watch besides the model
    local_imports: Tuple[str, ...] = ()
    #: products computed once per spec (derivations, lambdified functions); see :meth:`derived`.
    #: Not copied by dataclasses.replace (init=False), so a changed copy derives afresh.
    memo: Dict[str, Any] = field(default_factory=dict, init=False, compare=False, repr=False)

    @property
    def n(self) -> int:
        """Entries of the state vector x (four per attitude)."""
        return len(self.states)

    @property
    def attitudes(self) -> Tuple[int, ...]:
        """Index in x of the w entry of each attitude (its four entries are consecutive)."""
        return tuple(i for i, s in enumerate(self.states) if s.attitude is not None and s.name.endswith("_w")
                     and i + 3 < len(self.states) and self.states[i + 3].attitude == s.attitude)

    @property
    def ne(self) -> int:
        """The error (covariance) dimension: n minus one per attitude."""
        return self.n - len(self.attitudes)

    @property
    def error_names(self) -> Tuple[str, ...]:
        """Names of the covariance's components: each plain state, and ``<att>_rx``, ``_ry``,
        ``_rz`` (rad, rotation vector, body frame) for an attitude."""
        out: List[str] = []
        for s in self.states:
            if s.attitude is None:
                out.append(s.name)
            elif not s.name.endswith("_w"):
                out.append(f"{s.attitude}_r{s.name[-1]}")
        return tuple(out)

    def error_blocks(self) -> List[Tuple[str, int, int]]:
        """The state description, in order: ("real", x index, error index) for a plain state and
        ("attitude", x index of w, error index of the rotation vector's x) for an attitude."""
        out: List[Tuple[str, int, int]] = []
        e = 0
        att = set(self.attitudes)
        for i, s in enumerate(self.states):
            if s.attitude is None:
                out.append(("real", i, e))
                e += 1
            elif i in att:
                out.append(("attitude", i, e))
                e += 3
        return out

    @property
    def w_syms(self) -> List[sp.Symbol]:
        """The noise symbols in f (x[k+1] = f(x, u, w, dt)), in declaration order."""
        return [v.symbol for v in self.noise if v.enters == "process"]

    @property
    def nw(self) -> int:
        return len(self.w_syms)

    @property
    def f0(self) -> sp.Matrix:
        """f with every noise symbol at zero: the predicted mean's map."""
        w = self.w_syms
        return self.f.xreplace({s: sp.S.Zero for s in w}) if w else self.f

    @property
    def nu(self) -> int:
        return len(self.inputs)

    @property
    def x_syms(self) -> List[sp.Symbol]:
        return [s.symbol for s in self.states]

    @property
    def u_syms(self) -> List[sp.Symbol]:
        return [s.symbol for s in self.inputs]

    @property
    def p_syms(self) -> List[sp.Symbol]:
        return [p.symbol for p in self.params]

    @property
    def angle_states(self) -> Tuple[bool, ...]:
        return tuple(s.angle for s in self.states)

    def param_defaults(self) -> Dict[str, float]:
        return {p.name: p.default for p in self.params}

    def sensor(self, name: str) -> SensorSpec:
        for s in self.sensors:
            if s.name == name:
                return s
        raise KeyError(f"model {self.name!r} has no sensor {name!r}; it has {[s.name for s in self.sensors]}")

    def default_subs(self) -> Dict[sp.Symbol, float]:
        return {p.symbol: p.default for p in self.params}

    def derived(self, key: str, make: Callable[[], Any]) -> Any:
        """``make()``, computed once per spec and kept with it (a spec is immutable)."""
        if key not in self.memo:
            self.memo[key] = make()
        return self.memo[key]


# ---------------------------------------------------------------------------------------------
# Loading


def load_model(path: Union[str, os.PathLike]) -> ModelSpec:
    """Run a model file and return its validated :class:`ModelSpec`.

    Raises :class:`ModelError` (file, line, what to fix) for any problem in the file.
    """
    path = os.fspath(path)
    # Every message names a line (contract: the path as given, then ':LINE:'); a problem with
    # the file as a whole is reported at its first line.
    if not os.path.isfile(path):
        raise ModelError("model file not found", Where(path, 1))
    try:
        with open(path, "rb") as fb:
            raw = fb.read()
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise ModelError(f"the model file is not UTF-8 text (byte {err.start}); save it as UTF-8",
                         Where(path, raw.count(b"\n", 0, err.start) + 1)) from None
    except OSError as err:
        raise ModelError(f"cannot read the model file: {err.strerror or err}", Where(path, 1)) from None
    try:
        code = compile(text, path, "exec")
    except SyntaxError as err:
        raise ModelError(f"syntax error: {err.msg}", Where(path, err.lineno or 1)) from None
    except ValueError as err:  # e.g. NUL bytes in the source
        raise ModelError(f"the model file cannot be compiled: {_short(err)}", Where(path, 1)) from None
    namespace: Dict[str, Any] = {"__name__": "estgen_model", "__file__": os.path.abspath(path)}
    model_dir = os.path.dirname(os.path.abspath(path))
    sys.path.insert(0, model_dir)
    before = set(sys.modules)
    try:
        exec(code, namespace)
    except ModelError as err:
        raise err from None
    except (Exception, SystemExit) as err:  # the user's own code failed: show where
        raise ModelError(f"the model file raised {type(err).__name__}: {_short(err)}; fix the line shown",
                         _user_frame(err, path)) from None
    finally:
        if sys.path and sys.path[0] == model_dir:
            sys.path.pop(0)
    model = namespace.get("model")
    if model is None:  # reported at the file's last line, where the declaration belongs
        raise ModelError("no variable named 'model'; end the file with model = Model(\"name\") and its declarations",
                         Where(path, max(1, len(text.rstrip().splitlines()))))
    if not isinstance(model, Model):
        kind = type(model).__name__
        raise ModelError(f"'model' is {'an' if kind[0] in 'aeiou' else 'a'} {kind}, not an estgen.Model; "
                         f"assign model = Model(\"name\") and declare on it", Where(path, _assigned_line(text, "model")))
    model.source = path
    spec = validate(model)
    local = _local_files(sys.modules[name] for name in set(sys.modules) - before)
    return dataclasses.replace(spec, local_imports=local) if local else spec


def _installed_roots() -> Tuple[str, ...]:
    """Folders whose Python files are not the user's: the standard library, site-packages
    (system, virtual environment, user) and estgen itself."""
    import site
    import sysconfig

    roots = {_PKG_DIR}
    for key in ("stdlib", "platstdlib", "purelib", "platlib"):
        p = sysconfig.get_paths().get(key)
        if p:
            roots.add(p)
    try:
        roots.update(site.getsitepackages())
    except AttributeError:  # some virtualenv layouts
        pass
    user = getattr(site, "getusersitepackages", lambda: None)()
    if user:
        roots.add(user)
    return tuple(os.path.realpath(r) + os.sep for r in roots)


def _local_files(modules: Iterable[Any]) -> Tuple[str, ...]:
    """Files of the ``modules`` that are the user's own code (see :func:`_installed_roots`)."""
    roots = _installed_roots()
    out = set()
    for mod in modules:
        f = getattr(mod, "__file__", None)
        if not f or not os.path.isfile(f):
            continue
        real = os.path.realpath(f)
        if not real.startswith(roots):
            out.add(os.path.abspath(f))
    return tuple(sorted(out))


def _short(err: BaseException, limit: int = 160) -> str:
    """The first line of an exception's text, cut to ``limit`` characters (messages stay short)."""
    text = str(err).strip().splitlines()
    line = text[0] if text else "(no message)"
    return line if len(line) <= limit else line[: limit - 3] + "..."


def _assigned_line(text: str, name: str) -> int:
    """The last line of a module's source that assigns ``name`` (1 when none is found)."""
    import ast

    lines = [node.lineno for node in ast.walk(ast.parse(text))
             if isinstance(node, ast.Name) and node.id == name and isinstance(node.ctx, ast.Store)]
    return max(lines, default=1)


def _user_frame(err: BaseException, path: str) -> Where:
    """The deepest traceback entry in the model file itself (its first line when the error
    came from outside it, e.g. an import of a missing module's dependency)."""
    best = Where(path, 1)
    ap = os.path.abspath(path)
    for fs in traceback.extract_tb(err.__traceback__):
        if os.path.abspath(fs.filename) == ap:
            best = Where(path, fs.lineno)
    return best


def as_spec(m: Union[ModelSpec, Model, str, os.PathLike]) -> ModelSpec:
    """Accept a spec, a :class:`Model` built in Python, or a path to a model file."""
    if isinstance(m, ModelSpec):
        return m
    if isinstance(m, Model):
        return validate(m)
    return load_model(m)


# ---------------------------------------------------------------------------------------------
# Validation


def _check_symbol_name(name: str, what: str, where: Optional[Where]) -> None:
    """States, inputs and parameters become variables beside math calls in C and numpy."""
    if name in _RESERVED_MATH:
        raise ModelError(f"{what} name {name!r} is the name of a math function or constant the generated code "
                         f"uses; rename it (e.g. {name}_)", where)


def _check_ident(name: Any, what: str, where: Optional[Where]) -> str:
    if not isinstance(name, str) or not _IDENT.match(name):
        raise ModelError(
            f"{what} name {name!r} is not a safe C identifier; use letters, digits and '_', starting with a letter",
            where,
        )
    if name in _C_KEYWORDS or name in _C_MACROS or _MACRO_LIKE.match(name):
        raise ModelError(f"{what} name {name!r} clashes with a C keyword or standard macro; rename it", where)
    if len(name) > 40:
        raise ModelError(f"{what} name {name!r} is longer than 40 characters; shorten it", where)
    return name


def _to_float(v: Any, what: str, where: Optional[Where]) -> float:
    try:
        if isinstance(v, sp.Basic):
            if v.free_symbols:
                names = ", ".join(sorted(str(s) for s in v.free_symbols))
                raise ModelError(f"{what} must be a number, got {v} (uses {names}); give the value itself", where)
            val = float(v)
        elif isinstance(v, (bool, np.bool_, str, bytes)):
            raise TypeError  # float("1.5") would accept a string: a number is asked for
        else:
            val = float(v)
    except (TypeError, ValueError):
        raise ModelError(f"{what} must be a number, got {v!r}", where) from None
    if not math.isfinite(val):
        raise ModelError(f"{what} is not finite ({val}); give a finite number", where)
    return val


def _float_list(obj: Any, what: str, where: Where) -> List[float]:
    """A list of finite numbers (for bounds and vectors given as plain numbers)."""
    try:
        items = list(obj)
    except TypeError:
        raise ModelError(f"{what} must be a list of numbers, one per state", where) from None
    return [_to_float(v, f"{what}[{i}]", where) for i, v in enumerate(items)]


def _as_column(obj: Any, what: str, where: Where) -> sp.Matrix:
    try:
        if isinstance(obj, (sp.MatrixBase, np.ndarray)):
            mat = sp.Matrix(obj)
            if mat.shape[1] != 1 and mat.shape[0] == 1:
                mat = mat.T
        elif isinstance(obj, (list, tuple)):
            if len(obj) == 0:
                raise ModelError(f"{what} is empty; give at least one expression", where)
            items = [sp.sympify(e) for e in obj]
            for e in items:
                if isinstance(e, sp.Basic) and not isinstance(e, sp.Expr):
                    raise ModelError(f"{what} holds {e}, a condition, not a value; "
                                     f"use sp.Piecewise((a, cond), (b, True)) for a choice", where)
            mat = sp.Matrix(items)
        elif isinstance(obj, sp.Basic):
            mat = sp.Matrix([obj])
        else:
            raise TypeError(type(obj).__name__)
    except (TypeError, sp.SympifyError, ValueError) as err:
        raise ModelError(f"{what} must be a list of sympy expressions ({err})", where) from None
    if mat.shape[1] != 1:
        raise ModelError(f"{what} must be a vector, got a {mat.shape[0]}x{mat.shape[1]} matrix", where)
    return mat


def _as_square(obj: Any, size: int, what: str, where: Where) -> Tuple[sp.Matrix, bool]:
    """A list means a diagonal; a matrix must be size x size. Returns (matrix, given_as_list)."""
    try:
        if isinstance(obj, sp.MatrixBase) or isinstance(obj, np.ndarray):
            mat = sp.Matrix(obj)
            as_list = False
            if mat.shape[1] == 1 and size != 1:
                mat, as_list = sp.diag(*list(mat)), True
        elif isinstance(obj, (list, tuple)):
            if obj and isinstance(obj[0], (list, tuple)):
                mat, as_list = sp.Matrix([[sp.sympify(e) for e in row] for row in obj]), False
            else:
                mat, as_list = sp.diag(*[sp.sympify(e) for e in obj]), True
                if len(obj) == 0:
                    mat = sp.zeros(0, 0)
        elif isinstance(obj, (int, float, sp.Basic)) and size == 1:
            mat, as_list = sp.Matrix([[sp.sympify(obj)]]), True
        else:
            raise TypeError(type(obj).__name__)
    except (TypeError, sp.SympifyError, ValueError) as err:
        raise ModelError(f"{what} must be a {size}x{size} matrix or a list of {size} variances ({err})", where) from None
    if mat.shape != (size, size):
        raise ModelError(f"{what} must be {size}x{size}, got {mat.shape[0]}x{mat.shape[1]}; "
                         f"give a {size}x{size} matrix or a list of {size} variances", where)
    return mat, as_list


def _check_symbols(expr_mat: sp.Matrix, allowed: set, what: str, where: Where, hint: str,
                   kinds: Optional[Dict[sp.Symbol, str]] = None) -> None:
    """Every free symbol must be in ``allowed``; ``kinds`` names what a declared but
    disallowed symbol is (an input in h, a state in Q), for a clearer message."""
    used = set()
    for e in expr_mat:
        if not isinstance(e, sp.Basic):
            raise ModelError(f"{what} holds {e!r}, which is not a sympy expression", where)
        if not isinstance(e, sp.Expr):
            raise ModelError(f"{what} holds {e}, a condition, not a value; "
                             f"use sp.Piecewise((a, cond), (b, True)) for a choice", where)
        undef = sorted(str(a.func) for a in e.atoms(AppliedUndef))
        if undef:
            raise ModelError(f"{what} calls {undef[0]}(), an undefined sympy Function; "
                             f"write it out as an expression", where)
        if e.has(sp.Derivative, sp.Integral):
            raise ModelError(f"{what} holds an unevaluated Derivative or Integral; call .doit() on it", where)
        used |= e.free_symbols
    bad = sorted((s for s in used if s not in allowed), key=lambda s: str(s))
    if bad:
        kinds = kinds or {}
        known = [s for s in bad if s in kinds]
        if known:
            s0 = known[0]
            raise ModelError(f"{what} uses {kinds[s0]} {str(s0)!r}, which it may not; {hint}", where)
        names = ", ".join(repr(str(s)) for s in bad)
        raise ModelError(f"{what} uses {names}, never declared; {hint}", where)
    for e in expr_mat:
        if e.has(sp.zoo, sp.oo, -sp.oo, sp.nan):
            raise ModelError(f"{what} contains an infinite or undefined value ({e}); fix the expression", where)


def _numeric(mat: sp.Matrix, subs: Dict[sp.Symbol, float], what: str, where: Where) -> np.ndarray:
    try:
        arr = np.array(mat.subs(subs).evalf(), dtype=float)
    except (TypeError, ValueError):
        raise ModelError(f"{what} does not evaluate to numbers at the parameter defaults", where) from None
    if not np.all(np.isfinite(arr)):
        raise ModelError(f"{what} is not finite at the parameter defaults", where)
    return arr


def _check_psd(arr: np.ndarray, what: str, where: Where, strict: bool) -> None:
    if arr.size == 0:
        return
    scale = max(1.0, float(np.max(np.abs(arr))))
    if not np.allclose(arr, arr.T, rtol=1e-12, atol=1e-14 * scale):
        raise ModelError(f"{what} is not symmetric; make entry (i, j) equal entry (j, i)", where)
    eig = np.linalg.eigvalsh(0.5 * (arr + arr.T))
    if strict and not (np.min(eig) > 0.0):
        raise ModelError(
            f"{what} is not positive definite (smallest eigenvalue {np.min(eig):.3g}); every variance must be > 0", where
        )
    if not strict and np.min(eig) < -1e-12 * max(1.0, float(np.max(eig))):
        raise ModelError(f"{what} is not positive semidefinite (smallest eigenvalue {np.min(eig):.3g}); "
                         f"variances must be >= 0 and each correlation within [-1, 1]", where)


def _discretize(rates: sp.Matrix, xs: List[sp.Symbol], dt: sp.Symbol, method: str) -> sp.Matrix:
    """One step of an explicit Runge-Kutta method, symbolically (common practice)."""
    if method == "euler":
        return sp.Matrix(xs) + dt * rates

    def at(xv: sp.Matrix) -> sp.Matrix:
        return rates.xreplace(dict(zip(xs, list(xv))))

    x = sp.Matrix(xs)
    k1 = rates
    k2 = at(x + dt / 2 * k1)
    k3 = at(x + dt / 2 * k2)
    k4 = at(x + dt * k3)
    return x + dt / 6 * (k1 + 2 * k2 + 2 * k3 + k4)


def _angle_mask(angles: Any, m: int, where: Where, sname: str) -> Tuple[bool, ...]:
    if angles is None:
        return (False,) * m
    if isinstance(angles, bool):
        return (angles,) * m
    try:
        items = list(angles)
    except TypeError:
        items = [angles]  # a single index, checked below
    if len(items) == m and all(isinstance(a, (bool, np.bool_)) for a in items):
        return tuple(bool(a) for a in items)
    mask = [False] * m
    for a in items:
        if not isinstance(a, (int, np.integer)) or isinstance(a, bool) or not 0 <= int(a) < m:
            raise ModelError(f"sensor {sname!r}: angles must be component indices in 0..{m - 1} or {m} booleans", where)
        mask[int(a)] = True
    return tuple(mask)


def noise_factor(cov: sp.Matrix) -> sp.Matrix:
    """A lower-triangular ``A`` with ``A A' = cov``, symbolically: the square roots of a diagonal
    covariance (zero variances allowed), else the Cholesky factor (validation has made a
    correlated covariance definite). The UKF's sigma points of noise symbols use it, in the C
    and in the reference alike."""
    k = cov.shape[0]
    if all(cov[i, j] == 0 for i in range(k) for j in range(k) if i != j):
        return sp.diag(*[sp.sqrt(cov[i, i]) for i in range(k)]) if k else sp.zeros(0, 0)
    return cov.cholesky(hermitian=False)


def _correlated(a: set, b: set, order: Sequence[sp.Symbol], cov: sp.Matrix) -> bool:
    """Some noise symbol reaching one component is correlated with one reaching the other."""
    idx = {s: i for i, s in enumerate(order)}
    return any(cov[idx[p], idx[q]] != 0 for p in a for q in b)


class _NoiseTable:
    """The declared noise symbols during validation: their covariances, the measured-input
    substitution and the one place each enters."""

    def __init__(self, model: Model, kinds: Dict[sp.Symbol, str], allowed: set, point: Dict[sp.Symbol, float]
                 ) -> None:
        self.decls = model._noise
        self.symbols: List[sp.Symbol] = []
        self._group: Dict[sp.Symbol, Tuple[int, int]] = {}
        self._covs: List[sp.Matrix] = []
        self._place: Dict[sp.Symbol, Tuple[str, str]] = {}
        # The user's noise symbols are real-valued Symbols, distinct from a state or parameter
        # of the same name (the contract's example has a state v and a noise symbol v); the spec
        # carries them renamed to "_<name>", which no declared name can be.
        self._internal: Dict[sp.Symbol, sp.Symbol] = {}
        names: Dict[str, Where] = {}
        for g, nd in enumerate(self.decls):
            if not nd.names:
                raise ModelError("noise() declares no names; give at least one, e.g. model.noise(\"wa\", cov=[...])",
                                 nd.where)
            for i, (nm, sym) in enumerate(zip(nd.names, nd.symbols)):
                _check_ident(nm, "noise symbol", nd.where)
                if nm in names:
                    raise ModelError(f"noise symbol {nm!r} is already declared at line {names[nm].line}; "
                                     f"noise symbol names must be unique", nd.where)
                names[nm] = nd.where
                internal = sp.Symbol("_" + nm)
                self._internal[sym] = internal
                kinds[sym] = kinds[internal] = "noise symbol"
                self.symbols.append(internal)
                self._group[internal] = (g, i)
        for nd in self.decls:
            k = len(nd.symbols)
            what = "inputs() noise" if nd.inputs else f"noise({' '.join(nd.names)!r}) cov"
            C, _ = _as_square(nd.cov, k, what, nd.where)
            _check_symbols(C, allowed, what, nd.where, "a noise covariance may use parameters and dt only", kinds)
            _check_printable(C, what, nd.where)
            if C != C.T:
                raise ModelError(f"{what} is not symmetric; make entry (i, j) equal entry (j, i)", nd.where)
            diag = all(C[i, j] == 0 for i in range(k) for j in range(k) if i != j)
            # a correlated covariance is factored by Cholesky in the UKF: it must be definite
            _check_psd(_numeric(C, point, what, nd.where), what, nd.where, strict=not diag)
            self._covs.append(C)

    def measured_inputs(self, f: sp.Matrix, what: str) -> sp.Matrix:
        """``f`` with each measured input u replaced by ``u - w`` (u_true = u_meas - w)."""
        used = set().union(*[e.free_symbols for e in f]) if f.shape[0] else set()
        sub: Dict[sp.Symbol, sp.Expr] = {}
        for nd in self.decls:
            for u, w in zip(nd.inputs or [], nd.symbols):
                if u not in used:
                    raise ModelError(f"measured input {str(u)!r} is not used in {what}, so its noise enters nowhere; "
                                     f"use the input or drop noise=", nd.where)
                sub[u] = u - self._internal[w]
        return self.rename(f.xreplace(sub) if sub else f)

    def rename(self, mat: sp.Matrix) -> sp.Matrix:
        """``mat`` with the user's noise symbols replaced by the spec's."""
        return mat.xreplace(self._internal) if self._internal else mat

    def enter(self, place: str, what: str, mat: sp.Matrix, where: Where) -> List[sp.Symbol]:
        """Record that the noise symbols in ``mat`` enter ``place``; returns them in declaration order."""
        used = set().union(*[e.free_symbols for e in mat])
        out = [s for s in self.symbols if s in used]
        for s in out:
            if s in self._place:
                raise ModelError(f"noise symbol {str(s)[1:]!r} enters both {self._place[s][1]} and {what}; a noise symbol "
                                 f"may enter one place only: declare one per place", where)
            self._place[s] = (place, what)
        return out

    def where(self, sym: sp.Symbol) -> Where:
        """The declaration of the spec's noise symbol ``sym``."""
        return self.decls[self._group[sym][0]].where

    def cov(self, syms: Sequence[sp.Symbol]) -> sp.Matrix:
        """The covariance of ``syms`` (zero between symbols of different declarations)."""
        def entry(a: sp.Symbol, b: sp.Symbol) -> sp.Expr:
            (ga, ia), (gb, ib) = self._group[a], self._group[b]
            return self._covs[ga][ia, ib] if ga == gb else sp.S.Zero
        return sp.Matrix(len(syms), len(syms), lambda i, j: entry(syms[i], syms[j]))

    def finish(self) -> Tuple[NoiseSymbol, ...]:
        """Every symbol used once, no correlation between places; the spec's records."""
        out: List[NoiseSymbol] = []
        for g, nd in enumerate(self.decls):
            for i, (nm, usym) in enumerate(zip(nd.names, nd.symbols)):
                sym = self._internal[usym]
                if sym not in self._place:
                    raise ModelError(f"noise symbol {nm!r} is used nowhere; write it into process() or one sensor's h, "
                                     f"or remove it", nd.where)
                for j in range(i):
                    a, b = self._place[self._internal[nd.symbols[j]]], self._place[sym]
                    if a[0] != b[0] and self._covs[g][i, j] != 0:
                        raise ModelError(f"noise symbols {nd.names[j]!r} and {nm!r} are correlated but enter different "
                                         f"places ({a[1]}, {b[1]}); make them independent or use them in one place",
                                         nd.where)
                inp = str(nd.inputs[i]) if nd.inputs else None
                out.append(NoiseSymbol(nm, sym, self._place[sym][0], inp, nd.where))
        return tuple(out)


def validate(model: Model) -> ModelSpec:
    """Check a :class:`Model` and return the plain :class:`ModelSpec`.

    Raises :class:`ModelError` naming the file and line of the offending declaration.
    """
    mw = model._where
    src = model.source or mw.file
    _check_ident(model.name, "model", mw)
    if len(model.name) > 24:
        raise ModelError(f"model name {model.name!r} is longer than 24 characters; shorten it (it prefixes every C name)", mw)

    if not model._states:
        raise ModelError("the model declares no states; add model.states(\"x1 x2 ...\")", mw)

    seen: Dict[str, Tuple[str, Optional[Where]]] = {"dt": ("the sample time", None)}
    params: List[Param] = []
    for kind, items in (("state", model._states), ("input", model._inputs), ("parameter", model._params)):
        for v in items:
            _check_ident(v.name, kind, v.where)
            _check_symbol_name(v.name, kind, v.where)
            if v.name in seen:
                other = seen[v.name][0]
                raise ModelError(f"{kind} name {v.name!r} is already used by {other}; names must be unique", v.where)
            seen[v.name] = (f"a {kind}", v.where)
            if kind == "parameter":
                params.append(Param(v.name, v.symbol, _to_float(v.default, f"default of parameter {v.name!r}", v.where),
                                    v.unit, v.where))

    xs = [v.symbol for v in model._states]
    us = [v.symbol for v in model._inputs]
    ps = [p.symbol for p in params]
    n = len(xs)
    dt = model._dt
    subs = {p.symbol: p.default for p in params}
    kinds: Dict[sp.Symbol, str] = {dt: "the sample time"}
    kinds.update({s: "state" for s in xs})
    kinds.update({s: "input" for s in us})
    kinds.update({s: "parameter" for s in ps})
    sim_dt = _to_float(model._scenario_dt, "scenario dt", model._scenario_where) if model._scenario_dt is not None else None
    noise = _NoiseTable(model, kinds, set(ps) | {dt}, {**subs, dt: sim_dt or 0.01})
    nset = set(noise.symbols)

    # process
    if model._process is None:
        raise ModelError("no dynamics; add model.process([...]) (discrete) or model.dynamics([...]) (continuous)", mw)
    kind, fexpr, method, pw = model._process
    what = "process" if kind == "discrete" else "dynamics"
    fcol = noise.measured_inputs(_as_column(fexpr, f"{what}()", pw), f"{what}()")
    if fcol.shape[0] != n:
        raise ModelError(f"{what}() has {fcol.shape[0]} entries but the model has {n} states; give one per state", pw)
    allowed_f = set(xs) | set(us) | set(ps) | {dt} | nset
    _check_symbols(fcol, allowed_f, f"{what}()", pw, "declare it with model.states(), model.inputs() or model.param()",
                   kinds)
    _check_printable(fcol, f"{what}()", pw)
    continuous = None
    if kind == "continuous":
        if method not in ("rk4", "euler"):
            raise ModelError(f"dynamics(method={method!r}) is not known; use \"rk4\" or \"euler\"", pw)
        if dt in set().union(*[e.free_symbols for e in fcol]):
            raise ModelError("dynamics() gives rates dx/dt, which must not use dt; use model.process() for a discrete map", pw)
        continuous = fcol
        fcol = _discretize(fcol, xs, dt, method)
    else:
        method = "discrete"
    w_syms = noise.enter("process", f"{what}()", fcol, pw)

    # Q
    if model._Q is None:
        if not w_syms:
            raise ModelError("no process noise; add model.process_noise(Q) or noise symbols in process()", mw)
    att_idx = [i for i, v in enumerate(model._states) if v.attitude is not None and v.name.endswith("_w")]
    ne = n - len(att_idx)
    edim = f" (the error dimension: {n} states minus one per attitude)" if att_idx else ""
    if model._Q is None:
        Q, qw = sp.zeros(ne, ne), mw
    else:
        Qraw, qw = model._Q
        Q, _ = _as_square(Qraw, ne, "process_noise()" + edim, qw)
        _check_symbols(Q, set(ps) | {dt}, "process_noise()", qw, "Q may use parameters and dt only", kinds)
        _check_printable(Q, "process_noise()", qw)
        if Q != Q.T:
            raise ModelError("process_noise() is not symmetric; make entry (i, j) equal entry (j, i)", qw)
        qnum = _numeric(Q, {**subs, dt: sim_dt or 0.01}, "process_noise()", qw)
        _check_psd(qnum, "process_noise() Q", qw, strict=False)

    # sensors
    if not model._sensors:
        raise ModelError("the model declares no sensor; add model.sensor(\"name\", [h...], noise=[...])", mw)
    sensors: List[SensorSpec] = []
    for sd in model._sensors:
        _check_ident(sd.name, "sensor", sd.where)
        if any(s.name == sd.name for s in sensors):
            raise ModelError(f"sensor {sd.name!r} is declared twice; sensor names must be unique", sd.where)
        h = noise.rename(_as_column(sd.h, f"sensor {sd.name!r} h", sd.where))
        m = h.shape[0]
        if m == 0:
            raise ModelError(f"sensor {sd.name!r} measures nothing; give at least one expression", sd.where)
        _check_symbols(h, set(xs) | set(ps) | nset, f"sensor {sd.name!r} h", sd.where,
                       "a measurement may use states and parameters only, plus noise symbols", kinds)
        v_syms = noise.enter(sd.name, f"sensor {sd.name!r} h", h, sd.where)
        if sd.noise is None:
            if not v_syms:
                raise ModelError(f"sensor {sd.name!r} has no noise; give noise=[...] or write a noise symbol "
                                 f"(model.noise) into its h", sd.where)
            R = sp.zeros(m, m)
        else:
            R, _ = _as_square(sd.noise, m, f"sensor {sd.name!r} noise", sd.where)
        _check_symbols(R, set(ps), f"sensor {sd.name!r} noise", sd.where, "R may use parameters only", kinds)
        _check_printable(h, f"sensor {sd.name!r} h", sd.where)
        _check_printable(R, f"sensor {sd.name!r} noise", sd.where)
        if R != R.T:
            raise ModelError(f"sensor {sd.name!r} noise is not symmetric; make entry (i, j) equal entry (j, i)", sd.where)
        rnum = _numeric(R, subs, f"sensor {sd.name!r} noise", sd.where)
        _check_psd(rnum, f"sensor {sd.name!r} noise R", sd.where, strict=not v_syms)
        Rv = noise.cov(v_syms)
        if dt in Rv.free_symbols:
            raise ModelError(f"the noise symbols of sensor {sd.name!r} have a covariance that uses dt, which an update "
                             f"does not have; give them a covariance of parameters and numbers", noise.where(v_syms[0]))
        reach = [h[i].free_symbols & set(v_syms) for i in range(m)]
        for i in range(m):
            if not reach[i] and rnum[i, i] <= 0.0:
                raise ModelError(f"sensor {sd.name!r} component {i} has no noise: no noise symbol reaches it and "
                                 f"its noise= variance is 0; give it a variance or a noise symbol", sd.where)
        diagonal = all(R[i, j] == 0 and not _correlated(reach[i], reach[j], v_syms, Rv)
                       for i in range(m) for j in range(m) if i != j)
        every = sd.every
        if isinstance(every, bool) or not isinstance(every, (int, np.integer)) or every < 1:
            raise ModelError(f"sensor {sd.name!r}: every must be a whole number >= 1, got {every!r}", sd.where)
        gate = sd.gate
        if gate is not None:
            gate = _to_float(gate, f"sensor {sd.name!r} gate", sd.where)
            if not 0.0 < gate < 1.0:
                raise ModelError(f"sensor {sd.name!r}: gate is a probability strictly between 0 and 1, got {gate}", sd.where)
        try:
            units = tuple(_split_units(sd.units, [f"z[{k}]" for k in range(m)]))
        except ModelError as err:
            raise ModelError(f"sensor {sd.name!r}: {err.message}", sd.where) from None
        sensors.append(SensorSpec(sd.name, h, R, diagonal, int(every), _angle_mask(sd.angles, m, sd.where, sd.name),
                                  gate, units, sd.where, tuple(v_syms), Rv))
    noise_specs = noise.finish()

    # initial
    if model._initial is None:
        raise ModelError("no initial state; add model.initial(x0, P0) or model.initial_uniform(lower, upper)", mw)
    x0raw, P0raw, iw = model._initial
    if model._box is not None and att_idx:
        raise ModelError(f"initial_uniform() cannot describe attitude {model._states[att_idx[0]].attitude!r} (a box of "
                         f"quaternions is not a distribution of rotations); use model.initial(x0, P0) with P0 of "
                         f"the error dimension", iw)
    try:
        x0l = list(x0raw)
    except TypeError:
        raise ModelError("initial() x0 must be a list of numbers, one per state", iw) from None
    if len(x0l) != n:
        raise ModelError(f"initial() x0 has {len(x0l)} entries but the model has {n} states; give one per state", iw)
    x0 = tuple(_to_float(v, f"initial() x0[{i}]", iw) for i, v in enumerate(x0l))
    for i in att_idx:
        norm = math.sqrt(sum(v * v for v in x0[i:i + 4]))
        if abs(norm - 1.0) > 1e-6:
            raise ModelError(f"initial() x0[{i}:{i + 4}] is attitude {model._states[i].attitude!r} with norm "
                             f"{norm:.6g}; give a unit quaternion (w, x, y, z)", iw)
    # x0 as every filter starts from it: the C's init prints these numbers and the references
    # read them, so both begin at a unit quaternion and at angles in (-pi, pi]
    x0l = [wrap_angle(v) if st.angle else v for v, st in zip(x0, model._states)]
    for i in att_idx:
        norm = math.sqrt(sum(v * v for v in x0l[i:i + 4]))
        x0l[i:i + 4] = [v / norm for v in x0l[i:i + 4]]
    x0 = tuple(x0l)
    P0m, _ = _as_square(P0raw, ne, "initial() P0" + edim, iw)
    if any(e.free_symbols for e in P0m):
        raise ModelError("initial() P0 must hold numbers, not symbols", iw)
    if any(e.has(sp.zoo, sp.oo, -sp.oo, sp.nan) for e in P0m):
        raise ModelError("initial() P0 holds an infinite or undefined value; give finite variances", iw)
    P0n = _numeric(P0m, {}, "initial() P0", iw)
    _check_psd(P0n, "initial() P0", iw, strict=True)

    if model._input_profile is not None and not callable(model._input_profile):
        raise ModelError("scenario(inputs=...) must be a function of time t returning the input vector",
                         model._scenario_where)
    if sim_dt is not None and sim_dt <= 0:
        raise ModelError(f"scenario dt must be > 0, got {sim_dt}", model._scenario_where)
    u0 = [0.0] * len(us)
    profile = None
    if model._input_profile is not None:
        profile = _GuardedProfile(model._input_profile, src, model._scenario_where)
        u0 = _check_profile(profile, len(us), model._scenario_where)

    # f and h must evaluate to finite numbers at the defaults and x0 (catches 1/0 and log(0)
    # early), with the scenario's first input where there is one: zero may be outside its range.
    input_note = "the scenario's input at t = 0" if model._input_profile is not None else "zero input"
    point = {**subs, **dict(zip(xs, x0)), **dict(zip(us, u0)), dt: sim_dt or 0.01, **{v: 0.0 for v in nset}}
    for label, mat, w in [(what + "()", fcol, pw)] + [(f"sensor {s.name!r} h", s.h, s.where) for s in sensors]:
        try:
            val = np.array(mat.xreplace({k: sp.Float(v) for k, v in point.items()}).evalf(), dtype=complex)
        except (TypeError, ValueError):
            continue  # not numerically evaluable symbolically here; the filters check at run time
        if not np.all(np.isfinite(val)) or np.any(np.abs(val.imag) > 1e-9 * (1 + np.abs(val.real))):
            raise ModelError(f"{label} is not finite (or not real) at x0 with default parameters and {input_note}; "
                             f"check x0 and the expression's domain", w)

    _check_attitude_process(fcol, att_idx, model._states, point, what, pw)

    return ModelSpec(
        name=model.name,
        source=src,
        states=tuple(model._states),
        inputs=tuple(model._inputs),
        params=tuple(params),
        dt=dt,
        f=fcol,
        continuous=continuous,
        method=method,
        Q=Q,
        sensors=tuple(sensors),
        x0=x0,
        P0=tuple(tuple(float(v) for v in row) for row in P0n),
        scenario_dt=sim_dt,
        input_profile=profile,
        where={"model": mw, "process": pw, "Q": qw, "initial": iw},
        prior_box=model._box,
        noise=noise_specs,
        Qw=noise.cov(w_syms),
    )


def _check_attitude_process(fcol: sp.Matrix, att_idx: List[int], states: List[Variable],
                            point: Dict[sp.Symbol, float], what: str, where: Where) -> None:
    """The four entries of f for an attitude must form its next quaternion: a (near) unit
    quaternion at x0. A real-valued expression there (say q_w + dt*...) is almost always a
    model written for Euler angles; the filters would renormalize it silently."""
    for i in att_idx:
        try:
            val = np.array(sp.Matrix(fcol[i:i + 4]).xreplace({k: sp.Float(v) for k, v in point.items()}).evalf(),
                           dtype=float).ravel()
        except (TypeError, ValueError):
            continue
        norm = float(np.sqrt(np.sum(val * val)))
        if not np.isfinite(norm) or abs(norm - 1.0) > 1e-2:
            raise ModelError(f"{what} entries {i}..{i + 3} (attitude {states[i].attitude!r}) give a quaternion of "
                             f"norm {norm:.4g} at x0; write the next attitude as a unit quaternion, "
                             f"e.g. quat.mul(q, quat.exp([wx * dt, wy * dt, wz * dt]))", where)


def _printable(e: sp.Basic, printer: Any) -> bool:
    try:
        printer.doprint(e)
    except Exception:  # sympy raises its own print-method error, ValueError, ...
        return False
    return True


def _check_printable(mat: sp.Matrix, what: str, where: Optional[Where]) -> None:
    """Every function must have a C99 <math.h> form, or generation would fail later with a
    traceback. Names the innermost function that cannot be printed."""
    from sympy.printing.c import C99CodePrinter

    printer = C99CodePrinter()
    for i, e in enumerate(mat):
        for node in e.atoms(sp.Piecewise):
            if not any(c == sp.true for _, c in node.args):
                raise ModelError(f"{what} entry {i} has a Piecewise without a final (value, True) branch; "
                                 f"add one so every input has a value", where)
        if _printable(e, printer):
            continue
        bad = None
        for node in sp.postorder_traversal(e):
            if isinstance(node, sp.Function) or node.is_Function:
                if not _printable(node, printer):
                    bad = node
                    break
        name = type(bad).__name__ if bad is not None else "a construct"
        raise ModelError(f"{what} entry {i} uses {name}, which has no C form; "
                         f"write it with elementary functions (exp, log, sqrt, sin, atan2, ...)", where)


class _GuardedProfile:
    """The model's input profile ``t -> u``; an exception raised in it (at any t, in any stage
    that simulates) becomes a ModelError naming the model file's line, not a traceback."""

    def __init__(self, fn: Callable[[float], Sequence[float]], src: str, where: Optional[Where]) -> None:
        self.fn = fn
        self.src = src
        self.where = where

    def __call__(self, t: float) -> Sequence[float]:
        try:
            return self.fn(t)
        except ModelError:
            raise
        except Exception as err:
            at = _user_frame(err, self.src) if self.src else self.where
            raise ModelError(f"scenario inputs({t:g}) raised {type(err).__name__}: {_short(err)}; "
                             f"fix the input function", at if at is not None and at.line else self.where) from None


def _check_profile(profile: Callable[[float], Sequence[float]], nu: int, where: Optional[Where]) -> List[float]:
    """Call the input profile once at t = 0 so a broken one fails here rather than deep inside
    a simulation."""
    u0 = profile(0.0)
    try:
        vals = [float(v) for v in u0]
    except (TypeError, ValueError):
        raise ModelError(f"scenario inputs(t) must return a list of {nu} numbers, got {u0!r}", where) from None
    if len(vals) != nu:
        raise ModelError(f"scenario inputs(t) returns {len(vals)} values but the model has {nu} inputs; "
                         f"return one per input", where)
    if not all(math.isfinite(v) for v in vals):
        raise ModelError(f"scenario inputs(0) returns a non-finite value {vals}; return finite inputs", where)
    return vals


def _find_nondiff(expr: sp.Basic) -> Optional[str]:
    for node in sp.preorder_traversal(expr):
        if isinstance(node, NON_DIFFERENTIABLE):
            return type(node).__name__
    return None


def check_differentiable(spec: ModelSpec) -> None:
    """Refuse a model whose process or sensor functions are not differentiable (Min, Max,
    Abs, ...), as a filter that linearizes them (the EKF) must."""
    src = spec.continuous if spec.continuous is not None else spec.f
    what = "dynamics()" if spec.continuous is not None else "process()"
    for i, e in enumerate(src):
        fn = _find_nondiff(e)
        if fn:
            raise ModelError(
                f"{what} entry {i} ({spec.states[i].name}) uses {fn}, which the EKF cannot differentiate; "
                f"use --filter ukf for this model",
                spec.where.get("process"),
            )
    for s in spec.sensors:
        for i, e in enumerate(s.h):
            fn = _find_nondiff(e)
            if fn:
                raise ModelError(
                    f"sensor {s.name!r} component {i} uses {fn}, which the EKF cannot differentiate; "
                    f"use --filter ukf for this model",
                    s.where,
                )


def with_gates(spec: ModelSpec, gates: Optional[Dict[str, float]]) -> ModelSpec:
    """A copy of ``spec`` with chi-square gate probabilities set per sensor (overriding the model
    file's), as given to the generator by ``--gate SENSOR=P``."""
    if not gates:
        return spec
    names = {s.name for s in spec.sensors}
    for name, prob in gates.items():
        if name not in names:
            raise ModelError(f"--gate names sensor {name!r}, which the model does not have; sensors: {sorted(names)}")
        if not (isinstance(prob, (int, float)) and 0.0 < float(prob) < 1.0):
            raise ModelError(f"--gate {name}={prob}: the gate is a probability strictly between 0 and 1")
    sensors = tuple(dataclasses.replace(s, gate=float(gates[s.name])) if s.name in gates else s for s in spec.sensors)
    return dataclasses.replace(spec, sensors=sensors)
