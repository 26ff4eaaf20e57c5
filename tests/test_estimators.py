"""Estimators checked against outside sources: published formulas and worked examples
(../shared/REFERENCES.md sections 5, 6 and 10), numpy 2.4, scikit-learn 1.9.1 and pandas 3.1.

Conventions matched for the library checks: the shrinkage estimators demean each column
and shrink the 1/T covariance, which is scikit-learn's ``LedoitWolf``/``OAS`` with
``assume_centered=False`` (the default); the EWMA covariance is pandas'
``ewm(alpha=1-decay, adjust=True).cov(bias=False)`` (pandas' defaults).
"""
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from sklearn.covariance import OAS, LedoitWolf

import estimators as E
from estimators import _kernels
from estimators._chunk import Chunk
from tests.conftest import recipe_a

#: The deterministic 6 x 3 data of REFERENCES.md section 5b / 6.
X63 = np.array([[1, 2, 0], [3, 1, 2], [0, 4, 1], [2, 2, 5], [4, 0, 3], [1, 3, 2]], dtype=float)
#: Jorion's toy of REFERENCES.md section 10 (T = 8, N = 3).
TOY = np.array([(.02, .01, .03), (-.01, 0, .02), (.03, .02, -.01), (0, .01, .01),
                (.01, -.02, .04), (.02, .03, 0), (-.02, .01, .02), (.04, 0, .01)])

ESTIMATED_COVS = [c for c in E.COVARIANCE_ESTIMATORS if c != "given"]
SHRINK_COVS = ["ledoit-wolf-identity", "ledoit-wolf-constant-correlation",
               "ledoit-wolf-single-index", "oas"]
EWMA = {"ewma_decay": 0.9}


def recipe_a_returns(rng, T, n):
    """Gaussian returns with Recipe A's moments (REFERENCES.md section 0)."""
    mu, cov = recipe_a(n)
    return rng.multivariate_normal(mu, cov, size=T)


def windows(rng, D, T, n):
    mu, cov = recipe_a(n)
    L = np.linalg.cholesky(cov)
    return mu + rng.standard_normal((D, T, n)) @ L.T


# ---------------------------------------------------------------------------------------
# independent re-implementations written from the papers' formulas (double loops)
# ---------------------------------------------------------------------------------------
def loop_lw(X, target):
    """Ledoit-Wolf intensity and shrunk matrix by explicit loops over t, i, j.

    Formulas of REFERENCES.md section 6 (Ledoit & Wolf 2003, J. Empirical Finance; 2004,
    J. Portfolio Management; 2004, J. Multivariate Analysis with rho = 0)."""
    T, N = X.shape
    m = [sum(X[t, i] for t in range(T)) / T for i in range(N)]
    Y = [[X[t, i] - m[i] for i in range(N)] for t in range(T)]
    S = np.zeros((N, N))
    for i in range(N):
        for j in range(N):
            S[i, j] = sum(Y[t][i] * Y[t][j] for t in range(T)) / T
    pi = np.zeros((N, N))
    for i in range(N):
        for j in range(N):
            pi[i, j] = sum((Y[t][i] * Y[t][j] - S[i, j]) ** 2 for t in range(T)) / T
    F = np.zeros((N, N))
    rho = sum(pi[i, i] for i in range(N))
    if target == "identity":
        mu = sum(S[i, i] for i in range(N)) / N
        for i in range(N):
            F[i, i] = mu
        rho = 0.0
    elif target == "constant-correlation":
        pairs = [(i, j) for i in range(N) for j in range(i + 1, N)]
        rbar = sum(S[i, j] / np.sqrt(S[i, i] * S[j, j]) for i, j in pairs) / len(pairs)
        for i in range(N):
            for j in range(N):
                F[i, j] = S[i, i] if i == j else rbar * np.sqrt(S[i, i] * S[j, j])
        theta = np.zeros((N, N))   # theta[i, j] = theta_{ii,ij}
        for i in range(N):
            for j in range(N):
                theta[i, j] = sum((Y[t][i] ** 2 - S[i, i]) * (Y[t][i] * Y[t][j] - S[i, j])
                                  for t in range(T)) / T
        for i in range(N):
            for j in range(N):
                if i != j:
                    rho += rbar / 2 * (np.sqrt(S[j, j] / S[i, i]) * theta[i, j]
                                       + np.sqrt(S[i, i] / S[j, j]) * theta[j, i])
    elif target == "single-index":
        y0 = [sum(Y[t]) / N for t in range(T)]            # equal-weighted market
        s00 = sum(v * v for v in y0) / T
        s0 = [sum(Y[t][i] * y0[t] for t in range(T)) / T for i in range(N)]
        for i in range(N):
            for j in range(N):
                F[i, j] = S[i, i] if i == j else s0[i] * s0[j] / s00
        for i in range(N):
            for j in range(N):
                if i != j:
                    r = sum((s0[j] * s00 * Y[t][i] + s0[i] * s00 * Y[t][j]
                             - s0[i] * s0[j] * y0[t]) * y0[t] * Y[t][i] * Y[t][j] / s00 ** 2
                            for t in range(T)) / T - F[i, j] * S[i, j]
                    rho += r
    gamma = sum((F[i, j] - S[i, j]) ** 2 for i in range(N) for j in range(N))
    kappa = (pi.sum() - rho) / gamma
    delta = min(max(kappa / T, 0.0), 1.0)
    return delta, delta * F + (1 - delta) * S, F


