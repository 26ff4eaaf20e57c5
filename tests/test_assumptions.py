"""Capital-market assumptions: reading, checks, and the nearest-correlation repair."""
from pathlib import Path

import numpy as np
import pytest

from estimators.core import DataError
from noiseproof.assumptions import (REPAIR_EIGENVALUE_FLOOR, describe_assumptions, load_assumptions,
                                    looks_like_assumptions, nearest_correlation)
from noiseproof.intake import load_assumptions as load_assumptions_from_intake

DATA = Path(__file__).parent / "data" / "intake"

CORR_OK = np.array([[1.00, 0.10, 0.60, 0.30],
                    [0.10, 1.00, 0.20, -0.10],
                    [0.60, 0.20, 1.00, 0.25],
                    [0.30, -0.10, 0.25, 1.00]])
VOL_OK = np.array([0.160, 0.055, 0.170, 0.180])


def toml(tmp_path, assets, mu, vol, corr, extra=""):
    rows = ",\n".join("    [" + ", ".join(repr(float(x)) for x in r) + "]" for r in corr)
    text = (f"{extra}assets = [{', '.join(repr(a) for a in assets)}]\n"
            f"expected_return = [{', '.join(repr(float(x)) for x in mu)}]\n"
            f"volatility = [{', '.join(repr(float(x)) for x in vol)}]\n"
            f"correlation = [\n{rows}\n]\n").replace("'", '"')
    p = tmp_path / "a.toml"
    p.write_text(text)
    return p


# --------------------------------------------------------------------------- reading

def test_toml_and_csv_agree():
    a = load_assumptions(DATA / "assumptions_ok.toml")
    b = load_assumptions(DATA / "assumptions_ok.csv")       # lower triangle only
    assert a.assets == b.assets == ("Domestic Equity", "Government Bonds", "Real Estate", "Commodities")
    np.testing.assert_array_equal(a.mean, b.mean)
    np.testing.assert_array_equal(a.correlation, CORR_OK)
    np.testing.assert_array_equal(b.correlation, CORR_OK)
    np.testing.assert_allclose(a.covariance, CORR_OK * np.outer(VOL_OK, VOL_OK), rtol=1e-15)
    assert a.frequency == b.frequency == "annual" and a.periods_per_year == 1
    assert not a.repaired and a.repair_distance == 0.0
    assert len(a.sha256) == 64
    assert load_assumptions_from_intake is load_assumptions


def test_frequency_from_file_or_argument(tmp_path):
    p = toml(tmp_path, ["A", "B"], [0.005, 0.004], [0.04, 0.03], np.eye(2), extra='frequency = "monthly"\n')
    assert load_assumptions(p).frequency == "monthly"
    with pytest.raises(DataError, match="says frequency = 'monthly' but 'annual'"):
        load_assumptions(p, frequency="annual")
    assert load_assumptions(DATA / "assumptions_ok.csv", frequency="quarterly").periods_per_year == 4


def test_content_detection():
    assert looks_like_assumptions(DATA / "assumptions_ok.toml")
    assert looks_like_assumptions(DATA / "assumptions_ok.csv")
    assert not looks_like_assumptions(DATA / "does_not_exist.csv")


def test_describe(tmp_path):
    d = describe_assumptions(load_assumptions(DATA / "assumptions_ok.toml"))
    assert d["correlation_min"] == -0.10 and d["correlation_min_pair"] == ["Government Bonds", "Commodities"]
    assert d["correlation_max"] == 0.60 and d["correlation_max_pair"] == ["Domestic Equity", "Real Estate"]
    assert d["assets"][0]["volatility_annualised"] == 0.16
    assert d["min_eigenvalue"] == pytest.approx(np.linalg.eigvalsh(CORR_OK)[0], abs=1e-14)


# --------------------------------------------------------------------------- checks

@pytest.mark.parametrize("edit, match", [
    (lambda c: c.__setitem__((0, 2), 0.65), r"not symmetric: 'A' / 'C' is 0.65 but 'C' / 'A' is 0.6"),
    (lambda c: c.__setitem__((1, 1), 0.98), r"correlation of 'B' with itself is 0.98"),
    (lambda c: (c.__setitem__((1, 3), 1.2), c.__setitem__((3, 1), 1.2)), r"'B' and 'D' is 1.2, outside \[-1, 1\]"),
])
def test_matrix_defects_name_the_pair(tmp_path, edit, match):
    c = CORR_OK.copy()
    edit(c)
    p = toml(tmp_path, list("ABCD"), [0.06, 0.03, 0.05, 0.04], VOL_OK, c)
    with pytest.raises(DataError, match=match):
        load_assumptions(p)
    with pytest.raises(DataError, match=match):           # never repaired
        load_assumptions(p, repair=True)


