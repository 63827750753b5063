"""The particle filter as a filter kind: printing in :func:`estgen.emit_pf.generate_pf`,
template ``templates/pf.c.j2``, reference :class:`estgen.pf.ReferencePF`; its options are
validated by :func:`estgen.pf.pf_options`."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Mapping, Optional, Sequence, cast

from ..emit import Generated
from ..emit_pf import generate_pf
from ..layout import Field
from ..model import ModelSpec
from ..pf import DEFAULT_PARTICLES, DEFAULT_SEED, PfOptions, ReferencePF, pf_options
from ..reference import ModelFunctions
from ..status import Status
from .base import FilterKind, FilterOptions, Flag

if TYPE_CHECKING:
    from . import FilterSetup

__all__ = ["PF", "PfKindOptions"]


@dataclass(frozen=True)
class PfKindOptions(FilterOptions):
    """Particle count, resampling threshold (a fraction of N for the effective sample size),
    the jitter after resampling (regularization kernel or roughening), and the random
    generator's seed."""

    particles: int = DEFAULT_PARTICLES
    resample_threshold: float = 0.5
    roughening: float = 0.0
    #: None: the kernel at its optimal bandwidth (1) unless roughening is given (then 0)
    regularization: Optional[float] = None
    #: run time, not generated: the seed the C's init_seed and the reference start from
    seed: int = field(default=DEFAULT_SEED, metadata={"runtime": True})

    FLAGS = (
        Flag("particles", int, f"PF: number of particles (default {DEFAULT_PARTICLES})", "N"),
        Flag("resample_threshold", float, "PF: resample when the effective sample size falls below this "
                                          "fraction of N (default 0.5)"),
        Flag("roughening", float, "PF: roughening constant K after resampling instead of the regularization "
                                  "kernel, 0 for none (default 0)"),
        Flag("regularization", float, "PF: bandwidth of the Gaussian kernel that jitters the particles at "
                                      "resampling, as a multiple of the optimal one; 0 turns it off (default 1, "
                                      "0 when --roughening is given)"),
    )

    def validated(self, spec: ModelSpec) -> PfOptions:
        """The compile-time options, checked against the model (particles > n, ...)."""
        return pf_options(spec.n, {"particles": self.particles, "resample_threshold": self.resample_threshold,
                                   "roughening": self.roughening, "regularization": self.regularization})

    def check(self, spec: ModelSpec) -> None:
        self.validated(spec)


class PF(FilterKind):
    name = "pf"
    title = "particle filter"
    template = "pf.c.j2"
    header_partial = "pf_header.j2"
    Options = PfKindOptions
    gaussian = False
    statuses = frozenset({Status.DEGENERATE})

    def extra_fields(self, spec: ModelSpec, setup: "FilterSetup") -> Sequence[Field]:
        N, n = cast(PfKindOptions, setup.options).particles, spec.n
        return (Field("part", "real", (N, n), "the particles"),
                Field("lw", "real", (N,), "log-weights: the largest is 0, a dropped particle's -inf"),
                Field("w", "real", (N,), "exp(lw): the weights, largest 1 (work storage inside calls)", gap=3),
                Field("rng", "uint32_t", (), "generator state, 1 .. 2^31-2", gap=18),
                Field("rng_has_spare", "uint32_t", (), "1 when rng_spare holds the second normal of a polar pair",
                      gap=8),
                Field("rng_spare", "real"))

    def check_support(self, spec: ModelSpec) -> None:
        """The particle filter evaluates f and h without derivatives: every model without
        attitude states is supported."""

    def generate(self, spec: ModelSpec, setup: "FilterSetup") -> Generated:
        return generate_pf(spec, setup, cast(PfKindOptions, setup.options).validated(spec))

    def reference(self, spec: ModelSpec, options: FilterOptions, params: Optional[Mapping[str, float]] = None,
                  functions: Optional[ModelFunctions] = None) -> Any:
        o = cast(PfKindOptions, options)
        return ReferencePF(spec, particles=o.particles, resample_threshold=o.resample_threshold,
                           roughening=o.roughening, regularization=o.regularization, seed=o.seed, params=params,
                           functions=functions)
