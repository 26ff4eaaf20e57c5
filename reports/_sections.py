"""Build the pack's ten sections from a finished run folder (read only, nothing recomputed).

Every number a table prints is a traced :class:`~reports._model.Cell`; figures carry the
exact numbers they draw. A section whose results are absent still appears and says why.
"""
from __future__ import annotations

import json
import math
from typing import Optional

import numpy as np
import pandas as pd

from . import _figures as F
from . import _style as S
from ._model import Cell, Figure, Para, Section, Table, cell, fmt_value, text_cell
from ._run import RunFolder, as_float, dig
from ._verdict import EQUAL_WEIGHT, Verdict, evaluate

__all__ = ["build_sections", "SECTION_TITLES"]

SECTION_TITLES = (
    ("verdict", "Verdict"),
    ("inputs", "Inputs and assumptions"),
    ("stability", "Weight stability"),
    ("frontiers", "Frontiers"),
    ("cost", "Cost of estimation error"),
    ("history", "How much history would it need"),
    ("backtest", "Out-of-sample backtest"),
    ("selfcheck", "Engine self-check"),
    ("notes", "Method notes and cautions"),
    ("reproducibility", "Reproducibility"),
)

SIMULATED = ("Hypothetical: simulated results. Figures below come from synthetic histories drawn "
             "from an estimated population, not from realised returns.")
BACKTESTED = ("Hypothetical: backtested results. Rules are applied to past data with hindsight "
              "about which rules to test; they are not the record of a live portfolio.")


# ----------------------------------------------------------------------------- helpers

def _skip_reason(run: RunFolder, key: str) -> Optional[str]:
    node = dig(run.summary, key)
    if isinstance(node, dict) and "skipped" in node:
        return str(node["skipped"])
    if node is None:
        return None
    return None


def _rule_order(run: RunFolder) -> list:
    """Rule names in study order with 1/N last."""
    names = [n for n in run.rules if n != EQUAL_WEIGHT]
    if EQUAL_WEIGHT in run.rules:
        names.append(EQUAL_WEIGHT)
    return names


def _colours(run: RunFolder) -> dict:
    out = {}
    i = 0
    for name in _rule_order(run):
        out[name] = S.rule_colour(i, name)
        if name != EQUAL_WEIGHT:
            i += 1
    return out


def _styles(run: RunFolder) -> dict:
    out = {}
    i = 0
    for name in _rule_order(run):
        if name == EQUAL_WEIGHT:
            out[name] = ((0, (4, 2)), "*")
        else:
            out[name] = (S.LINESTYLES[i % len(S.LINESTYLES)], S.MARKERS[i % len(S.MARKERS)])
            i += 1
    return out


def _averaged_path(run: RunFolder, name: str, asset: str) -> tuple:
    """Where a rule's resampled (averaged) weight of ``asset`` lives in the summary."""
    if isinstance(dig(run.rules[name], "resampled_allocation", "weights"), dict):
        return ("rules", name, "resampled_allocation", "weights", asset)
    return ("rules", name, "weights", asset, "mean")


def _label(name: str) -> str:
    return "1/N (equal-weight)" if name == EQUAL_WEIGHT else name


def _fig(key: str, caption: str, made, alt: str = "") -> Figure:
    png, w, h, data = made
    return Figure(key=key, caption=caption, png=png, width_in=w, height_in=h, data=data,
                  alt=alt or caption)


def _kv_table(key: str, caption: str, items: list, note: str = "") -> Table:
    rows = tuple((text_cell(label), value if isinstance(value, Cell) else text_cell(value))
                 for label, value in items)
    return Table(key=key, caption=caption, columns=("Item", "Value"), rows=rows, note=note)


def _bound_text(b) -> str:
    try:
        lo, hi = (float(x) for x in b)
    except (TypeError, ValueError):
        return json.dumps(b)
    return f"{fmt_value(lo, 'pct1')} to {fmt_value(hi, 'pct1')}"


def _fmt_params(params) -> str:
    if not isinstance(params, dict) or not params:
        return "defaults"
    parts = []
    for k, v in params.items():
        if k == "bounds" and isinstance(v, dict):
            parts.append("bounds: " + "; ".join(f"{a} {_bound_text(b)}" for a, b in v.items()))
            continue
        if k == "groups" and isinstance(v, dict):
            for g, spec in v.items():
                if isinstance(spec, dict):
                    members = ", ".join(map(str, spec.get("assets", [])))
                    parts.append(f"group {g} ({members}): {_bound_text(spec.get('bounds'))}")
                else:
                    parts.append(f"group {g}: {json.dumps(spec)}")
            continue
        if isinstance(v, dict):
            v = json.dumps(v, separators=(", ", ": "))
        elif isinstance(v, bool):
            v = "true" if v else "false"
        parts.append(f"{k} = {v}")
    return "; ".join(parts)


def _absent(reason: str) -> Para:
    reason = reason.rstrip()
    return Para(f"Not available in this run: {reason}{'' if reason.endswith('.') else '.'}", "absent")


# ----------------------------------------------------------------------------- 1 verdict

def _verdict_section(run: RunFolder, v: Verdict) -> Section:
    blocks = []
    style = {"pass": "answer-pass", "fail": "answer-fail", "open": "answer-open"}[v.status]
    blocks.append(Para("Does the proposed allocation survive input noise?", "lead"))
    blocks.append(Para(v.answer, style))
    rows = []
    for c in v.criteria:
        result = {"pass": "PASS", "fail": "FAIL", "na": "NOT ASSESSED"}[c.status]
        rows.append((text_cell(c.number), text_cell(c.label), c.measured, text_cell(c.threshold),
                     text_cell(result, status=c.status)))
    if rows:
        notes = sorted({c.note for c in v.criteria if c.note})
        src = ", ".join(f"{k} = {fmt_value(v.settings[k], 'num3')} ({v.sources[k]})"
                        for k in v.settings)
        blocks.append(Table(
            key="verdict_criteria", caption="Stated criteria, measured numbers and results",
            columns=("#", "Criterion", "Measured", "Threshold", "Result"), rows=tuple(rows),
            note=("Thresholds from the study's [verdict] settings: " + src + ". "
                  + (" ".join(f"Not assessed because {n}." for n in notes) if notes else "")),
            first_column_is_label=False))
    if v.proposed is not None:
        blocks.append(_allocation_table(run, v.proposed))
    if v.policy is not None:
        pstyle = {"pass": "answer-pass", "fail": "answer-fail", "open": "answer-open"}[v.policy_status]
        blocks.append(Para(f"Is it better than the portfolio held today (the policy, "
                           f"'{v.policy}'), once the move is paid for?", "lead"))
        blocks.append(Para(v.policy_answer, pstyle))
        prow = []
        for c in v.policy_criteria:
            result = {"pass": "PASS", "fail": "FAIL", "na": "NOT ASSESSED"}[c.status]
            prow.append((text_cell(c.number), text_cell(c.label), c.measured, text_cell(c.threshold),
                         text_cell(result, status=c.status)))
        notes = sorted({c.note for c in v.policy_criteria if c.note})
        blocks.append(Table(
            key="verdict_policy_criteria",
            caption="The same questions against the policy, with the cost of moving",
            columns=("#", "Criterion", "Measured", "Threshold", "Result"), rows=tuple(prow),
            note=("Thresholds as for 1/N (min_prob_beats_equal_weight, significance). "
                  + (" ".join(f"Not assessed because {n}." for n in notes) if notes else "")),
            first_column_is_label=False))
        t = _transition_table(run, v.policy)
        if t is not None:
            blocks.append(t)
    blocks.append(Para("All simulated and backtested figures in this pack are hypothetical. The pack "
                       "is decision support, not investment advice; see section 9.", "note"))
    return Section(1, "verdict", "Verdict", tuple(blocks), hypothetical=True)


