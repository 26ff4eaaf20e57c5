"""`noiseproof study` and the runner: the run folder, its contract, atomic writes, errors.

The data are invented (random numbers with a fixed seed), no real market data.
"""
import json
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from noiseproof.cli import main
from noiseproof.runner import finish_study, prepare_study, run_study
from noiseproof.studyfile import load_study

ASSETS = ["Asset A", "Asset B", "Asset C", "Asset D"]


def _write_history(folder: Path, periods=150, seed=4):
    rng = np.random.default_rng(seed)
    mu = np.array([0.006, 0.004, 0.003, 0.002])
    vol = np.array([0.045, 0.03, 0.02, 0.012])
    corr = 0.3 + 0.7 * np.eye(4)
    x = rng.multivariate_normal(mu, corr * np.outer(vol, vol), size=periods)
    dates = pd.date_range("2010-01-31", periods=periods, freq="ME")
    frame = pd.DataFrame(x, columns=ASSETS)
    frame.insert(0, "date", dates.strftime("%Y-%m-%d"))
    frame.to_csv(folder / "history.csv", index=False, float_format="%.6f")


STUDY = """
name = "unit-study"
risk_aversion = 4

[data]
path = "history.csv"
kind = "returns"

[estimate]
mean = "sample"
covariance = "ledoit-wolf-identity"

[[rules]]
name = "proposed"
type = "mean-variance"
risk_aversion = 4

[[rules]]
name = "min-var-short"
type = "min-variance"
long_only = false
covariance = "sample"

[resample]
generator = "normal"
draws = 200
length = 60
seed = 20261201
sweep_years = [2, 5]
sweep_draws = 100
frontier_points = 6
"""


@pytest.fixture
def study(tmp_path):
    _write_history(tmp_path)
    f = tmp_path / "study.toml"
    f.write_text(STUDY + "\n[backtest]\nwindow = 60\nrebalance_every = 3\ncost_bps = 10\n"
                 "bootstrap_resamples = 100\n")
    return f


def test_study_command_writes_the_contract(study, tmp_path, capsys):
    out = tmp_path / "run"
    rc = main(["study", str(study), "--out", str(out), "--no-pack", "--quiet", "--draws", "150",
               "--seed", "7"])
    assert rc == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["schema"] == 1 and s["units"] == "per period" and s["periods_per_year"] == 12
    assert set(s["rules"]) == {"equal-weight", "proposed", "min-var-short"}
    for name, r in s["rules"].items():
        assert set(r["in_sample_weights"]) == set(ASSETS)
        for a in ASSETS:
            assert {"mean", "p5", "p25", "p50", "p75", "p95", "held"} <= set(r["weights"][a])
            assert r["weights"][a]["p5"] <= r["weights"][a]["p50"] <= r["weights"][a]["p95"]
        pop = r["population"]
        for key in ("expected_return_mean", "variance_mean", "variance_se", "sharpe_mean",
                    "ceq_mean", "ceq_se", "prob_beats_equal_weight_ceq",
                    "prob_beats_equal_weight_sharpe", "ceq_mean_annualised"):
            assert key in pop
        assert {"ceq", "variance", "sharpe"} <= set(r["optimum"])
        assert "backtest" in r
    assert s["rules"]["proposed"]["population"]["prob_beats_equal_weight_ceq"] is not None
    assert s["rules"]["min-var-short"]["estimator"]["covariance"] == "sample"
    assert s["rules"]["min-var-short"]["estimator"]["divisor"] == "T-1"
    assert s["rules"]["proposed"]["estimator"]["covariance"] == "ledoit-wolf-identity"
    res = s["resample"]
    assert res["draws"] == 150 and res["seed"] == 7 and res["T"] == 60
    assert res["generator"]["name"] == "normal" and res["n_assets"] == 4
    assert res["draw_path"] == "histories"
    assert res["estimators"]["min-var-short"]["divisor"] == "T-1"
    assert s["sweep"]["lengths"] == [24, 60]
    assert s["frontiers"]["points"] == 6 and s["frontiers"]["broadie_violations"] == 0
    assert s["self_check"]["draws"] > 0 and abs(s["self_check"]["standardised_difference"]) < 4
    assert s["verdict"]["proposed"] == "proposed"
    m = json.loads((out / "manifest.json").read_text())
    for key in ("versions", "platform", "command", "study_text", "seed", "data_sha256",
                "wall_time_seconds", "reproduce"):
        assert key in m
    assert m["seed"] == 7 and m["data_sha256"] == s["data"]["sha256"]
    assert "--seed 7" in m["reproduce"] and "--draws 150" in m["reproduce"]
    tables = {p.stem for p in (out / "tables").glob("*.csv")}
    assert {"weight_bands", "population_metrics", "population_quantiles", "frontiers",
            "sweep", "attribution", "in_sample_weights"} <= tables
    assert any(t.startswith("backtest") for t in tables)
    assert (out / "log.txt").read_text().count("\n") > 3
    assert not list(tmp_path.glob(".run.*"))