def test_not_psd_names_the_most_negative_eigenvalue():
    c = np.array([[1.0, 0.9, 0.7], [0.9, 1.0, -0.3], [0.7, -0.3, 1.0]])
    lam = np.linalg.eigvalsh(c)[0]
    with pytest.raises(DataError, match=f"most negative eigenvalue {lam:.4g}"):
        load_assumptions(DATA / "assumptions_not_psd.toml")


@pytest.mark.parametrize("mu, vol, match", [
    ([6.5, 0.03], [0.16, 0.05], "expected_return of 'A' is 6.5"),
    ([0.065, 0.03], [16.0, 0.05], "volatility of 'A' is 16"),
    ([0.065, 0.03], [0.16, 0.0], "volatility of 'B' is 0"),
])
def test_bounds_on_means_and_volatilities(tmp_path, mu, vol, match):
    with pytest.raises(DataError, match=match):
        load_assumptions(toml(tmp_path, ["A", "B"], mu, vol, np.eye(2)))


def test_structure_errors(tmp_path):
    p = tmp_path / "x.toml"
    p.write_text('assets = ["A", "B"]\nexpected_return = [0.1]\nvolatility = [0.1, 0.2]\n'
                 'correlation = [[1.0, 0.0], [0.0, 1.0]]\n')
    with pytest.raises(DataError, match="'expected_return' has 1 values but there are 2 assets"):
        load_assumptions(p)
    p.write_text('assets = ["A", "A"]\nexpected_return = [0.1, 0.1]\nvolatility = [0.1, 0.2]\n'
                 'correlation = [[1.0, 0.0], [0.0, 1.0]]\n')
    with pytest.raises(DataError, match="asset name 'A' is used twice"):
        load_assumptions(p)
    p.write_text('assets = ["A"]\nexpected_return = [0.1]\nvolatility = [0.1]\ncorrelation = [[1.0]]\n'
                 'corr = 1\n')
    with pytest.raises(DataError, match="unknown key 'corr'"):
        load_assumptions(p)
    p.write_text("assets = [")
    with pytest.raises(DataError, match="not valid TOML"):
        load_assumptions(p)
    q = tmp_path / "x.csv"
    q.write_text("asset,expected_return,volatility,A,B\nA,0.05,0.1,1,\nB,0.04,0.1,,1\n")
    with pytest.raises(DataError, match="correlation of 'A' and 'B' is missing"):
        load_assumptions(q)
    q.write_text("asset,expected_return,volatility,A,C\nA,0.05,0.1,1,\nB,0.04,0.1,0.2,1\n")
    with pytest.raises(DataError, match="named after the assets in the same order"):
        load_assumptions(q)
    q.write_text("asset,expected_return,volatility,A,B\nA,0.05,high,1,\nB,0.04,0.1,0.2,1\n")
    with pytest.raises(DataError, match=r"column 'volatility', row 1 \('A'\): non-numeric value 'high'"):
        load_assumptions(q)
    with pytest.raises(DataError, match="assumptions file not found"):
        load_assumptions(tmp_path / "none.toml")


# --------------------------------------------------------------------------- repair

def cvxpy_nearest(cp, a):
    """Independent reference: min ||X - A||_F^2 s.t. X PSD, diag(X) = 1, solved by cvxpy 1.9 (Clarabel)."""
    n = a.shape[0]
    x = cp.Variable((n, n), PSD=True)
    prob = cp.Problem(cp.Minimize(cp.sum_squares(x - a)), [cp.diag(x) == 1])
    prob.solve(solver="CLARABEL", tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10)
    return x.value


