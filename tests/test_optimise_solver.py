"""The active-set QP kernel: KKT on every solve, batch == loop, warm == cold, numba == plain
Python twin, and random constrained problems against cvxpy (a general-purpose convex
solver, used here only as a reference)."""
import cvxpy as cp
import numpy as np
import pytest
import quadprog
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from optimise import _kernels as K
from optimise import kkt_residuals, make_rule
from optimise.rules import _kkt_batch, _run_qp

CVXPY_VERSION = cp.__version__


def draws(rng, D, n, T=120):
    """D (mean, covariance) pairs estimated from resampled histories of one population."""
    vol = rng.uniform(0.02, 0.07, n)
    C = 0.3 + 0.7 * np.eye(n)
    S = C * np.outer(vol, vol)
    mu = rng.uniform(0.002, 0.012, n)
    L = np.linalg.cholesky(S)
    R = mu + rng.standard_normal((D, T, n)) @ L.T
    means = R.mean(axis=1)
    Rc = R - means[:, None, :]
    covs = np.einsum("dti,dtj->dij", Rc, Rc) / (T - 1)
    return means, covs


def random_constraints(rng, assets, long_only):
    n = len(assets)
    params = {"long_only": long_only}
    if rng.random() < 0.6:
        bounds = {}
        for a in assets:
            if rng.random() < 0.5:
                lo = float(rng.uniform(0, 0.5 / n)) if long_only else float(rng.uniform(-0.5, 0))
                bounds[a] = [lo, float(lo + rng.uniform(0.2, 0.8))]
        params["bounds"] = bounds
    if n >= 3 and rng.random() < 0.5:
        k = int(rng.integers(2, n))
        members = list(rng.choice(assets, size=k, replace=False))
        params["groups"] = {"g1": {"assets": [str(m) for m in members],
                                   "bounds": [0.2, 0.8]}}
    return params


def cvx_solve(type_, params, mu, S, assets):
    """The same rule written directly in cvxpy (reference only)."""
    n = len(mu)
    w = cp.Variable(n)
    cons = [cp.sum(w) == 1]
    lo = np.full(n, 0.0 if params.get("long_only", True) else -np.inf)
    hi = np.full(n, np.inf)
    for a, (l, h) in params.get("bounds", {}).items():
        i = assets.index(a)
        lo[i] = max(lo[i], l)
        hi[i] = h
    for i in range(n):
        if np.isfinite(lo[i]):
            cons.append(w[i] >= lo[i])
        if np.isfinite(hi[i]):
            cons.append(w[i] <= hi[i])
    for g in params.get("groups", {}).values():
        idx = [assets.index(a) for a in g["assets"]]
        cons += [cp.sum(w[idx]) >= g["bounds"][0], cp.sum(w[idx]) <= g["bounds"][1]]
    Sp = cp.psd_wrap(S)
    if type_ == "min-variance":
        obj = cp.Minimize(cp.quad_form(w, Sp))
    elif type_ == "mean-variance":
        obj = cp.Maximize(mu @ w - params["risk_aversion"] / 2 * cp.quad_form(w, Sp))
    elif type_ == "target-return":
        obj = cp.Minimize(cp.quad_form(w, Sp))
        cons.append(mu @ w >= params["target"])
    prob = cp.Problem(obj, cons)
    prob.solve(solver="CLARABEL", tol_gap_abs=1e-12, tol_gap_rel=1e-12, tol_feas=1e-12)
    return np.asarray(w.value), prob.status


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2 ** 32 - 1), n=st.integers(2, 8),
       type_=st.sampled_from(["min-variance", "mean-variance", "target-return"]),
       long_only=st.booleans())
