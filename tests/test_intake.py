"""Library-level checks of the history intake (noiseproof.intake)."""
import hashlib
import math

import numpy as np
import pandas as pd
import pytest

from estimators.core import DataError, History, SettingsError
from noiseproof.intake import (describe_history, infer_frequency, inspect_history, load_history,
                               require_rows)


def frame(n=30, assets=("Alpha", "Beta", "Gamma"), seed=11, freq="ME", start="2001-01-31"):
    rng = np.random.default_rng(seed)
    dates = pd.date_range(start, periods=n, freq=freq)
    return pd.DataFrame(rng.normal(0.005, 0.03, size=(n, len(assets))), index=dates, columns=list(assets))


def to_csv(df, path, fmt="%.8f", date_format="%Y-%m-%d", sep=","):
    df.to_csv(path, index_label="date", float_format=fmt, date_format=date_format, sep=sep)
    return path


# --------------------------------------------------------------------------- values

def test_returns_round_trip_and_metadata(tmp_path):
    df = frame()
    p = to_csv(df, tmp_path / "r.csv")
    h = load_history(p)
    assert isinstance(h, History)
    assert h.returns.shape == (30, 3) and h.returns.dtype == np.float64
    np.testing.assert_allclose(h.returns, df.to_numpy(), atol=5e-9)
    assert h.assets == ("Alpha", "Beta", "Gamma")
    assert h.frequency == "monthly" and h.periods_per_year == 12
    assert h.kind == "returns" and not h.excess and h.risk_free is None and h.dropped_rows == 0
    assert h.sha256 == hashlib.sha256(p.read_bytes()).hexdigest()
    assert (h.dates == df.index.to_numpy(dtype="datetime64[ns]")).all()
    assert not h.returns.flags.writeable


def test_prices_become_simple_returns_like_pandas_pct_change(tmp_path):
    # reference: pandas 3.1 DataFrame.pct_change (simple returns p_t / p_{t-1} - 1)
    df = 100 * (1 + frame()).cumprod()
    p = to_csv(df, tmp_path / "p.csv", fmt="%.10f")
    h = load_history(p, kind="prices")
    ref = df.pct_change().iloc[1:]
    np.testing.assert_allclose(h.returns, ref.to_numpy(), rtol=1e-8, atol=1e-12)
    assert (h.dates == ref.index.to_numpy(dtype="datetime64[ns]")).all()
    assert load_history(p).kind == "prices"   # every value >= 1: detected


def test_three_risk_free_forms_agree(tmp_path):
    df = frame()
    rate = pd.Series(np.linspace(0.001, 0.003, len(df)), index=df.index, name="cash")
    p_col = to_csv(df.assign(cash=rate), tmp_path / "with_cash.csv")
    p_ret = to_csv(df, tmp_path / "r.csv")
    # the risk-free file has extra dates and its own order of columns; alignment is by date
    extra = pd.Series(0.5, index=pd.date_range("1990-01-31", periods=5, freq="ME"))
    rf = pd.concat([extra, rate]).rename("rate").to_frame()
    rf.to_csv(tmp_path / "cash.csv", index_label="date", float_format="%.8f")
    a = load_history(p_col, risk_free_column="cash")
    b = load_history(p_ret, risk_free_path=tmp_path / "cash.csv")
    assert a.assets == b.assets == ("Alpha", "Beta", "Gamma")
    np.testing.assert_allclose(a.returns, df.to_numpy() - rate.to_numpy()[:, None], atol=1e-8)
    np.testing.assert_allclose(a.returns, b.returns, atol=1e-12)
    np.testing.assert_allclose(a.risk_free, rate.to_numpy(), atol=1e-8)
    assert a.excess and b.excess
    c = load_history(p_ret, risk_free=0.002)
    np.testing.assert_allclose(c.returns, load_history(p_ret).returns - 0.002, atol=1e-15)


