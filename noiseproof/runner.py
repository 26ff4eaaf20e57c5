"""Run a study: load the data, resample, backtest, and write the run folder.

Split in three so that a batch runner can plug in its own executor::

    prepared = prepare_study(settings)                 # data, population, rules, specs
    result = simulate.run_resampling(prepared.spec)    # or blocks on any executor
    finish_study(prepared, result, out)                # backtest, files, pack

:func:`run_study` does the three in a row. The run folder is built in a temporary
sibling folder and renamed into place at the end (an existing folder of the same name is
replaced only then), so a failed run never leaves a half-written summary.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import os
import platform
import shutil
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Optional, Sequence

import numpy as np

from estimators.core import SettingsError

from .studyfile import StudySettings, study_risk_aversion

__all__ = ["PreparedStudy", "prepare_study", "finish_study", "run_study", "SCHEMA"]

#: Version of summary.json's layout.
SCHEMA = 1


@dataclass(frozen=True)
class PreparedStudy:
    """Everything a study needs before the draws run.

    Attributes
    ----------
    settings : StudySettings
        With the command-line overrides applied.
    history : History or None
    assumptions : Assumptions or None
    assets : tuple of str
    periods_per_year : int
    risk_aversion : float
    risk_aversion_source : str
        ``study``, ``mean-variance rules`` or ``default``.
    rule_specs : tuple of simulate.RuleSpec
        Every rule with its estimator; 1/N (``equal-weight``) included.
    in_sample : dict
        Per rule: ``weights`` (N,), ``cash``, and ``moments`` (estimators.Moments or None).
    spec : simulate.ResampleSpec or None
        None when the study has no ``[resample]`` (``resample_skipped`` says why).
    backtest_inputs : dict or None
        Keyword arguments of ``backtest.run_backtest`` (None: ``backtest_skipped``).
    data_summary : dict
        The ``data`` section of summary.json.
    estimate_summary : dict
        The ``estimate`` section of summary.json.
    log : list of str
        Timestamped lines for log.txt.
    """

    settings: StudySettings
    history: Any
    assumptions: Any
    assets: tuple
    periods_per_year: int
    risk_aversion: float
    risk_aversion_source: str
    rule_specs: tuple
    in_sample: dict
    spec: Any
    resample_skipped: Optional[str]
    backtest_inputs: Optional[dict]
    backtest_skipped: Optional[str]
    data_summary: dict
    estimate_summary: dict
    log: list = field(default_factory=list)


def _stamp(log: list, message: str) -> None:
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    log.append(f"{now} {message}")


def _risk_aversion_source(settings: StudySettings) -> str:
    if settings.risk_aversion is not None:
        return "study"
    values = {float(r.params["risk_aversion"]) for r in settings.rules
              if r.type == "mean-variance" and "risk_aversion" in r.params}
    return "mean-variance rules" if len(values) == 1 else "default"


def _estimator_params(settings: StudySettings) -> dict:
    e = settings.estimate
    params = {}
    if e.ewma_half_life is not None:
        params["ewma_half_life"] = float(e.ewma_half_life)
    if e.ewma_decay is not None:
        params["ewma_decay"] = float(e.ewma_decay)
    return params


def _load_data(settings: StudySettings, log: list):
    from . import intake

    d = settings.data
    if d.path is not None:
        h = intake.load_history(d.path, kind=d.kind, frequency=d.frequency,
                                date_column=d.date_column, missing=d.missing,
                                risk_free=d.risk_free, risk_free_column=d.risk_free_column,
                                risk_free_path=d.risk_free_path)
        _stamp(log, f"history {h.source}: {h.n_periods} periods x {h.n_assets} assets, "
                    f"{h.frequency}, sha256 {h.sha256}")
        for note in getattr(h, "notes", ()) or ():
            _stamp(log, f"note: {note}")
        dates = np.asarray(h.dates)
        summary = {"source": str(h.source), "sha256": h.sha256, "kind": h.kind,
                   "frequency": h.frequency, "assets": list(h.assets),
                   "first_date": str(np.datetime_as_string(dates[0], unit="D")),
                   "last_date": str(np.datetime_as_string(dates[-1], unit="D")),
                   "periods": h.n_periods, "excess": bool(h.excess),
                   "risk_free": _risk_free_summary(d, h), "dropped_rows": int(h.dropped_rows),
                   "missing_policy": d.missing, "assumptions": False,
                   "notes": list(getattr(h, "notes", ()) or ())}
        return h, None, summary
    a = intake.load_assumptions(d.assumptions, repair=d.repair_correlation, frequency=d.frequency)
    _stamp(log, f"assumptions {a.source}: {len(a.assets)} assets, {a.frequency}, sha256 {a.sha256}")
    summary = {"source": str(a.source), "sha256": a.sha256, "kind": "assumptions",
               "frequency": a.frequency, "assets": list(a.assets), "first_date": None,
               "last_date": None, "periods": None, "excess": None, "risk_free": None,
               "dropped_rows": 0, "missing_policy": None, "assumptions": True,
               "repair_distance": float(getattr(a, "repair_distance", 0.0))}
    return None, a, summary


def _risk_free_summary(d, h):
    if d.risk_free is not None:
        return {"constant": float(d.risk_free)}
    if d.risk_free_column is not None:
        return {"column": d.risk_free_column}
    if d.risk_free_path is not None:
        return {"file": str(d.risk_free_path)}
    return None


def _make_rule(settings: StudySettings, r, assets: tuple, **kw):
    """optimise.make_rule for one [[rules]] table; errors name the study file."""
    from estimators.core import NoiseproofError
    from optimise import make_rule

    try:
        return make_rule(r.name, r.type, dict(r.params), assets, **kw)
    except NoiseproofError as exc:
        raise type(exc)(f"{settings.path or 'study'}: {exc}") from None


def _policy_weights(settings: StudySettings, assets: tuple, ppy):
    """The policy's fixed weights (N,), or None (no policy, or a policy that is not fixed)."""
    if settings.policy is None:
        return None
    r = next(r for r in settings.rules if r.name == settings.policy)
    if r.type != "fixed":
        if any("max_tracking_error" in x.params for x in settings.rules):
            raise SettingsError(f"{settings.path or 'study'}: max_tracking_error is measured "
                                f"against fixed policy weights, but policy = '{r.name}' is a "
                                f"'{r.type}' rule; make the policy a rule of type 'fixed'")
        return None
    return _make_rule(settings, r, assets, periods_per_year=ppy).fixed_weights


