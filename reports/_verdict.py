"""The verdict: does the proposed allocation survive input noise?

Three stated criteria, each read from the run's summary (nothing is recomputed):

1. Weight stability: the widest 5-95 percentile band of the proposed rule's weights, over
   all assets, is at most ``max_band_width``.
2. Beats 1/N under the population: the share of draws in which the proposed rule's
   population certainty-equivalent return (CEQ) beats 1/N's is at least
   ``min_prob_beats_equal_weight``.
3. Out-of-sample: in the backtest the proposed rule's Sharpe ratio is above 1/N's, the
   difference's p-value is at most ``significance`` (Ledoit-Wolf bootstrap p-value; the
   Jobson-Korkie-Memmel p-value when the bootstrap one is absent), and the deflated Sharpe
   ratio, which accounts for the number of configurations tried, is at least
   ``1 - significance``.

A criterion whose inputs are absent (resampling or backtest skipped) is "not assessed" and
says why; it neither passes nor fails.

When the study names a policy (the allocation held today, top-level ``policy``), the
proposal is the first rule that is neither 1/N nor the policy, and the verdict also answers
"is it better than the policy?" with the same thresholds: the share of draws beating the
policy on population CEQ, the backtest Sharpe difference against the policy and its
p-value, and whether the expected CEQ gain pays for the transition cost in a finite number
of periods (see ``_against_policy``).
"""
from __future__ import annotations

import tomllib
from dataclasses import dataclass
from typing import Optional

from ._model import Cell, cell, fmt_value
from ._run import RunFolder, as_float, dig

__all__ = ["DEFAULTS", "Criterion", "Verdict", "verdict_settings", "proposed_rule", "policy_rule",
           "evaluate"]

#: Defaults of the study file's ``[verdict]`` table (kept equal to
#: ``noiseproof.studyfile.VerdictSettings``; a test checks it).
DEFAULTS = {"max_band_width": 0.25, "min_prob_beats_equal_weight": 0.5, "significance": 0.05}

EQUAL_WEIGHT = "equal-weight"


def _study_verdict_table(run: RunFolder) -> Optional[dict]:
    """The ``[verdict]`` table of the study text in the manifest ({} when absent; None when
    the manifest has no readable study text)."""
    text = dig(run.manifest, "study_text") or dig(run.manifest, "study", "text")
    if not isinstance(text, str):
        return None
    try:
        table = tomllib.loads(text).get("verdict", {})
    except tomllib.TOMLDecodeError:
        return None
    return table if isinstance(table, dict) else {}


def verdict_settings(run: RunFolder) -> tuple[dict, dict]:
    """Thresholds and, per key, where each came from.

    Values: the run summary's ``verdict.settings`` (or ``verdict_settings``) first, then the
    study text's ``[verdict]`` table, then :data:`DEFAULTS`. Source: "study file" when the
    study text sets the key, "default" when it does not (or nothing sets it), "run summary"
    when only the summary holds it and no study text is at hand.
    """
    found: dict = {}
    for candidate in (dig(run.summary, "verdict", "settings"), dig(run.summary, "verdict_settings"),
                      dig(run.summary, "verdict")):
        if isinstance(candidate, dict):
            for key in DEFAULTS:
                x = as_float(candidate.get(key))
                if x is not None and key not in found:
                    found[key] = x
    table = _study_verdict_table(run)
    settings, sources = {}, {}
    for key, default in DEFAULTS.items():
        in_study = table is not None and as_float(table.get(key)) is not None
        if key in found:
            settings[key] = found[key]
        elif in_study:
            settings[key] = as_float(table[key])
        else:
            settings[key] = default
        if in_study:
            sources[key] = "study file"
        elif key in found and table is None:
            sources[key] = "run summary"
        else:
            sources[key] = "default"
    return settings, sources


def policy_rule(run: RunFolder) -> Optional[str]:
    """The allocation held today: the rule the study names with the top-level ``policy``
    key (from the summary, else the study text in the manifest), or None."""
    rules = run.rules
    for candidate in (dig(run.summary, "policy"), dig(run.summary, "study", "policy"),
                      dig(run.summary, "verdict", "policy")):
        if isinstance(candidate, str) and candidate in rules:
            return candidate
    text = dig(run.manifest, "study_text") or dig(run.manifest, "study", "text")
    if isinstance(text, str):
        try:
            policy = tomllib.loads(text).get("policy")
        except tomllib.TOMLDecodeError:
            policy = None
        if isinstance(policy, str) and policy in rules:
            return policy
    return None


