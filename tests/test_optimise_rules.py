"""Portfolio rules and constraints: closed forms, published check values, error paths.

Outside sources are named beside each check; values quoted from REFERENCES.md (the
project's reference sheet, ../shared) carry its section number.
"""
import numpy as np
import pytest

from conftest import recipe_a, recipe_b
from estimators.core import InfeasibleError, SettingsError, SingularCovarianceError
from optimise import RULE_TYPES, make_constraints, make_rule

ASSETS4 = ("a", "b", "c", "d")


def rule(type_, assets=ASSETS4, **params):
    return make_rule("r", type_, params, assets)


def merton_abcd(mu, S):
    """Merton (1972, JFQA 7(4)) frontier constants A, B, C, D."""
    Si1 = np.linalg.solve(S, np.ones(len(mu)))
    Sim = np.linalg.solve(S, mu)
    A, B, C = Si1.sum(), Si1 @ mu, mu @ Sim
    return A, B, C, A * C - B * B


# ---------------------------------------------------------------------------- Merton 1972
def test_merton_constants_match_reference_sheet():
    # REFERENCES section 3, Recipe B: A = 120.9639401935, B = 8.3689709763, C = 0.6415535620,
    # D = 7.5651715040 (Merton 1972, J. Financial and Quantitative Analysis 7(4)).
    mu, S = recipe_b()
    A, B, C, D = merton_abcd(mu, S)
    np.testing.assert_allclose([A, B, C, D], [120.9639401935, 8.3689709763, 0.6415535620,
                                              7.5651715040], rtol=1e-10)


@pytest.mark.parametrize("m, var, w", [
    # REFERENCES section 3 table (closed form sigma^2(m) = (A m^2 - 2 B m + C) / D)
    (0.05, 1.415252976190e-2, (1.1388888889, 0.0818452381, -0.0803571429, -0.1403769841)),
    (0.08, 1.013690476190e-2, (0.4722222222, 0.2380952381, 0.1071428571, 0.1825396825)),
    (0.10, 2.344940476190e-2, (0.0277777778, 0.3422619048, 0.2321428571, 0.3978174603)),
    (0.15, 1.126941964286e-1, (-1.0833333333, 0.6026785714, 0.5446428571, 0.9360119048)),
])
def test_unconstrained_frontier_matches_merton(m, var, w):
    mu, S = recipe_b()
    A, B, C, D = merton_abcd(mu, S)
    assert (A * m * m - 2 * B * m + C) / D == pytest.approx(var, rel=1e-10)
    # target-return with shorting: min variance s.t. w'mu >= m. Above the GMV mean
    # (B/A = 0.0691856678) the constraint binds and the rule traces Merton's frontier; below
    # it the constraint is slack and the rule returns the GMV portfolio.
    r = rule("target-return", long_only=False, target=m)
    alloc = r.weights(mu, S)
    if m >= B / A:
        np.testing.assert_allclose(alloc.weights, w, atol=1e-9)
        assert alloc.weights @ S @ alloc.weights == pytest.approx(var, rel=1e-9)
        assert r.check(mu, S, alloc.weights).max < 1e-12
    else:
        # the inequality is slack: the GMV portfolio (REFERENCES section 3)
        np.testing.assert_allclose(alloc.weights, [0.7125407166, 0.1817705910, 0.0395532806,
                                                   0.0661354118], atol=1e-9)


def test_gmv_and_tangency_recipe_b():
    # REFERENCES section 3: GMV weights and variance 8.2669264774e-3; tangency at rf = 0.03
    # w = (0.4193385584, 0.2504898468, 0.1220163876, 0.2081552072), Sharpe 0.4982798908
    # = sqrt(C - 2 rf B + rf^2 A) (Merton 1972).
    mu, S = recipe_b()
    for long_only in (True, False):
        w = rule("min-variance", long_only=long_only).weights(mu, S).weights
        np.testing.assert_allclose(w, [0.7125407166, 0.1817705910, 0.0395532806, 0.0661354118],
                                   atol=1e-10)
        assert w @ S @ w == pytest.approx(8.2669264774e-3, rel=1e-10)
        r = rule("max-sharpe", long_only=long_only, risk_free=0.03)
        w = r.weights(mu, S).weights
        np.testing.assert_allclose(w, [0.4193385584, 0.2504898468, 0.1220163876, 0.2081552072],
                                   atol=1e-10)
        sharpe = (w @ mu - 0.03) / np.sqrt(w @ S @ w)
        assert sharpe == pytest.approx(0.4982798908, rel=1e-10)
        A, B, C, _ = merton_abcd(mu, S)
        assert sharpe == pytest.approx(np.sqrt(C - 2 * 0.03 * B + 0.03 ** 2 * A), rel=1e-12)


