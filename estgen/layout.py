"""The filter struct's layout: one description, rendered into the header's struct, the cffi
declarations, and read by everything that looks into a filter (the cffi harness, soak, the
firmware replay).

A layout is a list of typed fields with array shapes. Every kind starts from the Kalman
fields (the state ``x`` of n entries, the covariance ``P`` packed, of the error dimension ne:
n minus one per attitude, and the parameters) and may add its own (the particle filter's
particles, log-weights and generator state).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

__all__ = ["Field", "StructLayout", "packed_index", "packed_size", "unpack", "pack_upper"]

#: the bytes of each field type per precision ("real" is the filter's floating type)
_SIZES = {"real": {"float": 4, "double": 8}, "uint32_t": {"float": 4, "double": 4}}


def packed_index(i: int, j: int, n: int) -> int:
    """Index of entry (i, j), i <= j, of a symmetric n x n matrix stored as its upper triangle
    row by row (the generated layout of P)."""
    if i > j:
        i, j = j, i
    return i * n - i * (i - 1) // 2 + (j - i)


def packed_size(n: int) -> int:
    """Entries of a packed symmetric n x n matrix."""
    return n * (n + 1) // 2


def unpack(packed: Any, n: int) -> np.ndarray:
    """Row-major packed upper triangles, shape (..., n(n+1)/2), to full symmetric (..., n, n) float64."""
    Pp = np.asarray(packed, dtype=np.float64)
    iu = np.triu_indices(n)
    full = np.zeros(Pp.shape[:-1] + (n, n), dtype=np.float64)
    full[..., iu[0], iu[1]] = Pp
    full[..., iu[1], iu[0]] = Pp
    return full


def pack_upper(P: Any) -> List[float]:
    """The upper triangle of a square matrix, row by row (what set_state takes)."""
    Pm = np.asarray(P, dtype=float)
    n = Pm.shape[0]
    return [float(Pm[i, j]) for i in range(n) for j in range(i, n)]


@dataclass(frozen=True)
class Field:
    """One member of the filter struct. ``ctype`` is "real" (the filter's floating type),
    "uint32_t" or "par" (the parameter struct); ``shape`` is () for a scalar. ``gap`` is the
    spaces between the declaration and its comment in the header."""

    name: str
    ctype: str
    shape: Tuple[int, ...] = ()
    comment: str = ""
    gap: int = 2

    @property
    def count(self) -> int:
        return math.prod(self.shape) if self.shape else 1

    def declaration(self, prefix: str, real: str) -> str:
        ctype = {"real": real, "par": f"{prefix}_par_t"}.get(self.ctype, self.ctype)
        return f"{ctype} {self.name}" + "".join(f"[{d}]" for d in self.shape) + ";"


@dataclass(frozen=True)
class StructLayout:
    """The struct ``<prefix>_t`` of one generated filter (and ``<prefix>_par_t`` when the model
    has parameters). ``n`` is the length of ``x``, ``ne`` the dimension of the packed ``P``."""

    prefix: str
    real: str
    n: int
    ne: int
    fields: Tuple[Field, ...]
    params: Tuple[Field, ...] = ()

    @classmethod
    def kalman(cls, prefix: str, real: str, n: int, ne: int, params: Sequence[Field],
               extra: Sequence[Field] = ()) -> "StructLayout":
        """x, packed P, the parameters, then ``extra`` fields."""
        fields = [Field("x", "real", (n,), "state estimate", gap=3),
                  Field("P", "real", (packed_size(ne),), "covariance, packed upper triangle, row by row")]
        if params:
            fields.append(Field("par", "par"))
        return cls(prefix, real, n, ne, tuple(fields) + tuple(extra), tuple(params))

    def field(self, name: str) -> Field:
        for f in self.fields:
            if f.name == name:
                return f
        raise KeyError(name)

    def _body(self, comments: bool) -> List[str]:
        out = []
        for f in self.fields:
            decl = f.declaration(self.prefix, self.real)
            out.append(f"    {decl}" + (f"{' ' * f.gap}/* {f.comment} */" if comments and f.comment else ""))
        return out

    def header_lines(self) -> List[str]:
        """The struct definitions as the header carries them (with comments)."""
        lines: List[str] = []
        if self.params:
            lines.append(f"/* Runtime parameters; {self.prefix}_init sets the defaults shown. */")
            lines.append(f"typedef struct {self.prefix}_par {{")
            lines += [f"    {p.declaration(self.prefix, self.real)}{' ' * p.gap}/* {p.comment} */" for p in self.params]
            lines.append(f"}} {self.prefix}_par_t;")
            lines.append("")
        lines.append(f"typedef struct {self.prefix} {{")
        lines += self._body(True)
        lines.append(f"}} {self.prefix}_t;")
        return lines

    def cdef_lines(self) -> List[str]:
        """The same definitions for cffi's cdef (no comments)."""
        lines: List[str] = []
        if self.params:
            lines.append(f"typedef struct {self.prefix}_par {{")
            lines += [f"    {p.declaration(self.prefix, self.real)}" for p in self.params]
            lines.append(f"}} {self.prefix}_par_t;")
        lines.append(f"typedef struct {self.prefix} {{")
        lines += self._body(False)
        lines.append(f"}} {self.prefix}_t;")
        return lines

    def size_bytes(self, precision: str) -> int:
        """sizeof the struct under the usual C rule: each member aligned to its own size, the
        struct to its largest member."""
        def member(f: Field) -> Tuple[int, int]:
            if f.ctype == "par":
                size = _SIZES["real"][precision]
                return size * len(self.params), size
            size = _SIZES[f.ctype][precision]
            return size * f.count, size

        offset, align = 0, 1
        for f in self.fields:
            size, a = member(f)
            offset = -(-offset // a) * a + size
            align = max(align, a)
        return -(-offset // align) * align

    # -- reading a filter through cffi ----------------------------------------------------------
    def view(self, ffi: Any, struct: Any, name: str, dtype: Optional[Any] = None) -> np.ndarray:
        """A live numpy view of array field ``name`` of a cffi struct pointer (no copy)."""
        f = self.field(name)
        dt = dtype or (np.float32 if self.real == "float" else np.float64)
        return np.frombuffer(ffi.buffer(getattr(struct, name)), dtype=dt).reshape(f.shape)

    def state(self, ffi: Any, struct: Any) -> np.ndarray:
        """x as float64 (a copy)."""
        return self.view(ffi, struct, "x").astype(np.float64)

    def covariance(self, ffi: Any, struct: Any) -> np.ndarray:
        """P unpacked to a full symmetric float64 matrix (a copy)."""
        return unpack(self.view(ffi, struct, "P"), self.ne)

    def params_of(self, struct: Any) -> Dict[str, float]:
        return {p.name: float(getattr(struct.par, p.name)) for p in self.params}
