"""`noiseproof optimise`: JSON fields, options, and one-line errors with exit status 2."""
import json

import numpy as np
import pandas as pd
import pytest

from noiseproof.cli import main
from noiseproof.commands import optimise as cmd
from optimise import RULE_TYPES, make_rule

ASSETS = ["Alder Equity", "Birch Bonds", "Cedar Realty", "Dune Notes"]


@pytest.fixture
def history_csv(tmp_path):
    """An invented monthly return history (no real market data)."""
    rng = np.random.default_rng(42)
    T = 96
    vol = np.array([0.045, 0.02, 0.05, 0.01])
    C = np.array([[1, .2, .5, 0], [.2, 1, .1, .3], [.5, .1, 1, 0], [0, .3, 0, 1]])
    R = rng.multivariate_normal([0.007, 0.003, 0.006, 0.002], C * np.outer(vol, vol), T)
    df = pd.DataFrame(R, columns=ASSETS)
    df.insert(0, "date", pd.date_range("2011-01-31", periods=T, freq="ME").strftime("%Y-%m-%d"))
    path = tmp_path / "history.csv"
    df.to_csv(path, index=False)
    return path, R


def run_json(capsys, *argv):
    status = main(["optimise", *map(str, argv), "--json"])
    out = capsys.readouterr()
    assert status == 0, out.err
    return json.loads(out.out)


def test_rule_type_list_matches_registry():
    assert cmd.RULE_TYPES == RULE_TYPES


def test_json_fields_and_figures(history_csv, capsys):
    path, R = history_csv
    doc = run_json(capsys, path, "--rule", "max-sharpe", "--risk-free", "0.001")
    assert set(ASSETS) == set(doc["weights"])
    for key in ("cash", "expected_return", "volatility", "sharpe"):
        assert isinstance(doc[key], float)
    assert doc["cash"] == 0.0
    mu = R.mean(axis=0)
    S = np.cov(R, rowvar=False)
    w = np.array([doc["weights"][a] for a in ASSETS])
    assert doc["expected_return"] == pytest.approx(w @ mu, rel=1e-12)
    assert doc["volatility"] == pytest.approx(np.sqrt(w @ S @ w), rel=1e-12)
    assert doc["sharpe"] == pytest.approx((w @ mu - 0.001) / np.sqrt(w @ S @ w), rel=1e-12)
    direct = make_rule("m", "max-sharpe", {"risk_free": 0.001}, tuple(ASSETS)).weights(mu, S)
    np.testing.assert_allclose(w, direct.weights, atol=1e-14)


def test_cash_budget_and_bounds(history_csv, capsys):
    path, R = history_csv
    doc = run_json(capsys, path, "--rule", "mean-variance", "--risk-aversion", "50",
                   "--budget", "cash", "--bound", "Alder Equity=:0.1",
                   "--group", "real=Cedar Realty,Alder Equity::0.15")
    w = doc["weights"]
    assert w["Alder Equity"] <= 0.1 + 1e-12
    assert w["Cedar Realty"] + w["Alder Equity"] <= 0.15 + 1e-12
    assert doc["cash"] == pytest.approx(1 - sum(w.values()), abs=1e-12)
    doc = run_json(capsys, path, "--rule", "mean-variance", "--risk-aversion", "5",
                   "--allow-short", "--budget", "cash")
    mu, S = R.mean(axis=0), np.cov(R, rowvar=False)
    np.testing.assert_allclose([doc["weights"][a] for a in ASSETS], np.linalg.solve(S, mu) / 5,
                               rtol=1e-10)


def test_table_output(history_csv, capsys):
    path, _ = history_csv
    assert main(["optimise", str(path), "--rule", "target-volatility", "--target", "0.02"]) == 0
    out = capsys.readouterr().out
    assert "Birch Bonds" in out and "Sharpe ratio" in out and "not investment advice" in out


@pytest.mark.parametrize("argv, match", [
    (["--rule", "min-variance", "--bound", "Alder Equity=0.6:1", "--bound", "Birch Bonds=0.5:1"],
     "lower bounds sum to 1.1, above 1"),
    (["--rule", "target-return", "--target", "0.5"], "above the largest attainable"),
    (["--rule", "min-variance", "--bound", "Nowhere=0:1"], "unknown asset 'Nowhere'"),
    (["--rule", "mean-variance"], "needs 'risk_aversion'"),
    (["--rule", "min-variance", "--bound", "Alder Equity=x:1"], "'x' is not a number"),
    (["--rule", "min-variance", "--group", "g=Alder Equity,Birch Bonds:0.7:0.9",
      "--bound", "Alder Equity=0:0.3", "--bound", "Birch Bonds=0:0.3"], "group 'g'"),
])
def test_errors_exit_2_with_one_line(history_csv, capsys, argv, match):
    path, _ = history_csv
    assert main(["optimise", str(path), *argv]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and match in err