def _build_rules(settings: StudySettings, assets: tuple, ppy=None):
    from optimise import make_rule
    from simulate import RuleSpec

    params = _estimator_params(settings)
    specs = []
    names = set()
    policy_w = _policy_weights(settings, assets, ppy)
    for r in settings.rules:
        if r.name == "equal-weight" and r.type != "equal-weight":
            raise SettingsError(f"rule name 'equal-weight' is reserved for 1/N (the rule "
                                f"named so has type '{r.type}')")
        rule = _make_rule(settings, r, assets, policy_weights=policy_w, periods_per_year=ppy)
        specs.append(RuleSpec(rule, r.mean or settings.estimate.mean,
                              r.covariance or settings.estimate.covariance, dict(params)))
        names.add(r.name)
    if "equal-weight" not in names:
        rule = make_rule("equal-weight", "equal-weight", {}, assets)
        specs.insert(0, RuleSpec(rule, settings.estimate.mean, settings.estimate.covariance,
                                 dict(params)))
    return tuple(specs)


def _moments_summary(m) -> dict:
    if m is None:
        return {}
    return {"divisor": m.divisor, "shrinkage": None if m.shrinkage is None else float(m.shrinkage),
            "mean_shrinkage": None if m.mean_shrinkage is None else float(m.mean_shrinkage)}