def test_cash_budget_closed_form_is_exact():
    # w = Sigma^-1 (mu - rf) / gamma: the unconstrained mean-variance rule with a cash sleeve
    # (Merton 1972; common practice).
    mu, S = recipe_a(10)
    for rf in (0.0, 0.002):
        r = make_rule("mv", "mean-variance", {"risk_aversion": 3.0, "budget": "cash",
                                              "long_only": False, "risk_free": rf}, 10)
        alloc = r.weights(mu, S)
        expect = np.linalg.solve(S, mu - rf) / 3.0
        np.testing.assert_allclose(alloc.weights, expect, rtol=1e-12, atol=1e-14)
        assert alloc.cash == pytest.approx(1 - expect.sum(), rel=1e-12)
    # long-only with cash: no borrowing, sum of risky weights <= 1
    r = make_rule("mv", "mean-variance", {"risk_aversion": 0.5, "budget": "cash"}, 10)
    alloc = r.weights(mu, S)
    assert alloc.weights.sum() <= 1 + 1e-12 and alloc.cash >= -1e-12
    assert r.check(mu, S, alloc.weights).max < 1e-10


def test_recipe_a_theta_squared_via_tangency():
    # REFERENCES section 0: Recipe A, N = 10 gives theta^2 = 0.0625 exactly; the tangency
    # portfolio with shorting has the maximum Sharpe ratio theta (rf = 0, excess means).
    mu, S = recipe_a(10)
    w = make_rule("t", "max-sharpe", {"long_only": False}, 10).weights(mu, S).weights
    assert (w @ mu) / np.sqrt(w @ S @ w) == pytest.approx(0.25, rel=1e-12)


# ---------------------------------------------------------------------------- two assets
@pytest.mark.parametrize("s1, s2, rho, xstar, minvar", [
    # REFERENCES section 4 table (worked examples; formula x* = (s2^2 - rho s1 s2) /
    # (s1^2 + s2^2 - 2 rho s1 s2))
    (0.20, 0.10, 0.25, 0.125, 0.009375),
    (0.20, 0.20, 0.0, 0.5, 0.02),
    (0.10, 0.30, 0.5, 1.0714285714, 0.0096428571),
])
def test_two_asset_minimum_variance(s1, s2, rho, xstar, minvar):
    S = np.array([[s1 * s1, rho * s1 * s2], [rho * s1 * s2, s2 * s2]])
    assert (s2 ** 2 - rho * s1 * s2) / (s1 ** 2 + s2 ** 2 - 2 * rho * s1 * s2) == pytest.approx(xstar, rel=1e-9)
    w = make_rule("m", "min-variance", {"long_only": False}, ("x", "y")).weights(None, S).weights
    assert w[0] == pytest.approx(xstar, rel=1e-9)
    assert w @ S @ w == pytest.approx(minvar, rel=1e-8)
    x = w[0]   # the portfolio variance formula x^2 s1^2 + (1-x)^2 s2^2 + 2x(1-x) rho s1 s2
    assert w @ S @ w == pytest.approx(x * x * s1 * s1 + (1 - x) ** 2 * s2 * s2
                                      + 2 * x * (1 - x) * rho * s1 * s2, rel=1e-12)
    wl = make_rule("m", "min-variance", {}, ("x", "y")).weights(None, S).weights
    assert wl[0] == pytest.approx(min(max(xstar, 0.0), 1.0), abs=1e-12)
    if xstar > 1:    # REFERENCES section 4: long-only minimum at the corner x = 1, vol s1
        assert np.sqrt(wl @ S @ wl) == pytest.approx(s1, rel=1e-12)


def test_two_asset_perfect_negative_correlation_singular_covariance():
    # REFERENCES section 4: rho = -1, s1 = 0.3, s2 = 0.1: zero variance at x = s2/(s1+s2) = 0.25.
    # The covariance is singular; long-only the rule still solves it (bounded weights).
    s1, s2 = 0.3, 0.1
    S = np.array([[s1 * s1, -s1 * s2], [-s1 * s2, s2 * s2]])
    r = make_rule("m", "min-variance", {}, ("x", "y"))
    w = r.weights(None, S).weights
    assert w[0] == pytest.approx(s2 / (s1 + s2), abs=1e-9)
    assert w @ S @ w == pytest.approx(0.0, abs=1e-15)
    assert r.check(None, S, w).max < 1e-12
    # with unbounded shorting the problem has no determined solution: an error, not garbage
    with pytest.raises(SingularCovarianceError, match="ledoit-wolf-identity"):
        make_rule("m", "min-variance", {"long_only": False}, ("x", "y")).weights(None, S)


