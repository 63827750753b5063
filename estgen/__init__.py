"""estgen: generate fixed-size, allocation-free C for nonlinear Kalman filters from a sympy model.

The public interface::

    import estgen
    m = estgen.load_model("model.py")                 # validated ModelSpec
    c = estgen.build(m, filter="ekf")                 # the generated C (float) through cffi
    r = estgen.reference(m, filter="ekf")               # the numpy reference filter
    g = estgen.generate(m, filter="ekf")                # the C text: g.files {name: text}
"""

from __future__ import annotations

from typing import Any

from .errors import BuildError, ModelError, ToolMissing, UsageError
from .model import Model, ModelSpec, load_model, validate
from .status import Status
from . import quat

# The submodules estgen.build and estgen.reference share their names with the functions below.
# Importing them first means the function definitions that follow win the package attribute.
from . import build as _build_module  # noqa: E402
from . import filters as _filters  # noqa: E402
from . import reference as _reference_module  # noqa: E402,F401  (imported for the note above)

from ._version import __version__  # noqa: E402

__all__ = [
    "Model",
    "ModelSpec",
    "ModelError",
    "UsageError",
    "ToolMissing",
    "BuildError",
    "Status",
    "quat",
    "load_model",
    "validate",
    "build",
    "reference",
    "generate",
    "__version__",
]


def build(model: Any, filter: str = "ekf", precision: str = "float", **options: Any) -> Any:
    """Generate C for ``model``, compile it through cffi and return a filter object with the
    reference's interface (predict, update, x, P, set_state). See :mod:`estgen.build`."""
    return _build_module.build(model, filter=filter, precision=precision, **options)


def reference(model: Any, filter: str = "ekf", **options: Any) -> Any:
    """The plain numpy reference filter for ``model``. See :func:`estgen.filters.reference`."""
    return _filters.reference(model, filter=filter, **options)


def generate(model: Any, filter: str = "ekf", precision: str = "float", **options: Any) -> Any:
    """The generated C for ``model`` (what ``estgen generate`` writes), without writing it: a
    :class:`~estgen.emit.Generated` whose ``files`` maps each file name to its text. Options as
    for the command (``gates``, ``commit_check``, the kind's own). See
    :func:`estgen.filters.generate`."""
    return _filters.generate(model, filter=filter, precision=precision, **options)
