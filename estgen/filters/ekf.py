"""The extended Kalman filter as a filter kind: derivation in :mod:`estgen.derive`, printing in
:func:`estgen.emit.generate_ekf`, template ``templates/ekf.c.j2``, reference
:class:`estgen.reference.ReferenceEKF`."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Mapping, Optional

from ..emit import Generated, generate_ekf
from ..model import ModelSpec, check_differentiable
from ..reference import ModelFunctions, ReferenceEKF
from .base import FilterKind, FilterOptions

if TYPE_CHECKING:
    from . import FilterSetup

__all__ = ["EKF", "EkfOptions"]


@dataclass(frozen=True)
class EkfOptions(FilterOptions):
    """The EKF has no options of its own."""


class EKF(FilterKind):
    name = "ekf"
    title = "extended Kalman filter"
    template = "ekf.c.j2"
    Options = EkfOptions
    attitudes = True

    def check_support(self, spec: ModelSpec) -> None:
        check_differentiable(spec)

    def generate(self, spec: ModelSpec, setup: "FilterSetup") -> Generated:
        return generate_ekf(spec, setup)

    def reference(self, spec: ModelSpec, options: FilterOptions, params: Optional[Mapping[str, float]] = None,
                  functions: Optional[ModelFunctions] = None) -> Any:
        return ReferenceEKF(spec, params=params, functions=functions)