def _transition_table(run: RunFolder, held: str) -> Optional[Table]:
    """Moving from the policy to each rule's in-sample allocation (summary ``transition``)."""
    rows = []
    for n in _rule_order(run):
        if n == held or not isinstance(dig(run.rules[n], "transition"), dict):
            continue
        T = ("rules", n, "transition")
        be = dig(run.rules[n], "transition", "break_even_periods")
        be_cell = (text_cell("never") if be == "never"
                   else cell(run, T + ("break_even_periods",), fmt="num1"))
        te_key = ("tracking_error_population" if as_float(dig(run.rules[n], "transition",
                                                              "tracking_error_population")) is not None
                  else "tracking_error_in_sample")
        rows.append((text_cell(_label(n)),
                     cell(run, T + ("turnover",), fmt="pct1"),
                     cell(run, T + ("cost",), fmt="bp1"),
                     cell(run, T + ("ceq_gain_per_period_in_sample",), op="ann_mean", fmt="pct2"),
                     cell(run, T + ("ceq_gain_per_period_population",), op="ann_mean", fmt="pct2"),
                     be_cell,
                     cell(run, T + (te_key,), op="ann_vol", fmt="pct2")))
    if not rows:
        return None
    notes = dig(run.summary, "transition", "notes") or []
    bps = dig(run.summary, "transition", "cost_bps")
    bps_text = (f"{fmt_value(as_float(bps), 'num1')} bp" if as_float(bps) is not None
                else "per-asset basis points (see the backtest settings)")
    return Table(
        key="verdict_transition",
        caption=f"Cost of moving from the policy ('{held}') to each rule, beside the expected gain",
        columns=("Rule", "Turnover", "Cost", "CEQ gain in-sample (ann.)",
                 "CEQ gain population (ann.)", "Break-even (periods)", "Tracking error (ann.)"),
        rows=tuple(rows),
        note=("Turnover: sum of |rule weight - policy weight| over assets, plus the change in cash. "
              f"Cost: turnover of the risky assets at {bps_text} (cash trades free), as a share of "
              "wealth. CEQ gain: the rule's CEQ minus the policy's, in-sample under the study's "
              "estimates and in the population as the mean over the synthetic histories. "
              "Break-even: cost divided by the expected gain per period (population when "
              "resampling ran, else in-sample); 'never' when the gain is not positive. Tracking "
              "error: sqrt((w - p)' Sigma (w - p)) of the in-sample allocation under the population "
              "covariance (else the estimated one), annualised. " + " ".join(notes)))


def _allocation_table(run: RunFolder, name: str) -> Table:
    from ._verdict import policy_rule

    assets = run.assets
    rule = run.rules[name]
    has_ew = EQUAL_WEIGHT in run.rules
    held = policy_rule(run)
    if held == name:
        held = None
    rows = []
    for a in assets:
        ins = cell(run, ("rules", name, "in_sample_weights", a), fmt="pct1")
        avg = cell(run, _averaged_path(run, name, a), fmt="pct1")
        if has_ew and as_float(dig(run.rules[EQUAL_WEIGHT], "in_sample_weights", a)) is not None:
            ew = cell(run, ("rules", EQUAL_WEIGHT, "in_sample_weights", a), fmt="pct1")
        elif has_ew and as_float(dig(run.summary, *_averaged_path(run, EQUAL_WEIGHT, a))) is not None:
            ew = cell(run, _averaged_path(run, EQUAL_WEIGHT, a), fmt="pct1")
        else:
            ew = Cell(text=fmt_value(1 / len(assets), "pct1"), value=1 / len(assets), numeric=True)
        lo = cell(run, ("rules", name, "weights", a, "p5"), fmt="pct1")
        hi = cell(run, ("rules", name, "weights", a, "p95"), fmt="pct1")
        row = (text_cell(a), ins, avg, ew, lo, hi)
        if held is not None:
            row = row + (cell(run, ("rules", held, "in_sample_weights", a), fmt="pct1"),)
        rows.append(row)
    cash = as_float(dig(rule, "in_sample_cash"))
    pcash = None if held is None else as_float(dig(run.rules[held], "in_sample_cash"))
    if (cash is not None and abs(cash) > 5e-4) or (pcash is not None and abs(pcash) > 5e-4):
        row = (text_cell("Cash (risk-free)"),
               cell(run, ("rules", name, "in_sample_cash"), fmt="pct1"),
               cell(run, ("rules", name, "resampled_allocation", "cash"), fmt="pct1"),
               Cell(text=fmt_value(0.0, "pct1"), value=0.0, numeric=True),
               text_cell(""), text_cell(""))
        if held is not None:
            row = row + (cell(run, ("rules", held, "in_sample_cash"), fmt="pct1"),)
        rows.append(row)
    columns = ("Asset", "Proposed (in-sample)", "Resampled (averaged)", "1/N",
               "5th pct over draws", "95th pct over draws")
    if held is not None:
        columns = columns + (f"Policy held ('{held}')",)
    note = ("Proposed: the rule applied to the full history. Resampled (averaged): the mean of "
            "the rule's allocations over the synthetic histories. Percentiles: the spread of the "
            "rule's weight across those histories.")
    # drop the resampling columns when the run has none (e.g. no [resample] section)
    keep = [i for i in range(len(columns))
            if i in (0, 1, 3, 6) or any(r[i].text not in ("n/a", "") for r in rows)]
    if len(keep) < len(columns):
        columns = tuple(columns[i] for i in keep)
        rows = [tuple(r[i] for i in keep) for r in rows]
        why = _skip_reason(run, "resample") or "the run holds no resampled weights"
        note = ("Proposed: the rule applied to the full history. The resampled (averaged) "
                f"allocation and the weight percentiles are not available: {why}.")
    return Table(
        key="verdict_allocation",
        caption=(f"Proposed allocation ('{name}') beside the resampled (averaged) allocation and 1/N"
                 + (f", and the policy held today ('{held}')" if held is not None else "")),
        columns=columns, rows=tuple(rows), note=note)


# ----------------------------------------------------------------------------- 2 inputs