def test_random_problems_match_cvxpy(seed, n, type_, long_only):
    # Reference: cvxpy (CLARABEL), a general-purpose convex solver.
    rng = np.random.default_rng(seed)
    assets = tuple(f"x{i}" for i in range(n))
    params = random_constraints(rng, assets, long_only)
    if not long_only and "bounds" not in params:
        params["bounds"] = {a: [-1.0, 1.5] for a in assets}
    means, covs = draws(rng, 1, n, T=60)
    mu, S = means[0], covs[0]
    if type_ == "mean-variance":
        params["risk_aversion"] = float(rng.uniform(1, 10))
    try:
        r = make_rule("r", type_, params, assets) if type_ != "target-return" else None
        if type_ == "target-return":
            base = make_rule("r", "min-variance", params, assets)
            lo = float(mu @ base.weights(mu, S).weights)
            top, _ = base.constraints.max_return(mu)
            params["target"] = lo + float(rng.uniform(0, 1)) * (top - lo)
            r = make_rule("r", type_, params, assets)
    except Exception as exc:  # random bounds may be infeasible: that must be an InfeasibleError
        from estimators.core import InfeasibleError
        assert isinstance(exc, InfeasibleError), exc
        return
    alloc = r.weights(mu, S)
    w = alloc.weights
    ref, status = cvx_solve(type_, params, mu, S, assets)
    assert status == "optimal"
    # objective values agree to ~1e-8; weights are unique (Sigma positive definite)
    f = {"min-variance": lambda v: v @ S @ v, "target-return": lambda v: v @ S @ v,
         "mean-variance": lambda v: -(mu @ v - params.get("risk_aversion", 0) / 2 * v @ S @ v)}[type_]
    assert f(w) <= f(ref) + 1e-9
    np.testing.assert_allclose(w, ref, atol=2e-5)
    # KKT with multipliers estimated independently of the solver
    assert r.check(mu, S, w).max < 1e-8
    assert alloc.kkt < 1e-9


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 2 ** 32 - 1), n=st.integers(2, 7), long_only=st.booleans())
def test_random_max_sharpe_matches_cvxpy(seed, n, long_only):
    # Reference: the homogenised problem written in cvxpy (CLARABEL) and the Sharpe ratio.
    rng = np.random.default_rng(seed)
    assets = tuple(f"x{i}" for i in range(n))
    params = {"long_only": long_only, "risk_free": 0.001}
    if long_only and rng.random() < 0.5:
        params["bounds"] = {assets[0]: [0.05, 0.6]}
    means, covs = draws(rng, 1, n, T=60)
    mu, S = means[0], covs[0]
    from estimators.core import InfeasibleError
    try:
        w = make_rule("s", "max-sharpe", params, assets).weights(mu, S).weights
    except InfeasibleError:
        return
    y = cp.Variable(n)
    kappa = cp.Variable()
    cons = [(mu - 0.001) @ y == 1, cp.sum(y) == kappa, kappa >= 0]
    if long_only:
        cons.append(y >= 0)
        if "bounds" in params:
            cons += [y[0] >= 0.05 * kappa, y[0] <= 0.6 * kappa]
    cp.Problem(cp.Minimize(cp.quad_form(y, cp.psd_wrap(S))), cons).solve(solver="CLARABEL")
    wr = y.value / kappa.value
    sr = lambda v: (v @ mu - 0.001) / np.sqrt(v @ S @ v)
    assert sr(w) >= sr(wr) - 1e-8
    # w = y / kappa: with shorting, kappa can be small (the tangency near the frontier's
    # asymptote) and the reference's weights then carry its solver tolerance times 1/kappa,
    # so the weights are compared relative to their size (|w| reached 183 in one example)
    np.testing.assert_allclose(w, wr, atol=1e-5 * max(1.0, np.abs(wr).max()))


def test_every_batch_solve_passes_kkt_and_matches_quadprog():
    # Reference: quadprog (dense Goldfarb-Idnani) on each problem.
    rng = np.random.default_rng(3)
    n, D = 12, 300
    means, covs = draws(rng, D, n)
    r = make_rule("mv", "mean-variance", {"risk_aversion": 5.0}, n)
    W, kkt = r.weights_batch_details(means, covs)
    assert np.max(kkt) < 1e-9
    Cq = np.hstack([np.ones((n, 1)), np.eye(n)])
    bq = np.r_[1.0, np.zeros(n)]
    for d in range(0, D, 10):
        wq = quadprog.solve_qp(5.0 * covs[d], means[d], Cq, bq, 1)[0]
        np.testing.assert_allclose(W[d], wq, atol=1e-9)
        assert r.check(means[d], covs[d], W[d]).max < 1e-10


@pytest.mark.parametrize("type_, params", [
    ("min-variance", {"bounds": {"asset 1": [0.05, 0.3]}}),
    ("mean-variance", {"risk_aversion": 3.0, "groups": {"g": {"assets": ["asset 1", "asset 2"],
                                                             "bounds": [0.3, 0.5]}}}),
    ("max-sharpe", {"risk_free": 0.001}),
    ("target-return", {"target": 0.007}),
    ("target-volatility", {"target": 0.035}),
    ("equal-risk-contribution", {}),
    ("mean-variance", {"risk_aversion": 4.0, "budget": "cash", "long_only": False}),
])
def test_batch_equals_loop(type_, params):
    rng = np.random.default_rng(5)
    n, D = 8, 40
    means, covs = draws(rng, D, n)
    r = make_rule("r", type_, params, n)
    W = r.weights_batch(means, covs)
    loop = np.array([r.weights(means[d], covs[d]).weights for d in range(D)])
    np.testing.assert_array_equal(W, loop)     # not a digit changes (block-size invariance)
    if type_ not in ("equal-risk-contribution",):
        for d in range(0, D, 7):
            assert r.check(means[d], covs[d], W[d]).max < 1e-9


