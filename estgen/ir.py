"""The intermediate form between derivation and printing: typed statements over sympy
expressions whose symbols are already named as the C names them, and a counted loop.

A derivation (:mod:`estgen.derive`, :mod:`estgen.derive_ukf`, ...) returns lists of nodes; the
:class:`~estgen.emit.Emitter` prints them through the C printer and counts their operations.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass
from typing import Tuple, Union

import sympy as sp

__all__ = ["Kind", "Stmt", "Loop", "Node", "comment", "is_trivial"]


class Kind(str, enum.Enum):
    """What a :class:`Stmt` prints as."""

    DECL = "decl"  #: ``const real <target> = <expr>;``
    ASSIGN = "assign"  #: ``<target> = <expr>;``
    CHECK = "check"  #: refuse unless ``<expr>`` is finite and > 0 (a pivot or innovation variance)
    WRAP = "wrap"  #: ``<target> = wrap(<expr>)`` for an angle
    COMMENT = "comment"  #: ``/* <target> */``, a section heading; expr unused

    def __str__(self) -> str:
        return self.value

    def __format__(self, spec: str) -> str:
        return format(self.value, spec)


@dataclass(frozen=True)
class Stmt:
    """One line of straight-line C. ``kind`` may be given as its string value ("decl", ...);
    an unknown kind is a ValueError when the statement is made, not when it is printed."""

    kind: Kind
    target: str
    expr: sp.Expr

    def __post_init__(self) -> None:
        object.__setattr__(self, "kind", Kind(self.kind))


@dataclass(frozen=True)
class Loop:
    """``for (size_t <var> = <start>; <var> < <stop>; ++<var>) { <body> }``: the body's symbols may
    use ``<var>`` in their C names (``x[i]``). Its operations count (stop - start) times."""

    var: str
    start: int
    stop: int
    body: Tuple["Node", ...]

    def __post_init__(self) -> None:
        if not self.var.isidentifier() or not 0 <= self.start <= self.stop:
            raise ValueError(f"bad loop {self.var} in [{self.start}, {self.stop})")
        object.__setattr__(self, "body", tuple(self.body))


Node = Union[Stmt, Loop]


def comment(text: str) -> Stmt:
    """A section heading in the C (text from the generator only, never from a model file)."""
    if "*/" in text or "/*" in text:
        raise ValueError(text)
    return Stmt(Kind.COMMENT, text, sp.S.Zero)


def is_trivial(e: sp.Expr) -> bool:
    """A number, a lone symbol or its negation: used in place, no temporary needed."""
    return bool(e.is_Number or e.is_Symbol or (e.is_Mul and len(e.args) == 2 and e.args[0] == -1
                                               and e.args[1].is_Symbol))
