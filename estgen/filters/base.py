"""What every filter kind implements, and the options every command shares.

A filter kind (EKF, UKF, ...) is one :class:`FilterKind` object in the registry
(:mod:`estgen.filters`). Its own options are a frozen dataclass deriving from
:class:`FilterOptions`: it validates its values when built and declares each command-line flag
once (:attr:`FilterOptions.FLAGS`), so ``generate``, ``verify``, ``simulate``, ``soak`` and
``report`` accept exactly the same options and measure the C that ships.

The options all kinds share (precision, commit check, gates) are :class:`CommonOptions`.
"""

from __future__ import annotations

import abc
import argparse
import dataclasses
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, ClassVar, Dict, FrozenSet, Mapping, Optional, Sequence, Tuple, Type

from ..errors import UsageError
from ..layout import Field
from ..status import Status

if TYPE_CHECKING:  # annotations only: the kinds import the emitters, not this module
    from ..emit import Generated
    from . import FilterSetup
    from ..model import ModelSpec
    from ..reference import ModelFunctions

__all__ = ["Flag", "FilterOptions", "FilterKind", "CommonOptions", "PRECISIONS", "COMMIT_CHECKS", "DEFAULT_COMMIT_CHECK",
           "OPTIMIZE", "DEFAULT_OPTIMIZE", "seed_value"]

def seed_value(text: str) -> int:
    """The ``--seed`` of every command that simulates: a whole number >= 0 (numpy's generators
    take no negative seed), refused by argparse with exit 2 otherwise."""
    try:
        seed = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 0, got {text!r}") from None
    if seed < 0:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 0, got {seed}")
    return seed


#: the C floating types a filter is generated for
PRECISIONS: Tuple[str, ...] = ("float", "double")
#: what predict and update verify before they commit a new P (README, "Commit check";
#: docs/performance.md, "The commit rule"): "subtractive" (default) factorizes it after every call
#: that subtracts from it (every update, the UKF's predict) and after an EKF predict only when its
#: rounding certificate fails (derive.predict_certificate); "cholesky" factorizes after every
#: call; "diagonal" never (cheaper, less safe)
COMMIT_CHECKS: Tuple[str, ...] = ("subtractive", "cholesky", "diagonal")
DEFAULT_COMMIT_CHECK = "subtractive"
#: the code form (contract section 9, docs/performance.md "Speed and size"): "speed" keeps
#: straight-line code where it pays, "size" uses the compact forms (loops over constant tables,
#: shared static functions) wherever they exist
OPTIMIZE: Tuple[str, ...] = ("speed", "size")
DEFAULT_OPTIMIZE = "speed"


@dataclass(frozen=True)
class Flag:
    """One command-line flag that sets one field of a kind's options (``--<field>``, with
    underscores written as dashes)."""

    field: str
    type: Callable[[str], Any]
    help: str
    metavar: Optional[str] = None

    @property
    def option(self) -> str:
        return "--" + self.field.replace("_", "-")


@dataclass(frozen=True)
class FilterOptions:
    """Base of every kind's options: a frozen dataclass whose ``__post_init__`` validates the
    values (raising :class:`UsageError`) and whose ``FLAGS`` declare its command-line flags."""

    FLAGS: ClassVar[Tuple[Flag, ...]] = ()

    def check(self, spec: "ModelSpec") -> None:
        """Validation that needs the model (e.g. a spread that depends on the state count)."""

    def as_dict(self) -> Dict[str, Any]:
        return dataclasses.asdict(self)

    def changed(self) -> Dict[str, Any]:
        """The generated-code values that differ from the defaults (what the header's options
        line records); run-time fields are left out."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
                if getattr(self, f.name) != f.default and not f.metadata.get("runtime")}

    def runtime(self) -> Dict[str, Any]:
        """The fields marked ``metadata={"runtime": True}``: set on the compiled filter when it is
        built (e.g. a generator seed), not part of the generated C."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self) if f.metadata.get("runtime")}