def _inputs_section(run: RunFolder) -> Section:
    s = run.summary
    d = dig(s, "data", default={})
    assets = run.assets
    first, last = dig(d, "first_date"), dig(d, "last_date")
    period = f"{first} to {last}" if first and last else "n/a"
    rf = dig(d, "risk_free")
    rf_path = ("data", "risk_free")
    if dig(d, "assumptions"):
        rf_text = "not applicable (capital-market assumptions)"
    elif isinstance(rf, (int, float)) and not isinstance(rf, bool):
        rf_text = None
    elif isinstance(rf, dict) and as_float(rf.get("constant")) is not None:
        rf_text, rf_path = None, ("data", "risk_free", "constant")
    elif isinstance(rf, dict) and rf.get("column"):
        rf_text = f"per-period rates from the column '{rf['column']}' of the data file"
    elif isinstance(rf, dict) and rf.get("file"):
        rf_text = f"per-period rates from the file {rf['file']}"
    elif rf:
        rf_text = json.dumps(rf) if isinstance(rf, (dict, list)) else str(rf)
    else:
        rf_text = "none given; returns are not in excess of a risk-free rate"
    items = [
        ("Data source", str(dig(d, "source", default="n/a"))),
        ("SHA-256 of the data", str(dig(d, "sha256", default="n/a"))),
        ("What the file holds", "capital-market assumptions" if dig(d, "assumptions")
         else str(dig(d, "kind", default="n/a"))),
        ("Frequency", f"{dig(d, 'frequency', default='n/a')} ({run.periods_per_year} "
                      f"period{'' if run.periods_per_year == 1 else 's'} a year)"),
        ("Period", period),
        ("Periods (rows used)", cell(run, ("data", "periods"), fmt="int")),
        ("Assets", f"{len(assets)}: " + ", ".join(assets)),
        ("Missing-data policy", str(dig(d, "missing_policy", default="n/a"))),
        ("Rows dropped by that policy", cell(run, ("data", "dropped_rows"), fmt="int")),
        ("Excess of the risk-free rate", "n/a" if dig(d, "excess") is None
         else ("yes" if dig(d, "excess") else "no")),
    ]
    if rf_text is None:
        items.append(("Risk-free rate (constant, per period)", cell(run, rf_path, fmt="pct2")))
    else:
        items.append(("Risk-free rate", rf_text))
    notes = dig(d, "notes")
    if isinstance(notes, list) and notes:
        items.append(("Notes from reading the data", "; ".join(str(n) for n in notes)))
    if as_float(dig(d, "repair_distance")) is not None and dig(d, "assumptions"):
        items.append(("Correlation repair distance", cell(run, ("data", "repair_distance"), fmt="num4")))
    est = dig(s, "estimate", default={})
    items += [
        ("Mean estimator", str(dig(est, "mean", default="n/a"))),
        ("Covariance estimator", f"{dig(est, 'covariance', default='n/a')} (divisor "
                                 f"{dig(est, 'divisor', default='n/a')})"),
    ]
    if as_float(dig(est, "shrinkage")) is not None:
        items.append(("Covariance shrinkage intensity", cell(run, ("estimate", "shrinkage"), fmt="num3")))
    if as_float(dig(est, "mean_shrinkage")) is not None:
        items.append(("Mean shrinkage intensity", cell(run, ("estimate", "mean_shrinkage"), fmt="num3")))
    items.append(("Risk aversion used to score every rule",
                  cell(run, ("risk_aversion",), fmt="num2")))
    items.append(("Where the risk aversion comes from", str(dig(s, "risk_aversion_source", default="n/a"))))
    blocks = [_kv_table("inputs_data", "Data and estimation", items)]

    rows = []
    for name in _rule_order(run):
        r = run.rules[name]
        e = dig(r, "estimator", default={})
        rows.append((text_cell(_label(name)), text_cell(dig(r, "type", default="n/a")),
                     text_cell(_fmt_params(dig(r, "params"))),
                     text_cell(f"{dig(e, 'mean', default='n/a')} / {dig(e, 'covariance', default='n/a')}")))
    blocks.append(Table(key="inputs_rules", caption="Rules compared, with their constraints and estimators",
                        columns=("Rule", "Type", "Parameters and constraints", "Mean / covariance estimator"),
                        rows=tuple(rows),
                        note="Unless a rule's parameters say otherwise, rules are long-only and fully invested."))

    res = dig(s, "resample")
    if isinstance(res, dict) and "skipped" not in res:
        gen = dig(res, "generator", default="n/a")
        gen_name = gen.get("name", "n/a") if isinstance(gen, dict) else str(gen)
        items = [("Generator", gen_name),
                 ("Draws (synthetic histories)", cell(run, ("resample", "draws"), fmt="int")),
                 ("Periods per synthetic history (T)", cell(run, ("resample", "length"), fmt="int")),
                 ("Seed", cell(run, ("resample", "seed"), fmt="id"))]
        for path, label, f in ((("generator", "degrees_of_freedom"), "Degrees of freedom (Student t)", "num2"),
                               (("degrees_of_freedom",), "Degrees of freedom (Student t)", "num2"),
                               (("generator", "block_length"), "Mean block length (periods)", "num2"),
                               (("block_length",), "Mean block length (periods)", "num2"),
                               (("hold_threshold",), "An asset counts as held above", "pct2")):
            if as_float(dig(res, *path)) is not None and label not in [i[0] for i in items]:
                items.append((label, cell(run, ("resample",) + path, fmt=f)))
        if isinstance(gen, dict):
            for key in ("degrees_of_freedom_source", "block_length_source"):
                if gen.get(key):
                    items.append((key.replace("_", " ").capitalize(), str(gen[key])))
        pop_src = dig(res, "population", "source")
        if pop_src:
            items.append(("Population (what the draws come from)", str(pop_src)))
        if dig(res, "draw"):
            items.append(("Draw path", str(dig(res, "draw"))))
        blocks.append(_kv_table("inputs_resample", "Resampling", items))
    else:
        blocks.append(Para("Resampling: " + (str(res["skipped"]) if isinstance(res, dict)
                                              else "not part of this study") + ".", "absent"))
    bt = dig(s, "backtest")
    if isinstance(bt, dict) and "skipped" not in bt:
        items = [("Estimation window (periods)", cell(run, ("backtest", "window"), fmt="int")),
                 ("Window type", "expanding" if dig(bt, "expanding") else "rolling"),
                 ("Rebalance every (periods)", cell(run, ("backtest", "rebalance_every"), fmt="int"))]
        cost = dig(bt, "cost_bps")
        if isinstance(cost, (int, float)) and not isinstance(cost, bool):
            items.append(("Transaction cost (basis points of value traded)",
                          cell(run, ("backtest", "cost_bps"), fmt="num1")))
        elif isinstance(cost, (dict, list)):
            items.append(("Transaction cost (basis points, per asset)", json.dumps(cost)))
        if as_float(dig(bt, "bootstrap_resamples")) is not None:
            items.append(("Bootstrap resamples (Ledoit-Wolf test)",
                          cell(run, ("backtest", "bootstrap_resamples"), fmt="int")))
        if as_float(dig(bt, "n_trials")) is not None:
            items.append(("Configurations tried (for the deflated Sharpe ratio)",
                          cell(run, ("backtest", "n_trials"), fmt="int")))
        blocks.append(_kv_table("inputs_backtest", "Backtest", items))
    else:
        blocks.append(Para("Backtest: " + (str(bt["skipped"]) if isinstance(bt, dict)
                                            else "not part of this study") + ".", "absent"))
    return Section(2, "inputs", "Inputs and assumptions", tuple(blocks))


# ----------------------------------------------------------------------------- 3 stability