def prepare_study(settings: StudySettings, *, draws: Optional[int] = None,
                  seed: Optional[int] = None) -> PreparedStudy:
    """Load the data, estimate the population, build the rules and the specs.

    Parameters
    ----------
    settings : StudySettings
    draws, seed : int, optional
        Command-line overrides of ``[resample] draws`` and ``seed``.

    Returns
    -------
    PreparedStudy
    """
    from estimators import estimate
    from simulate import ResampleSpec, population_moments

    settings = settings.with_overrides(draws=draws, seed=seed)
    log: list = []
    _stamp(log, f"study '{settings.name}' ({settings.path or 'text'})")
    if settings.resample is None and (draws is not None or seed is not None):
        _stamp(log, "note: --draws / --seed have no effect: the study has no [resample] section")
    history, assumptions, data_summary = _load_data(settings, log)
    if history is not None:
        assets = tuple(history.assets)
        ppy = int(history.periods_per_year)
        returns = np.ascontiguousarray(history.returns, dtype=np.float64)
    else:
        from estimators.core import PERIODS_PER_YEAR

        assets = tuple(assumptions.assets)
        ppy = int(PERIODS_PER_YEAR[assumptions.frequency])
        returns = None
    gamma = study_risk_aversion(settings)
    gamma_source = _risk_aversion_source(settings)
    rule_specs = _build_rules(settings, assets, ppy)
    _stamp(log, f"rules: {', '.join(rs.name for rs in rule_specs)}; scored with risk aversion "
                f"{gamma:g} ({gamma_source})")

    # in-sample allocations and the default estimate
    in_sample = {}
    est_cache = {}
    for rs in rule_specs:
        if returns is not None:
            key = rs.estimator_key()
            if key not in est_cache:
                est_cache[key] = estimate(returns, rs.mean, rs.covariance,
                                          params=dict(rs.params) or None)
            m = est_cache[key]
            alloc = rs.rule.weights(m.mean, m.covariance)
        else:
            m = None
            alloc = rs.rule.weights(assumptions.mean, assumptions.covariance)
        w = np.asarray(alloc.weights, dtype=np.float64)
        in_sample[rs.name] = {"weights": w, "cash": float(getattr(alloc, "cash", 0.0)),
                              "moments": m}
    e = settings.estimate
    estimate_summary = {"mean": e.mean, "covariance": e.covariance}
    if returns is not None:
        m0 = estimate(returns, e.mean, e.covariance, params=_estimator_params(settings) or None)
        estimate_summary.update(_moments_summary(m0))
    else:
        estimate_summary.update({"divisor": None, "shrinkage": None, "mean_shrinkage": None,
                                 "note": "capital-market assumptions are used as given"})

    # resampling spec
    spec, resample_skipped = None, None
    r = settings.resample
    if r is None:
        resample_skipped = "the study has no [resample] section"
    else:
        if returns is not None:
            mu, cov = population_moments(returns)
            source = ("the history's empirical distribution: sample mean and covariance with "
                      "divisor T")
            length = int(r.length) if r.length is not None else int(returns.shape[0])
        else:
            mu = np.asarray(assumptions.mean, dtype=np.float64)
            cov = np.asarray(assumptions.covariance, dtype=np.float64)
            source = "the capital-market assumptions"
            if r.length is None:
                raise SettingsError(f"{settings.path or 'study'}: [resample] length is needed "
                                    f"with capital-market assumptions (rows per synthetic "
                                    f"history, in {assumptions.frequency} periods)")
            length = int(r.length)
        sweep = []
        for y in r.sweep_years:
            t = int(round(float(y) * ppy))
            if t >= 2 and t not in sweep:
                sweep.append(t)
        spec = ResampleSpec(
            population_mean=mu, population_cov=cov, history=returns, assets=assets,
            rules=rule_specs, generator=r.generator, draws=int(r.draws), length=length,
            seed=int(r.seed), risk_aversion=gamma, degrees_of_freedom=r.degrees_of_freedom,
            block_length=r.block_length, block_size=int(r.block_size),
            keep_draws=bool(r.keep_draws), frontier_points=int(r.frontier_points),
            frontier_draws=int(r.frontier_draws), self_check_draws=int(r.self_check_draws),
            sweep_lengths=tuple(sweep), sweep_draws=r.sweep_draws,
            attribution=bool(r.attribution), hold_threshold=float(r.hold_threshold),
            draw=r.draw, periods_per_year=ppy, population_source=source,
            policy=settings.policy)
        from simulate.engine import _spec_iv

        _spec_iv(spec)
        spec = spec.resolved()
        _stamp(log, f"resampling: {spec.generator}, {spec.draws} draws of {spec.length} "
                    f"periods, seed {spec.seed}")

    # backtest inputs
    bt_inputs, bt_skipped = None, None
    b = settings.backtest
    if b is None:
        bt_skipped = "the study has no [backtest] section"
    elif history is None:
        bt_skipped = "capital-market assumptions have no history to backtest"
    elif history.n_periods < b.window + 3:
        bt_skipped = (f"the history has {history.n_periods} periods; a backtest window of "
                      f"{b.window} needs at least {b.window + 3} (3 out-of-sample periods)")
        _stamp(log, f"backtest skipped: {bt_skipped}")
    else:
        bt_inputs = _backtest_inputs(settings, history, rule_specs, gamma, ppy, log)
    return PreparedStudy(settings=settings, history=history, assumptions=assumptions,
                         assets=assets, periods_per_year=ppy, risk_aversion=gamma,
                         risk_aversion_source=gamma_source, rule_specs=rule_specs,
                         in_sample=in_sample, spec=spec, resample_skipped=resample_skipped,
                         backtest_inputs=bt_inputs, backtest_skipped=bt_skipped,
                         data_summary=data_summary, estimate_summary=estimate_summary, log=log)


def _backtest_inputs(settings, history, rule_specs, gamma, ppy, log) -> dict:
    b = settings.backtest
    assets = tuple(history.assets)
    if isinstance(b.cost_bps, dict):
        unknown = [a for a in b.cost_bps if a not in assets]
        if unknown:
            raise SettingsError(f"{settings.path or 'study'}: [backtest] cost_bps names unknown "
                                f"asset{'s' if len(unknown) > 1 else ''} "
                                f"{', '.join(map(repr, unknown))} (assets: {', '.join(assets)})")
        missing = [a for a in assets if a not in b.cost_bps]
        if missing:
            _stamp(log, f"note: [backtest] cost_bps gives no cost for {', '.join(missing)}: "
                        f"taken as 0")
        cost = np.array([float(b.cost_bps.get(a, 0.0)) for a in assets])
    else:
        cost = float(b.cost_bps)
    seed = b.seed if b.seed is not None else (settings.resample.seed if settings.resample
                                              else 0)
    return {"rule_specs": tuple(rs for rs in rule_specs if rs.name != "equal-weight"),
            "window": int(b.window), "expanding": bool(b.expanding),
            "rebalance_every": int(b.rebalance_every), "cost_bps": cost,
            "risk_aversion": gamma, "periods_per_year": ppy,
            "bootstrap_resamples": int(b.bootstrap_resamples),
            "bootstrap_block_length": b.bootstrap_block_length,
            "rolling_sharpe_window": b.rolling_sharpe_window, "seed": int(seed),
            "n_trials": None, "policy": settings.policy}