def oas_formula(X, paper_form):
    """OAS intensity written from Chen et al. (2010) eq. (23) (paper_form) or without the
    2/p terms (scikit-learn's form), on the demeaned 1/T covariance."""
    T, p = X.shape
    S = np.cov(X, rowvar=False, bias=True).reshape(p, p)
    tr, tr2 = np.trace(S), np.trace(S @ S)
    c = 2.0 / p if paper_form else 0.0
    return min(((1 - c) * tr2 + tr ** 2) / ((T + 1 - c) * (tr2 - tr ** 2 / p)), 1.0)


# ---------------------------------------------------------------------------------------
# sample covariance vs numpy
# ---------------------------------------------------------------------------------------
def test_sample_covariances_match_numpy_cov(rng):
    X = recipe_a_returns(rng, 40, 6)
    m = E.estimate(X)                                 # numpy 2.4: np.cov, ddof 1
    assert_allclose(m.covariance, np.cov(X, rowvar=False), rtol=1e-13, atol=1e-18)
    assert_allclose(m.mean, X.mean(axis=0), rtol=1e-14)
    assert m.divisor == "T-1" and m.shrinkage is None and m.n_obs == 40
    mle = E.estimate(X, covariance="sample-mle")      # np.cov(bias=True): divisor T
    assert_allclose(mle.covariance, np.cov(X, rowvar=False, bias=True), rtol=1e-13, atol=1e-18)
    assert mle.divisor == "T"


def test_dataframe_keeps_labels():
    df = pd.DataFrame(TOY, columns=["Alder", "Birch", "Cedar"],
                      index=pd.date_range("2030-01-31", periods=8, freq="ME"))
    m = E.estimate(df, covariance="ledoit-wolf-identity")
    assert m.assets == ("Alder", "Birch", "Cedar")
    assert_allclose(m.covariance, E.estimate(TOY, covariance="ledoit-wolf-identity").covariance)
    assert_allclose(m.correlation.diagonal(), 1.0)
    assert_allclose(m.volatility, np.sqrt(np.diag(m.covariance)))
    h = E.History(returns=TOY, dates=df.index.to_numpy(), assets=("Alder", "Birch", "Cedar"),
                  frequency="monthly")
    mh = E.estimate(h, covariance="ledoit-wolf-identity")
    assert mh.assets == m.assets
    assert_allclose(mh.covariance, m.covariance, rtol=1e-15)


# ---------------------------------------------------------------------------------------
# Ledoit-Wolf identity and OAS vs scikit-learn
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("T", [60, 24, 8, 200])
def test_ledoit_wolf_identity_matches_sklearn(rng, T):
    X = 100 * recipe_a_returns(rng, T, 10) + 0.5     # REFERENCES 5a: percent-like units
    ours = E.estimate(X, covariance="ledoit-wolf-identity")
    ref = LedoitWolf().fit(X)                         # scikit-learn: demeaned, divisor 1/T
    assert_allclose(ours.shrinkage, ref.shrinkage_, rtol=1e-12)
    assert_allclose(ours.covariance, ref.covariance_, rtol=1e-12, atol=1e-14)
    assert ours.divisor == "T"


def test_ledoit_wolf_identity_hand_example():
    # REFERENCES.md 5a [numeric]: delta = 0.216 exactly, shrunk [[1.385, .98], [.98, 2.365]]
    X = np.array([[1, 2], [2, 1], [3, 5], [4, 4]], dtype=float)
    m = E.estimate(X, covariance="ledoit-wolf-identity")
    assert_allclose(m.shrinkage, 0.216, rtol=1e-13)
    assert_allclose(m.covariance, [[1.385, 0.98], [0.98, 2.365]], rtol=1e-13)