def test_warm_start_does_not_change_results():
    rng = np.random.default_rng(9)
    n, D = 20, 200
    means, covs = draws(rng, D, n)
    r = make_rule("mv", "mean-variance", {"risk_aversion": 5.0,
                                          "bounds": {"asset 3": [0.02, 0.2]}}, n)
    H, c, A, lo, hi, lb, ub = r._qp_problem(means, covs)
    x0 = np.broadcast_to(r.constraints.feasible_point, (D, n)).copy()
    Xw, Zw, Nw, sw = _run_qp(H, c, A, lo, hi, lb, ub, x0, warm=True)
    Xc, Zc, Nc, sc = _run_qp(H, c, A, lo, hi, lb, ub, x0, warm=False)
    assert np.all(sw == 0) and np.all(sc == 0)
    # the answer depends only on the final working set: identical to the last bit
    np.testing.assert_array_equal(Xw, Xc)
    assert np.max(_kkt_batch(H, c, A, lo, hi, lb, ub, Xw, Zw, Nw)) < 1e-10
    # reversing the order of the problems changes nothing either
    Xr, *_ = _run_qp(H[::-1], c[::-1], A, lo, hi, lb, ub, x0, warm=True)
    np.testing.assert_array_equal(Xr[::-1], Xw)
    # and so does splitting the batch into blocks of any size
    for size in (1, 7, 64):
        parts = [_run_qp(H[i:i + size], c[i:i + size], A[i:i + size], lo[i:i + size],
                         hi[i:i + size], lb, ub, x0[i:i + size])[0] for i in range(0, D, size)]
        np.testing.assert_array_equal(np.concatenate(parts), Xw)


def test_numba_kernels_match_plain_python_twin():
    twin = K.plain_twin()
    rng = np.random.default_rng(13)
    n, D = 6, 12
    means, covs = draws(rng, D, n)
    r = make_rule("r", "mean-variance", {"risk_aversion": 4.0,
                                         "groups": {"g": {"assets": ["asset 1", "asset 2"],
                                                          "bounds": [0.1, 0.4]}}}, n)
    H, c, A, lo, hi, lb, ub = r._qp_problem(means, covs)
    H = np.ascontiguousarray(H)
    x0 = np.broadcast_to(r.constraints.feasible_point, (D, n)).copy()
    m = A.shape[1]
    outs = []
    for fn in (K.qp_batch, twin["qp_batch"]):
        X, Z, NU = np.empty((D, n)), np.empty((D, n)), np.empty((D, m))
        s, it = np.empty(D, np.int64), np.empty(D, np.int64)
        fn(H, c, A, lo, hi, lb, ub, x0, True, -1, 500, X, Z, NU, s, it)
        outs.append((X, Z, NU, s, it))
    for a, b in zip(outs[0], outs[1]):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-15)
    outs = []
    for fn in (K.erc_batch, twin["erc_batch"]):
        X, s, it = np.empty((D, n)), np.empty(D, np.int64), np.empty(D, np.int64)
        fn(covs, np.full(n, 1 / n), 1e-14, 100, X, s, it)
        outs.append((X, s, it))
    for a, b in zip(outs[0], outs[1]):
        np.testing.assert_allclose(a, b, rtol=1e-12)
    outs = []
    A2, lo2, hi2 = r.constraints.rows()
    A2 = np.broadcast_to(A2, (D,) + A2.shape)
    lo2 = np.broadcast_to(lo2, (D, lo2.size))
    hi2 = np.broadcast_to(hi2, (D, hi2.size))
    xmax = r._max_returns(means)[1]
    for fn in (K.target_vol_batch, twin["target_vol_batch"]):
        X, Z, NU, T = np.empty((D, n)), np.empty((D, n)), np.empty((D, m)), np.empty(D)
        s = np.empty(D, np.int64)
        fn(covs, means, A2, lo2, hi2, lb, ub, x0, xmax, 0.035 ** 2, 500, X, Z, NU, T, s)
        outs.append((X, T, s))
    for a, b in zip(outs[0], outs[1]):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-15)


