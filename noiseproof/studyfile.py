"""The study file (TOML): parsed once into frozen, typed settings.

Every unknown key is a :class:`SettingsError` that names it (with its section) and
lists the known keys. Paths are resolved relative to the study file. Values are
checked for type and range here; estimator and rule names are checked against
their registries by the runner, which knows the registries.

The keys are documented in README.md ("The study file"); keep the two in step.
"""
from __future__ import annotations

import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping, Optional

from estimators.core import SettingsError

__all__ = [
    "DataSettings",
    "EstimateSettings",
    "RuleSettings",
    "ResampleSettings",
    "BacktestSettings",
    "VerdictSettings",
    "StudySettings",
    "load_study",
    "parse_study",
]

GENERATORS = ("normal", "student-t", "bootstrap", "block-bootstrap")
DRAW_PATHS = ("auto", "histories", "moments")


@dataclass(frozen=True)
class DataSettings:
    """``[data]``: where the history (or the capital-market assumptions) comes from."""

    path: Optional[Path] = None
    assumptions: Optional[Path] = None
    kind: Optional[str] = None
    frequency: Optional[str] = None
    date_column: Optional[str] = None
    missing: str = "raise"
    risk_free: Optional[float] = None
    risk_free_column: Optional[str] = None
    risk_free_path: Optional[Path] = None
    repair_correlation: bool = False


@dataclass(frozen=True)
class EstimateSettings:
    """``[estimate]``: the default estimators (rules may override them)."""

    mean: str = "sample"
    covariance: str = "sample"
    ewma_half_life: Optional[float] = None
    ewma_decay: Optional[float] = None


@dataclass(frozen=True)
class RuleSettings:
    """One ``[[rules]]`` table: a name, a type and the rule's own parameters.

    ``params`` holds every key except ``name``, ``type``, ``mean`` and
    ``covariance``; the rule registry checks them.
    """

    name: str
    type: str
    params: Mapping[str, Any] = field(default_factory=dict)
    mean: Optional[str] = None
    covariance: Optional[str] = None


@dataclass(frozen=True)
class ResampleSettings:
    """``[resample]``: the synthetic histories."""

    generator: str = "normal"
    draws: int = 1000
    length: Optional[int] = None
    seed: int = 0
    degrees_of_freedom: Optional[float] = None
    block_length: Optional[float] = None
    block_size: int = 0             # 0: automatic (see simulate.ResampleSpec)
    keep_draws: bool = False
    frontier_points: int = 21
    sweep_years: tuple = (3, 5, 10, 20, 40)
    sweep_draws: Optional[int] = None
    attribution: bool = True
    hold_threshold: float = 0.005
    draw: str = "auto"
    frontier_draws: int = 1000
    self_check_draws: int = 2000


@dataclass(frozen=True)
class BacktestSettings:
    """``[backtest]``: rolling (or expanding) out-of-sample evaluation."""

    window: int = 120
    expanding: bool = False
    rebalance_every: int = 1
    cost_bps: Any = 0.0
    bootstrap_resamples: int = 1000
    bootstrap_block_length: Optional[int] = None
    rolling_sharpe_window: Optional[int] = None
    seed: Optional[int] = None


@dataclass(frozen=True)
class VerdictSettings:
    """``[verdict]``: thresholds of the pack's verdict criteria."""

    max_band_width: float = 0.25
    min_prob_beats_equal_weight: float = 0.5
    significance: float = 0.05


@dataclass(frozen=True)
class StudySettings:
    """A parsed study file."""

    name: str
    path: Optional[Path]
    text: str
    data: DataSettings
    estimate: EstimateSettings
    rules: tuple
    resample: Optional[ResampleSettings]
    backtest: Optional[BacktestSettings]
    verdict: VerdictSettings
    risk_aversion: Optional[float] = None
    policy: Optional[str] = None

    def with_overrides(self, **kw) -> "StudySettings":
        """Command-line overrides (``draws``, ``seed``) applied to ``[resample]``."""
        res = self.resample
        if res is None:
            return self
        changes = {k: v for k, v in kw.items() if v is not None}
        if not changes:
            return self
        for key in changes:
            if key not in ("draws", "seed"):
                raise SettingsError(f"cannot override '{key}'")
        if "draws" in changes and changes["draws"] < 1:
            raise SettingsError("--draws must be at least 1")
        return replace(self, resample=replace(res, **changes))