def _stability_section(run: RunFolder) -> Section:
    reason = _skip_reason(run, "resample")
    names = [n for n in _rule_order(run) if n != EQUAL_WEIGHT
             and isinstance(dig(run.rules[n], "weights"), dict)]
    if reason or not names:
        why = reason or "the run holds no per-draw weight statistics"
        return Section(3, "stability", "Weight stability", (_absent(why),), True, why)
    assets = run.assets
    colours = _colours(run)
    blocks = [Para(SIMULATED, "hypothetical"),
              Para("For each rule and asset: the band of weights across the synthetic histories "
                   "(thin line 5th to 95th percentile, thick bar 25th to 75th, tick at the median), "
                   "the in-sample weight (open diamond) and the averaged weight (dot). Narrow bands "
                   "mean the allocation does not hinge on the particular sample.", "body")]
    ew = 1 / len(assets) if assets else None
    for start in range(0, len(names), 3):
        chunk = names[start:start + 3]
        rules = []
        for n in chunk:
            w = run.rules[n]["weights"]
            ins = dig(run.rules[n], "in_sample_weights", default={})
            rules.append({
                "name": n, "colour": colours[n],
                **{q: [as_float(dig(w, a, q)) for a in assets] for q in ("p5", "p25", "p50", "p75", "p95")},
                "in_sample": [as_float(dig(ins, a)) for a in assets],
                "averaged": [as_float(dig(run.summary, *_averaged_path(run, n, a))) for a in assets]})
        blocks.append(_fig(f"fig_weight_bands_{start // 3 + 1}",
                           "Weight bands across synthetic histories (hypothetical, simulated); "
                           "dashed line: 1/N", F.weight_bands(assets, rules, ew)))
    # held share and in-sample vs averaged
    cols = ["Asset"]
    rows = []
    for a in assets:
        row = [text_cell(a)]
        for n in names:
            row.append(cell(run, ("rules", n, "weights", a, "held"), fmt="pct1"))
        rows.append(tuple(row))
    blocks.append(Table(key="stability_held", caption="Share of synthetic histories in which each asset is held",
                        columns=tuple(cols + names), rows=tuple(rows),
                        note=_held_note(run)))
    cols = ["Asset"]
    for n in names:
        cols += [f"{n}: in-sample", f"{n}: averaged", f"{n}: 25-75 band width"]
    rows = []
    for a in assets:
        row = [text_cell(a)]
        for n in names:
            row.append(cell(run, ("rules", n, "in_sample_weights", a), fmt="pct1"))
            row.append(cell(run, _averaged_path(run, n, a), fmt="pct1"))
            row.append(cell(run, ("rules", n, "weights", a, "p75"), ("rules", n, "weights", a, "p25"),
                            op="band", fmt="pct1"))
        rows.append(tuple(row))
    blocks.append(Table(key="stability_weights", caption="In-sample against averaged weights",
                        columns=tuple(cols), rows=tuple(rows)))
    return Section(3, "stability", "Weight stability", tuple(blocks), True)


def _held_note(run: RunFolder) -> str:
    thr = as_float(dig(run.summary, "resample", "hold_threshold"))
    if thr is None:
        return "An asset counts as held when its weight is above the study's hold threshold."
    return f"An asset counts as held when its weight is above {fmt_value(thr, 'pct2')}."


# ----------------------------------------------------------------------------- 4 frontiers

def _frontier_curve(fr: dict, kind: str, label, colour, ls, ppy):
    """A frontier from the summary's flat lists ``<kind>_expected_return`` and
    ``<kind>_volatility`` (per period), or a nested {"mean"/"volatility"} mapping."""
    mean = fr.get(f"{kind}_expected_return")
    vol = fr.get(f"{kind}_volatility")
    if mean is None and isinstance(fr.get(kind), dict):
        node = fr[kind]
        mean = node.get("expected_return", node.get("mean"))
        vol = node.get("volatility")
    if mean is None or vol is None:
        return None
    try:
        mean = np.asarray([np.nan if v is None else v for v in mean], dtype=float)
        vol = np.asarray([np.nan if v is None else v for v in vol], dtype=float)
    except (TypeError, ValueError):
        return None
    if mean.shape != vol.shape or mean.size == 0 or not np.isfinite(mean).any():
        return None
    return {"label": label, "x": vol * math.sqrt(ppy), "y": mean * ppy, "colour": colour, "ls": ls}


def _frontiers_section(run: RunFolder) -> Section:
    reason = _skip_reason(run, "resample")
    fr = dig(run.summary, "frontiers")
    if isinstance(fr, dict) and "skipped" in fr:
        reason = reason or str(fr["skipped"])
    ppy = run.periods_per_year
    curves = []
    if isinstance(fr, dict) and not reason:
        for key, label, colour, ls in (
                ("true", "true (population)", S.INK, "-"),
                ("estimated", "estimated (mean over draws)", "#E69F00", "--"),
                ("actual", "actual: estimated portfolios under the population", "#0072B2", "-."),
                ("averaged", "resampled (averaged) frontier under the population", "#009E73",
                 (0, (1, 1.2)))):
            c = _frontier_curve(fr, key, label, colour, ls, ppy)
            if c is not None:
                curves.append(c)
    if reason or not curves:
        why = reason or "the run holds no frontiers (the study's rules may not trace one)"
        return Section(4, "frontiers", "Frontiers", (_absent(why),), True, why)
    cloud = None
    tab = run.table("frontier_cloud", "frontiers_cloud")
    fname = dig(fr, "rule")
    if tab is not None and "rule" in tab.columns and isinstance(fname, str):
        tab = tab[tab["rule"] == fname]      # the frontier rule's own per-draw allocations
    if tab is not None and len(tab) and {"expected_return", "volatility"} <= set(tab.columns):
        cloud = pd.DataFrame({"x": tab["volatility"].to_numpy(float) * math.sqrt(ppy),
                              "y": tab["expected_return"].to_numpy(float) * ppy})
    points = []
    ew = dig(run.summary, "resample", "equal_weight")
    m, v = as_float(dig(ew, "expected_return")), as_float(dig(ew, "volatility"))
    if m is not None and v is not None:
        points.append({"label": "1/N under the population", "x": v * math.sqrt(ppy), "y": m * ppy,
                       "colour": S.EQUAL_COLOUR, "marker": "*"})
    if isinstance(fname, str) and fname in run.rules:
        opt = dig(run.rules[fname], "optimum")
        m, v = as_float(dig(opt, "expected_return")), as_float(dig(opt, "volatility"))
        if m is not None and v is not None:
            points.append({"label": f"'{fname}' on the population (optimum)", "x": v * math.sqrt(ppy),
                           "y": m * ppy, "colour": "#CC79A7", "marker": "D"})
        res = dig(run.rules[fname], "resampled_allocation")
        m, v = as_float(dig(res, "expected_return")), as_float(dig(res, "volatility"))
        if m is not None and v is not None:
            points.append({"label": f"'{fname}' averaged over draws", "x": v * math.sqrt(ppy),
                           "y": m * ppy, "colour": "#56B4E9", "marker": "o"})
    xl, yl = "volatility (annualised)", "expected return (annualised)"
    blocks = [Para(SIMULATED, "hypothetical"),
              Para("True: the frontier of the population itself. Estimated: what the optimiser "
                   "reports on each synthetic history, averaged over draws. Actual: the same "
                   "portfolios judged under the population, i.e. what the investor would really get. "
                   "The gap between estimated and actual is the optimism built into an estimated "
                   "frontier (Broadie 1993). Resampled (averaged): the per-draw frontier portfolios "
                   "averaged rank by rank and judged under the population.", "body")]
    if isinstance(fname, str):
        blocks.append(Para(f"Frontiers use the constraints and estimators of the rule '{fname}'"
                           + (f", over {int(dig(fr, 'draws'))} draws" if as_float(dig(fr, 'draws')) else "")
                           + ".", "note"))
    blocks.append(_fig("fig_frontiers", "True, estimated, actual and resampled frontiers "
                       "(hypothetical, simulated; annualised)", F.frontiers(curves, cloud, points, xl, yl)))
    viol = as_float(dig(fr, "broadie_violations"))
    if viol is not None:
        blocks.append(Para(f"Check: actual-frontier points lying above the true frontier, which theory "
                           f"rules out (Broadie 1993): {int(viol)}.", "note"))
    if cloud is None:
        blocks.append(Para("The cloud of per-draw actual portfolios is not drawn: the run keeps only "
                           "the frontiers' averages over draws.", "note"))
    else:
        blocks.append(Para(f"Cloud: the rule '{fname}' re-optimised on each of the first {len(cloud)} "
                           f"synthetic histories, each allocation judged under the population.", "note"))
    return Section(4, "frontiers", "Frontiers", tuple(blocks), True)


# ----------------------------------------------------------------------------- 5 cost