def test_kkt_residuals_detect_a_non_optimal_point():
    # The check can fail: a feasible but non-optimal portfolio has a large residual.
    rng = np.random.default_rng(2)
    means, covs = draws(rng, 1, 5)
    r = make_rule("mv", "mean-variance", {"risk_aversion": 5.0}, 5)
    w = r.weights(means[0], covs[0]).weights
    assert r.check(means[0], covs[0], w).max < 1e-10
    assert r.check(means[0], covs[0], np.full(5, 0.2)).max > 1e-4
    shifted = w + np.array([0.01, -0.01, 0, 0, 0])
    res = kkt_residuals(shifted, 5.0 * covs[0], means[0], np.ones((1, 5)), [1.0], [1.0],
                        np.zeros(5), np.full(5, np.inf))
    assert res.max > 1e-6 or res.primal > 0


def test_large_n_batch_kkt():
    rng = np.random.default_rng(17)
    n, D = 60, 50
    means, covs = draws(rng, D, n)
    for type_, p in (("mean-variance", {"risk_aversion": 5.0}), ("min-variance", {}),
                     ("max-sharpe", {})):
        r = make_rule("r", type_, p, n)
        W, kkt = r.weights_batch_details(means, covs)
        assert np.max(kkt) < 1e-9, type_
        assert np.all(W >= 0) and np.allclose(W.sum(axis=1), 1, atol=1e-12)


def test_kkt_kernel_matches_numpy_reference():
    from optimise.rules import _kkt_batch_numpy

    rng = np.random.default_rng(21)
    n, D = 9, 30
    means, covs = draws(rng, D, n)
    r = make_rule("r", "target-return", {"target": 0.006,
                                         "bounds": {"asset 2": [0.05, 0.4]}}, n)
    H, c, A, lo, hi, lb, ub = r._qp_problem(means, covs)
    x0 = r._starts(means, covs, H, c, A, lo, hi, lb, ub, False)
    X, Z, NU, status = _run_qp(H, c, A, lo, hi, lb, ub, x0)
    assert np.all(status == 0)
    # perturb to get non-trivial residuals of every kind
    Xp = X + rng.normal(0, 1e-3, X.shape)
    Zp = Z + rng.normal(0, 1e-4, Z.shape)
    for args in ((X, Z, NU), (Xp, Zp, NU)):
        np.testing.assert_allclose(_kkt_batch(H, c, A, lo, hi, lb, ub, *args),
                                   _kkt_batch_numpy(H, c, A, lo, hi, lb, ub, *args),
                                   rtol=1e-10, atol=1e-15)
    assert np.max(_kkt_batch(H, c, A, lo, hi, lb, ub, Xp, Zp, NU)) > 1e-6


def degenerate_case(rng):
    """A small problem with a singular covariance (few periods, duplicated or linearly
    dependent assets, a riskless asset) and possibly equal means."""
    n = int(rng.integers(2, 9))
    T = int(rng.integers(2, 12))
    R = rng.normal(0.005, 0.04, (T, n))
    kind = int(rng.integers(0, 4))
    if kind == 1:
        R[:, 1] = R[:, 0]
    elif kind == 2:
        R[:, 0] = 0.001
    elif kind == 3:
        R[:, -1] = 2 * R[:, 0] - R[:, 1]
    mu = R.mean(axis=0)
    if rng.random() < 0.3:
        mu[:] = mu[0]
    S = np.cov(R, rowvar=False)
    type_ = str(rng.choice(["min-variance", "mean-variance", "target-return", "max-sharpe"]))
    params = {"risk_aversion": 3.0} if type_ == "mean-variance" else {}
    if rng.random() < 0.4:
        params["bounds"] = {f"asset {i + 1}": [0, 0.6] for i in range(n)}
    if rng.random() < 0.3:
        params["long_only"] = False
        params["bounds"] = {f"asset {i + 1}": [-0.5, 0.8] for i in range(n)}
    if type_ == "target-return":
        params["target"] = float(np.quantile(mu, 0.6))
    return n, mu, S, type_, params