def test_risk_free_with_prices_aligns_on_return_dates(tmp_path):
    df = 50 * (1 + frame(n=12)).cumprod()
    rate = pd.Series(np.arange(12) * 1e-4, index=df.index)
    p = to_csv(df.assign(rf=rate), tmp_path / "p.csv", fmt="%.10f")
    h = load_history(p, kind="prices", risk_free_column="rf")
    np.testing.assert_allclose(h.risk_free, rate.to_numpy()[1:], atol=1e-12)
    np.testing.assert_allclose(h.returns, df.pct_change().iloc[1:].to_numpy() - rate.to_numpy()[1:, None],
                               rtol=1e-8, atol=1e-12)


def test_parquet_equals_csv(tmp_path):
    df = frame()
    to_csv(df, tmp_path / "r.csv", fmt="%.17g")
    df.rename_axis("date").reset_index().to_parquet(tmp_path / "r.parquet")
    df.rename_axis("date").to_parquet(tmp_path / "indexed.parquet")      # dates as the index
    a = load_history(tmp_path / "r.csv")
    b = load_history(tmp_path / "r.parquet")
    c = load_history(tmp_path / "indexed.parquet")
    np.testing.assert_array_equal(a.returns, b.returns)
    np.testing.assert_array_equal(b.returns, c.returns)
    assert (a.dates == b.dates).all() and a.assets == b.assets == c.assets


def test_parquet_missing_values_follow_the_policy(tmp_path):
    df = frame()
    df.iloc[3, 1] = np.nan
    df.rename_axis("date").reset_index().to_parquet(tmp_path / "r.parquet")
    with pytest.raises(DataError, match=r"column 'Beta', data row 4 \(date 2001-04-30\): missing"):
        load_history(tmp_path / "r.parquet")
    assert load_history(tmp_path / "r.parquet", missing="drop-rows").dropped_rows == 1


def test_drop_rows_counts_and_keeps_the_rest(tmp_path):
    df = frame()
    text = to_csv(df, tmp_path / "r.csv").read_text().splitlines()
    for row in (2, 9, 9):
        cells = text[row].split(",")
        cells[1 + row % 3] = ""
        text[row] = ",".join(cells)
    (tmp_path / "r.csv").write_text("\n".join(text) + "\n")
    h = load_history(tmp_path / "r.csv", missing="drop-rows")
    assert h.dropped_rows == 2 and h.n_periods == 28
    keep = np.ones(30, bool)
    keep[[1, 8]] = False
    np.testing.assert_allclose(h.returns, df.to_numpy()[keep], atol=5e-9)
    assert any("dropped 2 rows" in n for n in h.notes)


def test_separators_and_date_formats(tmp_path):
    df = frame(n=15)
    ref = load_history(to_csv(df, tmp_path / "iso.csv"))
    for name, sep, fmt in (("semi.csv", ";", "%Y-%m-%d"), ("tab.csv", "\t", "%Y/%m/%d"),
                           ("dmy.csv", ",", "%d/%m/%Y"), ("mdy.csv", ",", "%m/%d/%Y"),
                           ("compact.csv", ",", "%Y%m%d"), ("dots.csv", ",", "%d.%m.%Y")):
        h = load_history(to_csv(df, tmp_path / name, sep=sep, date_format=fmt))
        np.testing.assert_array_equal(h.returns, ref.returns)
        assert (h.dates == ref.dates).all(), name


def test_year_month_dates_are_month_ends(tmp_path):
    df = frame(n=15)
    h = load_history(to_csv(df, tmp_path / "ym.csv", date_format="%Y-%m"))
    assert (h.dates == df.index.to_numpy(dtype="datetime64[ns]")).all()


def test_ambiguous_day_month_order_is_refused(tmp_path):
    p = tmp_path / "amb.csv"
    p.write_text("date,A,B\n01/02/2001,0.01,0.02\n02/03/2001,-0.01,0.00\n03/04/2001,0.02,-0.01\n")
    with pytest.raises(DataError, match="day/month/year and as month/day/year"):
        load_history(p, frequency="monthly")


def test_bom_and_quoted_names(tmp_path):
    p = tmp_path / "bom.csv"
    p.write_bytes('\ufeffdate,"Equity, domestic",Bonds\n2001-01-31,0.01,0.00\n2001-02-28,-0.02,0.01\n'
                  '2001-03-31,0.015,0.002\n'.encode("utf-8"))
    h = load_history(p)
    assert h.assets == ("Equity, domestic", "Bonds")


