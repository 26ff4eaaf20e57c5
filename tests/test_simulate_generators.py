"""Generators: normal, Student-t, iid and stationary bootstrap, automatic block length.

Outside references: arch 8.0.0 (``arch.bootstrap.optimal_block_length``,
``arch.bootstrap.StationaryBootstrap``), scipy 1.17.1 (``scipy.stats.multivariate_t``),
Politis & Romano (1994, JASA 89(428)) for the stationary bootstrap's variance of the mean.
"""
import math

import numpy as np
import pytest
from scipy import stats

from estimators.core import SettingsError, SingularCovarianceError
from simulate.generators import (
    BlockBootstrapGenerator,
    BootstrapGenerator,
    NormalGenerator,
    StudentTGenerator,
    fit_degrees_of_freedom,
    make_generator,
    optimal_block_length,
    population_moments,
    student_t_loglik,
)
from tests.conftest import recipe_a


def _ar1(rng, phi, n, cols=1):
    e = rng.standard_normal((n, cols))
    x = np.empty_like(e)
    x[0] = e[0]
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    return x


def test_population_moments_use_divisor_t(rng):
    x = rng.normal(size=(50, 4))
    mu, cov = population_moments(x)
    np.testing.assert_allclose(mu, x.mean(axis=0), rtol=1e-14)
    np.testing.assert_allclose(cov, np.cov(x, rowvar=False, bias=True), rtol=1e-12)


def test_normal_generator_moments(rng):
    mu, cov = recipe_a(5)
    g = NormalGenerator(mu, cov)
    x = g.draw(rng, 200, 500).reshape(-1, 5)      # 100,000 rows
    se_mean = np.sqrt(np.diag(cov) / x.shape[0])
    assert np.all(np.abs(x.mean(axis=0) - mu) < 4 * se_mean)
    np.testing.assert_allclose(np.cov(x, rowvar=False), cov, atol=4 * np.sqrt(2 / x.shape[0]) * 0.06 ** 2)


@pytest.mark.parametrize("n", [5, 39, 40, 64, 200])
def test_times_factor_t_is_the_product_with_the_factor(rng, n):
    """``times_factor_t(z, L')`` against numpy's general product ``z @ L'`` (to rounding):
    in place from TRIANGULAR_MIN_ASSETS assets (BLAS trmm), a new array below; and the
    normal generator's rows are ``mean + z L'`` for the same normals."""
    from simulate.generators import TRIANGULAR_MIN_ASSETS, times_factor_t

    a = rng.normal(size=(n + 20, n))
    cov = a.T @ a / (n + 20)
    lt = np.ascontiguousarray(np.linalg.cholesky(cov).T)
    z = rng.normal(size=(360, n))
    ref = z @ lt
    work = z.copy()
    x = times_factor_t(work, lt)
    assert x.shape == (360, n) and x.flags.c_contiguous
    assert np.shares_memory(x, work) == (n >= TRIANGULAR_MIN_ASSETS)
    np.testing.assert_allclose(x, ref, rtol=0, atol=1e-13 * np.abs(ref).max())
    assert times_factor_t(np.empty((0, n)), lt).shape == (0, n)

    mu = np.linspace(-0.01, 0.01, n)
    g = NormalGenerator(mu, cov)
    drawn = g.draw(np.random.Generator(np.random.SFC64(7)), 3, 120).reshape(-1, n)
    normals = np.random.Generator(np.random.SFC64(7)).standard_normal((360, n))
    np.testing.assert_allclose(drawn, normals @ g._chol_t + mu, rtol=0,
                               atol=1e-13 * np.abs(drawn).max())


def test_normal_generator_rejects_singular_covariance():
    cov = np.ones((3, 3))
    with pytest.raises(SingularCovarianceError, match="not positive definite"):
        NormalGenerator(np.zeros(3), cov)


def test_student_t_generator_covariance_and_kurtosis(rng):
    mu, cov = recipe_a(3)
    nu = 8.0
    g = StudentTGenerator(mu, cov, nu)
    x = g.draw(rng, 400, 500).reshape(-1, 3)      # 200,000 rows
    np.testing.assert_allclose(np.cov(x, rowvar=False), cov, rtol=0.03, atol=1e-5)
    # excess kurtosis of a t marginal: 6 / (nu - 4) = 1.5 (textbook fact of the t distribution)
    k = stats.kurtosis(x[:, 0])
    assert abs(k - 6 / (nu - 4)) < 0.35


def test_student_t_rejects_nu_at_most_two():
    mu, cov = recipe_a(2)
    with pytest.raises(SettingsError, match="> 2"):
        StudentTGenerator(mu, cov, 2.0)


def test_student_t_loglik_matches_scipy(rng):
    """Our log-likelihood (covariance parameterisation) equals scipy 1.17.1's
    multivariate_t with shape = cov (nu - 2) / nu."""
    mu, cov = recipe_a(4)
    x = rng.normal(size=(30, 4)) * 0.05
    nu = 6.5
    ours = student_t_loglik(nu, x, mu, cov)
    ref = stats.multivariate_t(loc=mu, shape=cov * (nu - 2) / nu, df=nu).logpdf(x).sum()
    assert ours == pytest.approx(ref, rel=1e-12)


def test_fit_degrees_of_freedom_recovers_nu(rng):
    mu, cov = recipe_a(4)
    x = StudentTGenerator(mu, cov, 5.0).draw(rng, 1, 20000)[0]
    nu = fit_degrees_of_freedom(x)
    assert 4.3 < nu < 5.8
    # near-normal data: a large nu
    y = NormalGenerator(mu, cov).draw(rng, 1, 20000)[0]
    assert fit_degrees_of_freedom(y) > 30