def test_shrinkage_check_values_on_6x3_case():
    # REFERENCES.md sections 5b and 6, [numeric], computed independently of this project
    assert_allclose(E.estimate(X63, covariance="ledoit-wolf-identity").shrinkage,
                    0.4436506107, rtol=1e-9)
    assert_allclose(E.estimate(X63, covariance="oas").shrinkage, 0.7470069504, rtol=1e-9)
    cc = E.estimate(X63, covariance="ledoit-wolf-constant-correlation")
    si = E.estimate(X63, covariance="ledoit-wolf-single-index")
    assert_allclose(cc.shrinkage, 0.1652765700, rtol=1e-9)
    assert_allclose(si.shrinkage, 0.1806445267, rtol=1e-9)
    S = np.cov(X63, rowvar=False, bias=True)
    iu = np.triu_indices(3, 1)
    for m, expected in ((cc, [-0.4641733526, -0.5653268113, -0.5431484315]),
                        (si, [-0.2333333333, 0.9916666667, -0.5666666667])):
        F = (m.covariance - (1 - m.shrinkage) * S) / m.shrinkage
        # the sheet lists the off-diagonals as (0,1), (0,2), (1,2) up to order; compare sets
        assert_allclose(np.sort(F[iu]), np.sort(expected), atol=1e-9)
        assert_allclose(np.diag(F), np.diag(S), rtol=1e-12)


@pytest.mark.parametrize("T", [60, 24, 200])
def test_oas_is_paper_eq23_and_differs_from_sklearn_by_the_2_over_p_terms(rng, T):
    X = 100 * recipe_a_returns(rng, T, 10) + 0.5
    ours = E.estimate(X, covariance="oas")
    assert_allclose(ours.shrinkage, oas_formula(X, paper_form=True), rtol=1e-12)
    sk = OAS().fit(X)                                 # scikit-learn 1.9.1: no 2/p terms
    assert_allclose(sk.shrinkage_, oas_formula(X, paper_form=False), rtol=1e-12)
    # the explicit difference: dropping 2/p raises the intensity here (REFERENCES 5b: +2.7 %
    # relative at T = 60, N = 10)
    assert sk.shrinkage_ > ours.shrinkage
    gap = sk.shrinkage_ / ours.shrinkage - 1
    assert 0.005 < gap < 0.1
    # with scikit-learn's intensity our target and convention reproduce its matrix exactly
    Y = X - X.mean(0)
    S = Y.T @ Y / T
    d_sk = _kernels.oas_intensity(S[None], T, paper_form=False)[0]
    assert_allclose(d_sk, sk.shrinkage_, rtol=1e-12)
    mu = np.trace(S) / 10
    assert_allclose(d_sk * mu * np.eye(10) + (1 - d_sk) * S, sk.covariance_, rtol=1e-12,
                    atol=1e-14)
    assert not np.allclose(ours.covariance, sk.covariance_, rtol=1e-6, atol=0)


def test_oas_6x3_forms():
    # REFERENCES.md 5b: eq. (23) 0.7470069504; without 2/p 0.8967504033 (= scikit-learn)
    assert_allclose(oas_formula(X63, True), 0.7470069504, rtol=1e-9)
    assert_allclose(OAS().fit(X63).shrinkage_, 0.8967504033, rtol=1e-9)
    assert_allclose(E.estimate(X63, covariance="oas").shrinkage, 0.7470069504, rtol=1e-9)


# ---------------------------------------------------------------------------------------
# constant correlation and single index vs the independent double loops
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("target", ["identity", "constant-correlation", "single-index"])
@pytest.mark.parametrize("T,N", [(6, 3), (30, 5), (4, 7), (3, 4)])
def test_ledoit_wolf_targets_match_double_loop(rng, target, T, N):
    X = X63 if (T, N) == (6, 3) else recipe_a_returns(rng, T, N)
    delta, shrunk, _ = loop_lw(X, target)
    m = E.estimate(X, covariance=f"ledoit-wolf-{target}")
    assert_allclose(m.shrinkage, delta, rtol=1e-10, atol=1e-14)
    assert_allclose(m.covariance, shrunk, rtol=1e-10, atol=1e-16)
    assert 0.0 <= m.shrinkage <= 1.0


def test_target_equal_to_sample_reports_zero_intensity(rng):
    # With T = 2 every sample correlation is +-1; for two same-signed rows the
    # constant-correlation target equals S up to round-off, so the intensity is undefined
    # (0/0). We report 0 (the matrix is S either way) instead of a round-off artefact.
    X = rng.standard_normal((1, 3)) * [0.02, 0.03, 0.05]
    X = np.vstack([X, -X])
    m = E.estimate(X, covariance="ledoit-wolf-constant-correlation")
    assert m.shrinkage == 0.0
    assert_allclose(m.covariance, np.cov(X, rowvar=False, bias=True), rtol=1e-12)


