"""The resampling engine: closed forms, reproducibility, streaming statistics, frontiers.

Outside references named at each check: Kan & Zhou (2007, JFQA 42(3)) for the plug-in
rule's expected utility; Broadie (1993, Annals of Operations Research 45) for the
actual-below-true frontier fact; Michaud (1998) / REFERENCES §13 for the rank-matched
averaged frontier's feasibility; numpy 2.4 ``percentile(method="inverted_cdf")``.
"""
import json
import math
import os
from dataclasses import replace

import numpy as np
import pytest

from estimators.core import DataError, SettingsError
from optimise import make_rule
from simulate import (
    CHUNK_DRAWS,
    BlockResult,
    ResampleSpec,
    RuleSpec,
    block_plan,
    kan_zhou,
    merge_blocks,
    run_block,
    run_resampling,
    score,
    squared_sharpe,
)
from tests.conftest import recipe_a, recipe_b


def _assets(n):
    return tuple(f"asset{i}" for i in range(n))


def _spec(mu, cov, rules, *, draws=300, length=120, seed=11, gamma=3.0, **kw):
    assets = _assets(len(mu))
    specs = [RuleSpec(make_rule("equal-weight", "equal-weight", {}, assets))]
    for name, rtype, params, mean, covariance in rules:
        specs.append(RuleSpec(make_rule(name, rtype, params, assets), mean, covariance))
    kw.setdefault("sweep_lengths", ())
    kw.setdefault("self_check_draws", 0)
    return ResampleSpec(np.asarray(mu, float), np.asarray(cov, float), None, assets, tuple(specs),
                        "normal", draws, length, seed, gamma, **kw)


KZ_RULE = ("plug-in", "mean-variance", {"risk_aversion": 3.0, "long_only": False, "budget": "cash"},
           "sample", "sample-mle")
LO_MV = ("mv", "mean-variance", {"risk_aversion": 3.0}, "sample", "sample")


# ---------------------------------------------------------------- Kan & Zhou (2007)

def test_kan_zhou_closed_form_deterministic():
    """Kan & Zhou (2007, JFQA 42(3)) terms for Recipe A, N = 10, T = 120, gamma = 3:
    k1 = T/(T-N-2) = 120/108, k2 = T^2(T-2)/((T-N-1)(T-N-2)(T-N-4)), theta2 = 0.0625 exactly
    (REFERENCES §0/§1; the table there gives k1 1.111111, k2 1.361722, E[U] -0.00994926)."""
    mu, cov = recipe_a(10)
    th2 = squared_sharpe(mu, cov)
    assert th2 == pytest.approx(0.0625, rel=1e-12)
    kz = kan_zhou(th2, 10, 120, 3.0)
    assert kz.k1 == pytest.approx(120 / 108, rel=1e-12)
    assert kz.k2 == pytest.approx(120 ** 2 * 118 / (109 * 108 * 106), rel=1e-12)
    eu = (kz.k1 * 0.0625 - 0.5 * kz.k2 * (0.0625 + 10 / 120)) / 3.0
    assert kz.expected_utility == pytest.approx(eu, rel=1e-12)
    assert kz.expected_utility == pytest.approx(-0.00994926, abs=5e-9)
    assert kz.optimum == pytest.approx(0.0625 / 6, rel=1e-12)
    # Recipe A, N = 25, T = 60: REFERENCES §1 table: k1 1.818182, k2 6.003105, E[U] -0.47235280
    mu, cov = recipe_a(25)
    kz = kan_zhou(squared_sharpe(mu, cov), 25, 60, 3.0)
    assert kz.k1 == pytest.approx(1.818182, abs=5e-7)
    assert kz.k2 == pytest.approx(6.003105, abs=5e-7)
    assert kz.expected_utility == pytest.approx(-0.47235280, abs=5e-9)
    with pytest.raises(SettingsError, match="T > N \\+ 4"):
        kan_zhou(0.1, 10, 14, 3.0)