def _run_backtest(prepared: PreparedStudy, log: list):
    from backtest import BacktestConfig, run_backtest

    kw = dict(prepared.backtest_inputs)
    specs = kw.pop("rule_specs")
    configs = [BacktestConfig(rs.rule, rs.mean, rs.covariance, dict(rs.params)) for rs in specs]
    h = prepared.history
    t0 = time.perf_counter()
    res = run_backtest(h.returns, h.dates, tuple(h.assets), configs,
                       risk_free=None if getattr(h, "risk_free", None) is None else h.risk_free,
                       **kw)
    _stamp(log, f"backtest: {len(configs)} rules + 1/N, window {kw['window']}, "
                f"{time.perf_counter() - t0:.1f} s")
    return res


# --------------------------------------------------------------------------- summary

_DIVISORS = {"sample": "T-1", "sample-mle": "T"}


def _rule_summary(prepared: PreparedStudy, rs, res_rules: Optional[dict]) -> dict:
    ins = prepared.in_sample[rs.name]
    est = {"mean": rs.mean, "covariance": rs.covariance,
           "divisor": _DIVISORS.get(rs.covariance)}
    est.update(_moments_summary(ins["moments"]))
    if prepared.history is None:
        est["note"] = "in-sample allocation uses the capital-market assumptions as given"
    params = {k: (list(v) if isinstance(v, tuple) else v) for k, v in rs.rule.params.items()}
    out = {"type": rs.rule.type, "params": params, "estimator": est,
           "in_sample_weights": dict(zip(prepared.assets, map(float, ins["weights"]))),
           "in_sample_cash": float(ins["cash"])}
    if res_rules is not None and rs.name in res_rules:
        out.update(res_rules[rs.name])
        out["estimator"] = est
    return out


def _answer(decided, yes: str, no: str) -> str:
    """The verdict's word from the criteria that could be assessed (True/False each)."""
    if not decided:
        return "not assessed"
    if all(decided):
        return yes
    return "mixed" if any(decided) else no


def _verdict(prepared: PreparedStudy, summary: dict) -> dict:
    """The stated criteria of "does it survive input noise?" for the policy rule."""
    v = prepared.settings.verdict
    names = [rs.name for rs in prepared.rule_specs if rs.name != "equal-weight"]
    settings_out = {"max_band_width": v.max_band_width,
                    "min_prob_beats_equal_weight": v.min_prob_beats_equal_weight,
                    "significance": v.significance}
    if not names:
        return {"proposed": None, "rule": None, "answer": "not assessed",
                "reason": "the study has no rule besides 1/N", "criteria": [],
                "settings": settings_out, "criteria_passed": 0, "criteria_assessed": 0}
    held = prepared.settings.policy
    candidates = [n for n in names if n != held]
    if not candidates:
        return {"proposed": None, "rule": None, "policy": held, "answer": "not assessed",
                "reason": "the study has no rule besides 1/N and the policy", "criteria": [],
                "settings": settings_out, "criteria_passed": 0, "criteria_assessed": 0}
    policy = candidates[0]        # the proposal: the first rule that is not 1/N or the policy
    rule = summary["rules"].get(policy, {})
    criteria = []
    weights = rule.get("weights")
    if isinstance(weights, dict) and weights:
        widths = {a: (w["p95"] - w["p5"]) if w.get("p95") is not None and w.get("p5") is not None
                  else None for a, w in weights.items()}
        known = [x for x in widths.values() if x is not None]
        widest = max(known) if known else None
        criteria.append({"name": "weight_bands", "description":
                         f"widest 5-95% weight band at most {v.max_band_width:g}",
                         "value": widest, "threshold": v.max_band_width,
                         "passed": None if widest is None else bool(widest <= v.max_band_width)})
    pop = rule.get("population") or {}
    p = pop.get("prob_beats_equal_weight_ceq")
    if "population" in rule:
        criteria.append({"name": "prob_beats_equal_weight_ceq", "description":
                         f"share of draws beating 1/N on population CEQ at least "
                         f"{v.min_prob_beats_equal_weight:g}",
                         "value": p, "threshold": v.min_prob_beats_equal_weight,
                         "passed": None if p is None else bool(p >= v.min_prob_beats_equal_weight)})
    bt = rule.get("backtest") or {}
    pv = bt.get("sharpe_diff_p_lw")
    if bt:
        ew_sharpe = (summary["rules"].get("equal-weight", {}).get("backtest") or {}).get("sharpe")
        if pv is None:
            pv = bt.get("sharpe_diff_p_jkm")
        dsr = bt.get("dsr")
        better = (bt.get("sharpe") is not None and ew_sharpe is not None
                  and bt["sharpe"] > ew_sharpe)
        passed = None
        if pv is not None:
            passed = bool(better and pv <= v.significance
                          and (dsr is None or dsr >= 1.0 - v.significance))
        criteria.append({"name": "backtest_sharpe_vs_equal_weight", "description":
                         f"out-of-sample Sharpe ratio above 1/N's, difference p-value (Ledoit & "
                         f"Wolf 2008 bootstrap, else Jobson-Korkie-Memmel) at most "
                         f"{v.significance:g}, deflated Sharpe ratio at least "
                         f"{1.0 - v.significance:g}",
                         "value": pv, "threshold": v.significance, "dsr": dsr,
                         "passed": passed})
    decided = [c["passed"] for c in criteria if c["passed"] is not None]
    answer = _answer(decided, "survives", "does not survive")
    out = {"proposed": policy, "rule": policy, "answer": answer, "criteria": criteria,
           "settings": settings_out,
           "criteria_passed": sum(bool(x) for x in decided), "criteria_assessed": len(decided),
           "policy": held}
    if held is not None:
        out["against_policy"] = _verdict_policy(summary, policy, held, v)
    return out