def test_kernels_match_numpy_twins(rng):
    X = windows(rng, 7, 15, 6)
    ch = Chunk(X)
    S0 = ch.scatter / 15
    for numba_k, twin in ((_kernels.lw_identity, _kernels.lw_identity_numpy),
                          (_kernels.lw_constant_correlation,
                           _kernels.lw_constant_correlation_numpy),
                          (_kernels.lw_single_index, _kernels.lw_single_index_numpy)):
        S = S0.copy()
        delta = np.empty(7)
        numba_k(ch.Y, S, delta)
        S_twin, d_twin = twin(ch.Y, S0)
        assert_allclose(delta, d_twin, rtol=1e-12)
        assert_allclose(S, S_twin, rtol=1e-12, atol=1e-18)
        # the undecorated Python function of the numba kernel gives the same numbers
        S2 = S0.copy()
        numba_k.py_func(ch.Y, S2, delta)
        assert_allclose(S2, S, rtol=1e-12, atol=1e-18)
    m, Y = np.empty((7, 6)), np.empty_like(X)
    _kernels.center(X, m, Y)
    m2, Y2 = _kernels.center_numpy(X)
    assert_allclose(m, m2, rtol=1e-14)
    assert_allclose(Y, Y2, rtol=1e-12, atol=1e-16)
    A = rng.standard_normal((3, 5, 5))
    B = A.copy()
    _kernels.symmetrize_scale(B, 0.25)
    assert_array_equal(B, _kernels.symmetrize_scale_numpy(A, 0.25))


# ---------------------------------------------------------------------------------------
# EWMA vs pandas
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("decay", [0.94, 0.8, 0.99])
def test_ewma_matches_pandas_ewm_cov(rng, decay):
    X = recipe_a_returns(rng, 50, 4)
    df = pd.DataFrame(X, columns=list("abcd"))
    # pandas 3.1: ewm(alpha, adjust=True).cov(bias=False) is demeaned with the weighted
    # mean and bias-corrected by (sum w)^2 / ((sum w)^2 - sum w^2)
    ref = df.ewm(alpha=1 - decay, adjust=True).cov(bias=False).loc[49].to_numpy()
    m = E.estimate(X, covariance="ewma", params={"ewma_decay": decay})
    assert_allclose(m.covariance, ref, rtol=1e-10, atol=1e-18)
    assert m.params["ewma_decay"] == decay and m.divisor is None


def test_ewma_half_life_convention_and_decay_one(rng):
    X = recipe_a_returns(rng, 40, 3)
    h = 6.0
    ref = pd.DataFrame(X).ewm(halflife=h).cov().loc[39].to_numpy()   # pandas: decay 0.5**(1/h)
    m = E.estimate(X, covariance="ewma", params={"ewma_half_life": h})
    assert_allclose(m.params["ewma_decay"], 0.5 ** (1 / h), rtol=1e-15)
    assert_allclose(m.covariance, ref, rtol=1e-10)
    one = E.estimate(X, covariance="ewma", params={"ewma_decay": 1.0})
    assert_allclose(one.covariance, np.cov(X, rowvar=False), rtol=1e-12)


# ---------------------------------------------------------------------------------------
# means: Bayes-Stein (Jorion 1986) and James-Stein
# ---------------------------------------------------------------------------------------
def test_bayes_stein_toy_example():
    # REFERENCES.md section 10 [numeric]: m, mu0, w and mu_BS of Jorion's formula
    m = E.estimate(TOY, mean="bayes-stein")
    assert_allclose(TOY.mean(0), [0.01125, 0.0075, 0.015], rtol=1e-12)
    assert_allclose(m.mean_shrinkage, 0.9530480147, rtol=1e-9)
    assert_allclose(m.mean, [0.0112989083, 0.0111228384, 0.0114749783], rtol=1e-8)
    # mu0 = mean of the sample GMV portfolio
    mu0 = (m.mean - (1 - m.mean_shrinkage) * TOY.mean(0)) / m.mean_shrinkage
    assert_allclose(mu0, 0.0113013178, rtol=1e-8)