def _cost_section(run: RunFolder) -> Section:
    reason = _skip_reason(run, "resample")
    names = [n for n in _rule_order(run) if isinstance(dig(run.rules[n], "population"), dict)]
    if reason or not names:
        why = reason or "the run holds no population scores"
        return Section(5, "cost", "Cost of estimation error", (_absent(why),), True, why)
    blocks = [Para(SIMULATED, "hypothetical"),
              Para("Every allocation drawn from a synthetic history is judged under the population, "
                   "where the truth is known. CEQ is the certainty-equivalent return, mean minus half "
                   "the risk aversion times the variance. The loss against the optimum is the cost of "
                   "estimation error; the comparison with 1/N shows whether optimising was worth it.",
                   "body")]
    from ._verdict import policy_rule

    held = policy_rule(run)
    if held is not None and not any(as_float(dig(run.rules[n], "population", "prob_beats_policy_ceq"))
                                    is not None for n in names):
        held = None
    rows = []
    for n in names:
        P = ("rules", n, "population")
        vol = (cell(run, P + ("volatility_mean",), op="ann_vol", fmt="pct2")
               if as_float(dig(run.rules[n], "population", "volatility_mean")) is not None
               else cell(run, P + ("variance_mean",), op="ann_vol_from_var", fmt="pct2"))
        rows.append((text_cell(_label(n)),
                     cell(run, P + ("expected_return_mean",), op="ann_mean", fmt="pct2"),
                     vol,
                     cell(run, P + ("sharpe_mean",), op="ann_sharpe", fmt="num3"),
                     cell(run, P + ("ceq_mean",), op="ann_mean", fmt="pct2"),
                     cell(run, P + ("ceq_se",), op="ann_mean", fmt="pct2"),
                     cell(run, ("rules", n, "optimum", "ceq"), op="ann_mean", fmt="pct2"),
                     cell(run, ("rules", n, "optimum", "ceq"), P + ("ceq_mean",), op="ann_mean_diff", fmt="pct2"),
                     *((text_cell("reference"), text_cell("reference")) if n == EQUAL_WEIGHT else
                       (cell(run, P + ("prob_beats_equal_weight_ceq",), fmt="pct1"),
                        cell(run, P + ("prob_beats_equal_weight_sharpe",), fmt="pct1")))))
        if held is not None:
            rows[-1] = rows[-1] + ((text_cell("policy"), text_cell("policy"), text_cell("policy"))
                                   if n == held else
                                   (cell(run, P + ("prob_beats_policy_ceq",), fmt="pct1"),
                                    cell(run, P + ("prob_beats_policy_sharpe",), fmt="pct1"),
                                    cell(run, P + ("tracking_error_vs_policy_mean",), op="ann_vol",
                                         fmt="pct2")))
    columns = ("Rule", "Expected return", "Volatility", "Sharpe ratio", "CEQ", "CEQ MC s.e.",
               "Optimum CEQ", "CEQ loss vs optimum", "Beats 1/N on CEQ", "Beats 1/N on Sharpe")
    if held is not None:
        columns = columns + ("Beats policy on CEQ", "Beats policy on Sharpe",
                             "Tracking error vs policy (ann.)")
    blocks.append(Table(
        key="cost_population", caption="Population scores of the per-draw allocations (means over draws, annualised)",
        columns=columns,
        rows=tuple(rows),
        note=("Annualised: means and CEQ x periods per year, volatility and Sharpe x square root of "
              "periods per year. Volatility is the mean over draws of each allocation's population "
              "volatility. MC s.e.: Monte Carlo standard error of the mean over draws. 'Beats 1/N': "
              "share of draws in which the rule's allocation scores higher than 1/N under the "
              "population."
              + (f" 'Beats policy': the same against the policy held today ('{held}'), drawn "
                 "from the same synthetic history. Tracking error vs policy: mean over draws of "
                 "sqrt((w - p)' Sigma (w - p)) under the population covariance, annualised."
                 if held is not None else ""))))
    blocks.append(_fig("fig_cost", "Population CEQ and Sharpe ratio of the per-draw allocations "
                       "(hypothetical, simulated; annualised)", _cost_figure(run, names)))
    att = _attribution(run)
    blocks.extend(att)
    return Section(5, "cost", "Cost of estimation error", tuple(blocks), True)


def _quantiles(run: RunFolder, name: str, metric: str) -> dict:
    """{quantile: value} of a rule's per-draw population metric, from
    ``tables/population_quantiles.csv`` (rule, metric, quantile, value)."""
    t = run.table("population_quantiles")
    if t is None or not {"rule", "metric", "quantile", "value"} <= set(t.columns):
        return {}
    sel = t[(t["rule"] == name) & (t["metric"] == metric)]
    return {round(float(q), 4): float(v) for q, v in zip(sel["quantile"], sel["value"])}


def _cost_figure(run: RunFolder, names):
    ppy = run.periods_per_year
    colours = _colours(run)
    panels = []
    ew = dig(run.summary, "resample", "equal_weight")
    for key, title, f, percent, xl in (
            ("ceq", "Population CEQ", ppy, True, "CEQ (annualised)"),
            ("sharpe", "Population Sharpe ratio", math.sqrt(ppy), False, "Sharpe ratio (annualised)")):
        rows = []
        for n in names:
            q = _quantiles(run, n, key)
            mean = as_float(dig(run.rules[n], "population", f"{key}_mean"))
            opt = as_float(dig(run.rules[n], "optimum", key))
            g = (lambda x: None if x is None else x * f)
            rows.append({"rule": _label(n), "colour": colours[n], "centre": g(mean),
                         "lo": g(q.get(0.05)), "hi": g(q.get(0.95)),
                         "q25": g(q.get(0.25)), "q75": g(q.get(0.75)), "optimum": g(opt)})
        e = as_float(dig(ew, key))
        refs = [{"label": "1/N under the population", "ls": (0, (4, 3)),
                 "value": None if e is None else e * f}]
        panels.append({"title": title, "xlabel": xl, "percent": percent, "rows": rows, "refs": refs})
    return F.ranges(panels)


ATTRIBUTION_KEYS = (("both", "loss_estimated_both", "both estimated"),
                    ("means", "loss_from_mean_error", "only means estimated"),
                    ("covariances", "loss_from_covariance_error", "only covariances estimated"))


def _attribution(run: RunFolder) -> list:
    att = dig(run.summary, "attribution")
    if isinstance(att, dict) and "skipped" in att:
        return [Para(f"Means against covariances: not available: {att['skipped']}.", "absent")]
    if not isinstance(att, dict) or not att:
        return [Para("Means against covariances: not available: the run holds no error attribution "
                     "(it applies to rules that use estimated means).", "absent")]
    rows, cats = [], []
    series_vals = {k: [] for k, _, _ in ATTRIBUTION_KEYS}
    for n in _rule_order(run):
        node = att.get(n)
        if not isinstance(node, dict):
            continue
        row = [text_cell(_label(n))]
        for part, key, _ in ATTRIBUTION_KEYS:
            c = cell(run, ("attribution", n, key), op="ann_mean", fmt="pct2")
            row.append(c)
            series_vals[part].append(c.value)
        if all(not c.numeric or c.value is None for c in row[1:]):
            for part, _, _ in ATTRIBUTION_KEYS:
                series_vals[part].pop()
            continue
        cats.append(_label(n))
        rows.append(tuple(row))
    if not rows:
        return [Para("Means against covariances: not available: the attribution holds no rule the "
                     "pack can read.", "absent")]
    out = [Table(key="cost_attribution",
                 caption="Where the cost comes from: CEQ loss against the optimum (annualised)",
                 columns=("Rule", "Both estimated", "Only means estimated", "Only covariances estimated"),
                 rows=tuple(rows),
                 note=("Each column reruns the draws with one input estimated and the other set to its "
                       "true (population) value; the loss is the optimum's CEQ minus the mean CEQ over "
                       "draws. Errors in means usually dominate (Chopra & Ziemba 1993)."))]
    colours = {"both": "#0072B2", "means": "#E69F00", "covariances": "#009E73"}
    hatches = {"both": None, "means": "///", "covariances": "..."}
    out.append(_fig("fig_attribution", "CEQ loss against the optimum by source of error "
                    "(hypothetical, simulated; annualised)",
                    F.grouped_bars(cats, [{"label": label, "values": series_vals[part],
                                           "colour": colours[part], "hatch": hatches[part]}
                                          for part, _, label in ATTRIBUTION_KEYS],
                                   "CEQ loss against the optimum (annualised)", percent=True,
                                   decimals=2)))
    return out