def _verdict_policy(summary: dict, name: str, held: str, v) -> dict:
    """The same comparisons against the policy (the allocation held today), with the
    transition cost. Thresholds: those of the 1/N criteria."""
    rule = summary["rules"].get(name, {})
    criteria = []
    pop = rule.get("population") or {}
    if "population" in rule:
        p = pop.get("prob_beats_policy_ceq")
        criteria.append({"name": "prob_beats_policy_ceq", "description":
                         f"share of draws beating the policy on population CEQ at least "
                         f"{v.min_prob_beats_equal_weight:g}",
                         "value": p, "threshold": v.min_prob_beats_equal_weight,
                         "passed": None if p is None else bool(p >= v.min_prob_beats_equal_weight)})
    bt = rule.get("backtest") or {}
    if bt:
        pv = bt.get("sharpe_diff_policy_p_lw")
        if pv is None:
            pv = bt.get("sharpe_diff_policy_p_jkm")
        diff = bt.get("sharpe_diff_policy")
        passed = None
        if pv is not None and diff is not None:
            passed = bool(diff > 0 and pv <= v.significance)
        criteria.append({"name": "backtest_sharpe_vs_policy", "description":
                         f"out-of-sample Sharpe ratio above the policy's, difference p-value "
                         f"(Ledoit & Wolf 2008 bootstrap, else Jobson-Korkie-Memmel) at most "
                         f"{v.significance:g}", "value": pv, "threshold": v.significance,
                         "sharpe_diff": diff, "passed": passed})
    tr = rule.get("transition") or {}
    be = tr.get("break_even_periods")
    if tr:
        criteria.append({"name": "transition_pays_back", "description":
                         "the expected CEQ gain over the policy is positive, so the "
                         "transition cost is paid back after a finite number of periods",
                         "value": be, "basis": tr.get("break_even_basis"),
                         "passed": None if be is None else be != "never"})
    decided = [c["passed"] for c in criteria if c["passed"] is not None]
    answer = _answer(decided, "better than the policy", "not better than the policy")
    return {"policy": held, "proposed": name, "answer": answer, "criteria": criteria,
            "criteria_passed": sum(bool(x) for x in decided), "criteria_assessed": len(decided)}