def test_bayes_stein_matches_jorion_formula_written_with_inverse(rng):
    T, N = 40, 6
    X = recipe_a_returns(rng, T, N)
    mbar = X.mean(0)
    Sig = np.cov(X, rowvar=False) * (T - 1) / (T - N - 2)     # Jorion (1986) scaling
    Si = np.linalg.inv(Sig)
    one = np.ones(N)
    mu0 = one @ Si @ mbar / (one @ Si @ one)
    d = mbar - mu0
    w = (N + 2) / ((N + 2) + T * d @ Si @ d)
    m = E.estimate(X, mean="bayes-stein")
    assert_allclose(m.mean_shrinkage, w, rtol=1e-10)
    assert_allclose(m.mean, (1 - w) * mbar + w * mu0, rtol=1e-10)


def test_james_stein_formula(rng):
    T, N = 30, 8
    X = recipe_a_returns(rng, T, N)
    mbar = X.mean(0)
    g = mbar.mean()
    v = np.var(X, axis=0, ddof=1).mean()
    w = min(max((N - 3) * v / (T * ((mbar - g) ** 2).sum()), 0.0), 1.0)
    m = E.estimate(X, mean="james-stein")
    assert_allclose(m.mean_shrinkage, w, rtol=1e-12)
    assert_allclose(m.mean, g + (1 - w) * (mbar - g), rtol=1e-12)
    # three or fewer assets: no shrinkage (positive part of N - 3 <= 0)
    small = E.estimate(X[:, :3], mean="james-stein")
    assert small.mean_shrinkage == 0.0
    assert_allclose(small.mean, X[:, :3].mean(0))
    # works with fewer rows than assets (no inverse needed)
    E.estimate(X[:5], mean="james-stein")


def test_mean_shrinkage_reduces_loss_recipe_a(rng):
    # REFERENCES.md section 10 [MC]: at T=60, N=10 the sample-mean loss (mu~-mu)'S^-1(mu~-mu)
    # is N/T = 0.1667 and Bayes-Stein's about 0.052; a fast 600-draw version of that check.
    mu, cov = recipe_a(10)
    X = windows(rng, 600, 60, 10)
    Si = np.linalg.inv(cov)
    loss = {}
    for name in ("sample", "bayes-stein", "james-stein"):
        b = E.estimate_batch(X, mean=name)
        dev = b.mean - mu
        loss[name] = np.einsum("di,ij,dj->d", dev, Si, dev)
    se = loss["sample"].std() / np.sqrt(600)
    assert abs(loss["sample"].mean() - 10 / 60) < 4 * se
    assert loss["bayes-stein"].mean() < 0.5 * loss["sample"].mean()
    assert loss["james-stein"].mean() < loss["sample"].mean()


def test_covariance_shrinkage_beats_sample_in_frobenius_loss(rng):
    # REFERENCES.md section 6 [MC] (Recipe A, N=10, T=60, 4000 draws): sample 2.369e-5,
    # identity 2.080e-5, constant correlation 2.030e-5, single index 2.211e-5. Fast version.
    _, cov = recipe_a(10)
    X = windows(rng, 1500, 60, 10)
    loss = {}
    for c in ("sample", "ledoit-wolf-identity", "ledoit-wolf-constant-correlation",
              "ledoit-wolf-single-index", "oas"):
        b = E.estimate_batch(X, covariance=c)
        loss[c] = ((b.covariance - cov) ** 2).sum(axis=(1, 2))
    assert abs(loss["sample"].mean() - 2.369e-5) < 4 * loss["sample"].std() / np.sqrt(1500)
    for c in ("ledoit-wolf-identity", "ledoit-wolf-constant-correlation",
              "ledoit-wolf-single-index", "oas"):
        diff = loss["sample"] - loss[c]      # paired comparison
        assert diff.mean() > 2 * diff.std() / np.sqrt(1500), c


# ---------------------------------------------------------------------------------------
# batch == loop; chunking does not matter; structure (symmetric, PSD), edge cases
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("cov", ESTIMATED_COVS)
@pytest.mark.parametrize("mean", ["sample", "bayes-stein", "james-stein"])
def test_batch_equals_loop_and_chunking_is_irrelevant(rng, mean, cov):
    X = windows(rng, 9, 20, 5)
    b = E.estimate_batch(X, mean=mean, covariance=cov, params=EWMA)
    for d in range(9):
        one = E.estimate(X[d], mean=mean, covariance=cov, params=EWMA)
        assert_allclose(b.mean[d], one.mean, rtol=1e-13, atol=1e-17)
        assert_allclose(b.covariance[d], one.covariance, rtol=1e-12, atol=1e-17)
        if one.shrinkage is not None:
            assert_allclose(b.shrinkage[d], one.shrinkage, rtol=1e-12, atol=1e-15)
        if one.mean_shrinkage is not None:
            assert_allclose(b.mean_shrinkage[d], one.mean_shrinkage, rtol=1e-12)
    for cw in (1, 4):
        c = E.estimate_batch(X, mean=mean, covariance=cov, params=EWMA, chunk_windows=cw)
        assert_array_equal(c.mean, b.mean)
        assert_allclose(c.covariance, b.covariance, rtol=1e-14, atol=1e-18)
    assert b.mean.shape == (9, 5) and b.covariance.shape == (9, 5, 5) and len(b) == 9


