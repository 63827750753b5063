"""Compiler-free unit tests of the stages between derivation and C: the intermediate form, the
unrolled Cholesky factorization, the printer's loop node and the struct layout."""

from __future__ import annotations

import ctypes

import numpy as np
import pytest
import sympy as sp

from estgen.emit import Emitter, OpCount
from estgen.ir import Kind, Loop, Stmt
from estgen.layout import Field, StructLayout, pack_upper, packed_index, unpack
from estgen.report import count_c_ops
from estgen.unrolled import factor_function


def test_statement_kinds_are_typed() -> None:
    assert Stmt("decl", "t0", sp.Symbol("a")).kind is Kind.DECL
    assert f"{Kind.ASSIGN} x" == "assign x"  # section rules match on the text form
    with pytest.raises(ValueError):
        Stmt("store", "t0", sp.Symbol("a"))
    with pytest.raises(ValueError):
        Loop("i", 3, 1, ())


@pytest.mark.parametrize("n", [1, 2, 4, 7])
def test_unrolled_cholesky_matches_numpy(n: int) -> None:
    # Source: numpy.linalg.cholesky (LAPACK potrf) on a random symmetric positive definite matrix
    rng = np.random.default_rng(n)
    A = rng.standard_normal((n, n))
    P = A @ A.T + n * np.eye(n)
    env = {sp.Symbol(f"P[{k}]"): v for k, v in enumerate(pack_upper(P))}
    for st in factor_function(n):  # evaluate the straight-line statements in order
        value = float(st.expr.xreplace(env)) if st.expr.free_symbols or st.expr.is_Number else float(st.expr)
        if st.kind is Kind.CHECK:
            assert value > 0.0
        else:
            env[sp.Symbol(st.target)] = value
    L = np.zeros((n, n))
    for i in range(n):
        for j in range(i + 1):
            L[i, j] = env[sp.Symbol(f"Lf[{packed_index(j, i, n)}]")]
    np.testing.assert_allclose(L, np.linalg.cholesky(P), rtol=1e-12, atol=1e-12)


def test_the_ekf_block_update_factorizes_s_with_the_shared_builder() -> None:
    # Source: numpy.linalg.cholesky (LAPACK potrf): the full-R update's factor of S = H P H' + R
    # and the reciprocals of its diagonal, taken from the update's own statements, which come from
    # unrolled.cholesky (the one Cholesky derivation): its locals and nothing else
    import os

    from estgen.derive import derive_ekf_update
    from estgen.model import load_model

    spec = load_model(os.path.join(os.path.dirname(os.path.abspath(__file__)), "models", "noise_cart_additive.py"))
    sensor = next(s for s in spec.sensors if not s.diagonal)
    code = derive_ekf_update(sensor, spec)
    m = sensor.m
    assert not code.sequential
    names = {st.target for st in code.stmts}
    assert {f"Ld{j}" for j in range(m)} <= names and {f"Li{j}" for j in range(m)} <= names
    assert not {f"D{j}" for j in range(m)} & names and not {f"iL{j}" for j in range(m)} & names
    rng = np.random.default_rng(3)
    A = rng.standard_normal((m, m))
    S = A @ A.T + np.eye(m)
    env = {sp.Symbol(f"S{a}_{b}"): S[a, b] for a in range(m) for b in range(a, m)}
    for st in code.stmts:
        if st.target.startswith("L"):
            value = float(st.expr.xreplace(env))
            if st.kind is Kind.CHECK:
                assert value > 0.0
            else:
                env[sp.Symbol(st.target)] = value
    L = np.linalg.cholesky(S)
    for i in range(m):
        assert env[sp.Symbol(f"Li{i}")] == pytest.approx(1.0 / L[i, i], rel=1e-14)
        for j in range(i + 1):
            assert env[sp.Symbol(f"L{i}_{j}")] == pytest.approx(L[i, j], rel=1e-14)


def test_loop_node_prints_a_counted_loop() -> None:
    em = Emitter("demo_ekf", "float", {}, [])
    i = "i"
    body = (Stmt("assign", "y[i]", sp.Symbol("a[i]") * sp.Symbol("b[i]") + sp.Symbol("c")),)
    ops = OpCount()
    lines = em.lines([Loop(i, 0, 5, body)], ops)
    assert lines[0] == "for (size_t i = 0u; i < 5u; ++i) {" and lines[-1] == "}"
    assert ops.mul == 5 and ops.add == 5
    # the report's C tokenizer (which multiplies a loop body by its literal trip count) agrees
    src = "void f(float *y, const float *a, const float *b, float c)\n{\n" + "\n".join(lines) + "\n}\n"
    counted = count_c_ops(src, "f")
    assert (counted["mul"], counted["add"]) == (ops.mul, ops.add)


def test_struct_layout_size_matches_the_c_abi() -> None:
    # Source: ctypes lays out a Structure as the platform's C compiler does (Python docs, ctypes)
    N, n, ne, params = 7, 3, 2, 2
    lay = StructLayout.kalman("demo_pf", "double", n, ne,
                              [Field(f"p{k}", "real") for k in range(params)],
                              [Field("part", "real", (N, n)), Field("rng", "uint32_t"),
                               Field("spare", "uint32_t"), Field("last", "real"), Field("tail", "uint32_t")])

    class Par(ctypes.Structure):
        _fields_ = [(f"p{k}", ctypes.c_double) for k in range(params)]

    class Flt(ctypes.Structure):
        _fields_ = [("x", ctypes.c_double * n), ("P", ctypes.c_double * (ne * (ne + 1) // 2)), ("par", Par),
                    ("part", (ctypes.c_double * n) * N), ("rng", ctypes.c_uint32), ("spare", ctypes.c_uint32),
                    ("last", ctypes.c_double), ("tail", ctypes.c_uint32)]

    assert lay.size_bytes("double") == ctypes.sizeof(Flt)
    assert "    double part[7][3];" in lay.cdef_lines()
    assert lay.header_lines()[0].startswith("/* Runtime parameters")


def test_packed_storage_round_trip() -> None:
    # the header's packed layout: entry (i, j), i <= j, at i n - i (i - 1) / 2 + (j - i)
    P = np.arange(16.0).reshape(4, 4)
    P = P + P.T
    packed = pack_upper(P)
    assert [packed[packed_index(i, j, 4)] for i in range(4) for j in range(4)] == list(P.ravel())
    np.testing.assert_array_equal(unpack(packed, 4), P)