def test_date_column_by_name_and_position(tmp_path):
    df = frame(n=12)
    p = tmp_path / "when.csv"
    df.to_csv(p, index_label="when", float_format="%.8f")
    h = load_history(p)                      # first column reads as dates
    assert h.assets == ("Alpha", "Beta", "Gamma")
    cols = df.reset_index(names="obs_date")[["Alpha", "obs_date", "Beta"]]
    cols.to_csv(tmp_path / "mid.csv", index=False, float_format="%.8f")
    h = load_history(tmp_path / "mid.csv", date_column="obs_date")
    assert h.assets == ("Alpha", "Beta")


@pytest.mark.parametrize("freq, expected", [("B", "daily"), ("D", "daily"), ("W-FRI", "weekly"),
                                            ("ME", "monthly"), ("MS", "monthly"), ("QE", "quarterly"),
                                            ("YE", "annual")])
def test_frequency_inference(freq, expected):
    dates = pd.date_range("2001-01-01", periods=40, freq=freq).to_numpy(dtype="datetime64[ns]")
    assert infer_frequency(dates) == expected
    # irregular spacing around the usual one still reads the same (median spacing)
    jitter = dates.copy()
    jitter[::3] = jitter[::3] - np.timedelta64(1, "D") if expected != "daily" else jitter[::3]
    assert infer_frequency(np.sort(jitter)) == expected


def test_gap_note(tmp_path):
    df = frame(n=24).drop(pd.Timestamp("2001-06-30")).drop(pd.Timestamp("2001-07-31"))
    h = load_history(to_csv(df, tmp_path / "gap.csv"))
    assert h.frequency == "monthly"
    assert any("1 gap longer than usual" in n and "after 2001-05-31" in n for n in h.notes)


def test_annual_rate_on_monthly_data_gets_a_note(tmp_path):
    h = load_history(to_csv(frame(), tmp_path / "r.csv"), risk_free=0.03)
    assert any("is it an annual rate" in n for n in h.notes)


def test_require_rows(tmp_path):
    h = load_history(to_csv(frame(n=10), tmp_path / "r.csv"))
    require_rows(h, 10, "anything")
    with pytest.raises(DataError, match=r"r.csv: the sample covariance of 3 assets needs at least 11 return "
                                        r"periods; the history has 10 \(2001-01-31 to 2001-10-31\)"):
        require_rows(h, 11, "the sample covariance of 3 assets")


def test_option_validation():
    with pytest.raises(SettingsError, match="kind"):
        load_history("x.csv", kind="levels")
    with pytest.raises(SettingsError, match="frequency"):
        load_history("x.csv", frequency="hourly")
    with pytest.raises(SettingsError, match="missing"):
        load_history("x.csv", missing="fill")
    with pytest.raises(SettingsError, match="at most one risk-free source"):
        load_history("x.csv", risk_free=0.001, risk_free_column="rf")
    with pytest.raises(SettingsError, match="risk-free rate"):
        load_history("x.csv", risk_free=float("nan"))


def test_errors_are_data_errors_and_value_errors(tmp_path):
    p = tmp_path / "r.csv"
    p.write_text("date,A\n2001-01-31,abc\n2001-02-28,0.1\n")
    with pytest.raises(ValueError):
        load_history(p)


# --------------------------------------------------------------------------- describe

def test_describe_matches_numpy_and_pandas(tmp_path):
    df = frame(n=60, freq="W-FRI", start="2001-01-05")
    h = load_history(to_csv(df, tmp_path / "w.csv", fmt="%.17g"))
    s = describe_history(h)
    assert s.frequency == "weekly" and s.periods_per_year == 52
    # reference: pandas 3.1 Series.mean / Series.std(ddof=1) / Series.autocorr / DataFrame.corr
    for a in s.assets:
        col = df[a.name]
        assert math.isclose(a.mean_annualised, col.mean() * 52, rel_tol=1e-12)
        assert math.isclose(a.volatility_annualised, col.std(ddof=1) * math.sqrt(52), rel_tol=1e-12)
        assert a.minimum == col.min() and a.maximum == col.max()
        # Series.autocorr uses the Pearson correlation of the two shifted slices, a slightly
        # different estimator from ours (one overall mean and variance): close, not equal
        assert abs(a.autocorrelation - col.autocorr(1)) < 0.05
    c = df.corr().to_numpy()
    iu = np.triu_indices(3, 1)
    assert math.isclose(s.correlation_min, c[iu].min(), rel_tol=1e-12)
    assert math.isclose(s.correlation_max, c[iu].max(), rel_tol=1e-12)
    k = int(np.argmax(c[iu]))
    assert s.correlation_max_pair == (df.columns[iu[0][k]], df.columns[iu[1][k]])
    d = s.to_dict()
    assert d["assets"][0]["name"] == "Alpha" and d["type"] == "history"