def test_bootstrap_draws_history_rows(rng):
    h = rng.normal(size=(40, 3))
    x = BootstrapGenerator(h).draw(rng, 5, 60)
    assert x.shape == (5, 60, 3)
    rows = {tuple(r) for r in h}
    assert all(tuple(r) in rows for r in x.reshape(-1, 3))


@pytest.mark.parametrize("phi,n", [(0.0, 500), (0.5, 1000), (0.8, 2000), (0.95, 50), (-0.5, 20),
                                   (0.3, 120)])
def test_optimal_block_length_equals_arch(phi, n):
    """Exact equality with arch 8.0.0's optimal_block_length on fixed data (REFERENCES §9b);
    arch's result columns are named 'stationary' and 'circular'."""
    from arch.bootstrap import optimal_block_length as arch_obl

    x = _ar1(np.random.default_rng(9), phi, n, cols=3)
    ref = arch_obl(x)
    assert list(ref.columns) == ["stationary", "circular"]
    ours = optimal_block_length(x)
    np.testing.assert_array_equal(ours.stationary, ref["stationary"].to_numpy())
    np.testing.assert_array_equal(ours.circular, ref["circular"].to_numpy())
    # b_CB / b_SB = (3/2)^(1/3) whenever neither hits the cap (REFERENCES §9b)
    cap = math.ceil(min(3 * math.sqrt(n), n / 3))
    free = (ours.circular < cap) & (ours.stationary > 0)
    np.testing.assert_allclose(ours.circular[free] / ours.stationary[free], 1.5 ** (1 / 3),
                               rtol=1e-12)


def test_optimal_block_length_ar1_theory():
    """Loose check against the AR(1) theory b = (2 phi / (1 - phi^2))^(2/3) n^(1/3)
    (REFERENCES §9b: the estimator is noisy and biased slightly low)."""
    rng = np.random.default_rng(31)
    est = [optimal_block_length(_ar1(rng, 0.5, 1000)).stationary[0] for _ in range(40)]
    theory = (2 * 0.5 / (1 - 0.25)) ** (2 / 3) * 1000 ** (1 / 3)
    assert abs(np.mean(est) / theory - 1) < 0.2


def _sb_variance_formula(x, p):
    """Var*(mean) of the stationary bootstrap, conditional on the data (Politis & Romano 1994;
    REFERENCES §9a): (1/N)[C(0) + 2 sum_i b_N(i) C(i)], b_N(i) = (1-i/N)(1-p)^i + (i/N)(1-p)^(N-i)."""
    n = x.shape[0]
    d = x - x.mean()
    c = np.array([d[i:] @ d[:n - i] / n for i in range(n)])
    i = np.arange(1, n)
    b = (1 - i / n) * (1 - p) ** i + (i / n) * (1 - p) ** (n - i)
    return (c[0] + 2 * np.sum(b * c[1:])) / n


def test_stationary_bootstrap_variance_of_the_mean():
    """Our stationary bootstrap's Var*(mean) against the exact formula and against arch 8.0.0's
    StationaryBootstrap on the same data (AR(1), phi = 0.5, N = 200, mean block 20)."""
    from arch.bootstrap import StationaryBootstrap

    x = _ar1(np.random.default_rng(5), 0.5, 200)
    g = BlockBootstrapGenerator(x, 20.0)
    rng = np.random.default_rng(77)
    reps = 20000
    means = g.draw(rng, reps, 200)[:, :, 0].mean(axis=1)
    exact = _sb_variance_formula(x[:, 0], 1 / 20)
    ours = means.var(ddof=1)
    # se of a sample variance of near-normal means: var * sqrt(2 / (reps - 1))
    se = exact * math.sqrt(2 / (reps - 1))
    assert abs(ours - exact) < 4 * se
    assert abs(means.mean() - x.mean()) < 4 * math.sqrt(exact / reps)
    bs = StationaryBootstrap(20, x[:, 0], seed=np.random.default_rng(78))
    arch_var = bs.apply(lambda y: np.array([y.mean()]), reps).var(ddof=1)
    assert abs(arch_var - exact) < 4 * se
    assert abs(ours - arch_var) < 4 * math.sqrt(2) * se


def test_stationary_bootstrap_restart_count():
    """Visible restarts per resampled series: (N-1) p (1 - 1/N) (REFERENCES §9a)."""
    x = np.arange(100.0)[:, None]
    g = BlockBootstrapGenerator(x, 10.0)
    idx = g.indices(np.random.default_rng(3), 5000, 100)
    visible = ((idx[:, 1:] - idx[:, :-1]) % 100 != 1).sum(axis=1)
    expect = 99 * 0.1 * (1 - 1 / 100)
    assert abs(visible.mean() - expect) < 4 * visible.std(ddof=1) / math.sqrt(5000)


def test_make_generator_automatic_block_length_and_errors(rng):
    x = _ar1(rng, 0.5, 300, cols=2)
    mu, cov = population_moments(x)
    g = make_generator("block-bootstrap", mean=mu, cov=cov, history=x)
    assert g.automatic
    assert g.block_length == pytest.approx(np.mean(optimal_block_length(x).stationary))
    with pytest.raises(SettingsError, match="resamples a history"):
        make_generator("bootstrap", mean=mu, cov=cov, history=None)
    with pytest.raises(SettingsError, match="not one of"):
        make_generator("gaussian", mean=mu, cov=cov, history=x)
