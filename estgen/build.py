"""Stage 4: build and harness.

:func:`build` generates the C for a model, compiles it through cffi in API mode (the C compiler
sees the real header, so struct layout and prototypes are checked by the compiler, not assumed),
and returns a :class:`CFilter` with the same interface as the reference filters.

Build products are cached by a hash of everything that goes into them (sources, cdef, flags,
Python and cffi versions) under ``$ESTGEN_CACHE`` or ``~/.cache/estgen``; nothing is written
anywhere else.
"""

from __future__ import annotations

import contextlib
import hashlib
import importlib.util
import os
import shlex
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

from .emit import Generated
from .cross import WARNINGS
from .errors import BuildError, ToolMissing
from .filters import FilterSetup
from .layout import pack_upper
from .model import ModelSpec

__all__ = ["build", "compile_generated", "compiler_used", "CFilter", "cache_dir", "STRICT_FLAGS"]

#: the warning set of the contract; every generated file must compile clean under it
STRICT_FLAGS: List[str] = list(WARNINGS)


def cache_dir() -> str:
    """Where compiled harness modules are kept."""
    base = os.environ.get("ESTGEN_CACHE") or os.path.join(os.path.expanduser("~"), ".cache", "estgen")
    os.makedirs(base, exist_ok=True)
    return base


@dataclass
class _Compiled:
    ffi: Any
    lib: Any
    gen: Generated


def _module_hash(gen: Generated, cflags: Sequence[str], ldflags: Sequence[str]) -> str:
    import cffi

    h = hashlib.sha256()
    for part in (gen.header, gen.source, gen.cdef, " ".join(cflags), " ".join(ldflags), cffi.__version__, sys.version):
        h.update(part.encode())
        h.update(b"\0")
    return h.hexdigest()[:16]


_LOADED: Dict[str, _Compiled] = {}


def compiler_used(cflags: Optional[Sequence[str]] = None) -> Tuple[str, List[str]]:
    """The C compiler :func:`build` runs (its ``--version`` first line) and its flags."""
    cc = os.environ.get("CC", "cc")
    _require_compiler(cc)
    try:
        out = subprocess.run([*shlex.split(cc), "--version"], capture_output=True, text=True).stdout
        version = out.splitlines()[0].strip() if out.strip() else cc
    except OSError:
        version = cc
    return version, list(STRICT_FLAGS) + ["-O2"] + list(cflags or [])


def _require_compiler(cc: str) -> None:
    """:class:`ToolMissing` unless ``cc`` and the compiler cffi links with are installed."""
    import sysconfig

    for tool in (cc, sysconfig.get_config_var("CC") or "cc"):
        exe = shlex.split(tool)[0] if tool.strip() else "cc"
        if shutil.which(exe) is None:
            raise ToolMissing(exe)


def compile_generated(gen: Generated, cflags: Optional[Sequence[str]] = None,
                      ldflags: Optional[Sequence[str]] = None) -> _Compiled:
    """Compile generated C into a cffi extension module (cached) and load it."""
    import cffi

    extra_cflags = list(cflags or [])
    cflags = list(STRICT_FLAGS) + ["-O2"] + extra_cflags
    ldflags = list(ldflags or [])
    key = _module_hash(gen, cflags, ldflags)
    modname = f"_estgen_{gen.prefix}_{gen.precision}_{key}"
    if modname in _LOADED:
        return _LOADED[modname]
    root = cache_dir()
    target_dir = os.path.join(root, modname)
    so_path = None
    if os.path.isdir(target_dir):
        for fn in os.listdir(target_dir):
            if fn.startswith(modname) and fn.endswith((".so", ".pyd")):
                so_path = os.path.join(target_dir, fn)
    if so_path is None:
        work = tempfile.mkdtemp(prefix=modname + ".", dir=root)
        try:
            for name, text in gen.files.items():
                with open(os.path.join(work, name), "w", encoding="utf-8") as fh:
                    fh.write(text)
            # The generated source is compiled on its own with the strict flags; cffi's glue
            # (not ours, and not held to -Wconversion) is compiled with only the extra flags.
            c_path = os.path.join(work, f"{gen.prefix}.c")
            obj = os.path.join(work, f"{gen.prefix}.o")
            cc = os.environ.get("CC", "cc")
            _require_compiler(cc)
            proc = subprocess.run([cc, *cflags, "-fPIC", "-c", c_path, "-o", obj], capture_output=True, text=True)
            if proc.returncode != 0:
                raise BuildError(f"compiling {gen.prefix}.c failed:\n{proc.stderr.strip()}")
            ffi = cffi.FFI()
            ffi.cdef(gen.cdef)
            ffi.set_source(
                modname,
                f'#include "{gen.prefix}.h"\n',
                include_dirs=[work],
                extra_objects=[obj],
                extra_compile_args=list(extra_cflags or []),
                extra_link_args=ldflags,
            )
            with open(os.devnull, "w") as devnull, contextlib.redirect_stdout(devnull):
                so_built = ffi.compile(tmpdir=work, verbose=False)
            final = tempfile.mkdtemp(prefix=modname + ".done.", dir=root)
            shutil.copy2(so_built, final)
            for name in gen.files:
                shutil.copy2(os.path.join(work, name), final)
            try:
                os.rename(final, target_dir)
            except OSError:  # another process won the race; use its copy
                shutil.rmtree(final, ignore_errors=True)
        finally:
            shutil.rmtree(work, ignore_errors=True)
        for fn in os.listdir(target_dir):
            if fn.startswith(modname) and fn.endswith((".so", ".pyd")):
                so_path = os.path.join(target_dir, fn)
    assert so_path is not None
    spec = importlib.util.spec_from_file_location(modname, so_path)
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    comp = _Compiled(mod.ffi, mod.lib, gen)
    _LOADED[modname] = comp
    return comp