def test_autocorrelation_reference_statsmodels(tmp_path):
    # reference: statsmodels 0.15 tsa.stattools.acf (one overall mean, divisor T), the same estimator
    from statsmodels.tsa.stattools import acf

    df = frame(n=80)
    h = load_history(to_csv(df, tmp_path / "r.csv", fmt="%.17g"))
    s = describe_history(h)
    for a in s.assets:
        assert math.isclose(a.autocorrelation, acf(df[a.name].to_numpy(), nlags=1, fft=False)[1],
                            rel_tol=1e-10)


def test_single_asset_has_no_correlation_range(tmp_path):
    h = load_history(to_csv(frame(assets=("Solo",)), tmp_path / "one.csv"))
    s = describe_history(h)
    assert s.correlation_min is None and s.correlation_max is None and "one asset only" in s.to_text()


def test_inspect_history_reports_missing_by_asset(tmp_path):
    df = frame()
    df.iloc[5, 2] = np.nan
    p = to_csv(df, tmp_path / "r.csv")
    h, s = inspect_history(p, missing="drop-rows")
    assert s.missing_cells == 1 and s.dropped_rows == 1 and s.file_rows == 30 and s.rows == 29
    assert [a.missing_cells for a in s.assets] == [0, 0, 1]
    assert s.kind_inferred and s.frequency_inferred


def test_declared_frequency_that_disagrees_with_the_dates_gets_a_note(tmp_path):
    h = load_history(to_csv(frame(), tmp_path / "r.csv"), frequency="quarterly")
    assert h.frequency == "quarterly"
    assert any("declared quarterly" in n and "looks monthly" in n for n in h.notes)


def test_trailing_delimiter_and_month_name_dates(tmp_path):
    p = tmp_path / "x.csv"
    p.write_text("date,A,B,\n31-Jan-2001,0.01,0.02,\n28-Feb-2001,-0.02,0.01,\n31-Mar-2001,0.03,-0.01,\n")
    h = load_history(p)
    assert h.assets == ("A", "B") and h.n_periods == 3
    assert str(h.dates[-1])[:10] == "2001-03-31"


# --------------------------------------------------------------------------- properties

from hypothesis import assume, given, settings, strategies as st  # noqa: E402
from hypothesis.extra.numpy import arrays  # noqa: E402


@settings(max_examples=25, deadline=None)
@given(st.integers(3, 30).flatmap(lambda t: st.integers(1, 4).flatmap(
    lambda n: arrays(np.float64, (t, n), elements=st.floats(-0.375, 0.375, allow_nan=False, width=32)))),
    st.sampled_from(["ME", "W-FRI", "QE", "B"]))
def test_round_trip_property(tmp_path_factory, values, freq):
    spread = values.max(axis=0) - values.min(axis=0)
    assume((spread >= 1e-6).all())               # a constant column is refused (tested elsewhere)
    # (values stay below the 50%-a-period median that intake refuses as percentages typed as returns)
    df = pd.DataFrame(values, index=pd.date_range("2003-01-01", periods=len(values), freq=freq),
                      columns=[f"A{k}" for k in range(values.shape[1])])
    p = tmp_path_factory.mktemp("rt") / "r.csv"
    to_csv(df, p, fmt="%.12f")
    h = load_history(p, kind="returns")
    np.testing.assert_allclose(h.returns, values, atol=1e-12)
    assert (h.dates == df.index.to_numpy(dtype="datetime64[ns]")).all()
    assert h.frequency == {"ME": "monthly", "W-FRI": "weekly", "QE": "quarterly", "B": "daily"}[freq]