def _degenerate_run(count, seed):
    from estimators.core import InfeasibleError

    rng = np.random.default_rng(seed)
    solved = 0
    for _ in range(count):
        n, mu, S, type_, params = degenerate_case(rng)
        r = make_rule("r", type_, params, n)
        try:
            w = r.weights(mu, S).weights
        except InfeasibleError as exc:   # only: no asset beats the risk-free rate
            assert "risk-free" in str(exc)
            continue
        solved += 1
        assert np.all(np.isfinite(w))
        assert r.constraints.is_feasible(w, tol=1e-12)
        assert r.check(mu, S, w).max < 1e-9, (type_, params)
        if type_ == "max-sharpe":
            continue
        # the objective is no worse than cvxpy's (CLARABEL) on the same problem
        x = cp.Variable(n)
        lo, hi = r.constraints.lower, r.constraints.upper
        cons = [cp.sum(x) == 1] + [x[i] >= lo[i] for i in range(n) if np.isfinite(lo[i])] \
            + [x[i] <= hi[i] for i in range(n) if np.isfinite(hi[i])]
        g = params.get("risk_aversion", 0.0)
        if type_ == "target-return":
            cons.append(mu @ x >= params["target"])
        f = (lambda v: g / 2 * v @ S @ v - mu @ v) if g else (lambda v: v @ S @ v)
        obj = g / 2 * cp.quad_form(x, cp.psd_wrap(S)) - mu @ x if g else cp.quad_form(x, cp.psd_wrap(S))
        cp.Problem(cp.Minimize(obj), cons).solve(solver="CLARABEL")
        assert f(w) <= f(x.value) + 1e-9
    return solved


def test_singular_and_degenerate_problems():
    # Bounded problems with singular covariances are solved (proximal-point path), KKT
    # verified with independently estimated multipliers, never worse than cvxpy.
    assert _degenerate_run(60, 5) > 40


@pytest.mark.slow
def test_singular_and_degenerate_problems_full():
    assert _degenerate_run(1500, 6) > 1000


def test_plain_twin_on_a_singular_problem():
    # exercises the proximal-point fallback and the iterative refinement in both versions
    twin = K.plain_twin()
    rng = np.random.default_rng(4)
    R = rng.normal(0.005, 0.04, (4, 6))
    R[:, 1] = R[:, 0]
    mu = np.full(6, 0.004)
    S = np.cov(R, rowvar=False)
    r = make_rule("r", "mean-variance", {"risk_aversion": 3.0, "long_only": False,
                                         "bounds": {f"asset {i + 1}": [-0.5, 0.8] for i in range(6)}}, 6)
    H, c, A, lo, hi, lb, ub = r._qp_problem(mu[None], S[None])
    x0 = r._starts(mu[None], S[None], H, c, A, lo, hi, lb, ub, True)
    outs = []
    for fn in (K.qp_batch, twin["qp_batch"]):
        X, Z, NU = np.empty((1, 6)), np.empty((1, 6)), np.empty((1, 1))
        s, it = np.empty(1, np.int64), np.empty(1, np.int64)
        fn(np.ascontiguousarray(H), c, A, lo, hi, lb, ub, x0, True, -1, 500, X, Z, NU, s, it)
        outs.append((X, Z, NU, s, it))
    assert outs[0][3][0] == 0 and outs[0][4][0] > 3
    for a, b in zip(outs[0], outs[1]):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-14)


def _cold_state(H, A, lo, hi, lb, ub, x0):
    """Workspace, point, working sets and multiplier arrays of a solve from ``x0``."""
    n, m = H.shape[0], A.shape[0]
    work_f, work_i = K.make_work(n, m)
    x = x0.copy()
    vs, rs = np.zeros(n, np.int64), np.zeros(m, np.int64)
    K._states(x, A, lo, hi, lb, ub, vs, rs)
    return work_f, work_i, x, vs, rs, np.zeros(n), np.zeros(m)


def _prox_solve(fn, H, c, A, lo, hi, lb, ub, x0):
    work_f, work_i, x, vs, rs, z, nu = _cold_state(H, A, lo, hi, lb, ub, x0)
    st_, it = fn(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, 5000, work_f, work_i)
    return st_, it, x, z, nu, vs