# --------------------------------------------------------------------------- helpers

def _where(src: str, section: str, key: str) -> str:
    return f"{src}: [{section}] {key}" if section else f"{src}: {key}"


def _check_keys(table: Mapping, known, src: str, section: str) -> None:
    unknown = [k for k in table if k not in known]
    if unknown:
        where = f"[{section}]" if section else "top level"
        raise SettingsError(
            f"{src}: unknown key{'s' if len(unknown) > 1 else ''} "
            f"{', '.join(repr(k) for k in unknown)} in {where} (known: {', '.join(sorted(known))})"
        )


def _get(table, key, types, src, section, default=None, *, low=None, high=None, choices=None,
         low_inclusive=True):
    if key not in table:
        return default
    value = table[key]
    if isinstance(value, bool) and bool not in (types if isinstance(types, tuple) else (types,)):
        raise SettingsError(f"{_where(src, section, key)} must be {_typename(types)}, not {value!r}")
    if not isinstance(value, types):
        raise SettingsError(f"{_where(src, section, key)} must be {_typename(types)}, not {value!r}")
    if choices is not None and value not in choices:
        raise SettingsError(
            f"{_where(src, section, key)} = {value!r} is not one of: {', '.join(map(str, choices))}"
        )
    if low is not None and (value < low or (not low_inclusive and value == low)):
        op = ">=" if low_inclusive else ">"
        raise SettingsError(f"{_where(src, section, key)} must be {op} {low}, not {value!r}")
    if high is not None and value > high:
        raise SettingsError(f"{_where(src, section, key)} must be <= {high}, not {value!r}")
    return value


def _typename(types) -> str:
    names = {int: "an integer", float: "a number", str: "a string", bool: "true or false",
             list: "a list", dict: "a table"}
    if isinstance(types, tuple):
        if set(types) == {int, float}:
            return "a number"
        return " or ".join(names.get(t, t.__name__) for t in types)
    return names.get(types, types.__name__)


NUM = (int, float)


def _path(table, key, base: Path, src, section) -> Optional[Path]:
    value = _get(table, key, str, src, section)
    if value is None:
        return None
    p = Path(value)
    return p if p.is_absolute() else (base / p)


# --------------------------------------------------------------------------- sections

def _data(t, base, src) -> DataSettings:
    known = {"path", "assumptions", "kind", "frequency", "date_column", "missing", "risk_free",
             "risk_free_column", "risk_free_path", "repair_correlation"}
    _check_keys(t, known, src, "data")
    d = DataSettings(
        path=_path(t, "path", base, src, "data"),
        assumptions=_path(t, "assumptions", base, src, "data"),
        kind=_get(t, "kind", str, src, "data", choices=("returns", "prices")),
        frequency=_get(t, "frequency", str, src, "data",
                       choices=("daily", "weekly", "monthly", "quarterly", "annual")),
        date_column=_get(t, "date_column", str, src, "data"),
        missing=_get(t, "missing", str, src, "data", "raise", choices=("raise", "drop-rows")),
        risk_free=_get(t, "risk_free", NUM, src, "data", low=-1.0, high=1.0),
        risk_free_column=_get(t, "risk_free_column", str, src, "data"),
        risk_free_path=_path(t, "risk_free_path", base, src, "data"),
        repair_correlation=_get(t, "repair_correlation", bool, src, "data", False),
    )
    if (d.path is None) == (d.assumptions is None):
        raise SettingsError(f"{src}: [data] needs exactly one of 'path' (a history) or "
                            f"'assumptions' (capital-market assumptions)")
    given = [k for k in ("risk_free", "risk_free_column", "risk_free_path") if k in t]
    if len(given) > 1:
        raise SettingsError(f"{src}: [data] give at most one of risk_free, risk_free_column, "
                            f"risk_free_path (got {', '.join(given)})")
    return d


def _estimate(t, src) -> EstimateSettings:
    known = {"mean", "covariance", "ewma_half_life", "ewma_decay"}
    _check_keys(t, known, src, "estimate")
    e = EstimateSettings(
        mean=_get(t, "mean", str, src, "estimate", "sample"),
        covariance=_get(t, "covariance", str, src, "estimate", "sample"),
        ewma_half_life=_get(t, "ewma_half_life", NUM, src, "estimate", low=0, low_inclusive=False),
        ewma_decay=_get(t, "ewma_decay", NUM, src, "estimate", low=0, high=1,
                        low_inclusive=False),
    )
    if e.ewma_half_life is not None and e.ewma_decay is not None:
        raise SettingsError(f"{src}: [estimate] give ewma_half_life or ewma_decay, not both")
    return e


