"""The unscented Kalman filter as a filter kind: derivation in :mod:`estgen.derive_ukf`,
printing in :func:`estgen.emit_ukf.generate_ukf`, template ``templates/ukf.c.j2``, reference
:class:`estgen.reference.ReferenceUKF`."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Mapping, Optional, cast

from ..derive_ukf import UkfWeights, check_values
from ..emit import Generated
from ..emit_ukf import generate_ukf
from ..model import ModelSpec
from ..reference import ModelFunctions, ReferenceUKF
from .base import FilterKind, FilterOptions, Flag

if TYPE_CHECKING:
    from . import FilterSetup

__all__ = ["UKF", "UkfOptions"]


@dataclass(frozen=True)
class UkfOptions(FilterOptions):
    """The scaled unscented transform's parameters (Julier 2002): sigma-point spread ``alpha``
    (> 0), prior-distribution term ``beta``, secondary scaling ``kappa`` with
    ``alpha^2 (n + kappa) > 0``."""

    alpha: float = 1.0
    beta: float = 2.0
    kappa: float = 0.0

    FLAGS = (
        Flag("alpha", float, "UKF: sigma-point spread alpha (default 1)"),
        Flag("beta", float, "UKF: prior-distribution parameter beta (default 2)"),
        Flag("kappa", float, "UKF: secondary scaling kappa (default 0)"),
    )

    def __post_init__(self) -> None:
        check_values(self.alpha, self.beta, self.kappa)

    def weights(self, n: int) -> UkfWeights:
        """The sigma-point weights for dimension ``n`` (validates ``n + lambda > 0``)."""
        return UkfWeights(n, float(self.alpha), float(self.beta), float(self.kappa))

    def check(self, spec: ModelSpec) -> None:
        self.weights(spec.ne)  # sigma points live in the error space (ne = n without attitudes)


class UKF(FilterKind):
    name = "ukf"
    title = "unscented Kalman filter"
    template = "ukf.c.j2"
    Options = UkfOptions
    attitudes = True

    def check_support(self, spec: ModelSpec) -> None:
        """The UKF evaluates f and h without derivatives: every valid model is supported."""

    def generate(self, spec: ModelSpec, setup: "FilterSetup") -> Generated:
        return generate_ukf(spec, setup, cast(UkfOptions, setup.options).weights(spec.ne))

    def reference(self, spec: ModelSpec, options: FilterOptions, params: Optional[Mapping[str, float]] = None,
                  functions: Optional[ModelFunctions] = None) -> Any:
        o = cast(UkfOptions, options)
        return ReferenceUKF(spec, alpha=o.alpha, beta=o.beta, kappa=o.kappa, params=params, functions=functions)
