"""The particle filter's numerics: generator, Gaussian draws, resampling, and the reference filter
against an exact grid-based Bayes filter."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
import sympy as sp

import estgen
from estgen import Model, Status, validate
from estgen.errors import ModelError
from estgen.pf import ReferencePF, fill_in_place, kernel_bandwidth, pf_options, psd_cholesky, systematic_counts
from estgen.rng import MODULUS, Rng, next_state, seed_state, uniform_double, uniform_float


# -- the generator -----------------------------------------------------------------------------

def test_lehmer_48271_reference_value():
    # ISO C++11 [rand.predef] (minstd_rand, Park, Miller & Stockmeyer 1993): from state 1, the
    # 10000th value is 399268537 (from memory).
    x = 1
    for _ in range(10000):
        x = next_state(x)
    assert x == 399268537


def test_fold_equals_the_modular_product():
    # the division-free fold must equal 48271 x mod (2^31 - 1) everywhere, extremes included
    rng = np.random.default_rng(5)
    xs = [1, 2, MODULUS - 1, MODULUS - 2, 2 ** 30, 2 ** 31 - 3] + [int(v) for v in rng.integers(1, MODULUS, 2000)]
    for x in xs:
        assert next_state(x) == (48271 * x) % MODULUS


def test_seeds_and_uniforms_stay_inside_the_open_interval():
    for seed in (0, 1, 2, 3, 0xFFFFFFFF, 123456789):
        assert 1 <= seed_state(seed) <= MODULUS - 1
    for x in (1, MODULUS - 1):
        assert 0.0 < uniform_double(x) < 1.0
        assert 0.0 < uniform_float(x) < 1.0
    assert len({seed_state(s) for s in range(1000)}) == 1000


def test_gaussian_draws_fit_scipy_normal():
    # Kolmogorov-Smirnov against scipy.stats.norm (scipy's own implementation of the normal
    # CDF); both members of each polar pair are checked, and consecutive draws are uncorrelated.
    r = Rng(3)
    z = r.normals(40000)
    assert scipy.stats.kstest(z, scipy.stats.norm.cdf).pvalue > 1e-3
    assert scipy.stats.kstest(z[0::2], scipy.stats.norm.cdf).pvalue > 1e-3
    assert scipy.stats.kstest(z[1::2], scipy.stats.norm.cdf).pvalue > 1e-3
    # sample moments: 5-sigma bounds of a standard normal sample (common practice)
    assert abs(z.mean()) < 5 / math.sqrt(z.size)
    assert abs(z.var() - 1.0) < 5 * math.sqrt(2 / z.size)
    assert abs(np.corrcoef(z[:-1], z[1:])[0, 1]) < 5 / math.sqrt(z.size)


def test_uniform_draws_fit_scipy_uniform():
    r = Rng(9)
    u = np.array([r.uniform() for _ in range(40000)])
    assert scipy.stats.kstest(u, scipy.stats.uniform.cdf).pvalue > 1e-3


# -- resampling ---------------------------------------------------------------------------------

def test_systematic_resampling_expected_counts():
    # Kitagawa (1996): systematic resampling is unbiased, E[count_i] = N w_i, and each count is
    # floor(N w_i) or floor(N w_i) + 1 (a slice of length N w_i holds that many unit-spaced positions).
    rng = np.random.default_rng(1)
    N = 50
    w = rng.gamma(0.3, size=N)
    w[3] = 0.0
    wn = w / w.sum()
    runs = 4000
    total = np.zeros(N)
    for _ in range(runs):
        c = systematic_counts(w, rng.random())
        assert c.sum() == N
        assert np.all(c >= np.floor(N * wn - 1e-9)) and np.all(c <= np.floor(N * wn + 1e-9) + 1)
        total += c
    mean = total / runs
    # each count varies within one: its standard deviation is at most 1/2, so the mean of
    # `runs` counts is within 5 / (2 sqrt(runs)) of N w_i unless the resampling is biased
    assert np.max(np.abs(mean - N * wn)) < 5 / (2 * math.sqrt(runs))
    assert mean[3] == 0.0


def test_fill_in_place_keeps_the_drawn_multiset():
    rng = np.random.default_rng(2)
    N = 40
    X = rng.standard_normal((N, 3))
    counts = systematic_counts(rng.gamma(0.2, size=N), 0.37)
    Y = X.copy()
    fill_in_place(Y, counts)
    want = sorted(tuple(X[i]) for i in range(N) for _ in range(counts[i]))
    assert sorted(tuple(r) for r in Y) == want
    for i in np.flatnonzero(counts > 0):  # a drawn particle keeps its own slot
        assert np.array_equal(Y[i], X[i])


def test_semidefinite_cholesky():
    A = np.diag([4.0, 0.0, 9.0])
    L = psd_cholesky(A)
    assert L is not None and np.allclose(L @ L.T, A) and L[1, 1] == 0.0
    assert psd_cholesky(np.diag([1.0, -1.0])) is None
    B = np.array([[4.0, 2.0], [2.0, 3.0]])
    assert np.allclose(psd_cholesky(B), np.linalg.cholesky(B))  # numpy's factor for a definite matrix


# -- against an exact grid-based Bayes filter ---------------------------------------------------

def _growth_model() -> estgen.ModelSpec:
    # The univariate nonstationary growth model of Arulampalam et al., IEEE Trans. Signal
    # Process. 50(2), 2002, sec. VI (after Kitagawa 1996; Gordon et al. 1993): the measurement
    # x^2/20 leaves the sign of x ambiguous, so the posterior is often bimodal.
    m = Model("growth")
    (x,) = m.states("x")
    (u,) = m.inputs("u")  # the forcing 8 cos(1.2 k), passed as an input
    m.process([x / 2 + 25 * x / (1 + x ** 2) + u])
    m.process_noise([10.0])
    m.sensor("sq", [x ** 2 / 20], noise=[1.0])
    m.initial([0.1], [[5.0]])
    return validate(m)


def _box_model() -> estgen.ModelSpec:
    # a uniform prior on a box, a drift with a sine, a cubic sensor (skewed posterior); invented
    m = Model("boxcube")
    (x,) = m.states("x")
    m.process([x + 0.3 * sp.sin(x)])
    m.process_noise([0.05])
    m.sensor("cube", [x ** 3 / 4], noise=[0.5])
    m.initial_uniform([-2.0], [3.0])
    return validate(m)


def _grid_run(spec, f, h, Q, R, prior, inputs, steps, particles, seed, regularization=None):
    """Numerical integration of the Bayes recursion on a fine grid (Arulampalam et al. 2002,
    sec. III-B), beside the reference particle filter on the same simulated data. Returns the
    largest |mean error| / posterior std and the median over the steps of |variance error| /
    posterior variance. (Not the largest: where x^2/20 leaves a mirror mode holding 0.1% of
    the probability 35 units away, that mode makes most of the variance and a handful of
    particles estimate it; the worst step's variance error of the plain bootstrap filter is 0.3
    to 0.6 over seeds 1 to 3, measured.)"""
    g = np.linspace(-45.0, 45.0, 2401)
    p = prior(g)
    p = p / p.sum()
    pf = ReferencePF(spec, particles=particles, seed=seed, regularization=regularization)
    rng = np.random.default_rng(seed)
    xt = float(rng.choice(g, p=p))
    worst_m = 0.0
    errs_v = []
    for k in range(1, steps + 1):
        u = inputs(k)
        xt = f(xt, u) + math.sqrt(Q) * rng.standard_normal()
        z = h(xt) + math.sqrt(R) * rng.standard_normal()
        K = np.exp(-0.5 * (g[:, None] - f(g[None, :], u)) ** 2 / Q)
        p = K @ p
        p = p / p.sum()
        p = p * np.exp(-0.5 * (z - h(g)) ** 2 / R)
        p = p / p.sum()
        mu = float(p @ g)
        var = float(p @ (g - mu) ** 2)
        assert pf.predict([u] if spec.nu else [], 1.0) == Status.OK
        assert pf.update(spec.sensors[0].name, [z]) == Status.OK
        worst_m = max(worst_m, abs(pf.x[0] - mu) / math.sqrt(var))
        errs_v.append(abs(pf.P[0, 0] - var) / var)
    return worst_m, float(np.median(errs_v))


@pytest.mark.slow
@pytest.mark.parametrize("regularization", [0.0, None], ids=["bootstrap", "regularized"])
def test_posterior_matches_grid_filter_growth_model(regularization):
    # the plain bootstrap filter and the default (regularization kernel at resampling)
    spec = _growth_model()
    wm, mv = _grid_run(
        spec, lambda x, u: x / 2 + 25 * x / (1 + x ** 2) + u, lambda x: x ** 2 / 20, 10.0, 1.0,
        lambda g: np.exp(-0.5 * (g - 0.1) ** 2 / 5.0), lambda k: 8 * math.cos(1.2 * k), 25, 20000, 7,
        regularization)
    # Monte Carlo error of 20000 particles: a few hundredths of a posterior std
    assert wm < 0.1, wm
    assert mv < 0.1, mv


@pytest.mark.slow
@pytest.mark.parametrize("regularization", [0.0, None], ids=["bootstrap", "regularized"])
def test_posterior_matches_grid_filter_uniform_prior(regularization):
    spec = _box_model()
    wm, mv = _grid_run(
        spec, lambda x, u: x + 0.3 * np.sin(x), lambda x: x ** 3 / 4, 0.05, 0.5,
        lambda g: ((g >= -2.0) & (g <= 3.0)).astype(float), lambda k: 0.0, 25, 20000, 4, regularization)
    assert wm < 0.1, wm
    assert mv < 0.1, mv


# -- the reference filter's contract ------------------------------------------------------------

def test_initial_uniform_gives_box_moments_to_the_kalman_filters():
    spec = _box_model()
    # mean (a + b) / 2 and variance (b - a)^2 / 12 of a uniform distribution (textbook)
    assert spec.x0 == (0.5,)
    assert spec.P0 == ((25.0 / 12.0,),)
    ekf = estgen.reference(spec, filter="ekf")
    assert np.allclose(ekf.x, [0.5]) and np.allclose(ekf.P, [[25.0 / 12.0]])
    pf = estgen.reference(spec, filter="pf", particles=4000, seed=2)
    X = pf.particles
    assert X.min() >= -2.0 and X.max() <= 3.0
    assert scipy.stats.kstest(X[:, 0], scipy.stats.uniform(loc=-2.0, scale=5.0).cdf).pvalue > 1e-3


def test_initial_uniform_errors():
    m = Model("bad")
    m.states("a b")
    with pytest.raises(ModelError, match="lower < upper"):
        m.initial_uniform([0.0, 1.0], [1.0, 1.0])
    with pytest.raises(ModelError, match="one pair per state"):
        m.initial_uniform([0.0, 1.0], [1.0])
    m.initial_uniform([0.0, 0.0], [1.0, 2.0])
    with pytest.raises(ModelError, match="already declared"):
        m.initial([0.0, 0.0], [1.0, 1.0])


def test_set_state_gives_exact_moments():
    spec = _growth_model()
    pf = ReferencePF(spec, particles=300, seed=5)
    assert pf.set_state([2.5], [[0.7]]) == Status.OK
    assert np.allclose(pf.x, [2.5], rtol=0, atol=1e-12) and np.allclose(pf.P, [[0.7]], rtol=1e-12)
    assert pf.set_state([np.nan], [[1.0]]) == Status.BAD_INPUT
    assert pf.set_state([0.0], [[-1.0]]) == Status.NOT_POSITIVE_DEFINITE
    assert np.allclose(pf.x, [2.5], rtol=0, atol=1e-12)


def test_same_seed_same_filter_other_seed_other_draws():
    spec = _growth_model()
    a, b, c = (ReferencePF(spec, particles=200, seed=s) for s in (4, 4, 5))
    for f in (a, b, c):
        f.predict([1.0], 1.0)
        f.update("sq", [3.0])
    assert np.array_equal(a.particles, b.particles) and np.array_equal(a.x, b.x)
    assert not np.array_equal(a.particles, c.particles)


def _snapshot(pf: ReferencePF):
    return (pf.particles, pf.log_weights, pf.weights, pf.x, pf.P, pf.rng.snapshot())


def _same(a, b) -> bool:
    return all(np.array_equal(u, v) if isinstance(u, np.ndarray) else u == v for u, v in zip(a, b))


def test_refusals_leave_the_filter_unchanged():
    m = Model("domain")
    (x,) = m.states("x")
    m.process([sp.sqrt(x)])  # undefined for x < 0
    m.process_noise([0.01])
    m.sensor("lg", [sp.log(x)], noise=[0.1])
    m.initial([1.0], [[0.01]])
    m.scenario(dt=0.1)
    spec = validate(m)
    pf = ReferencePF(spec, particles=100, seed=1)
    assert pf.predict([], 0.1) == Status.OK
    before = _snapshot(pf)
    assert pf.predict([], float("nan")) == Status.BAD_INPUT
    assert pf.predict([], 0.0) == Status.BAD_DT
    assert pf.update("lg", [float("inf")]) == Status.BAD_INPUT
    assert _same(before, _snapshot(pf))
    # every particle below zero: f is NaN for all of them, predict refuses and changes nothing
    assert pf.set_state([-5.0], [[0.01]]) == Status.OK
    before = _snapshot(pf)
    assert pf.predict([], 0.1) == Status.NON_FINITE
    assert _same(before, _snapshot(pf))
    # log of a negative: no particle has a finite likelihood
    assert pf.update("lg", [0.0]) == Status.DEGENERATE
    assert _same(before, _snapshot(pf))


def test_dropped_particles_and_log_domain_weights():
    m = Model("domain2")
    (x,) = m.states("x")
    m.process([sp.sqrt(x)])
    m.process_noise([0.01])
    m.sensor("p", [x], noise=[1e-4])
    m.initial([0.5], [[0.25]])
    m.scenario(dt=0.1)
    pf = ReferencePF(validate(m), particles=400, seed=3)
    neg = int(np.sum(pf.particles < 0))
    assert neg > 0
    assert pf.predict([], 0.1) == Status.OK
    assert int(np.sum(pf.weights == 0.0)) == neg  # dropped, not refused
    assert np.all(np.isfinite(pf.x)) and pf.P[0, 0] > 0
    # a measurement 1e4 sigma from every particle: linear weights would all underflow to zero,
    # log-domain weights with max subtraction keep the best particle at weight 1
    assert pf.update("p", [3.0]) == Status.OK
    assert np.max(pf.weights) == 1.0 or np.all(pf.weights == 1.0)


def test_resampling_threshold():
    spec = _growth_model()
    never = ReferencePF(spec, particles=200, seed=2, resample_threshold=1e-9)
    always = ReferencePF(spec, particles=200, seed=2, resample_threshold=1.0)
    for f in (never, always):
        f.predict([0.0], 1.0)
        f.update("sq", [2.0])
    assert np.all(always.weights == 1.0)  # resampled: equal weights
    w = never.weights
    assert not np.all(w == 1.0)  # kept its weights
    ess = w.sum() ** 2 / (w * w).sum()
    assert ess < 200


def test_options_are_checked():
    with pytest.raises(ModelError, match="particles"):
        pf_options(3, {"particles": 3})
    with pytest.raises(ModelError, match="resample_threshold"):
        pf_options(1, {"resample_threshold": 0.0})
    with pytest.raises(ModelError, match="roughening"):
        pf_options(1, {"roughening": -1.0})
    with pytest.raises(ModelError, match="unknown"):
        pf_options(1, {"alpha": 1.0})
    assert pf_options(2, {}).particles == 500
    # the regularization kernel by default; roughening replaces it; both at once is refused
    assert pf_options(2, {}).regularization == 1.0
    assert pf_options(2, {"roughening": 0.2}).regularization == 0.0
    assert pf_options(2, {"regularization": 0.0}).bandwidth(2) == 0.0
    with pytest.raises(ModelError, match="roughening and regularization"):
        pf_options(2, {"roughening": 0.2, "regularization": 1.0})
    with pytest.raises(ModelError, match="regularization"):
        pf_options(2, {"regularization": -0.5})


@pytest.mark.parametrize("n", [1, 2, 3, 6])
def test_kernel_bandwidth_is_silvermans(n):
    # scipy.stats.gaussian_kde's Silverman factor (n_samples (d + 2) / 4)^(-1 / (d + 4)) is the
    # bandwidth optimal for a Gaussian density (Silverman 1986), the h_opt of Musso, Oudjane &
    # Le Gland 2001; in one dimension the well-known 1.06 N^(-1/5) (from memory)
    for N in (100, 500, 20000):
        kde = scipy.stats.gaussian_kde(np.random.default_rng(1).standard_normal((n, N)))
        assert kernel_bandwidth(N, n) == pytest.approx(kde.silverman_factor(), rel=1e-12)
    assert kernel_bandwidth(1000, 1) == pytest.approx(1.06 * 1000 ** -0.2, rel=0.01)


def test_regularization_widens_the_cloud_by_one_plus_h_squared():
    # A Gaussian kernel of covariance h^2 S around samples of covariance S gives a density of
    # covariance (1 + h^2) S and the same mean (Silverman 1986, sec. 4.2; Musso et al. 2001):
    # equal weights resample every particle once (systematic, Kitagawa 1996), so the kernel's
    # jitter is all that changes the cloud
    spec = validate(_two_state_model())
    N = 20000
    r = ReferencePF(spec, particles=N, seed=5)
    x, P = np.array([1.0, -2.0]), np.array([[2.0, 0.6], [0.6, 0.5]])
    assert r.set_state(x, P) == Status.OK
    before = r.particles
    r._resample()
    h = kernel_bandwidth(N, 2)
    d = r.particles - before
    assert np.all(np.abs(d) > 0.0)  # every particle moved
    Pn = np.cov(r.particles.T, bias=True)
    sd = np.sqrt(np.diag(P))
    # sampling error of the cross term ~ 2 h / sqrt(N) relative: 5 sigma
    tol = 5 * 2 * h / math.sqrt(N)
    assert np.all(np.abs(Pn - (1 + h * h) * P) / np.outer(sd, sd) < tol), (Pn, (1 + h * h) * P)
    assert np.all(np.abs(r.particles.mean(axis=0) - x) / sd < 5 * h / math.sqrt(N))


def _two_state_model() -> Model:
    m = Model("pair")
    a, b = m.states("a b")
    m.process([a, b])
    m.process_noise(sp.diag(0.01, 0.01))
    m.sensor("s", [a + b], noise=[1.0])
    m.initial([0.0, 0.0], sp.diag(1.0, 1.0))
    return m


def test_roughening_spreads_a_collapsed_cloud():
    # Gordon, Salmond & Smith (1993): jitter of std K E N^(-1/d) after resampling
    spec = _growth_model()
    plain = ReferencePF(spec, particles=500, seed=8, resample_threshold=1.0, regularization=0.0)
    rough = ReferencePF(spec, particles=500, seed=8, resample_threshold=1.0, roughening=0.2)
    for f in (plain, rough):
        f.set_state([10.0], [[4.0]])
        f.update("sq", [5.0])
    assert len(np.unique(rough.particles)) > len(np.unique(plain.particles))