def _assert_sym_psd(C):
    assert_array_equal(C, np.swapaxes(C, -1, -2))           # exactly symmetric
    ev = np.linalg.eigvalsh(C)
    assert (ev[..., 0] >= -1e-12 * np.abs(ev[..., -1])).all()


@pytest.mark.parametrize("cov", ESTIMATED_COVS)
@pytest.mark.parametrize("T,N", [(60, 10), (5, 12), (3, 30), (2, 4)])
def test_outputs_symmetric_psd_and_intensity_in_unit_interval(rng, cov, T, N):
    X = windows(rng, 6, T, N)
    b = E.estimate_batch(X, covariance=cov, params=EWMA)
    _assert_sym_psd(b.covariance)
    if cov in SHRINK_COVS:
        assert ((0 <= b.shrinkage) & (b.shrinkage <= 1)).all()
        if 2 < T < N:
            # shrinkage makes the T < N estimate positive definite. (With T = 2 both
            # demeaned rows are +-y, so y_t y_t' = S for each t: the estimated variance of
            # S is 0, the intensity is 0 and the estimate stays singular, as the formulas say.)
            assert (np.linalg.eigvalsh(b.covariance)[:, 0] > 0).all()


@pytest.mark.parametrize("cov", ESTIMATED_COVS)
def test_one_asset(rng, cov):
    x = rng.standard_normal((12, 1)) * 0.03
    m = E.estimate(x, mean="james-stein", covariance=cov, params=EWMA)
    assert m.covariance.shape == (1, 1)
    if cov != "ewma":
        ddof = 1 if cov == "sample" else 0
        assert_allclose(m.covariance[0, 0], x.var(ddof=ddof), rtol=1e-12)
    if cov in SHRINK_COVS:
        assert m.shrinkage == 0.0
    if cov == "ledoit-wolf-identity":  # scikit-learn also returns 0 for one feature
        assert LedoitWolf().fit(x).shrinkage_ == 0.0


def test_given_moments(rng):
    mu, cov = recipe_a(4)
    m = E.estimate(None, mean="given", covariance="given", given_mean=mu, given_covariance=cov)
    assert_array_equal(m.mean, mu) and m.n_obs == 0
    assert_allclose(m.covariance, cov)
    X = windows(rng, 3, 10, 4)
    b = E.estimate_batch(X, mean="given", covariance="sample", given_mean=mu)
    assert_array_equal(b.mean, np.tile(mu, (3, 1)))
    df = pd.DataFrame(X[0], columns=list("wxyz"))
    s = pd.Series(mu, index=list("wxyz"))[::-1]      # labels are aligned, not positions
    assert_array_equal(E.estimate(df, mean="given", given_mean=s).mean, mu)
    bad = cov.copy()
    bad[0, 1] = bad[1, 0] = 1.0
    with pytest.raises(E.DataError, match="not positive semi-definite"):
        E.estimate(X[0], covariance="given", given_covariance=bad)
    with pytest.raises(E.SettingsError, match="given_mean"):
        E.estimate(X[0], mean="given")


# ---------------------------------------------------------------------------------------
# errors
# ---------------------------------------------------------------------------------------
def test_unknown_names_list_the_known_ones():
    with pytest.raises(E.SettingsError, match="unknown covariance estimator 'ledoit'.*"
                                               "ledoit-wolf-constant-correlation"):
        E.estimate(TOY, covariance="ledoit")
    with pytest.raises(E.SettingsError, match="unknown mean estimator 'bayes'.*james-stein"):
        E.estimate_batch(TOY[None], mean="bayes")
    with pytest.raises(E.SettingsError, match="unknown estimator parameter.*'halflife'"):
        E.estimate(TOY, params={"halflife": 3})