def test_workers_do_not_change_the_summary(study, tmp_path):
    s = load_study(study)
    one = run_study(s, tmp_path / "one", workers=1, quiet=True, pack=False)
    two = run_study(s, tmp_path / "two", workers=2, quiet=True, pack=False)
    a = json.loads((one / "summary.json").read_text())
    b = json.loads((two / "summary.json").read_text())
    a["study"].pop("created"), b["study"].pop("created")
    assert a == b


def test_bad_study_is_one_line_and_writes_nothing(tmp_path, capsys):
    _write_history(tmp_path)
    f = tmp_path / "study.toml"
    f.write_text(STUDY.replace('seed = 20261201', 'seed = 20261201\nspeed = 3'))
    out = tmp_path / "run"
    assert main(["study", str(f), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "speed" in err
    assert not out.exists()


def test_a_failed_run_leaves_the_previous_folder_untouched(study, tmp_path, capsys):
    out = tmp_path / "run"
    assert main(["study", str(study), "--out", str(out), "--no-pack", "--quiet"]) == 0
    before = (out / "summary.json").read_bytes()
    broken = tmp_path / "broken.toml"
    broken.write_text(STUDY.replace('covariance = "sample"', 'covariance = "no-such-estimator"'))
    assert main(["study", str(broken), "--out", str(out), "--no-pack", "--quiet"]) == 2
    assert "no-such-estimator" in capsys.readouterr().err
    assert (out / "summary.json").read_bytes() == before
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".run")]


def test_assumptions_study(tmp_path):
    (tmp_path / "cma.toml").write_text(
        'frequency = "monthly"\nassets = ["A", "B", "C"]\n'
        'expected_return = [0.006, 0.004, 0.002]\nvolatility = [0.045, 0.03, 0.012]\n'
        'correlation = [[1, 0.3, 0.1], [0.3, 1, 0.2], [0.1, 0.2, 1]]\n')
    text = ('[data]\nassumptions = "cma.toml"\n[[rules]]\nname = "mv"\ntype = "mean-variance"\n'
            'risk_aversion = 3\n[resample]\ndraws = 100\nlength = 60\nsweep_years = [5]\n'
            'sweep_draws = 50\n[backtest]\nwindow = 24\n')
    f = tmp_path / "s.toml"
    f.write_text(text)
    out = run_study(load_study(f), tmp_path / "run", quiet=True, pack=False)
    s = json.loads((out / "summary.json").read_text())
    assert s["data"]["assumptions"] is True
    assert "skipped" in s["backtest"]
    assert s["resample"]["population"]["source"] == "the capital-market assumptions"
    np.testing.assert_allclose(list(s["rules"]["mv"]["in_sample_weights"].values()),
                               list(s["rules"]["mv"]["optimum"]["weights"].values()), atol=1e-9)
    f.write_text(text.replace("draws = 100", 'draws = 100\ngenerator = "bootstrap"'))
    from estimators.core import SettingsError

    with pytest.raises(SettingsError, match="resamples a history"):
        prepare_study(load_study(f))
    f.write_text(text.replace("length = 60\n", ""))
    with pytest.raises(SettingsError, match="length is needed"):
        prepare_study(load_study(f))


def test_study_without_resample_section(tmp_path):
    _write_history(tmp_path)
    f = tmp_path / "s.toml"
    f.write_text(STUDY.split("[resample]")[0])
    prepared = prepare_study(load_study(f))
    assert prepared.spec is None
    out = finish_study(prepared, None, tmp_path / "run", pack=False)
    s = json.loads((out / "summary.json").read_text())
    assert "skipped" in s["resample"] and "skipped" in s["backtest"]
    assert s["rules"]["proposed"]["in_sample_weights"]


def test_keep_draws_writes_draws_npz_and_progress_counts_every_draw(tmp_path):
    _write_history(tmp_path)
    f = tmp_path / "s.toml"
    f.write_text(STUDY.replace("frontier_points = 6", "frontier_points = 6\nkeep_draws = true"))
    prepared = prepare_study(load_study(f), draws=130)
    from simulate import block_plan, run_resampling

    seen = []
    result = run_resampling(prepared.spec, progress=seen.append)
    assert sum(seen) == sum(b.stop - b.start for b in block_plan(prepared.spec))
    out = finish_study(prepared, result, tmp_path / "run", pack=False)
    with np.load(out / "draws.npz") as z:
        assert z["weights"].shape == (130, 3, 4)
        assert list(z["rules"]) == ["equal-weight", "proposed", "min-var-short"]
        assert list(z["assets"]) == ASSETS
        s = json.loads((out / "summary.json").read_text())
        np.testing.assert_allclose(z["weights"][:, 1].mean(axis=0),
                                   [s["rules"]["proposed"]["weights"][a]["mean"] for a in ASSETS],
                                   rtol=1e-10, atol=1e-14)