class FilterKind(abc.ABC):
    """One kind of filter: how to check a model for it, generate its C and build its reference.

    Subclasses set ``name`` (the ``--filter`` value and the C prefix suffix), ``title`` (the
    header's first line says "<title> for the model ..."), ``template`` (the source template),
    ``Options`` (a :class:`FilterOptions` dataclass), ``header_partial`` (the template whose
    macros add the kind's own prose and functions to the shared header and cffi declarations;
    ``templates/kind_header.j2`` lists them, empty), ``attitudes`` (whether it filters
    models with attitude states) and ``gaussian`` (its state is a mean and covariance, so
    ``set_state`` reproduces another instance exactly; false for a particle cloud).
    """

    name: ClassVar[str]
    title: ClassVar[str]
    template: ClassVar[str]
    Options: ClassVar[Type[FilterOptions]]
    header_partial: ClassVar[str] = "kind_header.j2"
    attitudes: ClassVar[bool] = False
    gaussian: ClassVar[bool] = True
    #: the kind's own refusal codes (of status.KIND_STATUSES) its header lists
    statuses: ClassVar[FrozenSet[Status]] = frozenset()

    def options(self, **values: Any) -> FilterOptions:
        """This kind's options from keyword values (None means "the default"); unknown names
        and invalid values raise :class:`UsageError`."""
        known = {f.name for f in dataclasses.fields(self.Options)}
        unknown = sorted(set(values) - known)
        if unknown:
            takes = ", ".join(sorted(known)) if known else "none"
            raise UsageError(f"unknown {self.name.upper()} option(s) {unknown}; the {self.name.upper()} takes {takes}")
        return self.Options(**{k: v for k, v in values.items() if v is not None})

    def extra_fields(self, spec: "ModelSpec", setup: "FilterSetup") -> Sequence[Field]:
        """Struct members after x, P and the parameters (:class:`~estgen.layout.StructLayout`)."""
        return ()

    @abc.abstractmethod
    def check_support(self, spec: "ModelSpec") -> None:
        """Raise :class:`~estgen.errors.ModelError` for a model this kind cannot filter."""

    @abc.abstractmethod
    def generate(self, spec: "ModelSpec", setup: "FilterSetup") -> "Generated":
        """The C header and source for ``spec`` (gates set, support and options checked) as
        ``setup`` (this kind, the common options and this kind's options) asks."""

    @abc.abstractmethod
    def reference(self, spec: "ModelSpec", options: FilterOptions, params: Optional[Mapping[str, float]] = None,
                  functions: Optional["ModelFunctions"] = None) -> Any:
        """The numpy reference filter with the same interface as the compiled C."""


@dataclass(frozen=True)
class CommonOptions:
    """The options every filter kind takes: the C type, the check a new P passes before it is
    committed, and chi-square gate probabilities per sensor (overriding the model file's)."""

    precision: str = "float"
    commit_check: str = DEFAULT_COMMIT_CHECK
    gates: Tuple[Tuple[str, float], ...] = ()
    optimize: str = DEFAULT_OPTIMIZE

    def __post_init__(self) -> None:
        if self.precision not in PRECISIONS:
            raise UsageError(f"unknown precision {self.precision!r}; use 'float' or 'double'")
        if self.commit_check not in COMMIT_CHECKS:
            raise UsageError(f"unknown commit check {self.commit_check!r}; use one of {', '.join(COMMIT_CHECKS)}")
        if self.optimize not in OPTIMIZE:
            raise UsageError(f"unknown --optimize {self.optimize!r}; use one of {', '.join(OPTIMIZE)}")

    @property
    def gate_map(self) -> Dict[str, float]:
        return dict(self.gates)

    @staticmethod
    def add_arguments(parser: argparse.ArgumentParser, precision_default: str) -> None:
        parser.add_argument("--precision", choices=PRECISIONS, default=precision_default,
                            help=f"C floating type (default {precision_default})")
        parser.add_argument("--commit-check", choices=COMMIT_CHECKS, default=DEFAULT_COMMIT_CHECK,
                            help="what a new P must pass before a call commits it: a Cholesky factorization "
                                 "after every update, and after an EKF predict unless its rounding certificate "
                                 "holds (subtractive, default); after every call (cholesky); or a positive "
                                 "diagonal only (diagonal: cheaper, less safe)")
        parser.add_argument("--optimize", choices=OPTIMIZE, default=DEFAULT_OPTIMIZE,
                            help="trade instructions for flash like -O2/-Os: speed keeps straight-line code where "
                                 "it pays (default), size uses loops over constant tables and shared functions "
                                 "wherever they exist")
        parser.add_argument("--gate", action="append", default=[], metavar="SENSOR=P",
                            help="chi-square innovation gate for SENSOR with probability P, e.g. range1=0.997 "
                                 "(repeatable; overrides the model file)")

    @classmethod
    def from_args(cls, args: argparse.Namespace) -> "CommonOptions":
        gates = []
        for item in getattr(args, "gate", None) or []:
            name, sep, val = item.partition("=")
            try:
                prob = float(val)
            except ValueError:
                prob = float("nan")
            if not sep or not name or not 0.0 < prob < 1.0:
                raise UsageError(f"--gate {item!r}: write SENSOR=P with 0 < P < 1, e.g. --gate range1=0.997")
            gates.append((name, prob))
        return cls(args.precision, args.commit_check, tuple(gates), getattr(args, "optimize", DEFAULT_OPTIMIZE))
