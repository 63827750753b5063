"""estgen: generate fixed-size, allocation-free C for nonlinear Kalman filters from a sympy model.

The public interface::

    import estgen
    m = estgen.load_model("model.py")                 # validated ModelSpec
    c = estgen.build(m, filter="ekf", precision="double")   # the generated C through cffi
    r = estgen.reference(m, filter="ekf")               # the numpy reference filter
"""

from __future__ import annotations

from typing import Any

from .errors import GenerationError, ModelError
from .model import Model, ModelSpec, load_model, validate
from .status import Status

__version__ = "0.1.0"

__all__ = [
    "Model",
    "ModelSpec",
    "ModelError",
    "GenerationError",
    "Status",
    "load_model",
    "validate",
    "build",
    "reference",
    "__version__",
]


def build(model: Any, filter: str = "ekf", precision: str = "double", **options: Any) -> Any:
    """Generate C for ``model``, compile it through cffi and return a filter object with the
    reference's interface (predict, update, x, P, set_state). See :mod:`estgen.build`."""
    from .build import build as _build

    return _build(model, filter=filter, precision=precision, **options)


def reference(model: Any, filter: str = "ekf", **options: Any) -> Any:
    """The plain numpy reference filter for ``model``. See :mod:`estgen.reference`."""
    from .reference import reference as _reference

    return _reference(model, filter=filter, **options)
