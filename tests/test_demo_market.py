"""The invented demo market: byte-for-byte regeneration, the model's features, the study file, `demo`."""
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

import demo_market
from demo_market import model
from noiseproof.cli import main
from noiseproof.intake import load_history
from noiseproof.studyfile import load_study

DATA = Path(demo_market.__file__).parent / "data"


@pytest.fixture(scope="module")
def market():
    return model.generate()


def test_regenerates_byte_for_byte(tmp_path):
    r = subprocess.run([sys.executable, "-m", "demo_market", "--out", str(tmp_path)], capture_output=True,
                       text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    for name in (model.RETURNS_FILE, model.CASH_FILE):
        assert (tmp_path / name).read_bytes() == (DATA / name).read_bytes(), name


def test_check_mode(tmp_path):
    from demo_market.__main__ import main as dm_main
    assert dm_main(["--check"]) == 0
    (tmp_path / model.RETURNS_FILE).write_bytes((DATA / model.RETURNS_FILE).read_bytes()[:-2] + b"9\n")
    (tmp_path / model.CASH_FILE).write_bytes((DATA / model.CASH_FILE).read_bytes())
    assert dm_main(["--check", "--out", str(tmp_path)]) == 1


def test_same_seed_same_draw_other_seed_differs():
    a, b = model.generate(5), model.generate(5)
    np.testing.assert_array_equal(a.returns, b.returns)
    assert not np.array_equal(a.returns, model.generate(6).returns)


def test_file_shape_and_intake(market):
    h = load_history(DATA / model.RETURNS_FILE, kind="returns", risk_free_path=DATA / model.CASH_FILE)
    assert h.returns.shape == (360, 10) and h.frequency == "monthly" and h.excess
    assert h.assets == tuple(s.name for s in model.SLEEVES)
    assert str(h.dates[0])[:10] == "1995-01-31" and str(h.dates[-1])[:10] == "2024-12-31"
    # the committed file is the model's draw rounded to 6 decimals
    np.testing.assert_allclose(h.returns + h.risk_free[:, None], market.returns, atol=5.1e-7)
    np.testing.assert_allclose(h.risk_free, market.cash, atol=5.1e-7)


def test_regime_parameters_reproduce_the_unconditional_targets():
    # mixture mean and variance at the stationary crisis probability (law of total variance)
    mu, sd = model.regime_parameters()
    pi = model.P_CALM_TO_CRISIS / (model.P_CALM_TO_CRISIS + model.P_CRISIS_TO_CALM)
    for i, s in enumerate(model.SLEEVES):
        m = (1 - pi) * mu[0, i] + pi * mu[1, i]
        v = (1 - pi) * sd[0, i] ** 2 + pi * sd[1, i] ** 2 + pi * (1 - pi) * (mu[0, i] - mu[1, i]) ** 2
        assert m * 12 == pytest.approx(s.excess_return, rel=1e-12)
        assert np.sqrt(v * 12) == pytest.approx(s.volatility, rel=1e-12)


def test_long_run_moments_of_the_model():
    # many draws of the model: sample moments near the stated targets (smoothing halves the reported
    # volatility of the smoothed sleeve: sd_obs = sd (1 - phi) / sqrt(1 - phi^2) = 0.5 sd at phi = 0.6)
    m = model.generate(seed=99, months=60_000)
    x = m.returns - m.cash[:, None]
    for i, s in enumerate(model.SLEEVES):
        target_vol = s.volatility * (0.5 if s.smoothing else 1.0)
        assert x[:, i].mean() * 12 == pytest.approx(s.excess_return, abs=4 * s.volatility / np.sqrt(5000))
        assert x[:, i].std() * np.sqrt(12) == pytest.approx(target_vol, rel=0.05)
    assert m.regimes.mean() == pytest.approx(0.02 / 0.17, abs=0.02)


def test_fat_tails(market):
    x = market.returns - market.cash[:, None]
    k = stats.kurtosis(x, axis=0)          # excess kurtosis, 0 for a normal
    assert np.median(k) > 1.0
    assert (k[:3] > 1.0).all()             # the three equity sleeves


def test_crisis_months_have_higher_correlation(market):
    x = market.returns - market.cash[:, None]
    risky = [0, 1, 2, 6, 7, 9]
    iu = np.triu_indices(len(risky), 1)
    calm = np.corrcoef(x[market.regimes == 0][:, risky], rowvar=False)[iu].mean()
    crisis = np.corrcoef(x[market.regimes == 1][:, risky], rowvar=False)[iu].mean()
    assert market.regimes.sum() >= 12
    assert crisis > calm + 0.15
    bonds_calm = np.corrcoef(x[market.regimes == 0][:, [0, 3]], rowvar=False)[0, 1]
    bonds_crisis = np.corrcoef(x[market.regimes == 1][:, [0, 3]], rowvar=False)[0, 1]
    assert bonds_crisis < bonds_calm            # flight to quality


def test_only_the_illiquid_sleeve_is_autocorrelated(market):
    x = market.returns - market.cash[:, None]
    ac = np.array([np.corrcoef(x[1:, i], x[:-1, i])[0, 1] for i in range(x.shape[1])])
    k = [s.name for s in model.SLEEVES].index("Private Infrastructure")
    assert ac[k] > 0.4
    others = np.delete(ac, k)
    assert np.abs(others).max() < 0.2       # 2 / sqrt(360) is about 0.105: within sampling noise


def test_moments_in_illustrative_ranges(market):
    h = load_history(DATA / model.RETURNS_FILE, kind="returns", risk_free_path=DATA / model.CASH_FILE)
    vol = h.returns.std(axis=0, ddof=1) * np.sqrt(12)
    assert ((vol > 0.03) & (vol < 0.30)).all()
    mean = h.returns.mean(axis=0) * 12
    assert ((mean > -0.05) & (mean < 0.15)).all()
    cash = h.risk_free * 12
    assert cash.min() >= 0 and cash.max() < 0.10


def test_example_study_file_parses_and_points_at_the_data():
    s = load_study(DATA / "study.toml")
    assert s.data.path == DATA / model.RETURNS_FILE and s.data.kind == "returns"
    assert s.data.risk_free_path == DATA / model.CASH_FILE
    assert s.estimate.mean == "sample" and s.estimate.covariance == "ledoit-wolf-constant-correlation"
    names = {r.name: r for r in s.rules}
    assert names["proposed"].type == "mean-variance" and names["proposed"].params["risk_aversion"] == 5
    sleeves = {x.name for x in model.SLEEVES}
    assert set(names["proposed"].params["bounds"]) <= sleeves
    for g in names["proposed"].params["groups"].values():
        assert set(g["assets"]) <= sleeves
    assert names["risk-parity"].type == "equal-risk-contribution"
    assert s.resample.draws == 2000 and s.resample.length == 120 and s.resample.seed == 20261201
    assert s.backtest.window == 120 and s.backtest.rebalance_every == 3 and s.backtest.cost_bps == 10
    assert s.policy == "current-policy" and names["current-policy"].type == "fixed"
    assert set(names["current-policy"].params["weights"]) == sleeves
    assert sum(names["current-policy"].params["weights"].values()) == pytest.approx(1.0, abs=1e-12)


def test_example_study_rules_build_when_optimise_exists():
    optimise = pytest.importorskip("optimise")
    if not hasattr(optimise, "make_rule"):
        pytest.skip("optimise.make_rule not built yet")
    s = load_study(DATA / "study.toml")
    assets = tuple(x.name for x in model.SLEEVES)
    pol = next(r for r in s.rules if r.name == s.policy)
    policy_w = optimise.make_rule(pol.name, pol.type, dict(pol.params), assets).fixed_weights
    for r in s.rules:
        rule = optimise.make_rule(r.name, r.type, dict(r.params), assets,
                                  policy_weights=policy_w, periods_per_year=12)
        assert rule.name == r.name


def test_demo_help(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["demo", "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    for needle in ("usage: noiseproof demo", "--out DIR", "--workers N", "--quiet", "--no-pack",
                   "invented", "fictional"):
        assert needle in out


def test_demo_without_runner_says_what_is_missing(capsys, tmp_path, monkeypatch):
    import noiseproof

    if (Path(noiseproof.__file__).parent / "runner.py").exists():
        # hide the runner to check the message the demo gives while it is missing
        monkeypatch.setitem(sys.modules, "noiseproof.runner", None)
    rc = main(["demo", "--out", str(tmp_path / "run"), "--workers", "1"])
    out, err = capsys.readouterr()
    assert rc == 2
    assert "not built yet" in err and "nothing was written" in err and "Traceback" not in err
    assert "360 months x 10 sleeves" in out
    assert not (tmp_path / "run").exists()


def test_demo_calls_the_runner_with_the_study(capsys, tmp_path, monkeypatch):
    import types

    calls = {}

    def fake_run_study(settings, out, *, workers=1, quiet=False, pack=True, argv=None):
        calls.update(settings=settings, out=out, workers=workers, quiet=quiet, pack=pack, argv=argv)
        return out

    monkeypatch.setitem(sys.modules, "noiseproof.runner", types.SimpleNamespace(run_study=fake_run_study))
    rc = main(["demo", "--out", str(tmp_path / "run"), "--workers", "2", "--no-pack"])
    assert rc == 0
    assert calls["settings"].policy == "current-policy" and calls["out"] == tmp_path / "run"
    assert calls["workers"] == 2 and calls["pack"] is False and calls["quiet"] is False
    assert calls["argv"][:2] == ["noiseproof", "demo"] and "--no-pack" in calls["argv"]