# ----------------------------------------------------------------------------- 6 history

def _history_section(run: RunFolder) -> Section:
    reason = _skip_reason(run, "resample")
    sw = dig(run.summary, "sweep")
    if isinstance(sw, dict) and "skipped" in sw:
        reason = reason or str(sw["skipped"])
    if reason or not isinstance(sw, dict) or not sw:
        why = reason or "the run holds no history-length sweep"
        return Section(6, "history", "How much history would it need", (_absent(why),), True, why)
    ppy = run.periods_per_year
    lengths = sw.get("lengths") or sw.get("lengths_periods")
    rules = sw.get("rules") if isinstance(sw.get("rules"), dict) else {}
    if not lengths or not rules:
        why = "the sweep in this run is empty"
        return Section(6, "history", "How much history would it need", (_absent(why),), True, why)
    years = [float(l) / ppy for l in lengths]
    colours, styles = _colours(run), _styles(run)
    series, rows = [], []
    for n in _rule_order(run):
        node = rules.get(n)
        if not isinstance(node, dict) or n == EQUAL_WEIGHT:
            continue
        probs = node.get("prob_beats_equal_weight_ceq")
        if isinstance(probs, list) and len(probs) == len(lengths):
            series.append({"label": n, "y": [np.nan if as_float(p) is None else as_float(p)
                                             for p in probs], "colour": colours[n],
                           "ls": styles[n][0], "marker": styles[n][1]})
        rows.append((text_cell(n),
                     _shortest_cell(run, n, node, "shortest_length_50", ppy),
                     _shortest_cell(run, n, node, "shortest_length_90", ppy)))
    blocks = [Para(SIMULATED, "hypothetical"),
              Para("The same study repeated with longer synthetic histories: how often each rule beats "
                   "1/N on population CEQ as the history grows. A rule that needs decades of data "
                   "to beat 1/N reliably is not supported by the history at hand.", "body")]
    if series:
        blocks.append(_fig("fig_history", "Share of draws beating 1/N on population CEQ, by history "
                           "length (hypothetical, simulated)",
                           F.sweep(years, series, "history length (years)",
                                   "draws beating 1/N on CEQ (%)", [(0.5, "50%"), (0.9, "90%")])))
    if rows:
        blocks.append(Table(key="history_shortest", caption="Shortest history at which the rule beats 1/N "
                            "on population CEQ", columns=("Rule", "in at least 50% of draws",
                                                          "in at least 90% of draws"),
                            rows=tuple(rows),
                            note="Lengths tried (years): " + ", ".join(f"{y:g}" for y in years)
                            + ". 'None tried' means no length tried was enough."))
    return Section(6, "history", "How much history would it need", tuple(blocks), True)


def _shortest_cell(run, name, node, key, ppy) -> Cell:
    v = node.get(key)
    if v is None:
        return text_cell("none tried")
    x = as_float(v)
    if x is None:
        return text_cell(str(v))
    years = x / ppy
    return Cell(text=f"{int(round(x)):,} periods ({years:g} years)", value=x,
                src=(("sweep", "rules", name, key),), op="id", fmt="int", numeric=True)


# ----------------------------------------------------------------------------- 7 backtest

def _series_table(run: RunFolder, *names) -> Optional[pd.DataFrame]:
    t = run.table(*names)
    if t is None or t.empty:
        return None
    return t