def test_two_asset_perfect_positive_correlation():
    # REFERENCES section 4: rho = +1, s1 = 0.2, s2 = 0.1: volatility is linear in x on [0, 1]
    # (no diversification benefit); with shorting, zero variance at x = s2/(s2 - s1) = -1.
    s1, s2 = 0.2, 0.1
    S = np.array([[s1 * s1, s1 * s2], [s1 * s2, s2 * s2]])
    for x, vol in ((0.25, 0.125), (0.4, 0.14), (0.5, 0.15)):
        w = np.array([x, 1 - x])
        assert np.sqrt(w @ S @ w) == pytest.approx(vol, rel=1e-12)
    r = make_rule("m", "min-variance", {"long_only": False,
                                        "bounds": {"x": [-3, 3], "y": [-3, 3]}}, ("x", "y"))
    w = r.weights(None, S).weights
    assert w[0] == pytest.approx(-1.0, abs=1e-9)
    assert r.check(None, S, w).max < 1e-12


# ---------------------------------------------------------------------------- other rules
def test_equal_weight_and_inverse_volatility():
    mu, S = recipe_b()
    np.testing.assert_array_equal(rule("equal-weight").weights(mu, S).weights, np.full(4, 0.25))
    w = rule("inverse-volatility").weights(mu, S).weights
    inv = 1 / np.array([0.10, 0.15, 0.20, 0.25])
    np.testing.assert_allclose(w, inv / inv.sum(), rtol=1e-14)


def test_equal_risk_contribution_properties():
    # Maillard, Roncalli & Teiletche (2010, J. Portfolio Management 36(4)): the ERC portfolio
    # has equal risk contributions w_i (Sigma w)_i; with two assets, or with one common
    # correlation, it equals the inverse-volatility portfolio; its volatility lies between
    # the minimum-variance and the equal-weight portfolios' volatilities.
    mu, S = recipe_b()
    w = rule("equal-risk-contribution").weights(mu, S).weights
    rc = w * (S @ w)
    np.testing.assert_allclose(rc, rc.mean(), rtol=1e-10)
    assert w.sum() == pytest.approx(1, abs=1e-14) and np.all(w > 0)
    vol = lambda v: np.sqrt(v @ S @ v)
    gmv = rule("min-variance").weights(mu, S).weights
    assert vol(gmv) <= vol(w) <= vol(np.full(4, 0.25))
    vols = np.array([0.1, 0.2, 0.3, 0.15, 0.25])
    C = np.full((5, 5), 0.35) + 0.65 * np.eye(5)
    S5 = C * np.outer(vols, vols)
    w5 = make_rule("e", "equal-risk-contribution", {}, 5).weights(None, S5).weights
    np.testing.assert_allclose(w5, (1 / vols) / (1 / vols).sum(), rtol=1e-10)


def test_target_volatility_hits_target_and_matches_mean_variance():
    # The solution of max w'mu s.t. vol <= target is the mean-variance portfolio whose risk
    # aversion makes the volatility equal the target (KKT of the QCQP; common practice).
    mu, S = recipe_b()
    r = rule("target-volatility", target=0.15)
    alloc = r.weights(mu, S)
    w = alloc.weights
    assert np.sqrt(w @ S @ w) == pytest.approx(0.15, rel=1e-12)
    mv = rule("mean-variance", risk_aversion=alloc.implied_risk_aversion).weights(mu, S).weights
    np.testing.assert_allclose(w, mv, atol=1e-10)
    assert r.check(mu, S, w).max < 1e-10
    # a target above the maximum-return portfolio's volatility leaves the constraint slack
    w = rule("target-volatility", target=0.3).weights(mu, S).weights
    np.testing.assert_allclose(w, [0, 0, 0, 1], atol=1e-14)
    # shorting allowed, unbounded: the closed-form efficient portfolio at that volatility
    w = rule("target-volatility", target=0.1531319848, long_only=False).weights(mu, S).weights
    np.testing.assert_allclose(w, [0.0277777778, 0.3422619048, 0.2321428571, 0.3978174603],
                               atol=1e-8)   # REFERENCES section 3, m = 0.10