def proposed_rule(run: RunFolder) -> Optional[str]:
    """The rule the verdict is about: the summary's ``verdict.proposed``, else the first
    rule that is neither 1/N nor the policy (the allocation held today)."""
    rules = run.rules
    held = policy_rule(run)
    candidate = dig(run.summary, "verdict", "proposed")
    if isinstance(candidate, str) and candidate in rules and candidate != held:
        return candidate
    for name, rule in rules.items():
        if name != EQUAL_WEIGHT and rule.get("type") != EQUAL_WEIGHT and name != held:
            return name
    return None


@dataclass(frozen=True)
class Criterion:
    """One verdict row: what is measured, the measured number, the threshold, the result."""

    number: str
    label: str
    measured: Cell
    threshold: str
    status: str          # "pass" | "fail" | "na"
    note: str = ""


@dataclass(frozen=True)
class Verdict:
    proposed: Optional[str]
    settings: dict
    sources: dict
    criteria: tuple      # of Criterion
    groups: tuple        # ((title, status, reason, finding), ...) one per stated criterion
    answer: str
    status: str          # "pass" | "fail" | "open"
    policy: Optional[str] = None
    policy_criteria: tuple = ()   # of Criterion: the same questions against the policy
    policy_answer: str = ""
    policy_status: str = "open"


def _status(ok: Optional[bool]) -> str:
    return "na" if ok is None else ("pass" if ok else "fail")


def _skipped(section) -> Optional[str]:
    if isinstance(section, dict) and "skipped" in section:
        return str(section["skipped"])
    return None


