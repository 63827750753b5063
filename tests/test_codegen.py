"""The generated C: strict compiles, determinism, stale checks, and equality with the reference.

Sources of the checks are named beside each; "common practice" marks a fact of the trade.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys

import numpy as np
import pytest
import scipy.linalg

import estgen
from estgen.build import STRICT_FLAGS
from estgen.filters import generate
from estgen.verify import verify

from conftest import ROOT, example_filters, example_model, require_tool

CONFIGS = [(ex, f, p) for ex, f in example_filters() for p in ("float", "double")]
ALLOWED_INCLUDES = {"<math.h>", "<stdint.h>", "<stddef.h>", "<string.h>"}


def _write(gen, out) -> str:
    for name, text in gen.files.items():
        (out / name).write_text(text)
    return str(out / f"{gen.prefix}.c")


@pytest.mark.parametrize("example,filt,precision", CONFIGS)
@pytest.mark.parametrize("cc", ["gcc", "clang"])
def test_strict_compile(example, filt, precision, cc, tmp_path):
    """The contract's warning set, as errors, under both compilers; the header also as C++."""
    require_tool(cc)
    gen = generate(estgen.load_model(example_model(example)), filter=filt, precision=precision)
    src = _write(gen, tmp_path)
    proc = subprocess.run([cc, *STRICT_FLAGS, "-Wvla", "-O2", "-c", src, "-o", str(tmp_path / "f.o")],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    cxx = "g++" if cc == "gcc" else "clang++"
    require_tool(cxx)
    main = tmp_path / "use.cpp"
    first = gen.files[f"{gen.prefix}.h"]
    main.write_text(f'#include "{gen.prefix}.h"\nint main() {{ {gen.prefix}_t f; {gen.prefix}_init(&f); '
                    f'return {gen.prefix}_set_state(&f, f.x, f.P); }}\n')
    proc = subprocess.run([cxx, "-std=c++11", "-Wall", "-Wextra", "-Wpedantic", "-Werror", "-I", str(tmp_path),
                           str(main), str(tmp_path / "f.o"), "-lm", "-o", str(tmp_path / "use")],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert subprocess.run([str(tmp_path / "use")]).returncode == 0  # x0, P0 pass set_state's checks
    assert "extern \"C\"" in first


@pytest.mark.parametrize("example,filt,precision", CONFIGS)
def test_only_allowed_headers_and_no_heap(example, filt, precision):
    """Contract section 4: only four standard headers; no heap, stdio, recursion markers."""
    gen = generate(estgen.load_model(example_model(example)), filter=filt, precision=precision)
    for name, text in gen.files.items():
        incs = set(re.findall(r"#include\s+(<[^>]+>)", text))
        assert incs <= ALLOWED_INCLUDES, (name, incs - ALLOWED_INCLUDES)
        code = re.sub(r"/\*.*?\*/", "", text, flags=re.S)
        for banned in ("malloc", "calloc", "realloc", "free(", "printf", "FILE", "exit("):
            assert banned not in code, (name, banned)
        if precision == "float":
            # a float build calls only f-suffixed math functions (contract section 4)
            calls = set(re.findall(r"\b(sqrt|sin|cos|tan|exp|log|pow|atan2|atan|asin|acos|ceil|floor|fabs|tanh)\s*\(",
                                   code))
            assert not calls, (name, calls)
            # and every floating literal carries the F suffix (no double constant sneaks in)
            lits = re.findall(r"(?<![\w.])(\d+\.\d*(?:e[-+]?\d+)?|\d+e[-+]?\d+)([FfLl]?)", code)
            assert all(suf == "F" for _, suf in lits), (name, [x for x in lits if x[1] != "F"][:5])
            if name.endswith(".c"):
                assert lits, name


def test_header_usage_block_and_no_timestamp():
    """The header opens with a usage block naming the model file and version (issue 2, point 5)."""
    gen = generate(estgen.load_model(example_model("battery_soc")), filter="ekf", precision="float")
    h = gen.files["cell_ekf.h"]
    head = h[: h.index("#ifndef")]
    assert "Usage" in head and "model.py" in head and f"estgen {estgen.__version__}" in head
    for st in estgen.Status:
        if st is not estgen.Status.DEGENERATE:  # the particle filter's own code
            assert f"CELL_EKF_{st.name}" in head
    assert f"sizeof(cell_ekf_t) = {gen.struct_bytes} bytes" in head
    assert not re.search(r"20\d\d-\d\d-\d\d", h + gen.files["cell_ekf.c"])


def _gen_in_subprocess(seed: str) -> str:
    code = ("import estgen, hashlib, sys; from estgen.filters import generate\n"
            "out = []\n"
            "for ex in ['battery_soc', 'strapdown_nav', 'beacon_rover']:\n"
            "    s = estgen.load_model(f'generated_examples/{ex}/model.py')\n"
            "    for p in ('float', 'double'):\n"
            "        g = generate(s, 'ekf', p)\n"
            "        out += [g.files[k] for k in sorted(g.files)]\n"
            "print(hashlib.sha256(''.join(out).encode()).hexdigest())\n")
    env = dict(os.environ, PYTHONHASHSEED=seed)
    return subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True,
                          check=True).stdout.strip()


def test_regeneration_is_byte_identical():
    """Same model, same version: the same bytes, whatever the interpreter's hash seed."""
    assert _gen_in_subprocess("1") == _gen_in_subprocess("12345")


def test_committed_examples_are_fresh():
    """CI fails when a committed generated file is stale (issue 2, point 9)."""
    proc = subprocess.run([sys.executable, os.path.join(ROOT, "generated_examples", "regenerate.py"), "--check"],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr


@pytest.mark.parametrize("example,filt,precision", CONFIGS)
def test_c_matches_reference(example, filt, precision):
    """The compiled C against the numpy reference on simulated data (issue 2 tolerances)."""
    res = verify(example_model(example), filter=filt, precision=precision, steps=300, seed=7)
    assert res.ok, res.as_dict()


def test_linear_steady_state_matches_dare():
    """Steady-state predicted covariance of the Kalman filter equals the solution of the discrete
    algebraic Riccati equation (Anderson & Moore, Optimal Filtering, 1979, ch. 4), computed here
    by scipy.linalg.solve_discrete_are. Runs the generated C (double) on the linear example."""
    spec = estgen.load_model(example_model("linear_cart"))
    c = estgen.build(spec, filter="ekf", precision="double")
    dt = 0.01
    import sympy as sp

    subs = {**spec.default_subs(), spec.dt: dt}
    F = np.array(spec.f.jacobian(spec.x_syms).subs(subs).subs({u: 0 for u in spec.u_syms}), dtype=float)
    Q = np.array(spec.Q.subs(subs), dtype=float)
    enc = spec.sensor("encoder")
    H = np.array(enc.h.jacobian(spec.x_syms), dtype=float)
    R = np.array(enc.R.subs(subs), dtype=float)
    prev = None
    for _chunk in range(100):  # iterate the Riccati recursion until it has settled
        for _ in range(5000):
            assert c.predict([0.0], dt) == 0
            assert c.update("encoder", [0.0]) == 0
        if prev is not None and np.allclose(c.P, prev, rtol=1e-12, atol=0.0):
            break
        prev = c.P
    assert c.predict([0.0], dt) == 0
    P_pred = c.P
    X = scipy.linalg.solve_discrete_are(F.T, H.T, Q, R)
    assert np.allclose(P_pred, X, rtol=1e-6, atol=0.0), (P_pred, X)
    del sp


def test_jacobian_of_discretized_dynamics_is_exact():
    """F is the exact Jacobian of what the C computes: with continuous dynamics discretized by
    RK4, the C's predicted covariance for a tiny P0 matches the propagation of a central finite
    difference Jacobian of one RK4 step (common practice: Nocedal & Wright, Numerical
    Optimization, 2006, sec. 8.1)."""
    spec = estgen.load_model(example_model("battery_soc"))
    assert spec.method in ("rk4", "euler", "discrete")
    c = estgen.build(spec, filter="ekf", precision="double")
    r = estgen.reference(spec, filter="ekf")
    u = [2.0]
    dt = 1.0
    x0 = c.x
    assert c.predict(u, dt) == 0
    import sympy as sp

    fl = sp.lambdify([spec.x_syms, spec.u_syms, spec.dt], spec.f.subs(spec.default_subs()), "numpy")
    n = spec.n
    J = np.zeros((n, n))
    for j in range(n):
        h = 1e-6 * max(1.0, abs(x0[j]))
        e = np.zeros(n)
        e[j] = h
        J[:, j] = (np.ravel(fl(x0 + e, u, dt)) - np.ravel(fl(x0 - e, u, dt))) / (2 * h)
    P0 = np.array(spec.P0)
    Qn = np.array(spec.Q.subs({**spec.default_subs(), spec.dt: dt}), dtype=float)
    expect = J @ P0 @ J.T + Qn
    assert np.allclose(c.P, expect, rtol=1e-6, atol=1e-14)
    assert np.allclose(c.x, np.ravel(fl(x0, u, dt)), rtol=1e-12, atol=1e-15)
    assert r.predict(u, dt) == 0 and np.allclose(r.P, c.P, rtol=1e-12)


@pytest.mark.parametrize("example", ["beacon_rover", "strapdown_nav"])
def test_operation_counts_reported(example):
    """Op counts come from the printed expressions; predict must multiply at least once per
    non-zero of F P F' (a lower bound, common practice for sparse products)."""
    gen = generate(estgen.load_model(example_model(example)), filter="ekf", precision="float")
    assert set(gen.ops) == {"predict"} | {f"update_{s.name}" for s in estgen.load_model(example_model(example)).sensors}
    assert gen.ops["predict"]["mul"] > 0 and gen.ops["predict"]["add"] > 0


def _main_configs():
    """Configurations a main.c demonstrates: it includes that filter's header."""
    out = []
    for ex, filt, prec in CONFIGS:
        text = open(os.path.join(ROOT, "generated_examples", ex, "main.c")).read()
        if f"_{filt}.h\"" in text:
            out.append((ex, filt, prec))
    return out


@pytest.mark.parametrize("example,filt,precision", _main_configs())
def test_example_main_builds_and_runs(example, filt, precision, tmp_path):
    """Each example's host main.c shows the calls; it must build against the committed C and run."""
    ex_dir = os.path.join(ROOT, "generated_examples", example)
    main = os.path.join(ex_dir, "main.c")
    spec = estgen.load_model(example_model(example))
    cdir = os.path.join(ex_dir, f"{filt}_{precision}")
    exe = str(tmp_path / "demo")
    proc = subprocess.run(["gcc", "-std=c99", "-Wall", "-Wextra", "-Werror", "-O2", "-I", cdir, main,
                           os.path.join(cdir, f"{spec.name}_{filt}.c"), "-lm", "-o", exe], capture_output=True,
                          text=True)
    assert proc.returncode == 0, proc.stderr
    run = subprocess.run([exe], capture_output=True, text=True, timeout=60)
    assert run.returncode == 0 and run.stdout.strip(), run.stderr
    assert "nan" not in run.stdout.lower()


def test_every_example_has_a_main():
    for ex in {c[0] for c in CONFIGS}:
        assert any(c[0] == ex for c in _main_configs()), ex


@pytest.mark.parametrize("filt", ["ekf", "ukf"])
def test_diagonal_commit_check_variant(filt, tmp_path):
    """--commit-check diagonal: compiles clean, matches the reference, and really skips the
    factorization (an indefinite P with a positive diagonal is committed by predict there,
    refused by the default build) -- the trade-off the README documents."""
    spec = estgen.load_model(example_model("linear_cart"))
    gen = generate(spec, filter=filt, precision="float", commit_check="diagonal")
    src = _write(gen, tmp_path)
    proc = subprocess.run(["gcc", *STRICT_FLAGS, "-O2", "-c", src, "-o", str(tmp_path / "f.o")],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert "Commit check: a new P is committed when its diagonal" in gen.header
    res = verify(spec, filter=filt, precision="double", steps=150, seed=3, commit_check="diagonal")
    assert res.ok, res.as_dict()
    if filt == "ekf":
        # |corr(pos, vel)| > 1: indefinite, yet every diagonal entry is positive
        P_bad = np.array([[1.0, 2.0, 0.0], [2.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
        NOT_PD = int(estgen.Status.NOT_POSITIVE_DEFINITE)
        # "diagonal" commits it; "cholesky" and "subtractive" refuse (linear_cart's Q has
        # off-diagonal expressions: no rounding certificate, so its predict factorizes)
        for check, expect_predict, expect_update in (("diagonal", 0, None), ("cholesky", NOT_PD, NOT_PD),
                                                     ("subtractive", NOT_PD, NOT_PD)):
            c = estgen.build(spec, filter="ekf", precision="double", commit_check=check)
            packed = [P_bad[i, j] for i in range(3) for j in range(i, 3)]
            c._ffi.memmove(c._s.P, c._ffi.new("double[]", packed), 8 * len(packed))  # bypass set_state
            assert c.predict([0.0], 1e-6) == expect_predict, check
            if expect_update is not None:
                assert c.update(spec.sensors[0].name, [0.0] * spec.sensors[0].m) == expect_update, check
        # the default factorizes in every update; its predict factorizes only without a certificate
        src_default = generate(spec, filter="ekf", precision="float").source
        assert src_default.count("_commit_pd(Ps)") == len(spec.sensors)
        assert "_commit_pd(Pn)" in src_default and "certified" not in src_default


def test_predict_certificate_detects_cancellation():
    # Source: the arithmetic of derive.predict_certificate (Cauchy-Schwarz bound on
    # sum_k |F_ik| sqrt(P_kk), Higham 2002 sec. 3.5); F = [[1, 1], [0, 1]] is the constant-velocity
    # transition with dt = 1 (common practice).
    import sympy as sp

    from estgen.derive import packed_index, predict_certificate

    F = sp.Matrix([[1, 1], [0, 1]])
    Q = {(0, 0): sp.S.Zero, (0, 1): sp.S.Zero, (1, 1): sp.S.Zero}
    cert = predict_certificate(F, Q, 2)
    assert cert is not None and len(cert) == 1  # row 1 has one entry: nothing to cancel

    def holds(P: np.ndarray) -> bool:
        Pn = F_num @ P @ F_num.T
        subs = {sp.Symbol(f"P[{packed_index(i, j, 2)}]"): P[i, j] for i in range(2) for j in range(i, 2)}
        subs.update({sp.Symbol(f"Pn[{packed_index(i, j, 2)}]"): Pn[i, j] for i in range(2) for j in range(i, 2)})
        return all(bool(lhs.xreplace(subs) <= rhs.xreplace(subs)) for lhs, rhs in cert)

    F_num = np.array([[1.0, 1.0], [0.0, 1.0]])
    assert holds(np.eye(2))  # P'_00 = 2, bound (1 + 1)(1 + 1) = 4 <= 8
    # position and velocity almost exactly anti-correlated: P'_00 = 0.002, the row cancels
    assert not holds(np.array([[1.0, -0.999], [-0.999, 1.0]]))
    # a Q of expressions off the diagonal cannot be checked cheaply: always factorize
    q = sp.Symbol("par->q")
    assert predict_certificate(F, {(0, 0): q, (0, 1): q / 2, (1, 1): q}, 2) is None
    # an indefinite constant Q neither
    assert predict_certificate(F, {(0, 0): sp.Integer(1), (0, 1): sp.Integer(2), (1, 1): sp.Integer(1)}, 2) is None


def test_predict_certificate_loop_sums_are_the_same_conditions():
    # The compact predict sums F's part of each row in a loop (cr[i] = sum_k |F_ik|,
    # ca[i] = sum_k |F_ik| P_kk): with those sums substituted, its conditions must be the plain
    # certificate's, row for row, including the rows it skips and a noise-symbol column (the
    # arithmetic of derive.predict_certificate; Higham 2002 sec. 3.5).
    import sympy as sp

    from estgen.derive import packed_index, predict_certificate

    rng = np.random.default_rng(3)
    n, nw = 4, 1
    F = sp.Matrix(n, n, lambda i, k: 0 if (i, k) in ((1, 0), (1, 2), (1, 3), (3, 0)) else sp.Symbol(f"F{i}_{k}"))
    G = sp.Matrix([[0], [sp.Symbol("G1_0")], [sp.Symbol("G2_0")], [0]])
    Qw = sp.Matrix([[sp.Symbol("W0_0")]])
    Q = {(i, j): (sp.Symbol(f"Q{i}") if i == j else sp.S.Zero) for i in range(n) for j in range(i, n)}
    plain = predict_certificate(F, Q, n, G, Qw)
    looped = predict_certificate(F, Q, n, G, Qw, loop_sums=True)
    assert plain is not None and looped is not None and len(plain) == len(looped)
    for _ in range(20):
        vals = {sym: float(rng.normal()) for sym in F.free_symbols | G.free_symbols}
        vals[sp.Symbol("W0_0")] = float(rng.uniform(0.1, 2.0))
        vals.update({sp.Symbol(f"Q{i}"): float(rng.uniform(-0.1, 1.0)) for i in range(n)})
        vals.update({sp.Symbol(f"P[{packed_index(k, k, n)}]"): float(rng.uniform(0.1, 2.0)) for k in range(n)})
        vals.update({sp.Symbol(f"Pn[{packed_index(i, i, n)}]"): float(rng.uniform(0.0, 3.0)) for i in range(n)})
        Fn = np.array(F.xreplace(vals), dtype=float)
        for i in range(n):
            vals[sp.Symbol(f"cr[{i}]")] = float(np.sum(np.abs(Fn[i])))
            vals[sp.Symbol(f"ca[{i}]")] = float(sum(abs(Fn[i, k]) * vals[sp.Symbol(f"P[{packed_index(k, k, n)}]")]
                                                    for k in range(n)))
        for (l1, r1), (l2, r2) in zip(plain, looped):
            a = float(l1.xreplace(vals)) <= float(r1.xreplace(vals))
            b = float(l2.xreplace(vals)) <= float(r2.xreplace(vals))
            assert a == b or abs(float(l1.xreplace(vals)) - float(r1.xreplace(vals))) < 1e-12


# --optimize size (contract section 9): the compact forms must compute what the reference
# computes, compile under the contract's warning set and stay deterministic, like the default.
SIZE_CONFIGS = [c for c in CONFIGS if c[1] in ("ekf", "ukf")]


@pytest.mark.parametrize("example,filt,precision", SIZE_CONFIGS)
def test_optimize_size_matches_reference_and_compiles_clean(example, filt, precision, tmp_path):
    """The same C-against-reference check as test_c_matches_reference (numpy reference, issue 2
    tolerances), on the --optimize size build, plus the strict compile and byte-determinism."""
    require_tool("gcc")
    spec = estgen.load_model(example_model(example))
    gen = generate(spec, filter=filt, precision=precision, optimize="size")
    assert gen.files == generate(spec, filter=filt, precision=precision, optimize="size").files
    assert "--optimize size" in gen.header
    src = _write(gen, tmp_path)
    proc = subprocess.run(["gcc", *STRICT_FLAGS, "-Wvla", "-O2", "-c", src, "-o", str(tmp_path / "f.o")],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    res = verify(spec, filter=filt, precision=precision, steps=300, seed=7, optimize="size")
    assert res.ok, res.as_dict()


def test_optimize_size_uses_the_compact_forms():
    # the 15-state example: loops over F's non-zeros, one shared scalar update, a loop factorization
    spec = estgen.load_model(example_model("strapdown_nav"))
    size = generate(spec, filter="ekf", precision="float", optimize="size").source
    speed = generate(spec, filter="ekf", precision="float").source
    assert "static const uint16_t Fr[" in size and "_scalar_update(" in size and "_cholesky(" in size
    assert "static const uint16_t Fr[" not in speed  # F is sparse: straight-line under speed
    assert len(size) < len(speed)


# The compact forms on models the examples do not cover: the benchmark's synthetic models
# (benchmarks/synthetic.py: a fully coupled F and H, and a sparse chain above 12 states, each with
# a correlated two-component sensor, i.e. a constant full R) and an attitude model whose
# magnetometer has a full R. Under both --optimize forms, in both precisions, the C must compute
# what the numpy reference computes (estgen.reference: the textbook EKF, Simon, Optimal State
# Estimation, 2006, ch. 13, with the block update for a full R), to the same tolerances as
# test_c_matches_reference, compile clean and stay deterministic.
sys.path.insert(0, os.path.join(ROOT, "benchmarks"))
from synthetic import write_model  # noqa: E402

# full_r_param: a full R with a parameter is not whitened, so it keeps the block update under size
COMPACT_MODELS = [("dense", 8), ("dense", 6), ("sparse", 13), ("attitude_corr_mag", 0), ("full_r_param", 0)]


def _compact_model(kind: str, n: int, tmp_path) -> str:
    if n == 0:
        return os.path.join(ROOT, "tests", "models", f"{kind}.py")
    return write_model(kind, n, str(tmp_path))


@pytest.mark.parametrize("optimize", ["speed", "size"])
@pytest.mark.parametrize("precision", ["float", "double"])
@pytest.mark.parametrize("kind,n", COMPACT_MODELS, ids=[f"{k}{n or ''}" for k, n in COMPACT_MODELS])
def test_compact_forms_match_reference_on_more_models(kind, n, precision, optimize, tmp_path):
    require_tool("gcc")
    spec = estgen.load_model(_compact_model(kind, n, tmp_path))
    gen = generate(spec, filter="ekf", precision=precision, optimize=optimize)
    assert gen.files == generate(spec, filter="ekf", precision=precision, optimize=optimize).files
    src = _write(gen, tmp_path)
    proc = subprocess.run(["gcc", *STRICT_FLAGS, "-Wvla", "-O2", "-c", src, "-o", str(tmp_path / "f.o")],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    res = verify(spec, filter="ekf", precision=precision, steps=300, seed=7, optimize=optimize)
    assert res.ok, res.as_dict()
    # every sensor, the correlated one included, was exercised and accepted
    for name, cov in res.coverage["sensors"].items():
        assert cov["c"].get("OK", 0) >= 50, (name, cov)


def test_compact_forms_are_chosen_by_the_documented_rule(tmp_path):
    # docs/performance.md, "The rule speed follows": a dense F gets the plain loops over a full
    # local F from DENSE_F_MIN_N states under speed (from COMPACT_MIN_N under size); a sparse F its
    # table of non-zeros under size only; a constant full R is whitened where the scalar update is
    # the shared function (above UNROLL_SCALAR_UPDATE_MAX states under speed, from COMPACT_MIN_N
    # under size)
    def src(kind: str, n: int, optimize: str) -> str:
        spec = estgen.load_model(write_model(kind, n, str(tmp_path)))
        return generate(spec, filter="ekf", precision="float", optimize=optimize).source

    d8, d6, d6s = src("dense", 8, "speed"), src("dense", 6, "speed"), src("dense", 6, "size")
    assert "const float Fd[8][8] = {" in d8 and "Fr[" not in d8 and "whitened" not in d8
    assert "Fd[" not in d6 and "_scalar_update(" not in d6  # straight-line below 8 states
    assert "const float Fd[6][6] = {" in d6s and "whitened" in d6s
    s13, s13s = src("sparse", 13, "speed"), src("sparse", 13, "size")
    assert "Fd[" not in s13 and "Fr[" not in s13 and "whitened" in s13
    assert "static const uint16_t Fr[" in s13s and "Fd[" not in s13s and "whitened" in s13s
    assert "whitened" not in src("sparse", 12, "speed")  # the block update stays unrolled at 12


def test_whitening_factor_against_scipy():
    # Source: the Cholesky factorization R = L L' (scipy.linalg.cholesky); whitening by L^-1 makes
    # the noise covariance the identity, L^-1 R L^-T = I (Bierman 1977, ch. II)
    import sympy as sp

    from estgen.derive import whitening_factor

    R = np.array([[0.02, 0.005, 0.001], [0.005, 0.03, -0.004], [0.001, -0.004, 0.011]])
    Rm = {(i, j): sp.Float(R[i, j]) for i in range(3) for j in range(i, 3)}
    iL = np.array(whitening_factor(Rm, 3))
    assert np.all(np.triu(iL, 1) == 0.0)
    np.testing.assert_allclose(iL @ R @ iL.T, np.eye(3), atol=1e-14)
    np.testing.assert_allclose(iL, np.linalg.inv(scipy.linalg.cholesky(R, lower=True)), rtol=1e-13)
    # refused: an expression (a parameter), an indefinite R, an ill-conditioned R, a scalar
    Rp = dict(Rm)
    Rp[(0, 0)] = sp.Symbol("par->r")
    assert whitening_factor(Rp, 3) is None
    bad = {(0, 0): sp.Float(1.0), (0, 1): sp.Float(2.0), (1, 1): sp.Float(1.0)}
    assert whitening_factor(bad, 2) is None
    ill = {(0, 0): sp.Float(1.0), (0, 1): sp.Float(0.0), (1, 1): sp.Float(1e-9)}
    assert whitening_factor(ill, 2) is None
    assert whitening_factor({(0, 0): sp.Float(0.5)}, 1) is None