def _backtest_section(run: RunFolder) -> Section:
    reason = _skip_reason(run, "backtest")
    names = [n for n in _rule_order(run) if isinstance(dig(run.rules[n], "backtest"), dict)
             and "skipped" not in run.rules[n]["backtest"]]
    if reason or not names:
        why = reason or "the run holds no backtest results"
        return Section(7, "backtest", "Out-of-sample backtest", (_absent(why),), True, why)
    ppy = run.periods_per_year
    colours, styles = _colours(run), _styles(run)
    blocks = [Para(BACKTESTED, "hypothetical")]
    cum = _series_table(run, "backtest_cumulative")
    dd = _series_table(run, "backtest_drawdown")
    rs = _series_table(run, "backtest_rolling_sharpe")
    panels, dates = [], None
    for key, tab, title, ylabel, percent, log, transform in (
            ("growth", cum, "Growth of 1 unit invested (after costs)", "value of 1 invested", False,
             False, None),
            ("drawdown", dd, "Drawdown from the running peak", "drawdown (%)", True, False, None),
            ("rolling_sharpe", rs, "Rolling Sharpe ratio", "Sharpe ratio (annualised)", False, False,
             math.sqrt(ppy))):
        if tab is None:
            continue
        dcol = tab.columns[0]
        if dates is None:
            dates = tab[dcol]
        elif len(tab) != len(dates):
            continue
        series = []
        for n in names:
            if n in tab.columns:
                y = tab[n].to_numpy(dtype=float)
                if transform is not None:
                    y = y * transform
                series.append({"label": _label(n), "y": y, "colour": colours[n], "ls": styles[n][0]})
        if series:
            panels.append({"key": key, "title": title, "ylabel": ylabel, "percent": percent, "log": log,
                           "series": series, "zero_line": True,
                           "baseline": 1.0 if key == "growth" else 0.0})
    if panels:
        win = as_float(dig(run.summary, "backtest", "rolling_sharpe_window"))
        if win is None and rs is not None and len(rs.columns) > 1:
            # the series starts after its first full window
            first = rs.iloc[:, 1:].notna().any(axis=1).to_numpy()
            win = float(np.argmax(first) + 1) if first.any() else None
        cap = "Out-of-sample growth, drawdowns and rolling Sharpe ratio (hypothetical, backtested)"
        if win is not None:
            cap += f"; rolling window {int(win)} periods"
        blocks.append(_fig("fig_backtest", cap, F.backtest_panels(dates, panels)))
    else:
        blocks.append(Para("Time series of the backtest are not in the run's tables; only the summary "
                           "measures are shown.", "note"))
    rows = []
    for n in names:
        B = ("rules", n, "backtest")
        rows.append((text_cell(_label(n)),
                     cell(run, B + ("mean",), op="ann_mean", fmt="pct2"),
                     cell(run, B + ("volatility",), op="ann_vol", fmt="pct2"),
                     cell(run, B + ("sharpe",), op="ann_sharpe", fmt="num3"),
                     cell(run, B + ("ceq",), op="ann_mean", fmt="pct2"),
                     cell(run, B + ("max_drawdown",), fmt="pct1"),
                     cell(run, B + ("turnover",), fmt="pct1"),
                     cell(run, B + ("cost_drag",), op="ann_mean", fmt="bp1"),
                     cell(run, B + ("periods",), fmt="int")))
    blocks.append(Table(
        key="backtest_measures", caption="Out-of-sample measures (annualised where marked)",
        columns=("Rule", "Mean (ann.)", "Volatility (ann.)", "Sharpe (ann.)", "CEQ (ann.)",
                 "Max drawdown", "Turnover per rebalance", "Cost drag (ann.)", "Periods"),
        rows=tuple(rows),
        note=("Excess returns over the risk-free rate where one was given. Turnover: sum of absolute "
              "trades at a rebalance, as a share of portfolio value, averaged over rebalances. "
              "Cost drag: average per-period transaction cost, annualised, in basis points.")))
    turn = [as_float(dig(run.rules[n], "backtest", "turnover")) for n in names]
    drag = [None if as_float(dig(run.rules[n], "backtest", "cost_drag")) is None
            else as_float(dig(run.rules[n], "backtest", "cost_drag")) * ppy for n in names]
    if any(t is not None for t in turn):
        blocks.append(_fig("fig_turnover", "Turnover and cost drag (hypothetical, backtested)",
                           _turnover_figure(names, turn, drag, colours)))
    rows = []
    for n in names:
        if n == EQUAL_WEIGHT:
            continue
        B = ("rules", n, "backtest")
        node = run.rules[n]["backtest"]
        if as_float(node.get("sharpe_diff")) is not None:
            sd = cell(run, B + ("sharpe_diff",), op="ann_sharpe", fmt="snum3")
        else:
            sd = cell(run, B + ("sharpe",), ("rules", EQUAL_WEIGHT, "backtest", "sharpe"),
                      op="ann_sharpe_diff", fmt="snum3")
        if as_float(node.get("ceq_diff")) is not None:
            cd = cell(run, B + ("ceq_diff",), op="ann_mean", fmt="pct2")
        else:
            cd = cell(run, B + ("ceq",), ("rules", EQUAL_WEIGHT, "backtest", "ceq"),
                      op="ann_mean_diff", fmt="pct2")
        rows.append((text_cell(n), sd,
                     cell(run, B + ("sharpe_diff_p_jkm",), fmt="pval"),
                     cell(run, B + ("sharpe_diff_p_lw",), fmt="pval"),
                     cd,
                     cell(run, B + ("ceq_diff_p",), fmt="pval"),
                     cell(run, B + ("psr",), fmt="num3"),
                     cell(run, B + ("dsr",), fmt="num3"),
                     cell(run, B + ("min_track_record_years",), fmt="num1")))
    if rows:
        blocks.append(Table(
            key="backtest_tests", caption="Tests against 1/N",
            columns=("Rule", "Sharpe diff. (ann.)", "p (JKM)", "p (LW boot.)", "CEQ diff. (ann.)",
                     "p (CEQ)", "PSR", "DSR", "Min. track record (years)"),
            rows=tuple(rows),
            note=("Differences are the rule minus 1/N. p (JKM): Jobson & Korkie (1981) test with "
                  "Memmel's (2003) correction. p (LW boot.): Ledoit & Wolf (2008) studentised block "
                  "bootstrap. p (CEQ): delta-method test (DeMiguel, Garlappi & Uppal 2009). PSR: "
                  "probability that the true Sharpe ratio exceeds zero (Bailey & Lopez de Prado 2012). "
                  "DSR: the same after deflating for the number of configurations tried (Bailey & "
                  "Lopez de Prado 2014). Min. track record: the history needed for the observed "
                  "Sharpe ratio to be above zero with 95% confidence (Bailey & Lopez de Prado 2012). "
                  "p-values are two-sided, 3 decimals.")))
    from ._verdict import policy_rule

    held = policy_rule(run)
    prow = []
    for n in names:
        node = run.rules[n].get("backtest") or {}
        if held is None or n == held or "sharpe_diff_policy" not in node:
            continue
        B = ("rules", n, "backtest")
        prow.append((text_cell(n),
                     cell(run, B + ("sharpe_diff_policy",), op="ann_sharpe", fmt="snum3"),
                     cell(run, B + ("sharpe_diff_policy_p_jkm",), fmt="pval"),
                     cell(run, B + ("sharpe_diff_policy_p_lw",), fmt="pval"),
                     cell(run, B + ("ceq_diff_policy",), op="ann_mean", fmt="pct2"),
                     cell(run, B + ("ceq_diff_policy_p",), fmt="pval"),
                     cell(run, B + ("tracking_error_vs_policy",), op="ann_vol", fmt="pct2")))
    if prow:
        blocks.append(Table(
            key="backtest_tests_policy", caption=f"Tests against the policy held today ('{held}')",
            columns=("Rule", "Sharpe diff. (ann.)", "p (JKM)", "p (LW boot.)", "CEQ diff. (ann.)",
                     "p (CEQ)", "Tracking error (ann.)"),
            rows=tuple(prow),
            note=("Differences are the rule minus the policy, with the same tests as against 1/N. "
                  "Tracking error: standard deviation of the per-period differences between the "
                  "rule's and the policy's net returns, times the square root of periods per "
                  "year.")))
    return Section(7, "backtest", "Out-of-sample backtest", tuple(blocks), True)


def _turnover_figure(names, turn, drag, colours):
    import numpy as _np
    from . import _style as _S
    fig = _S.new_figure(F.WIDTH, 0.9 + 0.35 * len(names))
    axes = fig.subplots(1, 2, sharey=True)
    y = _np.arange(len(names))[::-1]
    labels = [_label(n) for n in names]
    cols = [colours[n] for n in names]
    rows = []
    for ax, vals, xl, title, pct in ((axes[0], turn, "turnover per rebalance (% of value)", "Turnover", True),
                                     (axes[1], drag, "cost drag (annualised, bp)", "Cost drag", False)):
        v = _np.array([_np.nan if x is None else x for x in vals], dtype=float)
        shown = v if pct else v * 1e4
        ax.barh(y, shown, color=cols, height=0.6)
        _S.style_axes(ax, xlabel=xl, title=title, grid="x")
        if pct:
            _S.pct_axis(ax.xaxis)
        ax.set_yticks(y)
        ax.set_yticklabels(labels, fontsize=_S.FONT - 0.5)
        ax.tick_params(axis="y", length=0)
        for lab, val in zip(labels, shown):
            rows.append({"measure": xl, "rule": lab, "value": val})
    return _S.png(fig), F.WIDTH, 0.9 + 0.35 * len(names), pd.DataFrame(rows)


# ----------------------------------------------------------------------------- 8 self-check

def _selfcheck_section(run: RunFolder) -> Section:
    sc = dig(run.summary, "self_check")
    reason = _skip_reason(run, "self_check") or _skip_reason(run, "resample")
    if reason or not isinstance(sc, dict) or not sc:
        why = reason or "the run holds no engine self-check"
        return Section(8, "selfcheck", "Engine self-check", (_absent(why),), True, why)
    P = ("self_check",)
    z = as_float(sc.get("standardised_difference"))
    rows = [(text_cell("Expected population CEQ (utility) of the plug-in rule"),
             cell(run, P + ("expected_utility_closed_form",), fmt="num6"),
             cell(run, P + ("expected_utility_monte_carlo",), fmt="num6"),
             cell(run, P + ("monte_carlo_se",), fmt="num6"),
             cell(run, P + ("standardised_difference",), fmt="snum3"),
             text_cell("n/a" if z is None else ("PASS" if abs(z) < 3 else "FAIL"),
                       status=None if z is None else ("pass" if abs(z) < 3 else "fail")))]
    what = str(sc.get("check") or "")
    detail = []
    for key, label in (("draws", "draws"), ("length", "T"), ("n_assets", "N"), ("risk_aversion", "risk aversion")):
        x = as_float(sc.get(key))
        if x is not None:
            detail.append(f"{label} = {x:g}")
    blocks = [Para(SIMULATED, "hypothetical"),
              Para("Where the study's setting has a closed form (normal iid returns), the engine's "
                   "Monte Carlo average is set beside it. The standardised difference is (Monte Carlo "
                   "minus closed form) divided by the Monte Carlo standard error; beyond 3 in absolute "
                   "value it would point to a fault in the engine.", "body")]
    if what:
        blocks.append(Para("Check: " + what + (" (" + ", ".join(detail) + ")" if detail else "") + ".",
                           "note"))
    setting = str(sc.get("setting") or "")
    if setting:
        blocks.append(Para("Draws used for the check: " + setting + ".", "note"))
    blocks.append(Table(key="selfcheck", caption="Closed form against Monte Carlo (per period, not annualised)",
                        columns=("Quantity", "Closed form", "Monte Carlo", "MC s.e.",
                                 "Standardised diff.", "Within 3 s.e."),
                        rows=tuple(rows)))
    return Section(8, "selfcheck", "Engine self-check", tuple(blocks), True)