def _transition(prepared: PreparedStudy, summary: dict) -> Optional[dict]:
    """Moving from the policy to each rule's in-sample allocation: turnover, its cost,
    the expected CEQ gain (in-sample and population) and the break-even horizon.

    Turnover is ``sum_i |w_i - p_i| + |cash_w - cash_p|`` (the cash leg counted when
    either side holds cash); the cost is ``sum_i cost_bps_i / 1e4 |w_i - p_i|`` (cash
    trades free, as in the backtest). The in-sample gain scores both allocations with
    the study's [estimate] moments, the population gain is the rule's mean population
    CEQ over the draws minus the policy's. Break-even periods = cost / gain, "never"
    when the gain is <= 0.
    """
    held = prepared.settings.policy
    if held is None:
        return None
    from estimators import estimate
    from optimise import tracking_error

    s = prepared.settings
    assets = prepared.assets
    n = len(assets)
    notes = []
    b = s.backtest
    if b is None:
        bps = np.zeros(n)
        bps_record = 0.0
        notes.append("the study has no [backtest] section, so its cost_bps is unknown: the "
                     "transition is costed at 0 bp")
    elif isinstance(b.cost_bps, dict):
        bps = np.array([float(b.cost_bps.get(a, 0.0)) for a in assets])
        bps_record = dict(zip(assets, map(float, bps)))
    else:
        bps = np.full(n, float(b.cost_bps))
        bps_record = float(b.cost_bps)
    if prepared.history is not None:
        e = s.estimate
        m = estimate(np.ascontiguousarray(prepared.history.returns, dtype=np.float64), e.mean,
                     e.covariance, params=_estimator_params(s) or None)
        mu, cov = np.asarray(m.mean), np.asarray(m.covariance)
        basis = f"the study's [estimate] moments ({e.mean} mean, {e.covariance} covariance)"
    else:
        mu = np.asarray(prepared.assumptions.mean)
        cov = np.asarray(prepared.assumptions.covariance)
        basis = "the capital-market assumptions"
    pop_cov = None if prepared.spec is None else np.asarray(prepared.spec.population_cov)
    gamma = prepared.risk_aversion
    ppy = prepared.periods_per_year
    p = prepared.in_sample[held]["weights"]
    pc = prepared.in_sample[held]["cash"]

    def ceq(w):
        return float(w @ mu - 0.5 * gamma * (w @ cov @ w))

    out = {}
    for rs in prepared.rule_specs:
        w = prepared.in_sample[rs.name]["weights"]
        c = prepared.in_sample[rs.name]["cash"]
        trade = np.abs(w - p)
        risky = float(trade.sum())
        turnover = risky + abs(c - pc)
        cost = float((bps / 1e4) @ trade)
        gain_in = ceq(w) - ceq(p)
        pop = (summary["rules"][rs.name].get("population") or {})
        gain_pop = pop.get("ceq_gain_vs_policy")
        entry = {"from": held, "turnover": turnover, "turnover_risky": risky,
                 "cash_change": float(c - pc), "cost": cost,
                 "ceq_gain_per_period_in_sample": gain_in,
                 "ceq_gain_per_period_in_sample_annualised": gain_in * ppy,
                 "ceq_gain_per_period_population": gain_pop,
                 "ceq_gain_per_period_population_annualised":
                     None if gain_pop is None else gain_pop * ppy,
                 "tracking_error_in_sample": tracking_error(w, p, cov),
                 "tracking_error_in_sample_annualised": tracking_error(w, p, cov) * math.sqrt(ppy)}
        if pop_cov is not None:
            te = tracking_error(w, p, pop_cov)
            entry["tracking_error_population"] = te
            entry["tracking_error_population_annualised"] = te * math.sqrt(ppy)
        if rs.name == held:
            entry.update({"ceq_gain_per_period": 0.0, "break_even_periods": None,
                          "break_even_periods_in_sample": None,
                          "break_even_periods_population": None, "break_even_years": None,
                          "break_even_basis": None, "note": "the policy itself: no move"})
            out[rs.name] = entry
            continue
        for key, g in (("in_sample", gain_in), ("population", gain_pop)):
            if g is None:
                entry[f"break_even_periods_{key}"] = None
            elif g <= 0:
                entry[f"break_even_periods_{key}"] = "never"
            else:
                entry[f"break_even_periods_{key}"] = cost / g
        basis_key = "population" if gain_pop is not None else "in_sample"
        entry["ceq_gain_per_period"] = gain_pop if gain_pop is not None else gain_in
        entry["break_even_basis"] = basis_key
        be = entry[f"break_even_periods_{basis_key}"]
        entry["break_even_periods"] = be
        entry["break_even_years"] = be / ppy if isinstance(be, float) else be
        out[rs.name] = entry
    meta = {"policy": held, "cost_bps": bps_record, "notes": notes,
            "in_sample_basis": basis, "risk_aversion": gamma,
            "convention": "turnover = sum |w - p| over assets plus |cash change|; cost = "
                          "sum cost_bps/1e4 |w_i - p_i| (cash trades free); break-even periods "
                          "= cost / expected CEQ gain per period (population gain when "
                          "resampling ran, else in-sample); 'never' when the gain is <= 0"}
    return {"rules": out, "meta": meta}



def _build_summary(prepared: PreparedStudy, result, bt, created: str) -> dict:
    s = prepared.settings
    res_summary = result.to_summary() if result is not None else None
    res_rules = res_summary["rules"] if res_summary else None
    summary = {
        "schema": SCHEMA,
        "study": {"name": s.name, "file": None if s.path is None else str(s.path),
                  "created": created},
        "units": "per period",
        "periods_per_year": prepared.periods_per_year,
        "data": prepared.data_summary,
        "estimate": prepared.estimate_summary,
        "risk_aversion": prepared.risk_aversion,
        "risk_aversion_source": prepared.risk_aversion_source,
        "policy": s.policy,
        "rules": {rs.name: _rule_summary(prepared, rs, res_rules) for rs in prepared.rule_specs},
    }
    if res_summary is not None:
        resample = dict(res_summary["resample"])
        resample["estimators"] = {name: summary["rules"][name]["estimator"]
                                  for name in summary["rules"]}
        summary["resample"] = resample
        for key in ("frontiers", "sweep", "attribution", "self_check"):
            summary[key] = res_summary[key]
    else:
        reason = prepared.resample_skipped or "resampling was not run"
        summary["resample"] = {"skipped": reason}
        for key in ("frontiers", "sweep", "attribution", "self_check"):
            summary[key] = {"skipped": reason}
    if bt is not None:
        kw = {k: v for k, v in prepared.backtest_inputs.items() if k != "rule_specs"}
        if isinstance(kw.get("cost_bps"), np.ndarray):
            kw["cost_bps"] = dict(zip(prepared.assets, map(float, kw["cost_bps"])))
        summary["backtest"] = {**kw, **_clean_json(bt.settings_summary())}
        for name, entry in bt.to_summary().items():
            if name in summary["rules"]:
                summary["rules"][name]["backtest"] = entry
    else:
        summary["backtest"] = {"skipped": prepared.backtest_skipped or "not run"}
    tr = _transition(prepared, summary)
    if tr is not None:
        summary["transition"] = tr["meta"]
        for name, entry in tr["rules"].items():
            summary["rules"][name]["transition"] = entry
    summary["verdict"] = _verdict(prepared, summary)
    summary["disclaimer"] = ("Simulated and backtested figures are hypothetical. Decision "
                             "support, not investment advice.")
    return _clean_json(summary)