def test_single_asset():
    S = np.array([[0.04]])
    mu = np.array([0.01])
    for t in RULE_TYPES:
        params = {"risk_aversion": 2.0} if t == "mean-variance" else {}
        if t == "target-return":
            params = {"target": 0.005}
        if t == "target-volatility":
            params = {"target": 0.3}
        if t == "fixed":
            params = {"weights": {"only": 1.0}}
        w = make_rule("one", t, params, ("only",)).weights(mu, S).weights
        np.testing.assert_allclose(w, [1.0], atol=1e-14, err_msg=t)


# ---------------------------------------------------------------------------- settings
def test_unknown_parameter_is_named():
    with pytest.raises(SettingsError, match="'gamma'"):
        make_rule("r", "mean-variance", {"gamma": 3}, ASSETS4)
    with pytest.raises(SettingsError, match="unknown rule type 'kelly'"):
        make_rule("r", "kelly", {}, ASSETS4)
    with pytest.raises(SettingsError, match="needs 'risk_aversion'"):
        make_rule("r", "mean-variance", {}, ASSETS4)
    with pytest.raises(SettingsError, match="needs 'target'"):
        make_rule("r", "target-return", {}, ASSETS4)
    with pytest.raises(SettingsError, match="unknown asset 'zz'"):
        make_rule("r", "min-variance", {"bounds": {"zz": [0, 1]}}, ASSETS4)
    with pytest.raises(SettingsError, match="takes no parameters"):
        make_rule("r", "equal-weight", {"long_only": True}, ASSETS4)


@pytest.mark.parametrize("kwargs, match", [
    ({"bounds": {a: (0.3, 1) for a in ASSETS4}}, "lower bounds sum to 1.2, above 1"),
    ({"bounds": {a: (0, 0.2) for a in ASSETS4}}, "upper bounds sum to 0.8, below 1"),
    ({"bounds": {"a": (0.5, 0.4)}}, "low 0.5 is above high 0.4"),
    ({"bounds": {"a": (-0.5, -0.1)}}, "below 0 but the portfolio is long-only"),
    ({"groups": {"eq": {"assets": ["a", "b"], "bounds": (0.7, 0.9)}},
      "bounds": {"a": (0, 0.3), "b": (0, 0.3)}}, "group 'eq': its assets' upper bounds sum to 0.6"),
    ({"groups": {"eq": {"assets": ["a", "b"], "bounds": (0.0, 0.1)}},
      "bounds": {"a": (0.2, 1)}}, "group 'eq': its assets' lower bounds sum to 0.2"),
    ({"groups": {"eq": {"assets": ["a"], "bounds": (0.0, 0.1)},
                 "rest": {"assets": ["b", "c", "d"], "bounds": (0, 0.5)}}},
     "cannot all be met together"),
])
def test_infeasible_constraints_name_the_conflict(kwargs, match):
    with pytest.raises(InfeasibleError, match=match):
        make_constraints(ASSETS4, **kwargs)


def test_infeasible_targets():
    mu, S = recipe_b()
    with pytest.raises(InfeasibleError, match="above the largest attainable expected return 0.12"):
        rule("target-return", target=0.13).weights(mu, S)
    with pytest.raises(InfeasibleError, match="below the minimum attainable volatility"):
        rule("target-volatility", target=0.05).weights(mu, S)
    with pytest.raises(InfeasibleError, match="no portfolio allowed by the constraints has an "
                                              "expected return above the risk-free rate"):
        rule("max-sharpe", risk_free=0.2).weights(mu, S)
    # shorting: a risk-free rate above the GMV mean has no tangency on the efficient branch
    with pytest.raises(InfeasibleError, match="no maximum"):
        rule("max-sharpe", risk_free=0.09, long_only=False).weights(mu, S)


def test_feasible_point_is_feasible_with_groups():
    cons = make_constraints(ASSETS4, bounds={"a": (0.1, 0.2)},
                            groups={"g": {"assets": ["b", "c"], "bounds": (0.6, 0.7)}})
    assert cons.is_feasible(cons.feasible_point, tol=1e-12)