def _rules(items, src) -> tuple:
    if not isinstance(items, list):
        raise SettingsError(f"{src}: 'rules' must be an array of tables ([[rules]])")
    rules = []
    seen = set()
    for i, t in enumerate(items, start=1):
        section = f"rules #{i}"
        if not isinstance(t, dict):
            raise SettingsError(f"{src}: [[rules]] entry {i} must be a table")
        name = _get(t, "name", str, src, section)
        rtype = _get(t, "type", str, src, section)
        if not name:
            raise SettingsError(f"{src}: [{section}] needs a 'name'")
        if not rtype:
            raise SettingsError(f"{src}: [{section}] ('{name}') needs a 'type'")
        if name in seen:
            raise SettingsError(f"{src}: rule name '{name}' is used twice")
        seen.add(name)
        params = {k: v for k, v in t.items() if k not in ("name", "type", "mean", "covariance")}
        rules.append(RuleSettings(
            name=name, type=rtype, params=params,
            mean=_get(t, "mean", str, src, section),
            covariance=_get(t, "covariance", str, src, section),
        ))
    return tuple(rules)


def _block_size(t, src) -> int:
    """``block_size``: a positive number of draws, or "auto" (0 here: the engine sizes the
    blocks from the study's work)."""
    value = t.get("block_size", "auto")
    if value == "auto":
        return 0
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise SettingsError(f"{_where(src, 'resample', 'block_size')} must be a positive integer "
                            f"or \"auto\", not {value!r}")
    return value


def _resample(t, src) -> ResampleSettings:
    known = {"generator", "draws", "length", "seed", "degrees_of_freedom", "block_length",
             "block_size", "keep_draws", "frontier_points", "sweep_years", "sweep_draws",
             "attribution", "hold_threshold", "draw", "frontier_draws", "self_check_draws"}
    s = "resample"
    _check_keys(t, known, src, s)
    sweep = _get(t, "sweep_years", list, src, s, [3, 5, 10, 20, 40])
    for v in sweep:
        if isinstance(v, bool) or not isinstance(v, NUM) or v <= 0:
            raise SettingsError(f"{src}: [resample] sweep_years must hold positive numbers, not {v!r}")
    return ResampleSettings(
        generator=_get(t, "generator", str, src, s, "normal", choices=GENERATORS),
        draws=_get(t, "draws", int, src, s, 1000, low=1),
        length=_get(t, "length", int, src, s, None, low=2),
        seed=_get(t, "seed", int, src, s, 0, low=0),
        degrees_of_freedom=_get(t, "degrees_of_freedom", NUM, src, s, None, low=2,
                                low_inclusive=False),
        block_length=_get(t, "block_length", NUM, src, s, None, low=1),
        block_size=_block_size(t, src),
        keep_draws=_get(t, "keep_draws", bool, src, s, False),
        frontier_points=_get(t, "frontier_points", int, src, s, 21, low=2),
        sweep_years=tuple(sweep),
        sweep_draws=_get(t, "sweep_draws", int, src, s, None, low=1),
        attribution=_get(t, "attribution", bool, src, s, True),
        hold_threshold=_get(t, "hold_threshold", NUM, src, s, 0.005, low=0, high=1),
        draw=_get(t, "draw", str, src, s, "auto", choices=DRAW_PATHS),
        frontier_draws=_get(t, "frontier_draws", int, src, s, 1000, low=1),
        self_check_draws=_get(t, "self_check_draws", int, src, s, 2000, low=0),
    )