def test_ewma_parameter_errors():
    with pytest.raises(E.SettingsError, match="needs a half-life.*0.94 for daily"):
        E.estimate(TOY, covariance="ewma")
    with pytest.raises(E.SettingsError, match="not both"):
        E.estimate(TOY, covariance="ewma", params={"ewma_decay": .9, "ewma_half_life": 3})
    with pytest.raises(E.SettingsError, match="0 < decay <= 1"):
        E.estimate(TOY, covariance="ewma", params={"ewma_decay": 1.5})
    with pytest.raises(E.SettingsError, match="> 0"):
        E.estimate(TOY, covariance="ewma", params={"ewma_half_life": -1})


def test_too_few_rows_names_estimator_rows_needed_and_given():
    with pytest.raises(E.DataError, match=r"'bayes-stein' needs at least 6 rows for 3 "
                                          r"asset\(s\).*james-stein.*got 5"):
        E.estimate(TOY[:5], mean="bayes-stein")
    with pytest.raises(E.DataError, match="'sample' needs at least 2 rows.*got 1"):
        E.estimate(TOY[:1])
    assert E.min_rows("bayes-stein", "sample", 10) == 13
    assert E.min_rows("sample", "ledoit-wolf-identity", 10) == 2
    assert E.min_rows("given", "given", 10) == 0
    with pytest.raises(E.SettingsError):
        E.min_rows("nope", "sample", 3)


def test_needs_observations():
    assert not E.needs_observations("sample", "sample")
    assert not E.needs_observations("sample", "sample-mle")
    for mean, cov in (("bayes-stein", "sample"), ("sample", "ewma"), ("james-stein", "sample"),
                      ("sample", "oas"), ("given", "given")):
        assert E.needs_observations(mean, cov)


def test_nan_and_inf_are_located():
    df = pd.DataFrame(TOY, columns=["Alder", "Birch", "Cedar"],
                      index=pd.date_range("2030-01-31", periods=8, freq="ME"))
    df.iloc[3, 1] = np.nan
    with pytest.raises(E.DataError, match=r"NaN at row index 3 \(2030-04-30\), column 'Birch'"):
        E.estimate(df)
    X = np.repeat(TOY[None], 5, axis=0)
    X[3, 6, 2] = np.inf
    with pytest.raises(E.DataError, match="infinite value at draw 3, row index 6, column 2"):
        E.estimate_batch(X, covariance="oas", chunk_windows=2)
    with pytest.raises(E.DataError, match="not numeric"):
        E.estimate(pd.DataFrame({"a": ["x", "y", "z"], "b": [1.0, 2.0, 3.0]}))
    with pytest.raises(E.DataError, match=r"\(T, N\)"):
        E.estimate(np.ones(5))


def test_singular_inputs():
    X = TOY.copy()
    X = np.column_stack([X, X[:, 0] + X[:, 1]])          # exactly collinear fourth asset
    X = np.vstack([X, X])                                 # 16 rows >= N + 3
    with pytest.raises(E.SingularCovarianceError, match="'bayes-stein'.*'james-stein'"):
        E.estimate(X, mean="bayes-stein")
    Xb = np.stack([windows(np.random.default_rng(1), 1, 16, 4)[0], X])
    with pytest.raises(E.SingularCovarianceError, match="draw 1: .*bayes-stein"):
        E.estimate_batch(Xb, mean="bayes-stein")
    S = E.estimate(X).covariance                          # singular, PSD: returned as is
    _assert_sym_psd(S)
    with pytest.raises(E.SingularCovarianceError,
                       match="the covariance of rule 'mv' is singular.*ledoit-wolf"):
        E.check_invertible(S, "the covariance of rule 'mv'")
    shrunk = E.estimate(X, covariance="ledoit-wolf-constant-correlation").covariance
    assert E.check_invertible(shrunk, "x") < 1e12
    conds = E.check_invertible(np.stack([shrunk, np.eye(4)]), "x")
    assert conds.shape == (2,) and conds[1] == 1.0
    with pytest.raises(E.SingularCovarianceError, match=r"\(draw 1\).*condition number"):
        E.check_invertible(np.stack([np.eye(2), np.diag([1.0, 1e-13])]), "x")


def test_zero_variance_asset_for_correlation_targets():
    df = pd.DataFrame(TOY, columns=["Alder", "Birch", "Cedar"])
    df["Cedar"] = 0.01
    with pytest.raises(E.DataError, match="asset 'Cedar' has zero variance.*constant-correlation"):
        E.estimate(df, covariance="ledoit-wolf-constant-correlation")
    # identity-target shrinkage still works and is PSD
    _assert_sym_psd(E.estimate(df, covariance="ledoit-wolf-identity").covariance)
    flat = np.zeros((6, 2)) + [0.01, 0.02]
    with pytest.raises(E.DataError, match="equal-weighted market has zero variance"):
        E.estimate(flat, covariance="ledoit-wolf-single-index")