def _kz_check(draws, seed):
    mu, cov = recipe_a(10)
    spec = _spec(mu, cov, [KZ_RULE], draws=draws, seed=seed, frontier_points=0, attribution=False,
                 self_check_draws=draws, draw="histories")
    res = run_resampling(spec).to_summary()
    pop = res["rules"]["plug-in"]["population"]
    kz = kan_zhou(squared_sharpe(mu, cov), 10, 120, 3.0)
    return pop, kz, res["self_check"]


def test_engine_matches_kan_zhou_fast():
    """The engine (normal generator, estimators' sample-mle covariance, optimise's cash-budget
    mean-variance rule, population scoring) against Kan & Zhou (2007): within 3 MC se."""
    pop, kz, check = _kz_check(3000, 20261202)
    assert check["draw_path"] == "histories"
    z = (pop["ceq_mean"] - kz.expected_utility) / pop["ceq_se"]
    assert abs(z) < 3, z
    # and the engine's own self-check (direct plug-in rule on the check draws)
    assert check["expected_utility_closed_form"] == pytest.approx(kz.expected_utility, rel=1e-12)
    assert abs(check["standardised_difference"]) < 3
    assert check["within_3_se"] is True


@pytest.mark.slow
def test_engine_matches_kan_zhou_precise():
    """High-precision variant: 100,000 draws (se about 4e-5), still within 3 MC se."""
    pop, kz, check = _kz_check(100_000, 7)
    assert abs((pop["ceq_mean"] - kz.expected_utility) / pop["ceq_se"]) < 3
    assert abs(check["standardised_difference"]) < 3


def test_standard_errors_shrink_as_one_over_sqrt_draws():
    mu, cov = recipe_a(5)
    se = []
    for draws in (400, 1600):
        s = run_resampling(_spec(mu, cov, [LO_MV], draws=draws, frontier_points=0,
                                 attribution=False)).to_summary()
        se.append(s["rules"]["mv"]["population"]["ceq_se"])
    assert se[0] / se[1] == pytest.approx(2.0, rel=0.15)


# ---------------------------------------------------------------- reproducibility

def _dump(res):
    s = json.loads(json.dumps(res.to_summary()))
    s["resample"].pop("block_draws")      # the block size itself is recorded, nothing else moves
    return json.dumps(s, sort_keys=True)


def test_block_size_and_workers_do_not_change_a_digit():
    mu, cov = recipe_a(6)
    base = _spec(mu, cov, [LO_MV, ("minv", "min-variance", {}, "sample", "ledoit-wolf-identity")],
                 draws=420, sweep_lengths=(36, 60), sweep_draws=120, frontier_points=5,
                 frontier_draws=60, self_check_draws=150)
    ref = run_resampling(base)
    # the chunk (CHUNK_DRAWS draws) is the unit of randomness; blocks are whole chunks
    for block_size in (CHUNK_DRAWS, 2 * CHUNK_DRAWS, 1000):
        spec = replace(base, block_size=block_size)
        assert spec.block_draws % CHUNK_DRAWS == 0
        assert _dump(run_resampling(spec)) == _dump(ref)
    two = run_resampling(replace(base, block_size=CHUNK_DRAWS), workers=2)
    assert _dump(two) == _dump(ref)
    for name, frame in ref.tables().items():
        assert frame.equals(two.tables()[name]), name


def test_completion_order_and_durable_blocks():
    mu, cov = recipe_a(4)
    spec = _spec(mu, cov, [LO_MV], draws=2 * CHUNK_DRAWS + 30, block_size=CHUNK_DRAWS,
                 frontier_points=0,
                 sweep_lengths=(24,), sweep_draws=60)
    plan = block_plan(spec)
    assert [b.index for b in plan] == list(range(len(plan)))
    assert [b.part for b in plan] == ["main", "main", "main", "sweep"]
    results = {b.index: run_block(spec, b.index) for b in reversed(plan)}   # finish in any order
    # durable form round-trips; block results are picklable
    import pickle

    again = [BlockResult.from_bytes(results[i].to_bytes()) for i in range(len(plan))]
    pickle.loads(pickle.dumps(again[0]))
    merged = merge_blocks(spec, again)
    assert _dump(merged) == _dump(run_resampling(spec))
    # out of order, duplicated or missing blocks are refused
    with pytest.raises(SettingsError, match="plan order"):
        merge_blocks(spec, [again[1], again[0]] + again[2:])
    with pytest.raises(DataError, match="only"):
        merge_blocks(spec, again[:-1])
    # a block of another study is refused
    other = run_block(replace(spec, seed=12), 0)
    with pytest.raises(DataError, match="different study"):
        merge_blocks(spec, [other] + again[1:])


