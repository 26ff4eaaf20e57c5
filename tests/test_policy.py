"""The policy (the allocation held today): the fixed rule, tracking error against it (as a
measure and as a constraint), the comparisons against it, the transition cost, and the
study-file errors.

Outside reference: cvxpy 1.9.3 (general-purpose convex solver) with the Clarabel
interior-point solver solves the same second-order cone problems; tests only.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from estimators.core import InfeasibleError, SettingsError
from noiseproof.cli import main as cli_main
from optimise import make_rule, tracking_error

ASSETS = tuple(f"a{i}" for i in range(6))


def _problem(seed=0, n=6):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(60, n))
    S = X.T @ X / 60 * 0.002 + np.diag(rng.uniform(0.0005, 0.002, n))
    mu = rng.normal(0.006, 0.004, n)
    return mu, S


POLICY = np.array([0.25, 0.25, 0.2, 0.1, 0.1, 0.1])


# --------------------------------------------------------------------------- fixed rule

def test_fixed_rule_returns_its_weights_and_missing_assets_hold_zero():
    r = make_rule("p", "fixed", {"weights": {"a0": 0.5, "a2": 0.5}}, ASSETS)
    assert not r.needs_mean and not r.needs_covariance
    a = r.weights(None, None)
    np.testing.assert_array_equal(a.weights, [0.5, 0, 0.5, 0, 0, 0])
    W = r.weights_batch(np.zeros((3, 6)), np.repeat(np.eye(6)[None], 3, 0))
    np.testing.assert_array_equal(W, np.tile([0.5, 0, 0.5, 0, 0, 0], (3, 1)))


def test_fixed_rule_with_a_cash_sleeve():
    r = make_rule("p", "fixed", {"weights": {"a0": 0.6, "a1": 0.3}, "budget": "cash"}, ASSETS)
    assert r.weights(None, None).cash == pytest.approx(0.1)


@pytest.mark.parametrize("params, needle", [
    ({"weights": {"zz": 1.0}}, "unknown asset 'zz'"),
    ({"weights": {"a0": 0.5, "a1": 0.4}}, "sum to 0.9"),
    ({"weights": {"a0": 0.5, "a1": 0.5}, "bounds": {"a0": [0, 0.3]}}, "outside its bounds"),
    ({"weights": {"a0": 1.2, "a1": -0.2}}, "long-only"),
    ({"weights": {"a0": 0.7, "a1": 0.5}, "budget": "cash"}, "> 1"),
    ({}, "needs 'weights'"),
])
def test_fixed_rule_refuses_bad_weights(params, needle):
    with pytest.raises(SettingsError, match=needle.replace("(", r"\(")):
        make_rule("p", "fixed", params, ASSETS)


# --------------------------------------------------------------------------- tracking error

def test_tracking_error_of_a_fixed_portfolio_matches_the_formula():
    mu, S = _problem(1)
    w = make_rule("w", "fixed", {"weights": dict(zip(ASSETS, [0.1, 0.1, 0.1, 0.2, 0.2, 0.3]))},
                  ASSETS).weights(None, None).weights
    d = w - POLICY
    expected = 0.0                     # independent: explicit double loop
    for i in range(6):
        for j in range(6):
            expected += d[i] * S[i, j] * d[j]
    assert tracking_error(w, POLICY, S) == pytest.approx(math.sqrt(expected), rel=1e-13)


@pytest.mark.parametrize("kind, extra", [("mean-variance", {"risk_aversion": 4}),
                                         ("min-variance", {}),
                                         ("target-return", {"target": 0.006})])
def test_large_limit_equals_the_unconstrained_rule(kind, extra):
    mu, S = _problem(2)
    free = make_rule("r", kind, extra, ASSETS).weights(mu, S).weights
    capped = make_rule("r", kind, {**extra, "max_tracking_error": 10.0}, ASSETS,
                       policy_weights=POLICY).weights(mu, S).weights
    np.testing.assert_allclose(capped, free, atol=1e-12)


def test_zero_limit_returns_the_policy():
    mu, S = _problem(3)
    r = make_rule("r", "mean-variance", {"risk_aversion": 4, "max_tracking_error": 0.0}, ASSETS,
                  policy_weights=POLICY)
    np.testing.assert_allclose(r.weights(mu, S).weights, POLICY, atol=1e-12)


def test_limit_below_the_least_attainable_is_infeasible():
    mu, S = _problem(3)
    # the rule may hold at most 5% of a0, the policy holds 25%
    r = make_rule("r", "mean-variance", {"risk_aversion": 4, "max_tracking_error": 1e-4,
                                         "bounds": {"a0": [0, 0.05]}}, ASSETS,
                  policy_weights=POLICY)
    with pytest.raises(InfeasibleError, match="least tracking error"):
        r.weights(mu, S)


def _cvxpy_solution(kind, mu, S, te, gamma=4.0, target=None, bound=None):
    cp = pytest.importorskip("cvxpy")
    n = mu.size
    w = cp.Variable(n)
    L = np.linalg.cholesky(S)
    cons = [cp.sum(w) == 1, w >= 0, cp.norm(L.T @ (w - POLICY)) <= te]
    if bound is not None:
        cons.append(w[0] <= bound)
    if kind == "mean-variance":
        obj = cp.Minimize(0.5 * gamma * cp.sum_squares(L.T @ w) - mu @ w)
    else:
        obj = cp.Minimize(cp.sum_squares(L.T @ w))
        if kind == "target-return":
            cons.append(mu @ w >= target)
    prob = cp.Problem(obj, cons)
    prob.solve(solver=cp.CLARABEL, tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10)
    return np.asarray(w.value), prob


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("kind", ["mean-variance", "min-variance", "target-return"])
def test_binding_limit_meets_kkt_and_matches_cvxpy(seed, kind):
    mu, S = _problem(10 + seed)
    extra = {"mean-variance": {"risk_aversion": 4.0}, "min-variance": {},
             "target-return": {"target": float(mu @ POLICY)}}[kind]
    free = make_rule("r", kind, extra, ASSETS).weights(mu, S).weights
    te = 0.5 * tracking_error(free, POLICY, S)   # halfway between the policy and the free rule
    rule = make_rule("r", kind, {**extra, "max_tracking_error": te, "bounds": {"a0": [0, 0.4]}},
                     ASSETS, policy_weights=POLICY)
    w = rule.weights(mu, S).weights        # feasible: the policy itself meets every constraint
    assert tracking_error(w, POLICY, S) == pytest.approx(te, rel=1e-9)      # binds
    res = rule.check(mu, S, w)            # KKT with the cone's own multiplier
    assert res.max <= 1e-8
    eta = rule.tracking_multiplier(mu, S)
    assert eta > 0                        # active: positive multiplier, zero slack
    ref, prob = _cvxpy_solution(kind, mu, S, te, gamma=4.0, target=extra.get("target"),
                                bound=0.4)
    assert prob.status == "optimal"
    # objective values agree (the minimiser is unique: strictly convex objective)
    if kind == "mean-variance":
        f = lambda x: 2.0 * x @ S @ x - mu @ x
    else:
        f = lambda x: x @ S @ x
    assert f(w) <= f(ref) + 1e-9
    np.testing.assert_allclose(w, ref, atol=2e-4)


def test_batched_limit_binds_in_every_draw_and_equals_single_solves():
    mu, S = _problem(4)
    rng = np.random.default_rng(5)
    D = 40
    means = mu + rng.normal(0, 0.003, (D, 6))
    covs = np.repeat(S[None], D, 0) * rng.uniform(0.7, 1.3, (D, 1, 1))
    rule = make_rule("r", "mean-variance", {"risk_aversion": 3, "max_tracking_error": 0.01},
                     ASSETS, policy_weights=POLICY)
    W = rule.weights_batch(means, covs)
    for d in range(D):
        np.testing.assert_allclose(W[d], rule.weights(means[d], covs[d]).weights, atol=1e-10)
        assert tracking_error(W[d], POLICY, covs[d]) <= 0.01 * (1 + 1e-9)


def test_annualised_units_divide_by_root_periods():
    mu, S = _problem(6)
    a = make_rule("r", "mean-variance", {"risk_aversion": 4, "max_tracking_error": 0.012 * math.sqrt(12),
                                         "tracking_error_units": "annualised"}, ASSETS,
                  policy_weights=POLICY, periods_per_year=12)
    b = make_rule("r", "mean-variance", {"risk_aversion": 4, "max_tracking_error": 0.012}, ASSETS,
                  policy_weights=POLICY)
    assert a.max_tracking_error == pytest.approx(b.max_tracking_error, rel=1e-15)
    with pytest.raises(SettingsError, match="tracking_error_units"):
        make_rule("r", "mean-variance", {"risk_aversion": 4, "max_tracking_error": 0.01,
                                         "tracking_error_units": "weekly"}, ASSETS,
                  policy_weights=POLICY)
    with pytest.raises(SettingsError, match="policy"):
        make_rule("r", "mean-variance", {"risk_aversion": 4, "max_tracking_error": 0.01}, ASSETS)


# --------------------------------------------------------------------------- through the study

DATA = Path(__file__).resolve().parents[1] / "demo_market" / "data"


def _study(tmp_path, policy_weights: str, extra_rule: str = "", backtest=True, resample=True):
    text = f'''
name = "policy test"
risk_aversion = 5
policy = "held"

[data]
path = "{DATA / 'demo_returns.csv'}"
kind = "returns"
frequency = "monthly"

[[rules]]
name = "held"
type = "fixed"
weights = {policy_weights}

[[rules]]
name = "proposed"
type = "mean-variance"
risk_aversion = 5
{extra_rule}
'''
    if resample:
        text += "\n[resample]\ngenerator = \"normal\"\ndraws = 200\nlength = 120\nseed = 7\n"
    if backtest:
        text += "\n[backtest]\nwindow = 300\nrebalance_every = 12\ncost_bps = 25\nbootstrap_resamples = 100\n"
    p = tmp_path / "study.toml"
    p.write_text(text)
    return p


GOOD = ('{ "Domestic Equity" = 0.3, "Global Equity" = 0.2, "Government Bonds" = 0.3, '
        '"Corporate Credit" = 0.2 }')


@pytest.mark.parametrize("weights, extra, needle", [
    ('{ "Moon Equity" = 1.0 }', "", "unknown asset 'Moon Equity'"),
    ('{ "Domestic Equity" = 0.5, "Global Equity" = 0.4 }', "", "sum to 0.9"),
    (GOOD + '\nbounds = { "Domestic Equity" = [0.0, 0.2] }', "", "outside its bounds"),
])
def test_bad_policy_is_one_line_and_status_2(tmp_path, capsys, weights, extra, needle):
    path = _study(tmp_path, weights, extra, backtest=False, resample=False)
    rc = cli_main(["study", str(path), "--out", str(tmp_path / "run"), "--no-pack", "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.count("\n") == 1 and needle in err and "Traceback" not in err
    assert not (tmp_path / "run").exists()


@pytest.fixture(scope="module")
def policy_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("policy")
    path = _study(tmp, GOOD, 'max_tracking_error = 0.03\ntracking_error_units = "annualised"')
    rc = cli_main(["study", str(path), "--out", str(tmp / "run"), "--no-pack", "--quiet"])
    assert rc == 0
    return json.loads((tmp / "run" / "summary.json").read_text()), tmp / "run"


def test_study_compares_every_rule_with_the_policy(policy_run):
    s, _ = policy_run
    assert s["policy"] == "held"
    prop = s["rules"]["proposed"]
    pop = prop["population"]
    for key in ("prob_beats_policy_ceq", "prob_beats_policy_sharpe"):
        assert 0.0 <= pop[key] <= 1.0
    assert s["rules"]["held"]["population"]["prob_beats_policy_ceq"] is None
    assert s["rules"]["held"]["population"]["tracking_error_vs_policy_mean"] == 0.0
    assert pop["tracking_error_vs_policy_mean"] > 0
    bt = prop["backtest"]
    for key in ("sharpe_diff_policy_p_jkm", "sharpe_diff_policy_p_lw", "ceq_diff_policy_p"):
        assert 0.0 <= bt[key] <= 1.0
    assert bt["tracking_error_vs_policy_annualised"] == pytest.approx(
        bt["tracking_error_vs_policy"] * math.sqrt(12))
    assert s["verdict"]["against_policy"]["policy"] == "held"


def test_realised_tracking_error_is_the_sd_of_return_differences(policy_run):
    import pandas as pd

    s, run = policy_run
    r = pd.read_csv(run / "tables" / "backtest_returns.csv", index_col=0)
    sd = float(np.std(r["proposed"].to_numpy() - r["held"].to_numpy(), ddof=1))
    assert s["rules"]["proposed"]["backtest"]["tracking_error_vs_policy"] == pytest.approx(sd, rel=1e-12)


def test_transition_cost_and_break_even(policy_run):
    s, _ = policy_run
    w = s["rules"]["proposed"]["in_sample_weights"]
    p = s["rules"]["held"]["in_sample_weights"]
    tr = s["rules"]["proposed"]["transition"]
    turnover = sum(abs(w[a] - p[a]) for a in w)
    assert tr["turnover"] == pytest.approx(turnover, rel=1e-12)
    assert tr["cost"] == pytest.approx(turnover * 25 / 1e4, rel=1e-12)
    gain = (s["rules"]["proposed"]["population"]["ceq_mean"]
            - s["rules"]["held"]["population"]["ceq_mean"])
    assert tr["ceq_gain_per_period_population"] == pytest.approx(gain, rel=1e-12)
    if gain > 0:
        assert tr["break_even_periods"] == pytest.approx(tr["cost"] / gain, rel=1e-12)
    else:
        assert tr["break_even_periods"] == "never"
    # the in-sample allocation meets the annualised limit under the estimated covariance
    assert tr["tracking_error_in_sample_annualised"] <= 0.03 * (1 + 1e-8)
    assert s["rules"]["held"]["transition"]["turnover"] == 0.0


@pytest.mark.parametrize("seed", range(5))
def test_max_sharpe_within_the_limit_meets_kkt_and_matches_cvxpy(seed):
    """The cvxpy reference solves the homogenised second-order cone problem
    min y'Sy s.t. mu'y = 1, y >= 0, ||L'(y - (1'y) p)|| <= (1'y) te, then w = y / 1'y."""
    cp = pytest.importorskip("cvxpy")
    mu, S = _problem(30 + seed)
    free = make_rule("ms", "max-sharpe", {}, ASSETS).weights(mu, S).weights
    te = 0.5 * tracking_error(free, POLICY, S)
    rule = make_rule("ms", "max-sharpe", {"max_tracking_error": te}, ASSETS,
                     policy_weights=POLICY)
    w = rule.weights(mu, S).weights
    assert tracking_error(w, POLICY, S) == pytest.approx(te, rel=1e-9)
    assert rule.check(mu, S, w).max <= 1e-8
    L = np.linalg.cholesky(S)
    y = cp.Variable(6)
    k = cp.sum(y)
    prob = cp.Problem(cp.Minimize(cp.sum_squares(L.T @ y)),
                      [mu @ y == 1, y >= 0, cp.norm(L.T @ (y - k * POLICY)) <= k * te])
    prob.solve(solver=cp.CLARABEL)
    assert prob.status == "optimal"
    ref = y.value / y.value.sum()

    def sharpe(x):
        return mu @ x / math.sqrt(x @ S @ x)

    assert sharpe(w) >= sharpe(ref) - 1e-9          # at least as good as the reference
    np.testing.assert_allclose(w, ref, atol=1e-4)
    # large limit: the unconstrained maximum; zero limit: the policy
    big = make_rule("ms", "max-sharpe", {"max_tracking_error": 10.0}, ASSETS, policy_weights=POLICY)
    np.testing.assert_allclose(big.weights(mu, S).weights, free, atol=1e-9)
    if mu @ POLICY > 0:
        zero = make_rule("ms", "max-sharpe", {"max_tracking_error": 0.0}, ASSETS,
                         policy_weights=POLICY)
        np.testing.assert_allclose(zero.weights(mu, S).weights, POLICY, atol=1e-12)


def _tv_case(seed, long_only):
    """A target halfway between the least and the policy's volatility, and a limit half
    the tracking error of the rule without it (both constraints bind in most draws)."""
    mu, S = _problem(50 + seed)
    extra = {} if long_only else {"long_only": False}
    least = make_rule("m", "min-variance", extra, ASSETS).weights(mu, S).weights
    target = 0.5 * (math.sqrt(least @ S @ least) + math.sqrt(POLICY @ S @ POLICY))
    free = make_rule("tv", "target-volatility", {"target": target, **extra}, ASSETS).weights(mu, S)
    te = 0.5 * tracking_error(free.weights, POLICY, S)
    return mu, S, extra, target, te


@pytest.mark.parametrize("long_only", [True, False])
@pytest.mark.parametrize("seed", range(6))
def test_target_volatility_within_the_limit_meets_kkt_and_matches_cvxpy(seed, long_only):
    """Reference: cvxpy 1.9.3 with Clarabel on max mu'w s.t. sum(w) = 1 (w >= 0),
    ||L'w|| <= target, ||L'(w - p)|| <= te (two second-order cones)."""
    cp = pytest.importorskip("cvxpy")
    mu, S, extra, target, te = _tv_case(seed, long_only)
    rule = make_rule("tv", "target-volatility", {"target": target, "max_tracking_error": te,
                                                 **extra}, ASSETS, policy_weights=POLICY)
    a = rule.weights(mu, S)
    w = a.weights
    L = np.linalg.cholesky(S)
    x = cp.Variable(6)
    vol_c = cp.norm(L.T @ x) <= target
    te_c = cp.norm(L.T @ (x - POLICY)) <= te
    cons = [cp.sum(x) == 1, vol_c, te_c] + ([x >= 0] if long_only else [])
    prob = cp.Problem(cp.Maximize(mu @ x), cons)
    prob.solve(solver=cp.CLARABEL, tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10)
    assert prob.status == "optimal"
    ref = np.asarray(x.value)
    assert mu @ w >= mu @ ref - 1e-9                 # at least as good as the reference
    np.testing.assert_allclose(w, ref, atol=1e-4)
    vol, trk = math.sqrt(w @ S @ w), tracking_error(w, POLICY, S)
    assert vol <= target * (1 + 1e-9) and trk <= te * (1 + 1e-9)    # both satisfied
    # binding at the stated level where the reference's multiplier says the cone is active
    if float(vol_c.dual_value) > 1e-6:
        assert vol == pytest.approx(target, rel=1e-9)
        assert 0 < a.implied_risk_aversion < np.inf
    if float(te_c.dual_value) > 1e-6:
        assert trk == pytest.approx(te, rel=1e-9)
        assert rule.tracking_multiplier(mu, S) > 0
    assert rule.check(mu, S, w).max <= 1e-8        # KKT with both cones' own multipliers
    assert a.kkt <= 1e-8
    assert sum(float(c.dual_value) > 1e-6 for c in (vol_c, te_c)) >= 1


def test_target_volatility_cases_cover_both_cones_binding():
    """The random cases above are not all of one kind: in most both cones bind."""
    both = 0
    for seed in range(6):
        mu, S, extra, target, te = _tv_case(seed, True)
        w = make_rule("tv", "target-volatility", {"target": target, "max_tracking_error": te},
                      ASSETS, policy_weights=POLICY).weights(mu, S).weights
        both += (math.sqrt(w @ S @ w) == pytest.approx(target, rel=1e-9)
                 and tracking_error(w, POLICY, S) == pytest.approx(te, rel=1e-9))
    assert both >= 4


@pytest.mark.parametrize("extra", [{}, {"long_only": False}, {"budget": "cash"},
                                   {"bounds": {"a0": [0, 0.3]}}])
@pytest.mark.parametrize("target", [0.03, 0.04, 0.06])
def test_target_volatility_large_limit_equals_the_rule_without_it(extra, target):
    mu, S = _problem(61)
    free = make_rule("tv", "target-volatility", {"target": target, **extra}, ASSETS).weights(mu, S)
    big = make_rule("tv", "target-volatility", {"target": target, "max_tracking_error": 10.0,
                                                **extra}, ASSETS,
                    policy_weights=POLICY).weights(mu, S)
    np.testing.assert_allclose(big.weights, free.weights, atol=1e-12)
    assert big.implied_risk_aversion == pytest.approx(free.implied_risk_aversion, rel=1e-9)


def test_target_volatility_zero_limit_returns_the_policy_or_names_both_numbers():
    mu, S = _problem(3)
    vp = math.sqrt(POLICY @ S @ POLICY)
    r = make_rule("tv", "target-volatility", {"target": 1.01 * vp, "max_tracking_error": 0.0},
                  ASSETS, policy_weights=POLICY)
    np.testing.assert_allclose(r.weights(mu, S).weights, POLICY, atol=1e-12)
    # a target below the least volatility within the limit: one line with both numbers
    r = make_rule("tv", "target-volatility", {"target": 0.9 * vp, "max_tracking_error": 0.0},
                  ASSETS, policy_weights=POLICY)
    with pytest.raises(InfeasibleError, match=f"target volatility {0.9 * vp:.6g} is below the "
                                              f"least volatility {vp:.6g}"):
        r.weights(mu, S)
    # a limit below the least tracking error the bounds allow
    r = make_rule("tv", "target-volatility", {"target": 0.05, "max_tracking_error": 1e-4,
                                              "bounds": {"a0": [0, 0.05]}}, ASSETS,
                  policy_weights=POLICY)
    with pytest.raises(InfeasibleError, match="least tracking error"):
        r.weights(mu, S)


def test_target_volatility_batched_limit_equals_single_solves():
    mu, S = _problem(4)
    vp = math.sqrt(POLICY @ S @ POLICY)
    rng = np.random.default_rng(7)
    D = 40
    means = mu + rng.normal(0, 0.003, (D, 6))
    covs = np.repeat(S[None], D, 0) * rng.uniform(0.7, 1.3, (D, 1, 1))
    target = 1.15 * vp                    # within reach in every draw (variances x 0.7..1.3)
    rule = make_rule("tv", "target-volatility", {"target": target, "max_tracking_error": 0.01},
                     ASSETS, policy_weights=POLICY)
    W, kkt = rule.weights_batch_details(means, covs)
    assert np.all(kkt <= 1e-8)
    binds = 0
    for d in range(D):
        np.testing.assert_allclose(W[d], rule.weights(means[d], covs[d]).weights, atol=1e-10)
        vol = math.sqrt(W[d] @ covs[d] @ W[d])
        assert vol <= target * (1 + 1e-9)
        assert tracking_error(W[d], POLICY, covs[d]) <= 0.01 * (1 + 1e-9)
        assert rule.check(means[d], covs[d], W[d]).max <= 1e-8
        binds += vol == pytest.approx(target, rel=1e-9)
    assert 0 < binds < D                  # both the binding and the slack branch are used


# --------------------------------------------------------------------------- engines

def _engine_rules():
    from simulate import RuleSpec

    held = make_rule("held", "fixed", {"weights": dict(zip(ASSETS, POLICY))}, ASSETS)
    return (RuleSpec(make_rule("equal-weight", "equal-weight", {}, ASSETS)),
            RuleSpec(held),
            RuleSpec(make_rule("mv", "mean-variance", {"risk_aversion": 4.0}, ASSETS)),
            RuleSpec(make_rule("mv-te", "mean-variance", {"risk_aversion": 4.0,
                                                          "max_tracking_error": 0.01},
                               ASSETS, policy_weights=POLICY)))


def _spec(**kw):
    from simulate import ResampleSpec

    mu, S = _problem(40)
    base = dict(population_mean=mu, population_cov=S, history=None, assets=ASSETS,
                rules=_engine_rules(), generator="normal", draws=300, length=60, seed=5,
                risk_aversion=4.0, keep_draws=True, frontier_points=0, attribution=False,
                self_check_draws=0, policy="held")
    base.update(kw)
    return ResampleSpec(**base)


def test_population_comparisons_with_the_policy_match_the_per_draw_weights():
    from simulate import run_resampling
    from simulate.engine import TIE_RTOL, score

    spec = _spec()
    res = run_resampling(spec)
    W = res.draw_arrays()["weights"]                     # (D, R, N)
    names = list(res.draw_arrays()["rules"])
    mu, S = spec.population_mean, spec.population_cov
    pol = names.index("held")
    for i, name in enumerate(names):
        pop = res.to_summary()["rules"][name]["population"]
        te = [math.sqrt(max((W[d, i] - W[d, pol]) @ S @ (W[d, i] - W[d, pol]), 0.0))
              for d in range(W.shape[0])]
        assert pop["tracking_error_vs_policy_mean"] == pytest.approx(np.mean(te), rel=1e-10, abs=1e-15)
        if name == "held":
            assert pop["prob_beats_policy_ceq"] is None
            continue
        m = score(W[:, i], mu, S, 4.0)
        mp = score(W[:, pol], mu, S, 4.0)
        tol = TIE_RTOL * (np.abs(mp[:, 4]) + np.abs(mp[:, 1]))
        assert pop["prob_beats_policy_ceq"] == pytest.approx(np.mean(m[:, 4] > mp[:, 4] + tol))
        assert pop["ceq_gain_vs_policy"] == pytest.approx(m[:, 4].mean() - mp[:, 4].mean(), rel=1e-9)
    # the limited rule keeps every draw within the limit under its own estimate; under the
    # population covariance the mean tracking error stays near it
    assert res.to_summary()["rules"]["mv-te"]["population"]["tracking_error_vs_policy_mean"] < \
        res.to_summary()["rules"]["mv"]["population"]["tracking_error_vs_policy_mean"]


def test_history_sweep_also_compares_with_the_policy():
    from simulate import run_resampling

    sweep = run_resampling(_spec(keep_draws=False, sweep_lengths=(30, 90), sweep_draws=60)
                           ).to_summary()["sweep"]
    for name, d in sweep["rules"].items():
        probs = d["prob_beats_policy_ceq"]
        assert len(probs) == 2
        if name == "held":
            assert probs == [None, None]
        else:
            assert all(0.0 <= x <= 1.0 for x in probs)


def test_policy_statistics_do_not_depend_on_block_size():
    from simulate import run_resampling

    a = run_resampling(_spec(block_size=50, keep_draws=False)).to_summary()["rules"]
    b = run_resampling(_spec(block_size=300, keep_draws=False)).to_summary()["rules"]
    for name in a:
        for key in ("prob_beats_policy_ceq", "prob_beats_policy_sharpe",
                    "tracking_error_vs_policy_mean", "tracking_error_vs_policy_sd"):
            assert a[name]["population"][key] == b[name]["population"][key]


def test_backtest_against_the_policy_uses_the_same_tests_and_leaves_1n_alone():
    from backtest import BacktestConfig, run_backtest
    from backtest.stats import ceq_difference_test, jobson_korkie_memmel

    mu, S = _problem(41)
    rng = np.random.default_rng(9)
    R = rng.multivariate_normal(mu, S, 180)
    dates = np.arange(180)
    rules = _engine_rules()[1:]
    configs = [BacktestConfig(r.rule) for r in rules]
    kw = dict(window=60, rebalance_every=3, cost_bps=10.0, risk_aversion=4.0,
              bootstrap_resamples=200, seed=3)
    with_p = run_backtest(R, dates, ASSETS, configs, policy="held", **kw)
    without = run_backtest(R, dates, ASSETS, configs, **kw)
    sa, sb = with_p.to_summary(), without.to_summary()
    for name in sb:
        for key in ("sharpe_diff_p_jkm", "sharpe_diff_p_lw", "ceq_diff_p"):
            assert sa[name][key] == sb[name][key]
        assert "sharpe_diff_policy" not in sb[name]
    names = list(with_p.names)
    y = with_p.returns[:, names.index("held")]
    for name in ("equal-weight", "mv", "mv-te"):
        x = with_p.returns[:, names.index(name)]
        assert sa[name]["sharpe_diff_policy_p_jkm"] == pytest.approx(
            jobson_korkie_memmel(x, y).p_value, rel=1e-12)
        assert sa[name]["ceq_diff_policy_p"] == pytest.approx(
            ceq_difference_test(x, y, 4.0).p_value, rel=1e-12)
        assert 0 < sa[name]["sharpe_diff_policy_p_lw"] <= 1
        assert sa[name]["tracking_error_vs_policy"] == pytest.approx(np.std(x - y, ddof=1), rel=1e-12)
    from backtest.stats import moments_of, probabilistic_sharpe

    m, sd, skew, kurt = moments_of(with_p.returns[:, names.index("mv")])
    _, sdy, _, _ = moments_of(y)
    assert sa["mv"]["psr_vs_policy"] == pytest.approx(
        probabilistic_sharpe(m / sd, len(y), skew, kurt, y.mean() / sdy), rel=1e-9)
    assert sa["held"]["tracking_error_vs_policy"] == 0.0
    # the fixed policy is rebalanced back to its weights at every rebalancing date
    t = with_p.targets[names.index("held")]
    np.testing.assert_array_equal(t, np.tile(POLICY, (t.shape[0], 1)))
    assert "sharpe_diff_policy_p_lw" in with_p.tables()["backtest_tests"].columns


def test_path_slopes_kernel_equals_its_twin_and_finite_differences():
    """The slope dx/dt of the parametric QP along its active set (used by the search)
    against the plain-Python twin and a forward difference of two solves."""
    from optimise import _kernels as K
    from optimise.rules import _run_qp

    mu, S = _problem(50)
    D = 4
    means = mu + np.random.default_rng(1).normal(0, 0.004, (D, 6))
    covs = np.repeat(S[None], D, 0)
    rule = make_rule("r", "mean-variance", {"risk_aversion": 4, "bounds": {"a0": [0, 0.3]}},
                     ASSETS)
    H, c, A, lo, hi, lb, ub = rule._qp_problem(means, covs)
    A = np.ascontiguousarray(np.broadcast_to(A, A.shape))
    lo, hi = np.ascontiguousarray(lo), np.ascontiguousarray(hi)
    g = np.ascontiguousarray(np.einsum("dij,j->di", covs, POLICY) - c)
    t, h = 0.3, 1e-7
    X1 = _run_qp(H, c + t * g, A, lo, hi, lb, ub, rule._cold_points(H, c))[0]
    X2 = _run_qp(H, c + (t + h) * g, A, lo, hi, lb, ub, X1, warm=False)[0]
    fast = np.empty((D, 6))
    K.path_slopes(H, g, A, lo, hi, lb, ub, X1, 1e-10, fast)
    plain = np.empty((D, 6))
    K.plain_twin()["path_slopes"](H, g, A, lo, hi, lb, ub, X1, 1e-10, plain)
    np.testing.assert_allclose(fast, plain, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(fast, (X2 - X1) / h, atol=1e-6)
    assert np.abs(fast).max() > 1e-3          # not a trivially zero slope
