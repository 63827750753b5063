"""The filter kinds, and the one registry every command and dispatch reads.

Adding a kind: write ``estgen/filters/<kind>.py`` (a :class:`~estgen.filters.base.FilterKind`
and its options dataclass), its template ``templates/<kind>.c.j2``, and add one line to
:data:`KINDS` below. Every ``--filter`` choice, every option flag, ``generate``, ``reference``,
``build``, ``verify``, ``simulate``, ``soak`` and ``report`` then know it.
"""

from __future__ import annotations

import argparse
from dataclasses import dataclass
from typing import Any, Dict, Mapping, Optional, Tuple

from ..emit import Generated
from ..errors import ModelError, UsageError
from ..model import ModelSpec, as_spec, with_gates
from ..reference import ModelFunctions
from .base import (COMMIT_CHECKS, DEFAULT_COMMIT_CHECK, DEFAULT_OPTIMIZE, OPTIMIZE, CommonOptions, FilterKind,
                   FilterOptions, seed_value)
from .ekf import EKF
from .pf import PF
from .ukf import UKF

__all__ = ["KINDS", "get", "names", "check_filter_support", "generate", "reference", "add_arguments",
           "FilterSetup", "seed_value"]

#: every filter kind, by its ``--filter`` name (the order is the order of the help text)
KINDS: Dict[str, FilterKind] = {k.name: k for k in (EKF(), UKF(), PF())}


def names() -> Tuple[str, ...]:
    """The ``--filter`` values."""
    return tuple(KINDS)


def get(name: str) -> FilterKind:
    """The kind called ``name``; :class:`UsageError` for an unknown name."""
    try:
        return KINDS[name]
    except (KeyError, TypeError):
        raise UsageError(f"unknown filter {name!r}; use {' or '.join(repr(n) for n in KINDS)}") from None


def check_filter_support(spec: ModelSpec, filter: str) -> None:
    """Refuse a model the named filter cannot handle (ModelError) or an unknown filter (UsageError)."""
    kind = get(filter)
    if spec.attitudes and not kind.attitudes:
        others = " or ".join(f"--filter {k.name}" for k in KINDS.values() if k.attitudes)
        raise ModelError(f"the {kind.title} does not take attitude states (model {spec.name!r} declares "
                         f"{len(spec.attitudes)}); use {others}", spec.states[spec.attitudes[0]].where)
    kind.check_support(spec)


@dataclass(frozen=True)
class FilterSetup:
    """Everything that decides the filter's C: its kind, the common options and the kind's own.
    Every command builds one, so what is verified, simulated, soaked and reported is what
    ``generate`` ships."""

    kind: FilterKind
    common: CommonOptions
    options: FilterOptions

    @classmethod
    def of(cls, filter: str = "ekf", precision: str = "float", gates: Optional[Mapping[str, float]] = None,
           commit_check: str = DEFAULT_COMMIT_CHECK, optimize: str = DEFAULT_OPTIMIZE,
           **options: Any) -> "FilterSetup":
        """From keyword values as the Python API takes them (None means "the default")."""
        kind = get(filter)
        common = CommonOptions(precision, commit_check, tuple((gates or {}).items()), optimize)
        return cls(kind, common, kind.options(**options))

    @classmethod
    def from_args(cls, args: argparse.Namespace) -> "FilterSetup":
        """From the flags :func:`add_arguments` declared; a kind's flag given for another kind is
        a :class:`UsageError`."""
        kind = get(args.filter)
        values: Dict[str, Any] = {}
        for other in KINDS.values():
            for flag in other.Options.FLAGS:
                value = getattr(args, flag.field, None)
                if value is None:
                    continue
                if other is not kind:
                    raise UsageError(f"{flag.option} applies to --filter {other.name} only")
                values[flag.field] = value
        return cls(kind, CommonOptions.from_args(args), kind.options(**values))

    @property
    def name(self) -> str:
        return self.kind.name

    @property
    def precision(self) -> str:
        return self.common.precision

    def spec(self, model: Any) -> ModelSpec:
        """The model as this filter sees it (gates set), checked for support and options."""
        spec = with_gates(as_spec(model), self.common.gate_map)
        check_filter_support(spec, self.kind.name)
        self.options.check(spec)
        return spec

    def generate(self, model: Any) -> Generated:
        """The C files for ``model``."""
        return self.kind.generate(self.spec(model), self)

    def reference(self, model: Any, params: Optional[Mapping[str, float]] = None,
                  functions: Optional[ModelFunctions] = None) -> Any:
        """The numpy reference filter for ``model``."""
        return self.kind.reference(self.spec(model), self.options, params=params, functions=functions)

    def kwargs(self, runtime: bool = True) -> Dict[str, Any]:
        """The keyword form (``filter=``, ``precision=``, ``gates=``, ``commit_check=`` and the
        kind's options) that the Python API functions take. ``runtime=False`` leaves out the
        run-time fields (the particle filter's seed): the commands pass their own ``--seed``,
        which then seeds the filter's generator too."""
        opts = self.options.as_dict()
        if not runtime:
            opts = {k: v for k, v in opts.items() if k not in self.options.runtime()}
        return {"filter": self.kind.name, "precision": self.common.precision, "gates": self.common.gate_map,
                "commit_check": self.common.commit_check, "optimize": self.common.optimize, **opts}


def generate(spec: Any, filter: str = "ekf", precision: str = "float", gates: Optional[Mapping[str, float]] = None,
             commit_check: str = DEFAULT_COMMIT_CHECK, optimize: str = DEFAULT_OPTIMIZE, **options: Any) -> Generated:
    """Generate C for ``spec``: ``filter`` names a kind of :data:`KINDS`, ``options`` are that
    kind's (the UKF's alpha, beta, kappa). ``gates`` sets chi-square gate probabilities per
    sensor, overriding the model file's; ``commit_check`` is one of :data:`COMMIT_CHECKS`
    (default "subtractive"): what a new P must pass before commit; ``optimize`` is "speed"
    (default) or "size" (contract section 9)."""
    return FilterSetup.of(filter, precision, gates, commit_check, optimize, **options).generate(spec)


def reference(model: Any, filter: str = "ekf", *, params: Optional[Mapping[str, float]] = None,
              gates: Optional[Mapping[str, float]] = None, functions: Optional[ModelFunctions] = None,
              **options: Any) -> Any:
    """The numpy reference filter for ``model`` (a ModelSpec, a Model or a model file path),
    started at the model's x0 and P0. ``params`` overrides parameter defaults; ``gates`` sets
    chi-square gate probabilities per sensor, as for :func:`estgen.build`."""
    return FilterSetup.of(filter, "double", gates, **options).reference(model, params=params, functions=functions)


def add_arguments(parser: argparse.ArgumentParser, precision_default: str) -> None:
    """Declare ``--filter``, the common options and every kind's own flags on ``parser`` (each
    once); read them back with :meth:`FilterSetup.from_args`."""
    parser.add_argument("--filter", choices=names(), default="ekf",
                        help=f"filter kind: {', '.join(f'{k.name} ({k.title})' for k in KINDS.values())} "
                             "(default ekf)")
    CommonOptions.add_arguments(parser, precision_default)
    for kind in KINDS.values():
        for flag in kind.Options.FLAGS:
            parser.add_argument(flag.option, dest=flag.field, type=flag.type, default=None, metavar=flag.metavar,
                                help=flag.help)