def test_block_results_pickle_with_sparse_counts():
    """Between processes the weight histograms travel sparse; they arrive bit-identical,
    with their dtype, and the pickle is far smaller than the dense arrays."""
    import pickle

    mu, cov = recipe_a(12)
    spec = _spec(mu, cov, [LO_MV], draws=CHUNK_DRAWS, frontier_points=0)
    r = run_block(spec, 0)
    hist = r.counts["hist1"]
    assert hist.size >= 4096 and np.count_nonzero(hist) < hist.size / 3   # the sparse case
    data = pickle.dumps(r)
    assert len(data) < hist.nbytes / 4
    back = pickle.loads(data)
    assert set(back.counts) == set(r.counts)
    for k, v in r.counts.items():
        assert back.counts[k].dtype == v.dtype and np.array_equal(back.counts[k], v), k
    assert back.to_bytes() == r.to_bytes()      # every other field too


def test_truncated_or_corrupt_block_bytes_are_detected():
    mu, cov = recipe_a(3)
    spec = _spec(mu, cov, [LO_MV], draws=50, frontier_points=0)
    data = run_block(spec, 0).to_bytes()
    assert BlockResult.from_bytes(data).n_draws == 50
    with pytest.raises(DataError, match="truncated"):
        BlockResult.from_bytes(data[: len(data) // 2])
    bad = bytearray(data)
    bad[-10] ^= 0xFF
    with pytest.raises(DataError, match="checksum"):
        BlockResult.from_bytes(bytes(bad))
    with pytest.raises(DataError, match="header"):
        BlockResult.from_bytes(b"junk")


@pytest.mark.parametrize("draw,extra", [("histories", ("minv", "min-variance", {}, "sample", "oas")),
                                        ("moments", ("minv", "min-variance", {}, "sample",
                                                     "sample-mle"))])
def test_common_random_numbers_adding_a_rule_changes_nothing_else(draw, extra):
    mu, cov = recipe_a(5)
    one = run_resampling(_spec(mu, cov, [LO_MV], draws=200, frontier_points=0, draw=draw))
    two = run_resampling(_spec(mu, cov, [LO_MV, extra], draws=200, frontier_points=0, draw=draw))
    assert one.to_summary()["resample"]["draw_path"] == draw
    assert json.dumps(one.to_summary()["rules"]["mv"], sort_keys=True) == json.dumps(
        two.to_summary()["rules"]["mv"], sort_keys=True)


# ---------------------------------------------------------------- statistics

def test_streaming_statistics_equal_direct_computation_from_kept_draws():
    mu, cov = recipe_a(5)
    spec = _spec(mu, cov, [LO_MV, ("short", "min-variance", {"long_only": False}, "sample", "sample")],
                 draws=370, keep_draws=True, frontier_points=0, attribution=False)
    res = run_resampling(spec)
    s = res.to_summary()
    arr = res.draw_arrays()
    w = arr["weights"]                               # (D, R, N)
    assert w.shape == (370, 3, 5)
    assert list(arr["rules"]) == ["equal-weight", "mv", "short"]
    ew = score(w[:, 0], mu, cov, 3.0)
    for r, name in enumerate(arr["rules"]):
        m = score(w[:, r], mu, cov, 3.0)
        pop = s["rules"][name]["population"]
        assert pop["ceq_mean"] == pytest.approx(m[:, 4].mean(), rel=1e-10)
        assert pop["ceq_sd"] == pytest.approx(m[:, 4].std(ddof=1), rel=1e-6, abs=1e-15)
        assert pop["variance_mean"] == pytest.approx(m[:, 1].mean(), rel=1e-10)
        assert pop["variance_se"] == pytest.approx(m[:, 1].std(ddof=1) / math.sqrt(370), rel=1e-6,
                                                   abs=1e-15)
        if name != "equal-weight":
            assert pop["prob_beats_equal_weight_ceq"] == np.mean(m[:, 4] > ew[:, 4])
            assert pop["prob_beats_equal_weight_sharpe"] == np.mean(m[:, 3] > ew[:, 3])
        for j, a in enumerate(_assets(5)):
            bands = s["rules"][name]["weights"][a]
            assert bands["mean"] == pytest.approx(w[:, r, j].mean(), rel=1e-10, abs=1e-14)
            assert bands["held"] == np.mean(np.abs(w[:, r, j]) > 0.005)
            for q in (5, 25, 50, 75, 95):
                ref = np.percentile(w[:, r, j], q, method="inverted_cdf")   # numpy 2.4
                assert abs(bands[f"p{q}"] - ref) <= 0.0005 + 1e-12, (name, a, q)
        np.testing.assert_allclose(
            [s["rules"][name]["resampled_allocation"]["weights"][a] for a in _assets(5)],
            w[:, r].mean(axis=0), rtol=1e-10, atol=1e-14)


def test_equal_weight_and_optimum_entries():
    mu, cov = recipe_a(4)
    s = run_resampling(_spec(mu, cov, [("minv", "min-variance", {"long_only": False}, "sample",
                                        "sample")], draws=100, frontier_points=0)).to_summary()
    ew = s["rules"]["equal-weight"]
    assert ew["population"]["ceq_sd"] == pytest.approx(0.0, abs=1e-15)
    assert ew["population"]["prob_beats_equal_weight_ceq"] is None
    w = np.full(4, 0.25)
    assert ew["population"]["variance_mean"] == pytest.approx(w @ cov @ w, rel=1e-12)
    # the minimum-variance rule's optimum is the population minimum variance 1/(1' S^-1 1)
    gmv = 1.0 / np.sum(np.linalg.inv(cov))
    assert s["rules"]["minv"]["optimum"]["variance"] == pytest.approx(gmv, rel=1e-9)
    # every per-draw allocation is worse (higher variance) than the population optimum
    assert s["rules"]["minv"]["population"]["variance_mean"] > gmv


def test_long_histories_make_the_resampled_allocation_the_in_sample_one():
    """With very long synthetic histories the estimates concentrate on the population, so the
    resampled (averaged) allocation converges to the rule applied to the population
    (REFERENCES §13 statistical property)."""
    mu, cov = recipe_b()
    mu, cov = mu / 12, cov / 12
    spec = _spec(mu, cov, [LO_MV], draws=100, length=60_000, frontier_points=0,
                 attribution=False)
    s = run_resampling(spec).to_summary()
    avg = np.array(list(s["rules"]["mv"]["resampled_allocation"]["weights"].values()))
    opt = np.array(list(s["rules"]["mv"]["optimum"]["weights"].values()))
    np.testing.assert_allclose(avg, opt, atol=0.02)
    short = run_resampling(replace(spec, length=60)).to_summary()
    avg_short = np.array(list(short["rules"]["mv"]["resampled_allocation"]["weights"].values()))
    assert np.abs(avg_short - opt).max() > 5 * np.abs(avg - opt).max()


def test_attribution_mean_errors_dominate():
    """Chopra & Ziemba (1993): errors in means cost far more than errors in covariances."""
    mu, cov = recipe_a(8)
    s = run_resampling(_spec(mu, cov, [LO_MV], draws=300, frontier_points=0)).to_summary()
    att = s["attribution"]["mv"]
    assert att["loss_from_mean_error"] > 3 * att["loss_from_covariance_error"]
    assert att["loss_from_covariance_error"] >= 0
    assert att["loss_estimated_both"] == pytest.approx(
        s["rules"]["mv"]["population"]["ceq_loss_vs_optimum"], rel=1e-12)


def test_broadie_frontiers_and_the_averaged_frontier():
    mu, cov = recipe_b()
    mu, cov = mu / 12, cov / 12
    res = run_resampling(_spec(mu, cov, [LO_MV], draws=300, frontier_points=11,
                               frontier_draws=300, attribution=False))
    s = res.to_summary()
    f = s["frontiers"]
    assert f["draws"] == 300 and f["rule"] == "mv"
    # Broadie (1993): the actual frontier never lies above the true one, in every draw
    assert f["broadie_violations"] == 0
    # on average the estimated frontier is over-optimistic at the top (Broadie 1993)
    assert f["estimated_expected_return"][-1] > f["actual_expected_return"][-1]
    table = res.tables()["frontiers"]
    assert len(table) == 11
    # REFERENCES §13: the rank-matched averaged portfolios are feasible (budget, long-only) and
    # lie on or below the population frontier at the same mean
    from optimise import efficient_frontier, make_constraints

    w = res.tables()["averaged_frontier_weights"].drop(columns="rank").to_numpy()
    np.testing.assert_allclose(w.sum(axis=1), 1.0, atol=1e-9)
    assert np.all(w >= -1e-12)
    fr = efficient_frontier(mu, cov, make_constraints(4))
    m = w @ mu
    on = fr.at_returns(m)
    v_front = np.einsum("kn,nm,km->k", on, cov, on)
    assert np.all(np.einsum("kn,nm,km->k", w, cov, w) >= v_front - 1e-12)


def test_failed_draws_are_counted_not_hidden():
    """max-sharpe has no answer when every estimated mean is negative; with a population whose
    means are near zero and short histories some draws fail: they are counted and excluded."""
    mu = np.array([0.0005, 0.0004, 0.0003])
    cov = np.diag([0.002, 0.003, 0.004])
    res = run_resampling(_spec(mu, cov, [("ms", "max-sharpe", {}, "sample", "sample")],
                               draws=200, length=24, frontier_points=0, attribution=False))
    s = res.to_summary()
    q = res.tables()["population_quantiles"]
    assert q["value"].notna().all()
    pop = s["rules"]["ms"]["population"]
    assert pop["draws_failed"] > 0
    assert pop["draws_scored"] + pop["draws_failed"] == 200
    assert "maximum Sharpe" in pop["failure_note"] or pop["failure_note"]
    assert math.isfinite(pop["ceq_mean"])


def test_sweep_reports_shortest_lengths():
    mu, cov = recipe_a(4)
    mu = mu * 4          # a strong signal so that optimising pays off at long histories
    s = run_resampling(_spec(mu, cov, [LO_MV], draws=100, frontier_points=0,
                             sweep_lengths=(12, 60, 240, 960), sweep_draws=150)).to_summary()
    r = s["sweep"]["rules"]["mv"]
    p = r["prob_beats_equal_weight_ceq"]
    assert r["lengths"] == [12, 60, 240, 960]
    assert p[-1] > p[0]
    hit50 = [t for t, x in zip(r["lengths"], p) if x >= 0.5]
    assert r["shortest_length_50"] == (hit50[0] if hit50 else None)
    if not hit50:
        assert r["shortest_50_text"] == "none of the tried lengths"


def test_spec_validation():
    mu, cov = recipe_a(3)
    spec = _spec(mu, cov, [LO_MV], draws=10)
    with pytest.raises(SettingsError, match="equal-weight"):
        run_resampling(replace(spec, rules=spec.rules[1:]))
    with pytest.raises(SettingsError, match="length >= 2"):
        run_resampling(replace(spec, length=1))
    lw = _spec(mu, cov, [("lw", "min-variance", {}, "sample", "ledoit-wolf-identity")], draws=10)
    with pytest.raises(SettingsError, match="'ledoit-wolf-identity', which need the observations"):
        run_resampling(replace(lw, draw="moments"))
    with pytest.raises(SettingsError, match="T - 1 = 2 is below N = 3"):
        run_resampling(replace(spec, draw="moments", length=3))
    with pytest.raises(DataError, match="NaN"):
        run_resampling(replace(spec, population_mean=np.array([np.nan, 0, 0])))


@pytest.mark.parametrize("generator", ["normal", "student-t", "bootstrap", "block-bootstrap"])
def test_every_generator_runs_through_the_engine(generator):
    rng = np.random.default_rng(8)
    mu, cov = recipe_a(4)
    history = rng.multivariate_normal(mu, cov, size=150)
    from simulate import population_moments

    pm, pc = population_moments(history)
    spec = replace(_spec(pm, pc, [LO_MV], draws=130, frontier_points=4, frontier_draws=20,
                         sweep_lengths=(36,), sweep_draws=30, self_check_draws=130),
                   history=history, generator=generator)
    a = run_resampling(spec)
    s = a.to_summary()
    assert s["resample"]["generator"]["name"] == generator
    if generator == "student-t":
        assert s["resample"]["generator"]["degrees_of_freedom_source"].startswith("fitted")
        assert s["resample"]["generator"]["degrees_of_freedom"] > 2
    if generator == "block-bootstrap":
        assert s["resample"]["generator"]["block_length"] >= 1
    # the Kan & Zhou (2007, JFQA) check runs for every generator: on normal draws from the
    # study's own population moments when the study's generator has no closed form
    sc = s["self_check"]
    assert abs(sc["standardised_difference"]) < 4 and sc["generator"] == "normal"
    if generator == "normal":
        assert sc["setting"] == "the study's own generator (normal)"
    else:
        assert f"'{generator}' generator has no closed form" in sc["setting"]
    assert s["frontiers"]["broadie_violations"] == 0
    assert _dump(run_resampling(spec, workers=2)) == _dump(a)


def test_a_rule_that_never_finds_an_allocation_is_an_error():
    """max-sharpe with every population mean negative and very long histories: no draw has a
    portfolio with positive expected return, so the study stops with a clear message."""
    from estimators.core import InfeasibleError

    mu = np.array([-0.01, -0.02])
    cov = np.diag([0.001, 0.002])
    with pytest.raises(InfeasibleError, match="no allocation in any"):
        run_resampling(_spec(mu, cov, [("ms", "max-sharpe", {}, "sample", "sample")], draws=20,
                             length=2000, frontier_points=0, attribution=False))


def test_unresolved_and_resolved_specs_give_the_same_blocks():
    """A batch runner may pass the spec before or after fitting nu: same blocks, same merge."""
    rng = np.random.default_rng(2)
    mu, cov = recipe_a(3)
    history = rng.standard_t(6, size=(300, 3)) * 0.04 + mu
    from simulate import population_moments

    pm, pc = population_moments(history)
    raw = replace(_spec(pm, pc, [LO_MV], draws=140, frontier_points=0), history=history,
                  generator="student-t")
    res = raw.resolved()
    assert raw.degrees_of_freedom is None and res.degrees_of_freedom > 2
    blocks = [run_block(raw, b.index) for b in block_plan(res)]
    assert _dump(merge_blocks(raw, blocks)) == _dump(run_resampling(res))


def test_one_asset():
    """N = 1: every full-budget rule holds the asset; metrics are the asset's own."""
    mu, cov = np.array([0.006]), np.array([[0.0016]])
    s = run_resampling(_spec(mu, cov, [LO_MV], draws=130, frontier_points=0,
                             self_check_draws=130)).to_summary()
    for name in ("equal-weight", "mv"):
        r = s["rules"][name]
        assert r["weights"]["asset0"]["mean"] == pytest.approx(1.0, abs=1e-12)
        assert r["weights"]["asset0"]["p5"] == pytest.approx(1.0, abs=5e-4)
        assert r["population"]["variance_mean"] == pytest.approx(0.0016, rel=1e-12)
    assert s["rules"]["mv"]["population"]["prob_beats_equal_weight_ceq"] == 0.0
    assert "standardised_difference" in s["self_check"]


def test_fewer_rows_than_assets():
    """T < N: the sample covariance of every draw is singular. Long-only min-variance still has
    an answer or the failures are counted; the auto path falls back to histories."""
    mu, cov = recipe_a(8)
    spec = _spec(mu, cov, [("minv", "min-variance", {}, "sample", "sample"),
                           ("lw", "min-variance", {}, "sample", "ledoit-wolf-identity")],
                 draws=130, length=6, frontier_points=0)
    s = run_resampling(spec).to_summary()
    assert s["resample"]["draw_path"] == "histories"
    assert "below N" in s["resample"]["draw_path_reason"]
    for name in ("minv", "lw"):
        pop = s["rules"][name]["population"]
        assert pop["draws_scored"] + pop["draws_failed"] == 130
    # shrinkage keeps the covariance invertible: the shrunk rule never fails
    assert s["rules"]["lw"]["population"]["draws_failed"] == 0


def test_one_and_two_workers_agree_where_blas_threads_would_split_products_differently():
    """Regression: in-process blocks once ran with the machine's BLAS threads and worker
    processes with one, and for some shapes (here N = 10, T = 60, a dense covariance) the
    last bits of the matrix products, hence the summaries, differed. Every block now runs
    with one BLAS thread wherever it runs."""
    mu, cov = recipe_a(10)
    assets = tuple(f"a{i}" for i in range(10))
    rules = (RuleSpec(make_rule("equal-weight", "equal-weight", {}, assets)),
             RuleSpec(make_rule("mv", "mean-variance", {"risk_aversion": 3}, assets),
                      "sample", "ledoit-wolf-identity"))
    spec = ResampleSpec(mu, cov, None, assets, rules, "normal", 500, 60, 5, 3.0,
                        frontier_points=0, attribution=False, self_check_draws=0,
                        block_size=250, draw="histories")
    assert _dump(run_resampling(spec, workers=1)) == _dump(run_resampling(spec, workers=2))


# ---------------------------------------------------------------- worker processes

#: (directory, block index that fails or -1): read by _recording_worker in the forked workers
_RECORD = [None, -1]


def _recording_worker(index):  # runs in the forked workers
    import threading
    import time

    from simulate import engine

    # a slow exit (a process waits for its threads), so that a parent that did not wait
    # for its workers would be caught
    threading.Thread(target=time.sleep, args=(1.0,)).start()
    with open(f"{_RECORD[0]}/{os.getpid()}", "a") as f:
        f.write(f"{index}\n")
    if index == _RECORD[1]:
        raise DataError(f"block {index} failed on purpose")
    return engine.run_block(engine._WORKER_SPEC, index)


def _gone(pid):
    try:
        os.kill(pid, 0)          # a zombie (exited, not reaped) still answers
    except ProcessLookupError:
        return True
    return False


@pytest.mark.parametrize("fail_at", [-1, 2, 15])
def test_two_workers_are_reaped_before_the_call_returns(monkeypatch, tmp_path, fail_at):
    """The workers exit while the parent finalises, but none outlives run_resampling,
    whether it returns or raises: each worker's process is gone (reaped, not a zombie) when
    the call is over, and its CPU time is in the parent's RUSAGE_CHILDREN."""
    import resource

    from simulate import engine

    mu, cov = recipe_a(6)
    spec = _spec(mu, cov, [LO_MV], draws=16 * CHUNK_DRAWS, block_size=CHUNK_DRAWS,
                 frontier_points=0, attribution=False)
    monkeypatch.setattr(engine, "_run_block_worker", _recording_worker)
    _RECORD[:] = [str(tmp_path), fail_at]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    if fail_at < 0:
        run_resampling(spec, workers=2)
    else:
        with pytest.raises(DataError, match="failed on purpose"):
            run_resampling(spec, workers=2)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    pids = [int(p.name) for p in tmp_path.iterdir()]
    assert len(pids) == 2 and all(_gone(pid) for pid in pids)
    blocks = sorted(int(i) for p in tmp_path.iterdir() for i in p.read_text().split())
    if fail_at < 0:
        assert blocks == list(range(16))
        assert after.ru_utime + after.ru_stime > before.ru_utime + before.ru_stime