def _backtest(t, src) -> BacktestSettings:
    known = {"window", "expanding", "rebalance_every", "cost_bps", "bootstrap_resamples",
             "bootstrap_block_length", "rolling_sharpe_window", "seed"}
    s = "backtest"
    _check_keys(t, known, src, s)
    cost = t.get("cost_bps", 0.0)
    if isinstance(cost, dict):
        for asset, v in cost.items():
            if isinstance(v, bool) or not isinstance(v, NUM) or v < 0:
                raise SettingsError(f"{src}: [backtest] cost_bps.{asset} must be a number >= 0")
    elif isinstance(cost, bool) or not isinstance(cost, NUM) or cost < 0:
        raise SettingsError(f"{src}: [backtest] cost_bps must be a number >= 0 or a table "
                            f"asset -> number, not {cost!r}")
    return BacktestSettings(
        window=_get(t, "window", int, src, s, 120, low=2),
        expanding=_get(t, "expanding", bool, src, s, False),
        rebalance_every=_get(t, "rebalance_every", int, src, s, 1, low=1),
        cost_bps=cost,
        bootstrap_resamples=_get(t, "bootstrap_resamples", int, src, s, 1000, low=0),
        bootstrap_block_length=_get(t, "bootstrap_block_length", int, src, s, None, low=1),
        rolling_sharpe_window=_get(t, "rolling_sharpe_window", int, src, s, None, low=2),
        seed=_get(t, "seed", int, src, s, None, low=0),
    )


def _verdict(t, src) -> VerdictSettings:
    known = {"max_band_width", "min_prob_beats_equal_weight", "significance"}
    _check_keys(t, known, src, "verdict")
    return VerdictSettings(
        max_band_width=_get(t, "max_band_width", NUM, src, "verdict", 0.25, low=0, high=2),
        min_prob_beats_equal_weight=_get(t, "min_prob_beats_equal_weight", NUM, src, "verdict",
                                         0.5, low=0, high=1),
        significance=_get(t, "significance", NUM, src, "verdict", 0.05, low=0, high=1,
                          low_inclusive=False),
    )


TOP_KEYS = {"name", "risk_aversion", "policy", "data", "estimate", "rules", "resample",
            "backtest", "verdict"}


def parse_study(text: str, path: Optional[Path] = None) -> StudySettings:
    """Parse study-file text. ``path`` (the file) anchors relative paths and names errors."""
    src = str(path) if path is not None else "<study>"
    base = path.parent if path is not None else Path.cwd()
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SettingsError(f"{src}: not valid TOML: {exc}") from None
    _check_keys(doc, TOP_KEYS, src, "")
    for section in ("data", "estimate", "resample", "backtest", "verdict"):
        if section in doc and not isinstance(doc[section], dict):
            raise SettingsError(f"{src}: '{section}' must be a table ([{section}])")
    if "data" not in doc:
        raise SettingsError(f"{src}: the study needs a [data] section")
    name = _get(doc, "name", str, src, "", None) or (path.stem if path is not None else "study")
    settings = StudySettings(
        name=name,
        path=path,
        text=text,
        data=_data(doc["data"], base, src),
        estimate=_estimate(doc.get("estimate", {}), src),
        rules=_rules(doc.get("rules", []), src),
        resample=_resample(doc["resample"], src) if "resample" in doc else None,
        backtest=_backtest(doc["backtest"], src) if "backtest" in doc else None,
        verdict=_verdict(doc.get("verdict", {}), src),
        risk_aversion=_get(doc, "risk_aversion", NUM, src, "", None, low=0, low_inclusive=False),
        policy=_get(doc, "policy", str, src, "", None),
    )
    if settings.policy is not None and settings.policy not in {r.name for r in settings.rules}:
        raise SettingsError(f"{src}: policy = '{settings.policy}' names no rule in [[rules]]")
    return settings


def read_settings_text(path, what: str = "study file") -> str:
    """The text of a settings file; a missing or unreadable file is a SettingsError."""
    p = Path(path)
    try:
        return p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SettingsError(f"{p}: {what} not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"{p}: cannot read the {what} ({exc.__class__.__name__})") from None


def load_study(path) -> StudySettings:
    """Read and parse a study file; a missing or unreadable file is a SettingsError."""
    p = Path(path)
    return parse_study(read_settings_text(p), p.resolve())


def study_risk_aversion(settings: StudySettings) -> float:
    """The one risk aversion every rule is scored with.

    The top-level ``risk_aversion``; when absent, the value the study's mean-variance
    rules share; else 1 (the value DeMiguel, Garlappi & Uppal 2009 report).
    """
    if settings.risk_aversion is not None:
        return float(settings.risk_aversion)
    values = {float(r.params["risk_aversion"]) for r in settings.rules
              if r.type == "mean-variance" and "risk_aversion" in r.params}
    if len(values) == 1:
        return values.pop()
    return 1.0
