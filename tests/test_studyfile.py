"""The study-file parser: typed settings, relative paths, and unknown keys named."""
from pathlib import Path

import pytest

from estimators.core import SettingsError
from noiseproof.studyfile import load_study, parse_study, study_risk_aversion

BASE = """
[data]
path = "history.csv"
kind = "returns"

[estimate]
mean = "sample"
covariance = "ledoit-wolf-constant-correlation"

[[rules]]
name = "proposed"
type = "mean-variance"
risk_aversion = 5

[[rules]]
name = "min-var-short"
type = "min-variance"
long_only = false

[resample]
generator = "normal"
draws = 5000
length = 120
seed = 20261201

[backtest]
window = 120
rebalance_every = 1
cost_bps = 10
"""


def test_the_issue_example_parses(tmp_path):
    f = tmp_path / "study.toml"
    f.write_text(BASE)
    s = load_study(f)
    assert s.name == "study"
    assert s.data.path == (tmp_path / "history.csv").resolve()
    assert s.data.kind == "returns"
    assert s.estimate.covariance == "ledoit-wolf-constant-correlation"
    assert [r.name for r in s.rules] == ["proposed", "min-var-short"]
    assert s.rules[0].params == {"risk_aversion": 5}
    assert s.rules[1].params == {"long_only": False}
    assert s.resample.draws == 5000 and s.resample.length == 120 and s.resample.seed == 20261201
    assert s.backtest.window == 120 and s.backtest.cost_bps == 10
    assert study_risk_aversion(s) == 5.0


@pytest.mark.parametrize(
    "text, needle",
    [
        (BASE.replace("draws = 5000", "drawz = 5000"), "unknown key 'drawz' in [resample]"),
        (BASE + "\nsurprise = 1\n", "unknown key 'surprise'"),
        (BASE.replace('generator = "normal"', 'generator = "lognormal"'), "[resample] generator"),
        (BASE.replace("draws = 5000", "draws = 0"), "[resample] draws must be >= 1"),
        (BASE.replace("draws = 5000", 'draws = "many"'), "[resample] draws must be an integer"),
        (BASE.replace("cost_bps = 10", "cost_bps = -1"), "cost_bps"),
        (BASE.replace('path = "history.csv"', 'path = "history.csv"\nassumptions = "cma.toml"'),
         "exactly one of 'path'"),
        (BASE.replace('name = "min-var-short"', 'name = "proposed"'), "used twice"),
        (BASE.replace("[data]", "[data\n"), "not valid TOML"),
        ('policy = "nope"\n' + BASE, "policy = 'nope' names no rule"),
    ],
)
def test_bad_settings_are_named(text, needle):
    with pytest.raises(SettingsError) as err:
        parse_study(text, Path("/tmp/s.toml"))
    assert needle in str(err.value)
    assert "/tmp/s.toml" in str(err.value)


def test_missing_file_is_a_settings_error(tmp_path):
    with pytest.raises(SettingsError, match="study file not found"):
        load_study(tmp_path / "nope.toml")


def test_sections_are_optional_and_risk_aversion_defaults_to_one():
    s = parse_study('[data]\npath = "x.csv"\n')
    assert s.resample is None and s.backtest is None and s.rules == ()
    assert study_risk_aversion(s) == 1.0


def test_top_level_risk_aversion_wins_and_overrides_apply():
    s = parse_study("risk_aversion = 3\n" + BASE)
    assert study_risk_aversion(s) == 3.0
    o = s.with_overrides(draws=10, seed=7)
    assert o.resample.draws == 10 and o.resample.seed == 7
    assert s.resample.draws == 5000  # frozen original unchanged


def test_disagreeing_mean_variance_rules_fall_back_to_one():
    text = BASE + '\n[[rules]]\nname = "other"\ntype = "mean-variance"\nrisk_aversion = 2\n'
    assert study_risk_aversion(parse_study(text)) == 1.0


def test_frontier_and_self_check_draws_parse_and_are_checked():
    s = parse_study(BASE.replace("seed = 20261201", "seed = 1\nfrontier_draws = 50\nself_check_draws = 0"))
    assert s.resample.frontier_draws == 50 and s.resample.self_check_draws == 0
    assert parse_study(BASE).resample.frontier_draws == 1000
    with pytest.raises(SettingsError, match=r"\[resample\] frontier_draws must be >= 1"):
        parse_study(BASE.replace("seed = 20261201", "frontier_draws = 0"))


def test_block_size_is_auto_or_a_positive_integer():
    """``[resample] block_size``: "auto" (the default; 0 in the settings, sized by the engine)
    or a positive integer; anything else is named."""
    assert parse_study(BASE, Path("/tmp/s.toml")).resample.block_size == 0
    for value, want in (('"auto"', 0), ("500", 500)):
        text = BASE.replace("seed = 20261201", f"seed = 20261201\nblock_size = {value}")
        assert parse_study(text, Path("/tmp/s.toml")).resample.block_size == want
    for bad in ("0", "-5", '"big"', "2.5", "true"):
        text = BASE.replace("seed = 20261201", f"seed = 20261201\nblock_size = {bad}")
        with pytest.raises(SettingsError, match=r"\[resample\] block_size must be a positive "
                                                r"integer or \"auto\""):
            parse_study(text, Path("/tmp/s.toml"))