def test_proximal_steps_take_the_primal_dual_phase_and_keep_every_bit():
    # Long-only minimum variance on sample covariances from fewer rows than assets: the
    # free block is singular, so qp_solve takes proximal-point steps. Each step tries the
    # primal-dual phase first; its answer must be the primal method's to the bit (same final
    # working set, same subproblem solve), in fewer iterations. Checked on the plain twin,
    # with the phase off (limit 0: the old path), cut short (limit 1: it gives up and the
    # restored state goes to the primal method) and on (the default limit).
    rng = np.random.default_rng(11)
    n, T = 24, 12
    means, covs = draws(rng, 6, n, T=T)
    r = make_rule("r", "min-variance", {}, n)
    H, c, A, lo, hi, lb, ub = r._qp_problem(means, covs)
    A = np.ascontiguousarray(np.broadcast_to(A, (6,) + A.shape[-2:]))
    lo = np.ascontiguousarray(np.broadcast_to(lo, (6, A.shape[1])))
    hi = np.ascontiguousarray(np.broadcast_to(hi, (6, A.shape[1])))
    x0 = r._starts(means, covs, H, c, A, lo, hi, lb, ub, False)
    twins = {}
    for limit in (0, 1, None):
        t = K.plain_twin()
        if limit is not None:
            t["_PROX_PDAS_MAXIT"] = limit
        twins[limit] = t
    iters = {k: 0 for k in twins}
    for d in range(6):
        args = (np.ascontiguousarray(H[d]), np.ascontiguousarray(c[d]), A[d], lo[d], hi[d],
                lb, ub, np.ascontiguousarray(x0[d]))
        # the start has every weight free and the block is singular: the proximal path
        out = {k: _prox_solve(t["qp_solve"], *args) for k, t in twins.items()}
        for k, o in out.items():
            assert o[0] == K.OK
            iters[k] += o[1]
        for k in (1, None):
            for a, b in zip(out[0][2:], out[k][2:]):
                assert np.array_equal(a, b), (d, k)
        # the compiled kernel agrees with its twin (to rounding: the compiler may contract
        # multiply-adds) and certifies the optimum
        st_, _, x, z, nu, _ = _prox_solve(K.qp_solve, *args)
        assert st_ == K.OK
        np.testing.assert_allclose(x, out[None][2], rtol=1e-10, atol=1e-14)
        assert r.check(means[d], covs[d], x).max < 1e-9
    assert iters[None] < 0.7 * iters[0], iters      # 69 against 124 when written


@settings(max_examples=12, deadline=None)
@given(seed=st.integers(0, 2 ** 32 - 1), n=st.integers(2, 7))
def test_random_target_volatility_matches_cvxpy(seed, n):
    # Reference: max mu'w s.t. w'Sw <= target^2 written in cvxpy 1.9 (CLARABEL).
    from estimators.core import InfeasibleError

    rng = np.random.default_rng(seed)
    assets = tuple(f"x{i}" for i in range(n))
    params = random_constraints(rng, assets, True)
    means, covs = draws(rng, 1, n, T=60)
    mu, S = means[0], covs[0]
    try:
        base = make_rule("m", "min-variance", params, assets)
    except InfeasibleError:
        return
    wmin = base.weights(mu, S).weights
    _, wmax = base.constraints.max_return(mu)
    lo, hi = np.sqrt(wmin @ S @ wmin), np.sqrt(wmax @ S @ wmax)
    target = float(lo + rng.uniform(0.05, 0.95) * (hi - lo)) if hi > lo * (1 + 1e-6) else hi
    r = make_rule("t", "target-volatility", dict(params, target=target), assets)
    w = r.weights(mu, S).weights
    assert np.sqrt(w @ S @ w) <= target * (1 + 1e-12)
    assert r.check(mu, S, w).max < 1e-9
    x = cp.Variable(n)
    cons = [cp.sum(x) == 1, x >= r.constraints.lower,
            cp.quad_form(x, cp.psd_wrap(S)) <= target ** 2]
    up = np.isfinite(r.constraints.upper)
    if up.any():
        cons.append(x[np.flatnonzero(up)] <= r.constraints.upper[up])
    for g in range(len(r.constraints.group_names)):
        a = r.constraints.group_matrix[g]
        cons += [a @ x >= r.constraints.group_lower[g], a @ x <= r.constraints.group_upper[g]]
    cp.Problem(cp.Maximize(mu @ x), cons).solve(solver="CLARABEL")
    assert mu @ w >= mu @ x.value - 1e-8


@pytest.mark.parametrize("type_, params", [
    ("min-variance", {}),
    ("target-return", {"target": 0.0}),
    ("max-sharpe", {"risk_free": -0.05}),
])
def test_batch_equals_loop_with_singular_covariances(type_, params):
    # T < N: the optimum is not unique (zero-variance portfolios exist). Whatever the batch
    # order, each problem's answer comes from its own cold start once the covariance turns
    # out singular, so batch and loop agree.
    rng = np.random.default_rng(8)
    D, T, n = 60, 8, 12
    R = rng.normal(0.005, 0.04, (D, T, n))
    means = R.mean(axis=1)
    Rc = R - means[:, None, :]
    covs = np.einsum("dti,dtj->dij", Rc, Rc) / (T - 1)
    r = make_rule("r", type_, params, n)
    W, kkt = r.weights_batch_details(means, covs)
    assert np.max(kkt) < 1e-9
    loop = np.array([r.weights(means[d], covs[d]).weights for d in range(D)])
    np.testing.assert_allclose(W, loop, atol=1e-10)
    for d in range(0, D, 6):
        assert r.check(means[d], covs[d], W[d]).max < 1e-9


