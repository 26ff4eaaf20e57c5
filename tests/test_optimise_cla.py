"""Critical line algorithm: the turning points of REFERENCES.md section 14 (Recipe B,
Markowitz 1956), interpolation against independent QP solves (quadprog, cvxpy), ties and
singular blocks."""
import cvxpy as cp
import numpy as np
import pytest
import quadprog

from conftest import recipe_b
from estimators.core import SettingsError, SingularCovarianceError
from optimise import efficient_frontier, make_constraints

ASSETS4 = ("a", "b", "c", "d")

# REFERENCES.md section 14 check values (Recipe B, annual): lambda, weights, mean, vol.
LONG_ONLY = [
    (1.875, (0, 0, 0, 1), 0.12, 0.25),
    (1.04166667, (0, 0, 0.31746032, 0.68253968), 0.11365079, 0.20971762),
    (0.51269531, (0, 0.34877232, 0.23995536, 0.41127232), 0.10125, 0.15718193),
    (0, (0.71254072, 0.18177059, 0.03955328, 0.06613541), 0.06918567, 0.09092264),
]
BOX_040 = [
    (0.805, (0, 0.2, 0.4, 0.4), 0.104, 0.16858232),
    (0.51525773, (0, 0.35051546, 0.24948454, 0.4), 0.10098969, 0.15635094),
    (0.49595046, (0.02327189, 0.34331797, 0.23341014, 0.4), 0.10020276, 0.15378514),
    (0.22488281, (0.4, 0.25502232, 0.12745536, 0.21752232), 0.08325, 0.10691002),
    (0.005, (0.4, 0.4, 0.0952381, 0.1047619), 0.07809524, 0.10121641),
    (0, (0.4, 0.4, 0.09714286, 0.10285714), 0.07805714, 0.10121547),
]
BOX_005_050 = [
    (0.97, (0.05, 0.05, 0.4, 0.5), 0.107, 0.18239723),
    (0.69696429, (0.05, 0.19183673, 0.25816327, 0.5), 0.10416327, 0.16893790),
    (0.47671875, (0.05, 0.33705357, 0.22589286, 0.38705357), 0.099, 0.14993324),
    (0.15292969, (0.5, 0.23158482, 0.09933036, 0.16908482), 0.07875, 0.09863872),
    (0, (0.5, 0.33241758, 0.07692308, 0.09065934), 0.07516484, 0.09581920),
]


@pytest.mark.parametrize("bounds, table", [
    (None, LONG_ONLY),
    ((0.0, 0.4), BOX_040),
    ((0.05, 0.5), BOX_005_050),
])
def test_turning_points_match_reference(bounds, table):
    mu, S = recipe_b()
    cons = make_constraints(ASSETS4, bounds=None if bounds is None else {a: bounds for a in ASSETS4})
    f = efficient_frontier(mu, S, cons)
    assert len(f.lambdas) == len(table)
    for k, (lam, w, m, vol) in enumerate(table):
        assert f.lambdas[k] == pytest.approx(lam, abs=5e-9)
        np.testing.assert_allclose(f.weights[k], w, atol=5e-9)
        assert f.means[k] == pytest.approx(m, abs=5e-9)
        assert f.volatilities[k] == pytest.approx(vol, abs=5e-9)


def test_resampling_sheet_plain_frontier_ranks():
    # REFERENCES section 13: Recipe B long-only, K = 11 ranks; plain frontier rank 0, 5, 10.
    mu, S = recipe_b()
    f = efficient_frontier(mu, S, make_constraints(ASSETS4))
    P = f.points(11)
    np.testing.assert_allclose(P[0], (0.7125, 0.1818, 0.0396, 0.0661), atol=5e-5)
    np.testing.assert_allclose(P[5], (0.1479, 0.3141, 0.1983, 0.3396), atol=5e-5)
    np.testing.assert_allclose(P[10], (0, 0, 0, 1), atol=1e-12)
    assert P[5] @ mu == pytest.approx(0.0946, abs=5e-5)
    assert np.sqrt(P[5] @ S @ P[5]) == pytest.approx(0.1363, abs=5e-5)