# ---------------------------------------------------------------------------- singular inputs
def test_t_below_n_sample_covariance():
    # T = 6 observations of N = 10 assets: the sample covariance has rank 5.
    rng = np.random.default_rng(7)
    R = rng.normal(0.01, 0.05, size=(6, 10))
    S = np.cov(R, rowvar=False)
    mu = R.mean(axis=0)
    assert np.linalg.matrix_rank(S) == 5
    for t, p in (("min-variance", {}), ("mean-variance", {"risk_aversion": 4.0}),
                 ("max-sharpe", {}), ("target-return", {"target": float(np.median(mu))})):
        r = make_rule("r", t, dict(p, bounds={f"asset {i + 1}": (0, 0.5) for i in range(10)}), 10)
        w = r.weights(mu, S).weights
        assert r.constraints.is_feasible(w, tol=1e-12)
        assert r.check(mu, S, w).max < 1e-9, t
        with pytest.raises(SingularCovarianceError, match="shrinkage"):
            make_rule("r", t, dict(p, long_only=False), 10).weights(mu, S)


def test_ill_conditioned_covariance():
    # condition number 1e12: long-only solves (KKT-verified); unbounded shorting refuses.
    rng = np.random.default_rng(11)
    Q, _ = np.linalg.qr(rng.normal(size=(6, 6)))
    S = (Q * np.geomspace(1e-2, 1e-14, 6)) @ Q.T
    S = 0.5 * (S + S.T)
    mu = rng.normal(0.01, 0.003, 6)
    r = make_rule("r", "mean-variance", {"risk_aversion": 5.0}, 6)
    w = r.weights(mu, S).weights
    assert r.check(mu, S, w).max < 1e-9
    with pytest.raises(SingularCovarianceError, match="condition number"):
        make_rule("r", "mean-variance", {"risk_aversion": 5.0, "long_only": False}, 6).weights(mu, S)


def test_bad_inputs():
    mu, S = recipe_b()
    r = rule("min-variance")
    with pytest.raises(SettingsError, match="shape"):
        r.weights(mu, S[:3, :3])
    bad = S.copy()
    bad[0, 1] = np.nan
    with pytest.raises(SettingsError, match="NaN"):
        r.weights(mu, bad)
    with pytest.raises(SettingsError, match="symmetric"):
        r.weights(mu, S + np.triu(np.full((4, 4), 1e-3), 1))


def test_cash_sleeve_rules_against_cvxpy():
    # Long-only with cash (sum(w) <= 1): target-volatility and target-return against the
    # same problems written in cvxpy 1.9 (CLARABEL), a general-purpose convex solver.
    import cvxpy as cp

    mu, S = recipe_b()
    rf = 0.03
    for type_, target in (("target-volatility", 0.12), ("target-return", 0.09)):
        r = rule(type_, budget="cash", risk_free=rf, target=target,
                 bounds={"d": (0, 0.3)})
        w = r.weights(mu, S).weights
        x = cp.Variable(4)
        cons = [x >= 0, cp.sum(x) <= 1, x[3] <= 0.3]
        if type_ == "target-volatility":
            cons.append(cp.quad_form(x, S) <= target ** 2)
            prob = cp.Problem(cp.Maximize((mu - rf) @ x), cons)
        else:
            cons.append((mu - rf) @ x + rf >= target)
            prob = cp.Problem(cp.Minimize(cp.quad_form(x, S)), cons)
        prob.solve(solver="CLARABEL", tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10)
        np.testing.assert_allclose(w, x.value, atol=2e-6)
        if type_ == "target-volatility":
            assert np.sqrt(w @ S @ w) == pytest.approx(target, rel=1e-12)
            assert (mu - rf) @ w >= (mu - rf) @ x.value - 1e-10
        else:
            assert w @ S @ w <= x.value @ S @ x.value + 1e-12
        assert r.check(mu, S, w).max < 1e-9


def test_batch_errors_name_the_draw_and_heuristics_batch():
    mu, S = recipe_b()
    means = np.stack([mu, mu * 0.5, mu])
    covs = np.stack([S, S, S])
    with pytest.raises(InfeasibleError, match="in draw 1"):
        rule("target-return", target=0.1).weights_batch(means, covs)
    bad = covs.copy()
    bad[2, 0, 0] = np.nan
    with pytest.raises(SettingsError, match=r"draw 2"):
        rule("min-variance").weights_batch(means, bad)
    W = rule("equal-weight").weights_batch(means, covs)
    np.testing.assert_array_equal(W, np.full((3, 4), 0.25))
    W = rule("inverse-volatility").weights_batch(means, covs)
    assert W.shape == (3, 4) and np.allclose(W.sum(axis=1), 1)