# ----------------------------------------------------------------------------- 9 notes

def _notes_section(run: RunFolder) -> Section:
    gen = dig(run.summary, "resample", "generator", default="") or ""
    gen = str(gen.get("name", "")) if isinstance(gen, dict) else str(gen)
    P = []
    P.append(Para("Status of the figures. Every simulated and every backtested figure in this pack is "
                  "hypothetical. Simulated figures come from synthetic histories drawn from a population "
                  "that was itself estimated; backtested figures apply the rules to past data chosen "
                  "after the fact. Neither is the record of a live portfolio, which would also bear "
                  "market impact, timing, fees and operational frictions not modelled here.", "body"))
    P.append(Para("Decision support, not advice. This pack is decision support, not investment advice. "
                  "Decisions rest with the fiduciary, under its own policies, the applicable "
                  "regulation and licensed professional advice.", "caution"))
    P.append(Para("Normality. The normal generator assumes returns are independent and normally "
                  "distributed; it understates the chance of large losses when returns have fat tails. "
                  "The Student t generator keeps the same mean and covariance with fatter tails. The "
                  "bootstrap generators reuse the history's own rows and so keep its tails and (block "
                  "bootstrap) its short-range dependence, but cannot produce events the history never saw."
                  + (f" This run used the '{gen}' generator." if gen else ""), "body"))
    P.append(Para("Stationarity. All generators treat the population as fixed over time. If means, "
                  "volatilities or correlations shift (regimes, structural change), the population is "
                  "wrong and so is every figure derived from it; the backtest is the only part of the "
                  "pack that meets changing conditions, and only those of the past.", "body"))
    P.append(Para("Estimation error in the population. The population is an estimate. Resampling "
                  "measures how much the allocation would move if the world had dealt a different "
                  "sample from that estimate; it cannot remove errors already in the estimate.", "body"))
    P.append(Para("Resampled (averaged) allocations. Averaging allocations over synthetic histories "
                  "(Michaud 1998) spreads weights, but Scherer (2002) notes that every draw is centred on "
                  "the same noisy estimates, so averaging inherits their error, that most of the extra "
                  "diversification comes from long-only bounds, and that the method lacks a "
                  "decision-theoretic footing; it is shown here as a diagnostic of weight uncertainty.",
                  "body"))
    P.append(Para("Estimators. The sample mean is the noisiest input: a few years of data pin down "
                  "a mean return only to within several percentage points a year, and mean-variance "
                  "rules act on those differences. Shrinkage estimators (Ledoit-Wolf, Bayes-Stein) "
                  "trade a little bias for much less variance; their intensity, shown in section 2, "
                  "says how far the data were pulled toward the target. Rules that ignore means "
                  "(minimum variance, risk parity) avoid the noisiest input but not the covariance "
                  "error.", "body"))
    P.append(Para("Certainty equivalent and risk aversion. CEQ ranks allocations for one investor "
                  "with the stated risk aversion; another risk aversion can reorder them. All rules "
                  "here are scored with the same value (section 2). 1/N is the yardstick because it "
                  "uses no estimates at all, not because it is recommended.", "body"))
    P.append(Para("Backtest statistics. p-values test one rule against 1/N at a time; with several rules "
                  "some will look significant by chance, which the deflated Sharpe ratio partly corrects "
                  "for by counting the configurations tried. Sharpe ratio tests need long samples: a "
                  "few years of monthly data rarely separate two reasonable rules.", "body"))
    P.append(Para("Annualisation and formatting. Figures are computed per period and annualised only "
                  "for display: means and CEQ times the periods per year, volatilities and Sharpe "
                  "ratios times its square root, assuming independent periods. Percentages show 1 or 2 "
                  "decimals, p-values 3 decimals (below 0.0005 shown as <0.001). Every number in the "
                  "tables is traceable: the HTML version records, for each, the field of summary.json "
                  "it comes from and the transformation applied, and pack/data/ holds the numbers "
                  "unrounded.", "body"))
    return Section(9, "notes", "Method notes and cautions", tuple(P))


# ----------------------------------------------------------------------------- 10 reproducibility

def _repro_section(run: RunFolder) -> Section:
    m = run.manifest
    blocks = []
    if not m:
        blocks.append(_absent("the run folder has no manifest.json"))
    versions = dig(m, "versions") or dig(m, "packages")
    items = []
    if isinstance(versions, dict):
        items.append(("Package versions", ", ".join(f"{k} {v}" for k, v in versions.items())))
    plat = dig(m, "platform")
    if isinstance(plat, dict):
        plat = ", ".join(f"{k}: {v}" for k, v in plat.items() if v not in (None, ""))
    items.append(("Platform", str(plat or "n/a")))
    cmd = dig(m, "command") or dig(m, "argv")
    if isinstance(cmd, list):
        cmd = " ".join(str(c) for c in cmd)
    items.append(("Command line", str(cmd or "n/a")))
    items.append(("Study file", str(dig(m, "study_file") or dig(run.summary, "study", "file", default="n/a"))))
    seed = dig(m, "seed", default=dig(run.summary, "resample", "seed"))
    items.append(("Seed", "n/a" if seed is None else str(seed)))
    items.append(("Data SHA-256", str(dig(m, "data_sha256") or dig(run.summary, "data", "sha256", default="n/a"))))
    wall = as_float(dig(m, "wall_time_seconds") or dig(m, "wall_time"))
    items.append(("Wall time", "n/a" if wall is None else f"{wall:.1f} s"))
    items.append(("Run created", run.created or "n/a"))
    repro = dig(m, "reproduce") or dig(m, "reproduce_command")
    if isinstance(repro, list):
        repro = " ".join(str(c) for c in repro)
    items.append(("To reproduce", str(repro or (cmd or "n/a"))))
    blocks.append(_kv_table("reproducibility", "The run's manifest", items,
                            note="The pack is rebuilt from this folder alone by: noiseproof pack RUN_DIR"))
    text = dig(m, "study_text") or dig(m, "study", "text")
    if isinstance(text, str) and text.strip():
        blocks.append(Para("Study file as run:", "body"))
        blocks.append(Para(text.rstrip(), "code"))
    return Section(10, "reproducibility", "Reproducibility", tuple(blocks))


# ----------------------------------------------------------------------------- all

def build_sections(run: RunFolder) -> tuple:
    """The ten sections in reading order."""
    verdict = evaluate(run)
    return (
        _verdict_section(run, verdict),
        _inputs_section(run),
        _stability_section(run),
        _frontiers_section(run),
        _cost_section(run),
        _history_section(run),
        _backtest_section(run),
        _selfcheck_section(run),
        _notes_section(run),
        _repro_section(run),
    )