def test_separable_start_is_the_separable_minimiser():
    """The batched QP's cold start (optimise._kernels.separable_start_rows) solves the
    problem without the off-diagonal covariances exactly: against cvxpy (a general-purpose
    convex solver) and the problem's KKT conditions (a common water level for the free
    weights, the bound weights on the right side of it); the plain twin gives the same bits;
    rows with a diagonal it cannot use are left to the caller."""
    from optimise import _kernels as K

    twin = K.plain_twin()["separable_start_rows"]
    rng = np.random.default_rng(2026)
    for n, lower, upper in [(10, np.zeros(10), np.ones(10)),
                            (25, np.zeros(25), np.full(25, 0.12)),
                            (8, np.full(8, 0.02), np.linspace(0.1, 0.6, 8)),
                            # tight caps, widely spread levels: bracket points where no
                            # weight is free (every weight at a bound)
                            (12, np.zeros(12), np.full(12, 0.1)),
                            (30, np.zeros(30), np.full(30, 0.04))]:
        D = 12
        a = rng.normal(size=(D, n, n))
        H = a @ a.transpose(0, 2, 1) / n + 0.05 * np.eye(n)
        c = rng.normal(0.0, 0.5 if n not in (12, 30) else 5.0, size=(D, n))
        cap = np.minimum(upper, lower + 1.0 - lower.sum())
        out = np.full((D, n), np.nan)
        done = np.zeros(D, dtype=bool)
        K.separable_start_rows(H, c, lower, cap, out, done)
        out2 = np.full((D, n), np.nan)
        done2 = np.zeros(D, dtype=bool)
        twin(H, c, lower, cap, out2, done2)
        assert done.all() and np.array_equal(done, done2)
        assert np.array_equal(out.view(np.int64), out2.view(np.int64))
        for d in range(D):
            h, w = np.diag(H[d]), out[d]
            assert abs(w.sum() - 1.0) <= 1e-12
            assert np.all(w >= lower) and np.all(w <= cap)
            level = c[d] - h * w
            free = (w > lower + 1e-12) & (w < cap - 1e-12)
            at_low, at_cap = w <= lower + 1e-12, w >= cap - 1e-12
            if free.any():
                lam = level[free].mean()
                np.testing.assert_allclose(level[free], lam, rtol=0, atol=1e-9)
                assert np.all(level[at_low] <= lam + 1e-9)
                assert np.all(level[at_cap] >= lam - 1e-9)
            else:       # every weight at a bound: some level separates the two groups
                top_low = level[at_low].max(initial=-np.inf)
                assert top_low <= level[at_cap].min(initial=np.inf) + 1e-9
            x = cp.Variable(n)
            cp.Problem(cp.Minimize(0.5 * cp.sum(cp.multiply(h, cp.square(x))) - c[d] @ x),
                       [cp.sum(x) == 1, x >= lower, x <= cap]).solve(
                solver=cp.CLARABEL, tol_gap_abs=1e-11, tol_gap_rel=1e-11, tol_feas=1e-11)
            np.testing.assert_allclose(w, x.value, atol=1e-6)
    # a draw with a zero variance or a non-finite mean is left to the caller's start
    H = np.stack([np.eye(3), np.diag([1.0, 0.0, 1.0]), np.eye(3)])
    c = np.array([[0.1, 0.2, 0.3], [0.1, 0.2, 0.3], [0.1, np.nan, 0.3]])
    out = np.full((3, 3), -7.0)
    done = np.ones(3, dtype=bool)
    K.separable_start_rows(H, c, np.zeros(3), np.ones(3), out, done)
    assert done.tolist() == [True, False, False]
    assert np.all(out[1:] == -7.0)


def _cold_solve(fn_core, H, c, A, lo, hi, lb, ub, x0, maxiter=500, pdas=False):
    """One problem from the cold point: the primal active-set core, or the primal-dual
    phase (returns None when it did not settle)."""
    n, m = H.shape[0], A.shape[0]
    work_f, work_i, x, vs, rs, z, nu = _cold_state(H, A, lo, hi, lb, ub, x0)
    if pdas:
        rs[:] = -1
        st_, _ = K._pdas(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, K._PDAS_MAXIT,
                         K._unpack(work_f, work_i, n, m), 0.0, np.zeros(n))
        return None if st_ != K.OK else (x, z, nu)
    st_, _ = fn_core(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, maxiter, work_f, work_i,
                     0.0, np.zeros(n))
    assert st_ == K.OK
    return x, z, nu


