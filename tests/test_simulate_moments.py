"""The moments path (issue 9): sample mean and Wishart scatter drawn directly.

Outside references: the Wishart moments E[W] = df Sigma and
Var(W_ij) = df (Sigma_ii Sigma_jj + Sigma_ij^2) (standard results, e.g. Muirhead 1982,
"Aspects of Multivariate Statistical Theory", Wiley, Theorem 3.2.8 (from memory for the
theorem number)); scipy 1.17.1's ``scipy.stats.wishart`` mean and var as a second reference;
Kan & Zhou (2007, JFQA 42(3)) for the plug-in rule's expected utility.
"""
import json
from dataclasses import replace

import numpy as np
import pytest
from scipy import stats

from estimators.core import SettingsError
from simulate import kan_zhou, run_resampling, squared_sharpe
from simulate.engine import draw_path
from simulate.generators import NormalGenerator
from tests.conftest import recipe_a
from tests.test_simulate_engine import KZ_RULE, LO_MV, _spec


def test_drawn_moments_have_the_right_distribution():
    mu, cov = recipe_a(3)
    t = 20
    g = NormalGenerator(mu, cov)
    draws = 40_000
    sm = g.draw_moments(np.random.default_rng(5), draws, t)
    assert sm.mean.shape == (draws, 3) and sm.scatter.shape == (draws, 3, 3)
    np.testing.assert_array_equal(sm.scatter, sm.scatter.transpose(0, 2, 1))
    # sample mean ~ N(mu, Sigma / T)
    m_se = np.sqrt(np.diag(cov) / t / draws)
    assert np.all(np.abs(sm.mean.mean(axis=0) - mu) < 4 * m_se)
    np.testing.assert_allclose(np.cov(sm.mean, rowvar=False), cov / t, rtol=0.05, atol=2e-6)
    # S = W / (T - 1): E[S] = Sigma, Var(S_ij) = (S_ii S_jj + S_ij^2) / (T - 1)
    s = sm.scatter / (t - 1)
    var_theory = (np.outer(np.diag(cov), np.diag(cov)) + cov ** 2) / (t - 1)
    se_mean = np.sqrt(var_theory / draws)
    assert np.all(np.abs(s.mean(axis=0) - cov) < 4 * se_mean)
    np.testing.assert_allclose(s.var(axis=0, ddof=1), var_theory, rtol=0.05)
    # scipy.stats.wishart(df = T - 1, scale = Sigma) as a second reference for the scatter
    w = stats.wishart(df=t - 1, scale=cov)
    np.testing.assert_allclose(w.mean(), (t - 1) * cov, rtol=1e-12)
    np.testing.assert_allclose(sm.scatter.var(axis=0, ddof=1), w.var(), rtol=0.05)
    # mean and scatter are independent: their sample correlation is near zero
    c = np.corrcoef(sm.mean[:, 0], sm.scatter[:, 0, 0])[0, 1]
    assert abs(c) < 4 / np.sqrt(draws)


def _dense_wishart(chol, chi, low):
    """W = (L A)(L A)' by numpy: A built with ``tril_indices`` (the Bartlett factor of Smith
    & Hocking 1972: sqrt(chi) on the diagonal, normals below it), two dense products."""
    d, n = chi.shape
    a = np.zeros((d, n, n))
    ii = np.arange(n)
    a[:, ii, ii] = np.sqrt(chi)
    rows, cols = np.tril_indices(n, -1)
    a[:, rows, cols] = low
    b = np.matmul(chol, a)
    return np.matmul(b, b.transpose(0, 2, 1))