class CFilter:
    """The generated C filter, driven from Python with the reference's interface.

    ``x`` and ``P`` are float64 copies (P unpacked to a full symmetric matrix), read through the
    generated struct's layout (:class:`~estgen.layout.StructLayout`); arguments are converted to
    the C's precision on the way in, as firmware would hand them over.
    """

    def __init__(self, spec: ModelSpec, comp: _Compiled, filter: str, seed: Optional[int] = None) -> None:
        self.spec = spec
        self.filter = filter
        self.n = spec.n
        self.ne = spec.ne  # covariance dimension: n minus one per attitude
        self.precision = comp.gen.precision
        self._layout = comp.gen.layout
        self._ffi = comp.ffi
        self._lib = comp.lib
        self._prefix = comp.gen.prefix
        self._real = "float" if self.precision == "float" else "double"
        self._s = self._ffi.new(f"{self._prefix}_t *")
        self._nis_out = self._ffi.new(f"{self._real} *")
        if seed is not None:  # a kind's run-time generator seed (the particle filter's)
            getattr(self._lib, f"{self._prefix}_init_seed")(self._s, int(seed) & 0xFFFFFFFF)
        else:
            getattr(self._lib, f"{self._prefix}_init")(self._s)
        self._predict = getattr(self._lib, f"{self._prefix}_predict")
        self._updates = {s.name: (getattr(self._lib, f"{self._prefix}_update_{s.name}_nis"), s.m)
                         for s in spec.sensors}
        self._set_state = getattr(self._lib, f"{self._prefix}_set_state")
        self.sensors = [s.name for s in spec.sensors]
        self.nis = float("nan")

    def _arr(self, values: Sequence[float], length: int, what: str) -> Any:
        vals = [float(v) for v in np.asarray(values, dtype=float).ravel()]
        if len(vals) != length:
            raise ValueError(f"{what} must have {length} values, got {len(vals)}")
        return self._ffi.new(f"{self._real}[]", vals) if length else self._ffi.NULL

    def predict(self, u: Sequence[float], dt: float) -> int:
        """Time update; returns the status code (0 accepted)."""
        ua = self._arr(u if u is not None else [], self.spec.nu, "u")
        return int(self._predict(self._s, ua, float(dt)))

    def update(self, sensor: str, z: Sequence[float]) -> int:
        """Measurement update with the named sensor; returns the status code (0 accepted)."""
        try:
            fn, m = self._updates[sensor]
        except KeyError:
            raise KeyError(f"no sensor {sensor!r}; sensors are {self.sensors}") from None
        za = self._arr(z, m, f"z of sensor {sensor!r}")
        self._nis_out[0] = float("nan")
        st = int(fn(self._s, za, self._nis_out))
        v = float(self._nis_out[0])
        if v == v:
            self.nis = v
        return st

    @property
    def x(self) -> np.ndarray:
        return self._layout.state(self._ffi, self._s)

    @property
    def P(self) -> np.ndarray:
        return self._layout.covariance(self._ffi, self._s)

    def set_state(self, x: Sequence[float], P: Any) -> int:
        """Replace x and P (full matrix; its upper triangle is used) after validation."""
        Pm = np.asarray(P, dtype=float)
        if Pm.shape != (self.ne, self.ne):
            raise ValueError(f"P must be {self.ne}x{self.ne}")
        packed = pack_upper(Pm)
        # non-finite values are the C's to refuse (BAD_INPUT comes first, as in the reference)
        finite = bool(np.all(np.isfinite(Pm))) and bool(np.all(np.isfinite(np.asarray(x, dtype=float))))
        if finite and not np.allclose(Pm, Pm.T, rtol=1e-9, atol=0.0):
            return 3  # Status.NOT_POSITIVE_DEFINITE: a non-symmetric P is no covariance
        return int(self._set_state(self._s, self._arr(x, self.n, "x"), self._arr(packed, len(packed), "P")))

    @property
    def params(self) -> Dict[str, float]:
        return self._layout.params_of(self._s)

    def set_param(self, name: str, value: float) -> None:
        if name not in {p.name for p in self.spec.params}:
            raise KeyError(f"no parameter {name!r}; parameters are {[p.name for p in self.spec.params]}")
        setattr(self._s.par, name, float(value))

    def raw_state(self) -> bytes:
        """The struct's bytes, for checks that a refused call changed nothing."""
        return bytes(self._ffi.buffer(self._s))


def build(model: Any, filter: str = "ekf", precision: str = "float", *, cflags: Optional[Sequence[str]] = None,
          ldflags: Optional[Sequence[str]] = None, gates: Optional[Dict[str, float]] = None,
          commit_check: str = "subtractive", **options: Any) -> CFilter:
    """Generate, compile (cached) and load the C filter for ``model``.

    ``gates``, ``commit_check`` and ``options`` (the kind's own: the UKF's alpha, beta, kappa;
    the particle filter's particles, resample_threshold, roughening, regularization and seed,
    the generator seed init_seed starts from) are those of :func:`estgen.filters.generate`. ``cflags``/``ldflags``
    add compiler and linker flags (sanitizers, say).
    """
    setup = FilterSetup.of(filter, precision, gates, commit_check, **options)
    spec = setup.spec(model)
    comp = compile_generated(setup.generate(spec), cflags, ldflags)
    return CFilter(spec, comp, filter, **setup.options.runtime())