@pytest.mark.parametrize("long_only", [True, False])
def test_primal_dual_phase_ends_where_the_primal_method_ends(long_only):
    """Bounds and equality rows only (fully invested, long-only or boxed long-short): the
    primal-dual active-set phase (Hintermueller, Ito & Kunisch 2003) settles on the
    primal method's final working set, so weights and multipliers are the same to the
    bit, and the batch kernel (which runs the phase first) returns them too."""
    rng = np.random.default_rng(21 if long_only else 22)
    n, D = 30, 60
    assets = tuple(f"x{i}" for i in range(n))
    params = {"long_only": long_only, "risk_aversion": 3.0}
    if not long_only:
        params["bounds"] = {a: [-0.3, 0.5] for a in assets}
    r = make_rule("r", "mean-variance", params, assets)
    means, covs = draws(rng, D, n)
    H, c, A, lo, hi, lb, ub = r._qp_problem(means, covs)
    H = np.ascontiguousarray(H)
    A, lo, hi = (np.ascontiguousarray(a) for a in (A, lo, hi))
    x0 = r._starts(means, covs, H, c, A, lo, hi, lb, ub, False)
    settled = 0
    for d in range(D):
        prim = _cold_solve(K._qp_core, H[d], c[d], A[d], lo[d], hi[d], lb, ub, x0[d])
        pd = _cold_solve(None, H[d], c[d], A[d], lo[d], hi[d], lb, ub, x0[d], pdas=True)
        if pd is None:
            continue
        settled += 1
        for a, b in zip(prim, pd):
            assert np.array_equal(a.view(np.int64), b.view(np.int64))
    assert settled >= 0.9 * D
    X, Z, NU, status = _run_qp(H, c, A, lo, hi, lb, ub, x0, warm=False)
    assert np.all(status == K.OK)
    kkt = _kkt_batch(H, c, A, lo, hi, lb, ub, X, Z, NU)
    assert np.all(kkt <= 1e-9)
    for d in range(0, D, 7):
        x = _cold_solve(K._qp_core, H[d], c[d], A[d], lo[d], hi[d], lb, ub, x0[d])[0]
        assert np.array_equal(X[d].view(np.int64), x.view(np.int64))


def test_primal_dual_phase_twin_and_give_up():
    """The phase's numba kernel against its plain twin (to rounding), and its give-up path:
    with one subproblem allowed it stops unsettled on a problem that needs more, and the
    batch kernel still solves that problem (the primal method takes over)."""
    twin = K.plain_twin()
    rng = np.random.default_rng(23)
    n, D = 12, 10
    assets = tuple(f"x{i}" for i in range(n))
    r = make_rule("r", "mean-variance", {"risk_aversion": 2.0}, assets)
    means, covs = draws(rng, D, n)
    H, c, A, lo, hi, lb, ub = r._qp_problem(means, covs)
    H = np.ascontiguousarray(H)
    A, lo, hi = (np.ascontiguousarray(a) for a in (A, lo, hi))
    x0 = r._starts(means, covs, H, c, A, lo, hi, lb, ub, False)
    outs = []
    for fn in (K.qp_batch, twin["qp_batch"]):
        X, Z, NU = np.empty((D, n)), np.empty((D, n)), np.empty((D, 1))
        s, it = np.empty(D, np.int64), np.empty(D, np.int64)
        fn(H, c, A, lo, hi, lb, ub, x0, False, -1, 500, X, Z, NU, s, it)
        outs.append((X, Z, NU, s, it))
    for a, b in zip(outs[0], outs[1]):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-15)
    gave_up = 0
    for d in range(D):
        work_f, work_i = K.make_work(n, 1)
        x = x0[d].copy()
        vs, rs = np.zeros(n, np.int64), np.full(1, -1, np.int64)
        K._states(x, A[d], lo[d], hi[d], lb, ub, vs, rs)
        rs[:] = -1
        st_, it_ = K._pdas(H[d], c[d], A[d], lo[d], hi[d], lb, ub, x, vs, rs, np.zeros(n),
                           np.zeros(1), 1, K._unpack(work_f, work_i, n, 1), 0.0, np.zeros(n))
        if st_ == K.NOT_SETTLED:
            gave_up += 1
            assert outs[0][3][d] == K.OK and outs[0][4][d] > 1   # solved all the same
    assert gave_up > 0