def quadprog_target(mu, S, lo, hi, m):
    """min w'Sw s.t. 1'w = 1, mu'w = m, lo <= w <= hi by quadprog (Goldfarb-Idnani)."""
    n = len(mu)
    C = np.hstack([np.ones((n, 1)), mu[:, None], np.eye(n), -np.eye(n)])
    b = np.r_[1.0, m, lo, -hi]
    return quadprog.solve_qp(S, np.zeros(n), C, b, 2)[0]


@pytest.mark.parametrize("seed", range(8))
def test_frontier_equals_independent_solves(seed):
    # Every point between turning points (by linear interpolation) equals an independent
    # quadprog solve (quadprog 0.1.14, dense Goldfarb-Idnani) at the same expected return,
    # and every turning point is the quadprog solution of min 1/2 w'Sw - lambda mu'w at its
    # lambda.
    rng = np.random.default_rng(seed)
    n = int(rng.integers(3, 12))
    vol = rng.uniform(0.05, 0.3, n)
    X = rng.normal(size=(n + 5, n))
    C = np.corrcoef(X, rowvar=False)
    S = C * np.outer(vol, vol)
    mu = rng.uniform(0.02, 0.12, n)
    lo = np.where(rng.random(n) < 0.3, 0.02, 0.0)
    if seed >= 4:                          # box bounds that allow short positions
        lo = np.where(rng.random(n) < 0.5, -0.2, 0.0)
    hi = np.where(rng.random(n) < 0.5, rng.uniform(0.2, 0.6, n), 1.0)
    if hi.sum() < 1:
        hi[:] = 1.0
    assets = tuple(f"x{i}" for i in range(n))
    cons = make_constraints(assets, long_only=bool(np.all(lo >= 0)),
                            bounds={a: (lo[i], hi[i]) for i, a in enumerate(assets)})
    f = efficient_frontier(mu, S, cons)
    assert np.all(np.diff(f.means) < 0) and np.all(np.diff(f.lambdas) < 0)
    # interior targets (at the very top the equality mu'w = max is degenerate for quadprog)
    targets = f.means[-1] + (f.means[0] - f.means[-1]) * np.linspace(0.0, 0.999, 17)
    W = f.at_returns(targets)
    for m, w in zip(targets, W):
        ref = quadprog_target(mu, S, lo, hi, m)
        np.testing.assert_allclose(w, ref, atol=1e-8)
    for lam, wk in zip(f.lambdas[1:], f.weights[1:]):
        Cq = np.hstack([np.ones((n, 1)), np.eye(n), -np.eye(n)])
        ref = quadprog.solve_qp(S, lam * mu, Cq, np.r_[1.0, lo, -hi], 1)[0]
        np.testing.assert_allclose(wk, ref, atol=1e-9)
    # and the least-variance end agrees with cvxpy (CLARABEL) to its accuracy
    w = cp.Variable(n)
    cp.Problem(cp.Minimize(cp.quad_form(w, cp.psd_wrap(S))),
               [cp.sum(w) == 1, w >= lo, w <= hi]).solve(solver="CLARABEL")
    np.testing.assert_allclose(f.weights[-1], w.value, atol=1e-5)


def test_points_rank_order_and_endpoints():
    mu, S = recipe_b()
    f = efficient_frontier(mu, S, make_constraints(ASSETS4))
    P = f.points(5)
    assert P.shape == (5, 4)
    np.testing.assert_allclose(P[0], f.weights[-1])
    np.testing.assert_allclose(P[-1], f.weights[0])
    assert np.all(np.diff(P @ mu) > 0)
    with pytest.raises(SettingsError, match="between"):
        f.at_returns([0.2])


def test_equal_means_give_a_single_point():
    # All means equal: every efficient portfolio is the minimum-variance portfolio.
    _, S = recipe_b()
    mu = np.full(4, 0.08)
    f = efficient_frontier(mu, S, make_constraints(ASSETS4))
    assert len(f.lambdas) == 1
    np.testing.assert_allclose(f.weights[0], (0.71254072, 0.18177059, 0.03955328, 0.06613541),
                               atol=1e-8)
    np.testing.assert_allclose(f.points(3), np.repeat(f.weights, 3, axis=0))