@pytest.mark.parametrize("n", [1, 2, 5, 8, 9, 13, 40])
def test_triangular_wishart_kernel(n):
    """The kernel that forms W from the triangles alone: the same W as numpy's two dense
    products to rounding, its plain twin to the bit, and exactly symmetric (sizes around
    the padding to eight columns and the groups of four rows)."""
    from simulate import _kernels as K

    t = 60
    mu, cov = recipe_a(n)
    rng = np.random.default_rng(11 + n)
    d = 3
    chi = rng.chisquare(np.arange(t - 1, t - 1 - n, -1.0), size=(d, n))
    low = rng.standard_normal((d, n * (n - 1) // 2))
    chol = np.linalg.cholesky(cov)
    fast = K.wishart_triangular(chol, chi, low, np.full((d, n, n), np.nan))
    twin = K.wishart_triangular_py(chol, chi, low, np.full((d, n, n), np.nan))
    dense = _dense_wishart(chol, chi, low)
    assert np.array_equal(fast.view(np.int64), twin.view(np.int64))
    np.testing.assert_array_equal(fast, fast.transpose(0, 2, 1))
    np.testing.assert_allclose(fast, dense, rtol=1e-12, atol=1e-15 * np.abs(dense).max())


def test_wishart_moments_at_40_assets():
    """At 40 assets the drawn scatter has the Wishart moments (E[S] = Sigma; Var(S_ij) =
    (S_ii S_jj + S_ij^2) / (T - 1), a standard Wishart moment; scipy.stats.wishart's
    variance as a second reference)."""
    n, t = 40, 60
    mu, cov = recipe_a(n)
    g = NormalGenerator(mu, cov)
    draws = 6_000
    s = g.draw_moments(np.random.default_rng(12), draws, t).scatter / (t - 1)
    var_theory = (np.outer(np.diag(cov), np.diag(cov)) + cov ** 2) / (t - 1)
    z = (s.mean(axis=0) - cov) / np.sqrt(var_theory / draws)
    assert np.abs(z).max() < 5.0                      # 820 distinct entries
    np.testing.assert_allclose(s.var(axis=0, ddof=1).diagonal(), var_theory.diagonal(),
                               rtol=0.15)
    w = stats.wishart(df=t - 1, scale=cov)
    np.testing.assert_allclose((s * (t - 1)).var(axis=0, ddof=1)[:5, :5], w.var()[:5, :5],
                               rtol=0.15)


def test_moments_path_needs_t_minus_one_at_least_n(rng):
    mu, cov = recipe_a(5)
    with pytest.raises(SettingsError, match="T - 1 >= N"):
        NormalGenerator(mu, cov).draw_moments(rng, 3, 5)


def test_auto_chooses_the_path_and_records_it():
    mu, cov = recipe_a(4)
    spec = _spec(mu, cov, [LO_MV], draws=10)
    assert draw_path(spec, 120)[0] == "moments"
    assert draw_path(spec, 4)[0] == "histories"                       # T - 1 < N
    lw = _spec(mu, cov, [("lw", "min-variance", {}, "sample", "ledoit-wolf-identity")], draws=10)
    assert draw_path(lw, 120)[0] == "histories"
    assert draw_path(replace(spec, generator="student-t", degrees_of_freedom=5.0), 120)[0] == "histories"
    with pytest.raises(SettingsError, match="no moments shortcut"):
        draw_path(replace(spec, generator="student-t", degrees_of_freedom=5.0, draw="moments"), 120)
    # explicit moments: a sweep length with T - 1 < N falls back to histories, recorded
    s = run_resampling(replace(spec, draw="moments", sweep_lengths=(3, 60), sweep_draws=20,
                               frontier_points=0)).to_summary()
    assert s["resample"]["draw_path"] == "moments"
    assert s["sweep"]["draw_paths"] == ["histories", "moments"]


def _kz(draw, draws, seed):
    mu, cov = recipe_a(10)
    spec = _spec(mu, cov, [KZ_RULE], draws=draws, seed=seed, frontier_points=0,
                 attribution=False, self_check_draws=draws, draw=draw)
    s = run_resampling(spec).to_summary()
    kz = kan_zhou(squared_sharpe(mu, cov), 10, 120, 3.0)
    return s, kz


def test_kan_zhou_holds_on_the_moments_path():
    s, kz = _kz("moments", 3000, 99)
    pop = s["rules"]["plug-in"]["population"]
    assert s["resample"]["draw_path"] == "moments" and s["self_check"]["draw_path"] == "moments"
    assert abs((pop["ceq_mean"] - kz.expected_utility) / pop["ceq_se"]) < 3
    assert abs(s["self_check"]["standardised_difference"]) < 3


@pytest.mark.slow
def test_kan_zhou_holds_on_the_moments_path_precise():
    s, kz = _kz("moments", 100_000, 5)
    pop = s["rules"]["plug-in"]["population"]
    assert abs((pop["ceq_mean"] - kz.expected_utility) / pop["ceq_se"]) < 3


def test_both_paths_agree_statistically_on_the_same_study():
    mu, cov = recipe_a(6)
    base = _spec(mu, cov, [LO_MV, ("minv", "min-variance", {"long_only": False}, "sample",
                                   "sample")], draws=3000, frontier_points=0)
    a = run_resampling(replace(base, draw="moments")).to_summary()
    b = run_resampling(replace(base, draw="histories")).to_summary()
    assert a["resample"]["draw_path"] == "moments" and b["resample"]["draw_path"] == "histories"
    for name in ("mv", "minv"):
        pa, pb = a["rules"][name]["population"], b["rules"][name]["population"]
        for metric in ("ceq", "variance", "expected_return", "sharpe"):
            se = np.hypot(pa[f"{metric}_se"], pb[f"{metric}_se"])
            assert abs(pa[f"{metric}_mean"] - pb[f"{metric}_mean"]) < 4 * se, (name, metric)
        wa = np.array([a["rules"][name]["weights"][k]["mean"] for k in a["rules"][name]["weights"]])
        wb = np.array([b["rules"][name]["weights"][k]["mean"] for k in b["rules"][name]["weights"]])
        sd = np.array([a["rules"][name]["weights"][k]["sd"] for k in a["rules"][name]["weights"]])
        assert np.all(np.abs(wa - wb) < 4 * sd * np.sqrt(2 / 3000) + 1e-12)
    # the two paths use the random stream differently: same seed, different draws
    assert json.dumps(a["rules"], sort_keys=True) != json.dumps(b["rules"], sort_keys=True)
    # the moments path is reproducible too, whatever the workers
    again = run_resampling(replace(base, draw="moments"), workers=2).to_summary()
    assert json.dumps(again, sort_keys=True) == json.dumps(a, sort_keys=True)


@pytest.mark.parametrize("mean", ["sample", "bayes-stein", "james-stein"])
@pytest.mark.parametrize("covariance", ["sample", "sample-mle"])
def test_moments_path_estimates_equal_the_estimators_on_histories(mean, covariance):
    """Fed the sample mean and scatter of given histories, the moments path's estimates equal
    ``estimators.estimate_batch`` on those histories (so the two paths share one definition)."""
    from estimators import estimate_batch
    from simulate.engine import RuleSpec, _from_sample_moments
    from simulate.generators import SampleMoments

    rng = np.random.default_rng(3)
    mu, cov = recipe_a(6)
    x = rng.multivariate_normal(mu, cov, size=(40, 30))            # (D, T, N)
    m = x.mean(axis=1)
    y = x - m[:, None, :]
    w = np.matmul(y.transpose(0, 2, 1), y)
    sm = SampleMoments(mean=m, scatter=0.5 * (w + w.transpose(0, 2, 1)), length=30)

    class _R:
        name, type, params, needs_mean, needs_covariance = "r", "mean-variance", {}, True, True

    got_m, got_s = _from_sample_moments(sm, RuleSpec(_R(), mean, covariance))
    ref = estimate_batch(x, mean, covariance)
    np.testing.assert_allclose(got_m, ref.mean, rtol=1e-11, atol=1e-15)
    np.testing.assert_allclose(got_s, ref.covariance, rtol=1e-11, atol=1e-17)


def test_shrunk_means_take_the_moments_path():
    mu, cov = recipe_a(5)
    spec = _spec(mu, cov, [("bs", "mean-variance", {"risk_aversion": 3.0}, "bayes-stein", "sample"),
                           ("js", "mean-variance", {"risk_aversion": 3.0}, "james-stein",
                            "sample-mle")], draws=250, frontier_points=0, attribution=False)
    s = run_resampling(spec).to_summary()
    assert s["resample"]["draw_path"] == "moments"
    h = run_resampling(replace(spec, draw="histories")).to_summary()
    for name in ("bs", "js"):
        pa, pb = s["rules"][name]["population"], h["rules"][name]["population"]
        assert abs(pa["ceq_mean"] - pb["ceq_mean"]) < 4 * np.hypot(pa["ceq_se"], pb["ceq_se"])