def _clean_json(obj):
    """JSON-ready: numpy scalars to Python, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _clean_json(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean_json(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean_json(obj.tolist())
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        return x if math.isfinite(x) else None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def _versions() -> dict:
    from importlib import metadata

    out = {"python": platform.python_version()}
    for pkg in ("noiseproof", "numpy", "scipy", "pandas", "numba", "matplotlib", "reportlab",
                "tqdm", "pyarrow"):
        try:
            out[pkg] = metadata.version(pkg)
        except metadata.PackageNotFoundError:
            out[pkg] = None
    return out


def _reproduce_command(prepared: PreparedStudy, out: Path, argv) -> str:
    s = prepared.settings
    parts = ["noiseproof", "study", str(s.path) if s.path else "STUDY.toml"]
    if s.resample is not None:
        parts += ["--draws", str(s.resample.draws), "--seed", str(s.resample.seed)]
    parts += ["--out", str(out)]
    return " ".join(parts)


def _manifest(prepared: PreparedStudy, out: Path, argv, started: float, created: str) -> dict:
    s = prepared.settings
    return {
        "schema": SCHEMA,
        "created": created,
        "versions": _versions(),
        "platform": {"system": platform.system(), "release": platform.release(),
                     "machine": platform.machine(), "processor": platform.processor(),
                     "cpus": os.cpu_count(), "python": sys.version.split()[0]},
        "command": list(argv) if argv is not None else None,
        "reproduce": _reproduce_command(prepared, out, argv),
        "study_file": None if s.path is None else str(s.path),
        "study_text": s.text,
        "seed": None if s.resample is None else s.resample.seed,
        "draws": None if s.resample is None else s.resample.draws,
        "data_sha256": prepared.data_summary.get("sha256"),
        "study_sha256": hashlib.sha256(s.text.encode()).hexdigest(),
        "wall_time_seconds": round(time.perf_counter() - started, 3),
        "note": "the same study file, data, seed and draws give the same numbers whatever "
                "the number of workers or the block size",
    }


def _write_json(path: Path, obj) -> None:
    path.write_text(json.dumps(obj, indent=2, allow_nan=False) + "\n", encoding="utf-8")


def finish_study(prepared: PreparedStudy, resample_result, out, *, quiet: bool = False,
                 pack: bool = True, argv: Optional[Sequence[str]] = None,
                 started: Optional[float] = None) -> Path:
    """Run the backtest and write the run folder (then the pack unless ``pack=False``).

    Parameters
    ----------
    prepared : PreparedStudy
    resample_result : simulate.ResampleResult or None
    out : Path
        The run folder; built as a temporary sibling and renamed into place at the end.
    quiet : bool
        Unused here but accepted for symmetry with :func:`run_study`.
    pack : bool
        Build the evidence pack (``reports.build_pack``). When the pack fails, the run
        folder is still moved into place (its results are complete; log.txt says what
        failed) and the pack's error is raised afterwards.
    argv : sequence of str, optional
        The command line, recorded in manifest.json.
    started : float, optional
        ``time.perf_counter()`` at the start, for the wall time.

    Returns
    -------
    Path
        The run folder.
    """
    started = time.perf_counter() if started is None else started
    out = Path(out).resolve()
    log = list(prepared.log)
    created = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    bt = _run_backtest(prepared, log) if prepared.backtest_inputs is not None else None
    if bt is None:
        _stamp(log, f"backtest skipped: {prepared.backtest_skipped}")
    if resample_result is None:
        _stamp(log, f"resampling skipped: {prepared.resample_skipped}")
    summary = _build_summary(prepared, resample_result, bt, created)
    tables = {}
    if resample_result is not None:
        tables.update(resample_result.tables())
        sc = summary.get("self_check", {})
        if "standardised_difference" in sc:
            _stamp(log, f"self-check (Kan & Zhou 2007): closed form "
                        f"{sc['expected_utility_closed_form']:.6g}, engine "
                        f"{sc['expected_utility_monte_carlo']:.6g} (se {sc['monte_carlo_se']:.2g},"
                        f" z = {sc['standardised_difference']:+.2f})")
    tables["in_sample_weights"] = _in_sample_table(prepared)
    if bt is not None:
        tables.update(bt.tables())

    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.parent / f".{out.name}.partial-{os.getpid()}"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    try:
        (tmp / "tables").mkdir()
        for name, frame in tables.items():
            frame.to_csv(tmp / "tables" / f"{name}.csv", index=_keeps_index(frame))
        if resample_result is not None and resample_result.draw_arrays() is not None:
            np.savez_compressed(tmp / "draws.npz", **resample_result.draw_arrays())
            _stamp(log, "per-draw weights written to draws.npz")
        _write_json(tmp / "summary.json", summary)
        _stamp(log, f"wrote summary.json, {len(tables)} tables")
        _write_json(tmp / "manifest.json", _manifest(prepared, out, argv, started, created))
        (tmp / "log.txt").write_text("\n".join(log) + "\n", encoding="utf-8")
        pack_error = None
        pack_started = time.perf_counter()
        if pack:
            try:
                _stamp(log, _build_pack(tmp))
            except Exception as exc:      # the results stand; the pack failure is reported
                pack_error = exc
                shutil.rmtree(tmp / "pack", ignore_errors=True)
                _stamp(log, f"pack failed ({exc.__class__.__name__}): "
                            f"{' '.join(str(exc).split())}; the run folder is complete without it")
        # wall_time_seconds (computing) was written before the pack, which prints it;
        # the pack's own time is added beside it so the two files never disagree
        manifest = json.loads((tmp / "manifest.json").read_text())
        manifest["pack_wall_time_seconds"] = (round(time.perf_counter() - pack_started, 3)
                                              if pack else None)
        _write_json(tmp / "manifest.json", manifest)
        _stamp(log, f"done in {time.perf_counter() - started:.1f} s")
        (tmp / "log.txt").write_text("\n".join(log) + "\n", encoding="utf-8")
        _move_into_place(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if pack_error is not None:
        # the run folder is in place; the pack's own error is raised after it
        raise pack_error
    return out


def _keeps_index(frame) -> bool:
    import pandas as pd

    return not isinstance(frame.index, pd.RangeIndex)


def _in_sample_table(prepared: PreparedStudy):
    import pandas as pd

    rows = []
    for rs in prepared.rule_specs:
        ins = prepared.in_sample[rs.name]
        for a, w in zip(prepared.assets, ins["weights"]):
            rows.append({"rule": rs.name, "asset": a, "weight": float(w)})
        rows.append({"rule": rs.name, "asset": "cash", "weight": float(ins["cash"])})
    return pd.DataFrame(rows)


def _build_pack(run_dir: Path) -> str:
    try:
        from reports import build_pack
    except ImportError:
        return "pack skipped: the reports package is not available in this installation"
    res = build_pack(run_dir)
    names = [Path(p).name for p in (getattr(res, "html", None), getattr(res, "pdf", None)) if p]
    return f"pack written: {', '.join('pack/' + n for n in names) or 'pack/'}"


def _move_into_place(tmp: Path, out: Path) -> None:
    if out.exists():
        old = out.parent / f".{out.name}.old-{os.getpid()}"
        os.replace(out, old)
        try:
            os.replace(tmp, out)
        except BaseException:
            os.replace(old, out)
            raise
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, out)


def run_study(settings: StudySettings, out, *, workers: int = 1, quiet: bool = False,
              pack: bool = True, argv: Optional[Sequence[str]] = None,
              draws: Optional[int] = None, seed: Optional[int] = None) -> Path:
    """prepare_study + simulate.run_resampling + finish_study; returns the run folder."""
    from simulate import block_plan, run_resampling

    started = time.perf_counter()
    prepared = prepare_study(settings, draws=draws, seed=seed)
    result = None
    if prepared.spec is not None:
        total = sum(b.stop - b.start for b in block_plan(prepared.spec))
        bar = _progress_bar(total, quiet)
        t0 = time.perf_counter()
        try:
            result = run_resampling(prepared.spec, workers=workers,
                                    progress=None if bar is None else bar.update)
        finally:
            if bar is not None:
                bar.close()
        _stamp(prepared.log, f"resampling finished: {total} draws (all parts) on {workers} "
                             f"worker{'s' if workers != 1 else ''} in "
                             f"{time.perf_counter() - t0:.1f} s")
    return finish_study(prepared, result, out, quiet=quiet, pack=pack, argv=argv,
                        started=started)


def _progress_bar(total: int, quiet: bool):
    if quiet or not sys.stderr.isatty():
        return None
    try:
        from tqdm import tqdm
    except ImportError:  # pragma: no cover
        return None
    return tqdm(total=total, unit="draw", desc="resampling", file=sys.stderr, leave=False)
