"""Unrolled straight-line building blocks shared by the filters: a statement block with common
subexpressions and dead-code removal, and the one unrolled Cholesky factorization (with its
pivot checks) behind the UKF's factor function and every filter's commit check."""

from __future__ import annotations

from typing import Dict, List, Mapping, Optional, Sequence, Set, Tuple, Union

import sympy as sp

from .ir import Stmt, is_trivial
from .layout import packed_index
from .progress import detail

__all__ = ["Block", "cholesky", "factor_function", "commit_check"]


class Block:
    """Statements of one function, with named temporaries and dead-code removal."""

    def __init__(self) -> None:
        self.stmts: List[Stmt] = []

    def value(self, name: str, e: sp.Expr) -> sp.Expr:
        """A const local for ``e`` unless it is a number or a symbol (then used in place)."""
        if is_trivial(e):
            return e
        self.stmts.append(Stmt("decl", name, e))
        return sp.Symbol(name)

    def add(self, kind: str, target: str, e: sp.Expr) -> None:
        self.stmts.append(Stmt(kind, target, e))

    def cse(self, items: Sequence[Tuple[str, sp.Expr]], prefix: str) -> Dict[str, sp.Expr]:
        """Common subexpressions of all ``items`` (name, expr) shared; returns name -> what later
        code uses (a number, a symbol, or a new const local). Equal results share one local."""
        if not items:
            return {}
        detail("common subexpressions")
        repl, reduced = sp.cse([e for _, e in items], symbols=sp.numbered_symbols(prefix), order="canonical")
        # a shared condition (a > 0) would become a floating local: put conditions back inline
        inline: Dict[sp.Symbol, sp.Basic] = {}
        for s, e in repl:
            e = e.xreplace(inline) if inline else e
            if isinstance(e, sp.logic.boolalg.Boolean):
                inline[s] = e
                continue
            self.stmts.append(Stmt("decl", str(s), e))
        if inline:
            reduced = [e.xreplace(inline) for e in reduced]
        out: Dict[str, sp.Expr] = {}
        seen: Dict[sp.Expr, sp.Expr] = {}
        for (name, _), e in zip(items, reduced):
            if e in seen:
                out[name] = seen[e]
                continue
            v = self.value(name, e)
            seen[e] = v
            out[name] = v
        return out

    def pruned(self) -> List[Stmt]:
        """Drop const locals nothing reads (the compiler would warn about them)."""
        needed: Set[str] = set()
        keep: List[Stmt] = []
        for st in reversed(self.stmts):
            if st.kind == "decl" and st.target not in needed:
                continue
            keep.append(st)
            needed |= {str(s) for s in st.expr.free_symbols}
            if st.kind in ("assign", "wrap"):
                needed.add(st.target)  # arrays read back later by name
        keep.reverse()
        return keep


def cholesky(blk: Block, n: int, P: Union[str, Mapping[Tuple[int, int], sp.Expr]], tag: str,
             inverses: Optional[Dict[int, sp.Expr]] = None) -> Dict[Tuple[int, int], sp.Expr]:
    """Unrolled lower Cholesky factor of ``P``; each pivot is checked (finite, > 0).

    ``P`` is the name of a packed array or a mapping (i, j) -> entry for i >= j (an innovation
    covariance held in locals). Locals are named ``<tag>d<j>`` (pivots), ``<tag><i>_<j>`` (L)
    and ``<tag>i<j>`` (reciprocals of the diagonal). Given ``inverses``, the reciprocal of every
    diagonal entry is a local and stored there (triangular solves need the last one too)."""
    def entry(i: int, j: int) -> sp.Expr:
        return sp.Symbol(f"{P}[{packed_index(i, j, n)}]") if isinstance(P, str) else P[(i, j)]

    L: Dict[Tuple[int, int], sp.Expr] = {}
    for j in range(n):
        d = entry(j, j) - sum((L[(j, k)] ** 2 for k in range(j)), sp.S.Zero)
        dname = f"{tag}d{j}"
        blk.add("decl", dname, d)
        blk.add("check", dname, sp.Symbol(dname))
        L[(j, j)] = blk.value(f"{tag}{j}_{j}", sp.sqrt(sp.Symbol(dname)))
        if j + 1 < n or inverses is not None:
            inv = blk.value(f"{tag}i{j}", 1 / L[(j, j)])
            if inverses is not None:
                inverses[j] = inv
        for i in range(j + 1, n):
            e = entry(i, j) - sum((L[(i, k)] * L[(j, k)] for k in range(j)), sp.S.Zero)
            L[(i, j)] = blk.value(f"{tag}{i}_{j}", e * inv)
    return L


def factor_function(n: int) -> List[Stmt]:
    """Body of the shared factorization ``Lf = chol(P)`` that predict and every update call
    first: unrolled, pivots checked (one copy in the C however many sensors there are)."""
    blk = Block()
    L = cholesky(blk, n, "P", "L")
    for (i, j), e in L.items():
        blk.add("assign", f"Lf[{packed_index(j, i, n)}]", e)
    return blk.pruned()


def commit_check(n: int, P: str) -> List[Stmt]:
    """Refuse to commit a covariance that is not positive definite: the pivots of its unrolled
    Cholesky factorization (a positive diagonal is not enough). Straight-line, so it costs
    about n^3/6 multiply-adds and no index arithmetic."""
    blk = Block()
    cholesky(blk, n, P, "Lc")
    return blk.pruned()