def test_registry_lists_every_contract_name():
    assert list(E.MEAN_ESTIMATORS) == ["sample", "bayes-stein", "james-stein", "given"]
    assert list(E.COVARIANCE_ESTIMATORS) == [
        "sample", "sample-mle", "ewma", "ledoit-wolf-identity",
        "ledoit-wolf-constant-correlation", "ledoit-wolf-single-index", "oas", "given"]
    for est in list(E.MEAN_ESTIMATORS.values()) + list(E.COVARIANCE_ESTIMATORS.values()):
        assert est.summary and (est.compute is None) == (est.name == "given")


# ---------------------------------------------------------------------------------------
# full-size statistical checks (make test-slow)
# ---------------------------------------------------------------------------------------
@pytest.mark.slow
def test_frobenius_loss_matches_reference_monte_carlo_full():
    # REFERENCES.md section 6 [MC], Recipe A, N=10, T=60, demeaned, 4000 draws:
    # sample 2.369e-5, identity 2.080e-5, constant correlation 2.030e-5, single index 2.211e-5.
    # Both Monte Carlo means carry error; allow 4 se of the difference (se*sqrt(2)).
    rng = np.random.default_rng(6060)
    _, cov = recipe_a(10)
    X = windows(rng, 4000, 60, 10)
    for c, ref in (("sample", 2.369e-5), ("ledoit-wolf-identity", 2.080e-5),
                   ("ledoit-wolf-constant-correlation", 2.030e-5),
                   ("ledoit-wolf-single-index", 2.211e-5)):
        loss = ((E.estimate_batch(X, covariance=c).covariance - cov) ** 2).sum(axis=(1, 2))
        se = loss.std() / np.sqrt(loss.size)
        assert abs(loss.mean() - ref) < 4 * np.sqrt(2) * se, (c, loss.mean(), ref, se)


@pytest.mark.slow
def test_bayes_stein_loss_full():
    # REFERENCES.md section 10 [MC], Recipe A, N=10, T=60, 20000 draws: sample-mean loss
    # 0.16699 (theory N/T = 0.16667), Bayes-Stein 0.05178, mean w 0.595.
    rng = np.random.default_rng(1986)
    mu, cov = recipe_a(10)
    X = windows(rng, 20000, 60, 10)
    Si = np.linalg.inv(cov)
    b = E.estimate_batch(X, mean="bayes-stein")
    dev = b.mean - mu
    loss = np.einsum("di,ij,dj->d", dev, Si, dev)
    se = loss.std() / np.sqrt(loss.size)
    assert abs(loss.mean() - 0.05178) < 4 * np.sqrt(2) * se
    wse = b.mean_shrinkage.std() / np.sqrt(loss.size)
    assert abs(b.mean_shrinkage.mean() - 0.595) < max(4 * np.sqrt(2) * wse, 0.0015)
    s = E.estimate_batch(X, mean="sample").mean - mu
    sl = np.einsum("di,ij,dj->d", s, Si, s)
    assert abs(sl.mean() - 10 / 60) < 4 * sl.std() / np.sqrt(sl.size)


# ---------------------------------------------------------------------------------------
# property check over random shapes and scales (hypothesis)
# ---------------------------------------------------------------------------------------
from hypothesis import given, settings, strategies as st  # noqa: E402


@settings(max_examples=40, deadline=None)
@given(T=st.integers(3, 14), N=st.integers(1, 7), seed=st.integers(0, 2 ** 32 - 1),
       scale=st.sampled_from([1e-4, 0.03, 50.0]), heavy=st.booleans())
def test_random_shapes_symmetric_psd_unit_intensity_and_scale_free(T, N, seed, scale, heavy):
    rng = np.random.default_rng(seed)
    X = rng.standard_t(3, (2, T, N)) if heavy else rng.standard_normal((2, T, N))
    X = scale * (X + rng.standard_normal(N))             # non-zero means, any units
    for cov in SHRINK_COVS:
        b = E.estimate_batch(X, covariance=cov)
        _assert_sym_psd(b.covariance)
        assert ((b.shrinkage >= 0) & (b.shrinkage <= 1)).all()
        # intensities do not depend on the units or on adding constants (REFERENCES 5a)
        b2 = E.estimate_batch(X / scale * 0.01 + 3.0, covariance=cov)
        assert_allclose(b2.shrinkage, b.shrinkage, rtol=1e-7, atol=1e-9)
        one = E.estimate(X[1], covariance=cov)
        assert_allclose(one.covariance, b.covariance[1], rtol=1e-12, atol=1e-300)