def test_tied_top_means_end_at_least_variance_mix():
    # Two assets share the largest mean: the top of the frontier is the least-variance mix
    # of the two (the maximum-return portfolio is not unique; common practice), here checked
    # against a direct quadprog solve at that mean.
    mu, S = recipe_b()
    mu = mu.copy()
    mu[2] = mu[3]
    f = efficient_frontier(mu, S, make_constraints(ASSETS4))
    ref = quadprog_target(mu, S, np.zeros(4), np.ones(4), 0.12)
    np.testing.assert_allclose(f.weights[0], ref, atol=1e-9)
    assert f.weights[0][2] > 0 and f.weights[0][3] > 0


def test_perfectly_correlated_pair_singular_covariance():
    # REFERENCES section 4: rho = +1 (rank-1 covariance): long-only, volatility is linear in
    # the weight along the whole frontier (no diversification benefit).
    s1, s2 = 0.2, 0.1
    S = np.array([[s1 * s1, s1 * s2], [s1 * s2, s2 * s2]])
    mu = np.array([0.08, 0.04])
    f = efficient_frontier(mu, S, make_constraints(("x", "y")))
    P = f.points(6)
    x = P[:, 0]
    np.testing.assert_allclose(np.sqrt(np.einsum("ki,ij,kj->k", P, S, P)), x * s1 + (1 - x) * s2,
                               rtol=1e-10)
    np.testing.assert_allclose(x, np.linspace(0, 1, 6), atol=1e-12)


def test_duplicated_asset_singular_covariance():
    # Two identical assets: the split between them is not determined, but the frontier is.
    # The result must be an optimal frontier (the pair's summed weight equals the 4-asset
    # frontier of REFERENCES section 14) or a SingularCovarianceError; never garbage.
    mu, S = recipe_b()
    S5 = np.zeros((5, 5))
    S5[:4, :4] = S
    S5[4, :4] = S[3]
    S5[:4, 4] = S[3]
    S5[4, 4] = S[3, 3]
    mu5 = np.r_[mu, mu[3]]
    try:
        f5 = efficient_frontier(mu5, S5, make_constraints(5))
    except SingularCovarianceError as exc:
        assert "shrinkage" in str(exc)
        return
    f4 = efficient_frontier(mu, S, make_constraints(ASSETS4))
    targets = np.linspace(f4.means[-1], f4.means[0], 9)
    W5 = f5.at_returns(targets)
    merged = np.c_[W5[:, :3], W5[:, 3] + W5[:, 4]]
    np.testing.assert_allclose(merged, f4.at_returns(targets), atol=1e-10)


def test_unsupported_constraints():
    mu, S = recipe_b()
    with pytest.raises(SettingsError, match="budget"):
        efficient_frontier(mu, S, make_constraints(ASSETS4, budget="cash"))
    with pytest.raises(SettingsError, match="bounded"):
        efficient_frontier(mu, S, make_constraints(ASSETS4, long_only=False))


def _singular_sweep(count, seed):
    from optimise import make_rule

    rng = np.random.default_rng(seed)
    solved = 0
    for _ in range(count):
        n = int(rng.integers(3, 10))
        T = int(rng.integers(2, n + 1))              # T <= N: singular sample covariance
        S = np.cov(rng.normal(0.005, 0.04, (T, n)), rowvar=False)
        mu = rng.normal(0.005, 0.003, n)
        if rng.random() < 0.3:
            mu[1] = mu[0]                            # a tie in the means
        lo = 0.0 if rng.random() < 0.5 else -0.2
        bounds = {f"asset {i + 1}": (lo, 0.5) for i in range(n)}
        cons = make_constraints(n, long_only=lo == 0, bounds=bounds)
        try:
            f = efficient_frontier(mu, S, cons)
        except SingularCovarianceError as exc:      # allowed: an error naming the cure
            assert "shrinkage" in str(exc)
            continue
        solved += 1
        for w in f.points(9)[:-1]:
            # as good as the active-set solver's target-return portfolio at that mean
            r = make_rule("t", "target-return", {"target": float(w @ mu), "long_only": lo == 0,
                                                 "bounds": bounds}, n)
            v = r.weights(mu, S).weights
            assert w @ S @ w <= v @ S @ v + 1e-9 * (v @ S @ v) + 1e-15
            assert cons.is_feasible(w, tol=1e-12)
    return solved


def test_singular_covariance_frontier_is_optimal_or_refused():
    assert _singular_sweep(40, 1) > 10


@pytest.mark.slow
def test_singular_covariance_frontier_is_optimal_or_refused_full():
    assert _singular_sweep(600, 2) > 200