def evaluate(run: RunFolder) -> Verdict:
    """Evaluate the stated criteria for the proposed rule."""
    settings, sources = verdict_settings(run)
    name = proposed_rule(run)
    rows = []
    groups = []
    band_max = settings["max_band_width"]
    prob_min = settings["min_prob_beats_equal_weight"]
    alpha = settings["significance"]
    if name is None:
        answer = ("Not assessed: the study has no rule other than 1/N, so there is no proposed "
                  "allocation to judge.")
        return Verdict(None, settings, sources, (), (), answer, "open")

    rule = run.rules[name]
    resample_skip = _skipped(dig(run.summary, "resample"))
    backtest_skip = _skipped(dig(run.summary, "backtest"))

    # 1. weight bands
    c = cell(run, ("rules", name, "weights"), op="max_band", fmt="pct1")
    widest = None
    if c.value is not None:
        widths = {a: as_float(dig(w, "p95")) - as_float(dig(w, "p5")) for a, w in rule["weights"].items()}
        widest = max(widths, key=widths.get)
    ok = None if c.value is None else c.value <= band_max + 1e-12
    why = resample_skip or ("" if c.value is not None else "the run has no per-asset weight bands")
    rows.append(Criterion("1", "Widest 5-95 percentile weight band over assets"
                          + (f" ({widest})" if widest else ""), c,
                          f"at most {fmt_value(band_max, 'pct1')}", _status(ok), why))
    if ok is None:
        said = f"weight stability could not be assessed ({why})"
    elif ok:
        said = (f"its weights are stable: the widest 5-95 band is {c.text}, within the "
                f"{fmt_value(band_max, 'pct1')} limit")
    else:
        said = (f"its weights are unstable: the widest 5-95 band is {c.text} ({widest}), above "
                f"the {fmt_value(band_max, 'pct1')} limit")
    groups.append(("weight bands narrow", _status(ok), why, said))

    # 2. probability of beating 1/N on population CEQ
    c = cell(run, ("rules", name, "population", "prob_beats_equal_weight_ceq"), fmt="pct1")
    ok = None if c.value is None else c.value >= prob_min - 1e-12
    why = resample_skip or ("" if c.value is not None else "the run has no population CEQ comparison")
    rows.append(Criterion("2", "Share of draws beating 1/N on population CEQ", c,
                          f"at least {fmt_value(prob_min, 'pct1')}", _status(ok), why))
    if ok is None:
        said = f"the comparison with 1/N under the population could not be assessed ({why})"
    elif ok:
        said = (f"it beats 1/N on population CEQ in {c.text} of draws (at least "
                f"{fmt_value(prob_min, 'pct1')} required)")
    else:
        said = (f"it beats 1/N on population CEQ in only {c.text} of draws (at least "
                f"{fmt_value(prob_min, 'pct1')} required)")
    groups.append(("beats 1/N under the population", _status(ok), why, said))

    # 3. backtest: ahead of 1/N, significant, survives deflation
    bt = dig(rule, "backtest")
    bt_skip = backtest_skip or _skipped(bt)
    if as_float(dig(bt, "sharpe_diff")) is not None:
        diff = cell(run, ("rules", name, "backtest", "sharpe_diff"), op="ann_sharpe", fmt="snum3")
    else:
        diff = cell(run, ("rules", name, "backtest", "sharpe"), ("rules", EQUAL_WEIGHT, "backtest", "sharpe"),
                    op="ann_sharpe_diff", fmt="snum3")
    p_key = "sharpe_diff_p_lw" if as_float(dig(bt, "sharpe_diff_p_lw")) is not None else "sharpe_diff_p_jkm"
    p_label = "Ledoit-Wolf bootstrap" if p_key == "sharpe_diff_p_lw" else "Jobson-Korkie-Memmel"
    pc = cell(run, ("rules", name, "backtest", p_key), fmt="pval")
    dsr = cell(run, ("rules", name, "backtest", "dsr"), fmt="num3")
    oks = [None if diff.value is None else diff.value > 0,
           None if pc.value is None else pc.value <= alpha + 1e-12,
           None if dsr.value is None else dsr.value >= 1 - alpha - 1e-12]
    why = bt_skip or ""
    if not why and any(o is None for o in oks):
        why = "the backtest results lack some of these figures"
    rows.append(Criterion("3a", "Backtest Sharpe ratio minus 1/N's (annualised)", diff,
                          "above 0", _status(oks[0]), why))
    rows.append(Criterion("3b", f"p-value of that difference ({p_label})", pc,
                          f"at most {fmt_value(alpha, 'num3')}", _status(oks[1]), why))
    rows.append(Criterion("3c", "Deflated Sharpe ratio (for the configurations tried)", dsr,
                          f"at least {fmt_value(1 - alpha, 'num3')}", _status(oks[2]), why))
    if any(o is False for o in oks):
        g3 = "fail"
    elif any(o is None for o in oks):
        g3 = "na"
    else:
        g3 = "pass"
    if g3 == "na":
        said = f"the out-of-sample test could not be assessed ({why})"
    else:
        nums = (f"Sharpe difference {diff.text} annualised, p = {pc.text}, deflated Sharpe "
                f"ratio {dsr.text}")
        said = ("its out-of-sample Sharpe advantage over 1/N is significant after deflation ("
                if g3 == "pass" else
                "its out-of-sample Sharpe ratio is not significantly above 1/N's after deflation (") \
            + nums + ")"
    groups.append(("significantly ahead of 1/N out of sample after deflation", g3, why, said))

    failed = [g for g in groups if g[1] == "fail"]
    open_ = [g for g in groups if g[1] == "na"]
    findings = "; ".join(g[3] for g in groups)
    if failed:
        status = "fail"
        head = (f"No. The proposed allocation ('{name}') fails {len(failed)} of the "
                f"{len(groups)} stated criteria")
    elif open_:
        status = "open"
        head = (f"Not established. The proposed allocation ('{name}') passes every criterion "
                f"that could be assessed, but {len(open_)} of {len(groups)} could not be")
    else:
        status = "pass"
        head = f"Yes. The proposed allocation ('{name}') passes all {len(groups)} stated criteria"
    answer = f"{head}: {findings}."
    held = policy_rule(run)
    if held is None:
        return Verdict(name, settings, sources, tuple(rows), tuple(groups), answer, status)
    prow, panswer, pstatus = _against_policy(run, name, held, settings, resample_skip,
                                             backtest_skip)
    return Verdict(name, settings, sources, tuple(rows), tuple(groups), answer, status,
                   held, prow, panswer, pstatus)