def test_default_run_folder_is_named_after_the_study(study, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    text = study.read_text().replace('name = "unit-study"', 'name = "Unit Study: Q4 (draft)"')
    study.write_text(text)
    assert main(["study", str(study), "--no-pack", "--quiet", "--draws", "50"]) == 0
    out = tmp_path / "runs" / "unit-study-q4-draft"
    m = json.loads((out / "manifest.json").read_text())
    assert m["command"][:3] == ["noiseproof", "study", str(study)]
    assert "--draws" in m["command"] and "--quiet" in m["command"]


def test_a_failing_pack_keeps_the_results(study, tmp_path, monkeypatch):
    import reports

    from estimators.core import DataError

    def broken(run_dir):
        (run_dir / "pack").mkdir()
        raise DataError("pack: invented failure for the test")

    monkeypatch.setattr(reports, "build_pack", broken)
    out = tmp_path / "run"
    with pytest.raises(DataError, match="invented failure"):
        finish_study(prepare_study(load_study(study), draws=50), None, out, pack=True)
    assert (out / "summary.json").is_file() and not (out / "pack").exists()
    assert "pack failed" in (out / "log.txt").read_text()


def test_a_history_too_short_for_the_backtest_skips_it_and_the_pack_says_why(tmp_path):
    _write_history(tmp_path, periods=70)
    f = tmp_path / "study.toml"
    f.write_text(STUDY.replace("draws = 200", "draws = 100")
                 + "\n[backtest]\nwindow = 68\nbootstrap_resamples = 50\n")
    out = tmp_path / "run"
    assert main(["study", str(f), "--out", str(out), "--quiet"]) == 0
    s = json.loads((out / "summary.json").read_text())
    reason = s["backtest"]["skipped"]
    assert "70 periods" in reason and "window of 68" in reason
    assert all("backtest" not in r or r["backtest"] is None for r in s["rules"].values())
    html = (out / "pack" / "report.html").read_text()
    assert "window of 68" in html


def test_backtest_settings_in_the_summary_carry_the_engine_defaults(study, tmp_path):
    out = tmp_path / "run"
    assert main(["study", str(study), "--out", str(out), "--no-pack", "--quiet",
                 "--draws", "100"]) == 0
    bt = json.loads((out / "summary.json").read_text())["backtest"]
    # left unset in the study file, filled in by the backtest engine's own rule
    assert isinstance(bt["rolling_sharpe_window"], int) and bt["rolling_sharpe_window"] > 1
    assert isinstance(bt["bootstrap_block_length"], int) and bt["bootstrap_block_length"] >= 1


def test_the_cloud_of_per_draw_allocations_never_beats_the_true_frontier(study, tmp_path):
    """Broadie (1993): a portfolio judged under the population cannot lie above the
    population's own efficient frontier. Each cloud point of the long-only rule is checked
    against the largest population expected return at its volatility, solved independently
    with cvxpy (general-purpose convex solver) on the population moments (the history's
    mean and divisor-T covariance, as README states)."""
    cp = pytest.importorskip("cvxpy")
    out = tmp_path / "run"
    assert main(["study", str(study), "--out", str(out), "--no-pack", "--quiet",
                 "--draws", "250"]) == 0
    s = json.loads((out / "summary.json").read_text())
    cloud = pd.read_csv(out / "tables" / "frontier_cloud.csv")
    assert set(cloud["rule"]) == {"proposed", "min-var-short"}
    mine = cloud[cloud["rule"] == "proposed"]          # long-only, fully invested
    assert len(mine) == 250
    x = pd.read_csv(tmp_path / "history.csv").drop(columns="date").to_numpy()
    mu, cov = x.mean(axis=0), np.cov(x.T, bias=True)
    w = cp.Variable(len(mu))
    v = cp.Parameter(nonneg=True)
    root = np.linalg.cholesky(cov)                      # w' cov w = |root' w|^2
    prob = cp.Problem(cp.Maximize(mu @ w), [cp.sum(w) == 1, w >= 0,
                                           cp.norm(root.T @ w, 2) <= v])
    worst = -np.inf
    for _, row in mine.iloc[::5].iterrows():           # every fifth draw keeps it quick
        v.value = row["volatility"]
        prob.solve(solver=cp.CLARABEL)
        worst = max(worst, row["expected_return"] - prob.value)
    assert worst <= 1e-7


def test_frontier_and_self_check_draws_are_study_settings(tmp_path):
    _write_history(tmp_path)
    f = tmp_path / "study.toml"
    f.write_text(STUDY.replace("frontier_points = 6",
                               "frontier_points = 6\nfrontier_draws = 130\nself_check_draws = 0"))
    out = tmp_path / "run"
    assert main(["study", str(f), "--out", str(out), "--no-pack", "--quiet"]) == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["frontiers"]["draws"] == 130
    assert s["self_check"] == {"skipped": "self_check_draws = 0"}