def test_higham_example_against_cvxpy():
    # The 3x3 example of Higham (2002, IMA J. Numer. Anal. 22(3)), section 4: A = [[1,1,0],[1,1,1],[0,1,1]];
    # nearest correlation matrix off-diagonals 0.7607 and 0.1573 (from memory), confirmed here by an
    # independent solver: the SDP  min ||X - A||_F^2  s.t. X PSD, diag(X) = 1  in cvxpy (Clarabel).
    cp = pytest.importorskip("cvxpy")
    a = np.array([[1.0, 1.0, 0.0], [1.0, 1.0, 1.0], [0.0, 1.0, 1.0]])
    res = nearest_correlation(a)
    assert res.converged
    np.testing.assert_allclose(res.matrix[0, 1], 0.7607, atol=5e-5)
    np.testing.assert_allclose(res.matrix[0, 2], 0.1573, atol=5e-5)
    x = cvxpy_nearest(cp, a)
    np.testing.assert_allclose(res.matrix, x, atol=1e-6)
    assert res.distance == pytest.approx(np.linalg.norm(x - a), abs=1e-8)


def test_random_invalid_matrices_against_cvxpy():
    cp = pytest.importorskip("cvxpy")
    rng = np.random.default_rng(7)
    for n in (4, 6):
        u = rng.uniform(-1, 1, size=(n, n))
        a = np.triu(u, 1)
        a = a + a.T + np.eye(n)
        assert np.linalg.eigvalsh(a)[0] < 0
        res = nearest_correlation(a)
        x = cvxpy_nearest(cp, a)
        np.testing.assert_allclose(res.matrix, x, atol=1e-6)
        assert res.distance <= np.linalg.norm(x - a) + 1e-8
        assert np.linalg.eigvalsh(res.matrix)[0] >= -1e-12
        np.testing.assert_array_equal(np.diag(res.matrix), np.ones(n))
        np.testing.assert_array_equal(res.matrix, res.matrix.T)


def test_valid_matrix_is_left_alone():
    res = nearest_correlation(CORR_OK)
    np.testing.assert_allclose(res.matrix, CORR_OK, atol=1e-12)
    assert res.distance < 1e-12


def test_eigenvalue_floor():
    a = np.array([[1.0, 0.9, 0.7], [0.9, 1.0, -0.3], [0.7, -0.3, 1.0]])
    res = nearest_correlation(a, min_eigenvalue=0.01)
    assert np.linalg.eigvalsh(res.matrix)[0] >= 0.01 - 1e-6


def test_load_with_repair_reports_the_move():
    a = load_assumptions(DATA / "assumptions_not_psd.toml", repair=True)
    given = np.array([[1.0, 0.9, 0.7], [0.9, 1.0, -0.3], [0.7, -0.3, 1.0]])
    assert a.repaired and a.given_min_eigenvalue < 0
    assert a.min_eigenvalue >= REPAIR_EIGENVALUE_FLOOR * 0.5
    assert a.repair_distance == pytest.approx(np.linalg.norm(a.correlation - given), rel=1e-9)
    assert a.repair_max_change == pytest.approx(np.abs(a.correlation - given).max(), rel=1e-9)
    k = np.unravel_index(np.argmax(np.abs(a.correlation - given)), (3, 3))
    assert set(a.repair_max_pair) == {a.assets[k[0]], a.assets[k[1]]}
    np.testing.assert_allclose(a.covariance, a.correlation * np.outer(a.volatility, a.volatility))
    np.linalg.cholesky(a.covariance)     # invertible: the floor keeps it positive definite


def test_a_study_file_is_not_taken_for_assumptions(tmp_path):
    p = tmp_path / "study.toml"
    p.write_text('name = "x"\n[data]\npath = "r.csv"\n')
    with pytest.raises(DataError, match="this is a study file"):
        load_assumptions(p)


from hypothesis import given, settings, strategies as st  # noqa: E402
from hypothesis.extra.numpy import arrays  # noqa: E402


@settings(max_examples=30, deadline=None)
@given(st.integers(2, 7).flatmap(lambda n: arrays(np.float64, (n, n), elements=st.floats(-1, 1))))
def test_repair_properties(u):
    n = u.shape[0]
    a = np.triu(u, 1)
    a = a + a.T + np.eye(n)
    res = nearest_correlation(a)
    m = res.matrix
    np.testing.assert_array_equal(m, m.T)
    np.testing.assert_array_equal(np.diag(m), np.ones(n))
    assert np.linalg.eigvalsh(m)[0] >= -1e-10
    assert np.abs(m).max() <= 1 + 1e-12
    assert res.distance <= np.linalg.norm(a - np.eye(n)) + 1e-9    # the identity is a correlation matrix
    again = nearest_correlation(m)                                  # a valid matrix is a fixed point
    assert again.distance < 1e-7
    if np.linalg.eigvalsh(a)[0] >= 0:
        assert res.distance < 1e-7