def _against_policy(run: RunFolder, name: str, held: str, settings: dict, resample_skip,
                    backtest_skip):
    """Is the proposal better than the policy held today, once the move is paid for?

    1. the share of draws in which the proposal beats the policy on population CEQ is at
       least ``min_prob_beats_equal_weight`` (the same threshold as against 1/N);
    2. its backtest Sharpe ratio is above the policy's with a difference p-value at most
       ``significance`` (Ledoit-Wolf bootstrap, else Jobson-Korkie-Memmel);
    3. the expected CEQ gain over the policy pays back the transition cost in a finite
       number of periods (break-even horizon from the summary's ``transition``).
    """
    rows, groups = [], []
    prob_min = settings["min_prob_beats_equal_weight"]
    alpha = settings["significance"]
    rule = run.rules[name]
    c = cell(run, ("rules", name, "population", "prob_beats_policy_ceq"), fmt="pct1")
    ok = None if c.value is None else c.value >= prob_min - 1e-12
    why = resample_skip or ("" if c.value is not None else "the run has no comparison with the policy under the population")
    rows.append(Criterion("P1", f"Share of draws beating the policy ('{held}') on population CEQ", c,
                          f"at least {fmt_value(prob_min, 'pct1')}", _status(ok), why))
    if ok is None:
        groups.append(("na", f"the comparison with the policy under the population could not be assessed ({why})"))
    else:
        groups.append((_status(ok), f"it beats the policy on population CEQ in {c.text} of draws "
                                    f"(at least {fmt_value(prob_min, 'pct1')} required)"))
    bt = dig(rule, "backtest")
    bt_skip = backtest_skip or _skipped(bt)
    diff = cell(run, ("rules", name, "backtest", "sharpe_diff_policy"), op="ann_sharpe", fmt="snum3")
    p_key = ("sharpe_diff_policy_p_lw" if as_float(dig(bt, "sharpe_diff_policy_p_lw")) is not None
             else "sharpe_diff_policy_p_jkm")
    p_label = "Ledoit-Wolf bootstrap" if p_key.endswith("lw") else "Jobson-Korkie-Memmel"
    pc = cell(run, ("rules", name, "backtest", p_key), fmt="pval")
    oks = [None if diff.value is None else diff.value > 0,
           None if pc.value is None else pc.value <= alpha + 1e-12]
    why = bt_skip or ("" if all(o is not None for o in oks)
                      else "the backtest has no comparison with the policy")
    rows.append(Criterion("P2a", "Backtest Sharpe ratio minus the policy's (annualised)", diff,
                          "above 0", _status(oks[0]), why))
    rows.append(Criterion("P2b", f"p-value of that difference ({p_label})", pc,
                          f"at most {fmt_value(alpha, 'num3')}", _status(oks[1]), why))
    if any(o is None for o in oks):
        groups.append(("na", f"the out-of-sample comparison with the policy could not be assessed ({why})"))
    elif all(oks):
        groups.append(("pass", f"out of sample its Sharpe ratio is significantly above the policy's "
                               f"({diff.text} annualised, p = {pc.text})"))
    else:
        groups.append(("fail", f"out of sample its Sharpe ratio is not significantly above the "
                               f"policy's ({diff.text} annualised, p = {pc.text})"))
    T = ("rules", name, "transition")
    tr = dig(rule, "transition")
    be_raw = dig(tr, "break_even_periods")
    cost = cell(run, T + ("cost",), fmt="bp1")
    turn = cell(run, T + ("turnover",), fmt="pct1")
    gain = cell(run, T + ("ceq_gain_per_period",), fmt="bp1")
    if be_raw == "never":
        measured = Cell(text="never", value=None)
        ok = False
    else:
        measured = cell(run, T + ("break_even_periods",), fmt="num1")
        ok = None if measured.value is None else True
    why = "" if ok is not None else "the run has no transition cost (no policy in the study)"
    basis = dig(tr, "break_even_basis")
    basis_text = {"population": "population", "in_sample": "in-sample"}.get(basis, "expected")
    rows.append(Criterion("P3", f"Periods of {basis_text} CEQ gain that pay for the move "
                          f"(turnover {turn.text}, cost {cost.text})", measured,
                          "finite (gain above 0)", _status(ok), why))
    if ok is None:
        groups.append(("na", f"the transition cost could not be weighed ({why})"))
    elif ok:
        groups.append(("pass", f"moving costs {cost.text} of wealth (turnover {turn.text}) and the "
                               f"{basis_text} CEQ gain of {gain.text} a period pays for it in "
                               f"{measured.text} periods"))
    else:
        groups.append(("fail", f"moving costs {cost.text} of wealth (turnover {turn.text}) and the "
                               f"{basis_text} CEQ gain of {gain.text} a period never pays for it"))
    failed = [g for g in groups if g[0] == "fail"]
    open_ = [g for g in groups if g[0] == "na"]
    findings = "; ".join(g[1] for g in groups)
    if failed:
        status = "fail"
        head = (f"No. Against the policy held today ('{held}'), the proposed allocation ('{name}') "
                f"fails {len(failed)} of {len(groups)} criteria")
    elif open_:
        status = "open"
        head = (f"Not established. Against the policy held today ('{held}'), the proposed "
                f"allocation ('{name}') passes every criterion that could be assessed, but "
                f"{len(open_)} of {len(groups)} could not be")
    else:
        status = "pass"
        head = (f"Yes. Against the policy held today ('{held}'), the proposed allocation "
                f"('{name}') passes all {len(groups)} criteria")
    return tuple(rows), f"{head}: {findings}.", status
