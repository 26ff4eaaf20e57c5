"""`noiseproof estimate`: table, JSON fields, help text and one-line errors (invented data)."""
import json

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

import estimators as E
from noiseproof.cli import main

ASSETS = ["Harbour Equity", "Ridge Bonds", "Meadow Credit", "Summit Property"]


@pytest.fixture
def history_csv(tmp_path, rng):
    """72 months of invented returns for four invented asset classes."""
    vol = np.array([0.045, 0.012, 0.02, 0.035])
    corr = np.array([[1, .1, .4, .5], [.1, 1, .5, .1], [.4, .5, 1, .3], [.5, .1, .3, 1]])
    x = rng.multivariate_normal([0.006, 0.002, 0.003, 0.005], corr * np.outer(vol, vol), 72)
    df = pd.DataFrame(x, columns=ASSETS)
    df.insert(0, "date", pd.date_range("2031-01-31", periods=72, freq="ME").strftime("%Y-%m-%d"))
    path = tmp_path / "history.csv"
    df.to_csv(path, index=False, float_format="%.8f")
    return path, pd.read_csv(path)[ASSETS].to_numpy()


def test_json_matches_the_library(history_csv, capsys):
    path, x = history_csv
    assert main(["estimate", str(path), "--kind", "returns", "--mean", "james-stein",
                 "--covariance", "ledoit-wolf-constant-correlation", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    ref = E.estimate(x, mean="james-stein", covariance="ledoit-wolf-constant-correlation")
    assert doc["assets"] == ASSETS and doc["frequency"] == "monthly"
    assert doc["units"] == "per period" and doc["periods"] == 72
    assert_allclose([doc["mean"][a] for a in ASSETS], ref.mean, rtol=1e-12)
    assert_allclose(np.array(doc["covariance"]), ref.covariance, rtol=1e-12)
    assert_allclose(doc["shrinkage"], ref.shrinkage, rtol=1e-12)
    assert 0 <= doc["shrinkage"] <= 1 and doc["mean_shrinkage"] is not None


def test_json_shrinkage_null_for_sample(history_csv, capsys):
    path, x = history_csv
    assert main(["estimate", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["shrinkage"] is None and doc["divisor"] == "T-1"
    assert_allclose(np.array(doc["covariance"]), np.cov(x, rowvar=False), rtol=1e-12)


def test_table_is_annualised_and_shows_correlation(history_csv, capsys):
    path, x = history_csv
    assert main(["estimate", str(path), "--covariance", "ewma", "--half-life", "24"]) == 0
    out = capsys.readouterr().out
    for a in ASSETS:
        assert a in out
    assert "correlation" in out and "mean x 12" in out and "half-life 24 periods" in out
    line = next(s for s in out.splitlines() if s.startswith("Harbour Equity") and "%" in s)
    assert f"{100 * 12 * x[:, 0].mean():.2f}%" in line


@pytest.mark.parametrize("argv,match", [
    (["--covariance", "nope"], "unknown covariance estimator 'nope'; known: sample"),
    (["--covariance", "ewma"], "--covariance ewma needs --half-life"),
    (["--decay", "0.9"], "--decay applies only to --covariance ewma"),
    (["--mean", "given"], "assumptions file"),
    (["--mean", "bayes-stein", "--covariance", "oas", "--frequency", "monthly"], None),
])
def test_errors_are_one_line_exit_2(history_csv, capsys, argv, match):
    path, _ = history_csv
    rc = main(["estimate", str(path), *argv])
    err = capsys.readouterr().err
    if match is None:
        assert rc == 0 and err == ""
    else:
        assert rc == 2
        assert err.count("\n") == 1 and match in err


def test_help_lists_every_estimator(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["estimate", "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    for name in list(E.MEAN_ESTIMATORS) + list(E.COVARIANCE_ESTIMATORS):
        if name != "given":
            assert f"\n  {name}\n" in out
    assert "--half-life" in out and "JSON fields" in out
