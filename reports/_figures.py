"""The pack's figures. Each function takes plain numbers (already annualised where the
axis says so), draws them on an explicit Figure, and returns the PNG together with a
DataFrame holding exactly the numbers drawn (written to ``pack/data/<key>.csv``).
"""
from __future__ import annotations

from typing import Optional, Sequence

import numpy as np
import pandas as pd

from . import _style as S

__all__ = ["weight_bands", "frontiers", "ranges", "grouped_bars", "sweep", "backtest_panels"]

WIDTH = 7.0   # inches: the printed text width


def _legend(ax, **kw):
    leg = ax.legend(fontsize=S.FONT - 1, frameon=False, **kw)
    return leg


def weight_bands(assets: Sequence[str], rules: Sequence[dict], equal_weight: Optional[float]):
    """Per asset and rule: 5-95 (thin) and 25-75 (thick) bands, median tick, in-sample
    (diamond) and averaged (circle) weights; 1/N as a dashed line.

    ``rules``: dicts with name, colour, p5, p25, p50, p75, p95, in_sample, averaged
    (sequences over ``assets``, decimal weights; None entries are skipped).
    """
    n = len(assets)
    k = max(1, len(rules))
    height = 1.4 + 0.26 * n
    fig = S.new_figure(WIDTH, height)
    axes = fig.subplots(1, k, sharey=True, sharex=True, squeeze=False)[0]
    y = np.arange(n)[::-1]
    rows = []
    for ax, r in zip(axes, rules):
        c = r["colour"]
        for i, a in enumerate(assets):
            vals = {q: r[q][i] for q in ("p5", "p25", "p50", "p75", "p95", "in_sample", "averaged")}
            rows.append({"rule": r["name"], "asset": a, **vals})
            if vals["p5"] is not None and vals["p95"] is not None:
                ax.plot([vals["p5"], vals["p95"]], [y[i], y[i]], color=c, lw=1.0, alpha=0.7,
                        solid_capstyle="butt")
            if vals["p25"] is not None and vals["p75"] is not None:
                ax.plot([vals["p25"], vals["p75"]], [y[i], y[i]], color=c, lw=5.0, alpha=0.45,
                        solid_capstyle="butt")
            if vals["p50"] is not None:
                ax.plot([vals["p50"]], [y[i]], marker="|", color=c, ms=8, mew=1.4)
        ins = [v if v is not None else np.nan for v in r["in_sample"]]
        avg = [v if v is not None else np.nan for v in r["averaged"]]
        ax.plot(ins, y, ls="none", marker="D", ms=4.2, mfc="white", mec=S.INK, mew=0.9,
                label="in-sample")
        ax.plot(avg, y, ls="none", marker="o", ms=3.6, color=c, mec=S.INK, mew=0.5,
                label="averaged over draws")
        if equal_weight is not None:
            ax.axvline(equal_weight, color=S.EQUAL_COLOUR, ls=(0, (4, 3)), lw=0.8, label="1/N")
        S.style_axes(ax, xlabel="weight (% of portfolio)", title=r["name"], grid="x")
        S.pct_axis(ax.xaxis)
        ax.set_yticks(y)
        ax.set_yticklabels(assets, fontsize=S.FONT - 0.5)
        ax.tick_params(axis="y", length=0)
    values = [v for row in rows for key, v in row.items()
              if key not in ("rule", "asset") and v is not None and np.isfinite(v)]
    if equal_weight is not None:
        values.append(equal_weight)
    lo, hi = min(values + [0.0]), max(values + [0.0])
    pad = 0.04 * (hi - lo if hi > lo else 1.0)
    axes[0].set_xlim(lo - pad if lo < 0 else -pad / 2, hi + pad)
    from matplotlib.lines import Line2D

    grey = "#7f8793"
    handles = [Line2D([], [], color=grey, lw=1.0), Line2D([], [], color=grey, lw=5, alpha=0.45),
               Line2D([], [], color=grey, ls="none", marker="|", ms=8, mew=1.4),
               Line2D([], [], ls="none", marker="D", ms=4.2, mfc="white", mec=S.INK, mew=0.9),
               Line2D([], [], ls="none", marker="o", ms=3.6, color=grey, mec=S.INK, mew=0.5)]
    labels = ["5th to 95th percentile", "25th to 75th percentile", "median", "in-sample weight",
              "averaged over draws"]
    if equal_weight is not None:
        handles.append(Line2D([], [], color=S.EQUAL_COLOUR, ls=(0, (4, 3)), lw=0.8))
        labels.append("1/N")
    fig.legend(handles, labels, loc="outside lower center", ncol=3, fontsize=S.FONT - 1,
               frameon=False, handlelength=2.0)
    data = pd.DataFrame(rows, columns=["rule", "asset", "p5", "p25", "p50", "p75", "p95",
                                       "in_sample", "averaged"])
    if equal_weight is not None:
        data["equal_weight"] = equal_weight
    return S.png(fig), WIDTH, height, data


def frontiers(curves: Sequence[dict], cloud: Optional[pd.DataFrame], points: Sequence[dict],
              xlabel: str, ylabel: str):
    """Frontier curves (dicts: label, x, y, colour, ls), a cloud of per-draw portfolios
    (DataFrame with x, y) and marked points (dicts: label, x, y, colour, marker)."""
    height = 5.0
    fig = S.new_figure(WIDTH, height)
    ax = fig.subplots()
    frames = []
    if cloud is not None and len(cloud):
        ax.scatter(cloud["x"], cloud["y"], s=4, color="#56B4E9", alpha=0.35, lw=0,
                   label="per-draw actual portfolios", rasterized=True)
        frames.append(cloud.assign(series="per-draw actual portfolios")[["series", "x", "y"]])
    for c in curves:
        ax.plot(c["x"], c["y"], color=c["colour"], ls=c["ls"], lw=1.6, label=c["label"])
        frames.append(pd.DataFrame({"series": c["label"], "x": c["x"], "y": c["y"]}))
    for p in points:
        ax.plot([p["x"]], [p["y"]], ls="none", marker=p["marker"], ms=7, color=p["colour"],
                mec=S.INK, mew=0.6, label=p["label"])
        frames.append(pd.DataFrame({"series": [p["label"]], "x": [p["x"]], "y": [p["y"]]}))
    S.style_axes(ax, xlabel=xlabel, ylabel=ylabel)
    S.pct_axis(ax.xaxis, 1, nbins=7)
    S.pct_axis(ax.yaxis, 1)
    fig.legend(loc="outside lower center", ncol=2, fontsize=S.FONT - 1, frameon=False)
    data = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=["series", "x", "y"])
    data = data.rename(columns={"x": xlabel, "y": ylabel})
    return S.png(fig), WIDTH, height, data


def ranges(panels: Sequence[dict]):
    """Side-by-side panels of per-rule distributions. Each panel: title, xlabel, percent
    (bool), rows (dicts: rule, colour, centre (mean), lo/hi (5th/95th percentiles), q25/q75,
    optimum), refs (dicts: label, value, ls) drawn as vertical lines."""
    k = len(panels)
    n = max(len(p["rows"]) for p in panels)
    height = 1.5 + 0.45 * n
    fig = S.new_figure(WIDTH, height)
    axes = fig.subplots(1, k, squeeze=False)[0]
    rows = []
    handles = {}
    for j, (ax, p) in enumerate(zip(axes, panels)):
        y = np.arange(len(p["rows"]))[::-1]
        for yi, r in zip(y, p["rows"]):
            if r.get("lo") is not None and r.get("hi") is not None:
                h = ax.plot([r["lo"], r["hi"]], [yi, yi], color=r["colour"], lw=1.2,
                            solid_capstyle="butt")[0]
                handles.setdefault("5th to 95th percentile over draws", h)
            if r.get("q25") is not None and r.get("q75") is not None:
                h = ax.plot([r["q25"], r["q75"]], [yi, yi], color=r["colour"], lw=6, alpha=0.5,
                            solid_capstyle="butt")[0]
                handles.setdefault("25th to 75th percentile", h)
            if r.get("centre") is not None:
                h = ax.plot([r["centre"]], [yi], ls="none", marker="o", ms=5, color=r["colour"],
                            mec=S.INK, mew=0.6)[0]
                handles.setdefault("mean over draws", h)
            if r.get("optimum") is not None:
                h = ax.plot([r["optimum"]], [yi], ls="none", marker="|", ms=13, mew=2.0,
                            color=S.INK)[0]
                handles.setdefault("population optimum under the rule's constraints", h)
            rows.append({"panel": p["title"], "rule": r["rule"], "mean": r.get("centre"),
                         "p5": r.get("lo"), "p25": r.get("q25"), "p75": r.get("q75"),
                         "p95": r.get("hi"), "optimum": r.get("optimum")})
        for ref in p["refs"]:
            if ref["value"] is None:
                continue
            h = ax.axvline(ref["value"], color=S.EQUAL_COLOUR, ls=ref["ls"], lw=0.9)
            handles.setdefault(ref["label"], h)
            rows.append({"panel": p["title"], "rule": ref["label"], "mean": ref["value"]})
        S.style_axes(ax, xlabel=p["xlabel"], title=p["title"], grid="x")
        if p.get("percent"):
            S.pct_axis(ax.xaxis, 1)
        ax.set_yticks(y)
        ax.set_yticklabels([r["rule"] for r in p["rows"]] if j == 0 else [""] * len(y),
                           fontsize=S.FONT - 0.5)
        ax.set_ylim(-0.7, len(y) - 0.3)
        ax.tick_params(axis="y", length=0)
    if handles:
        from matplotlib.lines import Line2D

        grey = "#7f8793"
        proxy = {"5th to 95th percentile over draws": Line2D([], [], color=grey, lw=1.2),
                 "25th to 75th percentile": Line2D([], [], color=grey, lw=6, alpha=0.5),
                 "mean over draws": Line2D([], [], ls="none", marker="o", ms=5, color=grey,
                                           mec=S.INK, mew=0.6)}
        labels = list(handles)
        fig.legend([proxy.get(k, handles[k]) for k in labels], labels, loc="outside lower center",
                   ncol=2, fontsize=S.FONT - 1, frameon=False)
    data = pd.DataFrame(rows, columns=["panel", "rule", "mean", "p5", "p25", "p75", "p95", "optimum"])
    return S.png(fig), WIDTH, height, data


def grouped_bars(categories: Sequence[str], series: Sequence[dict], xlabel: str, percent: bool,
                 decimals: int = 1):
    """Horizontal grouped bars: one group per category, one bar per series
    (dicts: label, values, colour, hatch)."""
    n, k = len(categories), len(series)
    height = 1.5 + 0.22 * n * max(1, k)
    fig = S.new_figure(WIDTH, min(height, 8.5))
    ax = fig.subplots()
    y = np.arange(n)[::-1].astype(float)
    h = 0.8 / max(k, 1)
    rows = []
    for j, s in enumerate(series):
        vals = np.array([np.nan if v is None else v for v in s["values"]], dtype=float)
        ax.barh(y + (k - 1) / 2 * h - j * h, vals, height=h * 0.92, color=s["colour"],
                hatch=s.get("hatch"), edgecolor="white", lw=0.3, label=s["label"])
        for c, v in zip(categories, s["values"]):
            rows.append({"category": c, "series": s["label"], xlabel: v})
    ax.axvline(0, color=S.MUTED, lw=0.6)
    S.style_axes(ax, xlabel=xlabel, grid="x")
    if percent:
        S.pct_axis(ax.xaxis, decimals)
    ax.set_yticks(y)
    ax.set_yticklabels(categories, fontsize=S.FONT - 0.5)
    ax.tick_params(axis="y", length=0)
    fig.legend(loc="outside lower center", ncol=min(k, 3), fontsize=S.FONT - 1, frameon=False)
    return S.png(fig), WIDTH, min(height, 8.5), pd.DataFrame(rows)


def sweep(x: Sequence[float], series: Sequence[dict], xlabel: str, ylabel: str,
          lines: Sequence[tuple]):
    """Lines over history length (dicts: label, y, colour, ls, marker); horizontal guide
    ``lines`` as (value, label)."""
    height = 3.4
    fig = S.new_figure(WIDTH, height)
    ax = fig.subplots()
    rows = []
    for s in series:
        ax.plot(x, s["y"], color=s["colour"], ls=s["ls"], marker=s["marker"], ms=4, lw=1.5,
                label=s["label"])
        for xi, yi in zip(x, s["y"]):
            rows.append({"series": s["label"], xlabel: xi, ylabel: yi})
    for value, label in lines:
        ax.axhline(value, color=S.MUTED, lw=0.8, ls=(0, (2, 2)))
        ax.annotate(label, (1.0, value), xycoords=("axes fraction", "data"), xytext=(3, 0),
                    textcoords="offset points", va="center", fontsize=S.FONT - 1.5, color=S.MUTED)
    S.style_axes(ax, xlabel=xlabel, ylabel=ylabel)
    S.pct_axis(ax.yaxis)
    ax.set_ylim(-0.02, 1.02)
    ax.set_xticks(list(x))
    ax.set_xticklabels([f"{v:g}" for v in x])
    _legend(ax, loc="center left", bbox_to_anchor=(1.06, 0.5))
    return S.png(fig), WIDTH, height, pd.DataFrame(rows)


def backtest_panels(dates, panels: Sequence[dict]):
    """Stacked time-series panels sharing the date axis. Each panel: ylabel, percent (bool),
    log (bool), series (dicts: label, y, colour, ls), zero_line (bool)."""
    k = len(panels)
    height = 1.0 + 2.1 * k
    fig = S.new_figure(WIDTH, height)
    axes = fig.subplots(k, 1, sharex=True, squeeze=False)[:, 0]
    d = pd.to_datetime(pd.Series(dates)).to_numpy()
    frame = {"date": pd.to_datetime(pd.Series(dates)).dt.strftime("%Y-%m-%d")}
    for ax, p in zip(axes, panels):
        for s in p["series"]:
            ax.plot(d, s["y"], color=s["colour"], ls=s["ls"], lw=1.2, label=s["label"])
            frame[f"{p['key']}: {s['label']}"] = np.asarray(s["y"], dtype=float)
        if p.get("zero_line"):
            ax.axhline(p.get("baseline", 0.0), color=S.MUTED, lw=0.6)
        if p.get("log"):
            ax.set_yscale("log")
            from matplotlib.ticker import FuncFormatter, NullFormatter
            ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.2f}"))
            ax.yaxis.set_minor_formatter(NullFormatter())
        S.style_axes(ax, ylabel=p["ylabel"], title=p["title"])
        if p.get("percent"):
            S.pct_axis(ax.yaxis)
    axes[-1].set_xlabel("date (end of period)", fontsize=S.FONT, color=S.INK)
    _legend(axes[0], loc="upper left", ncol=min(3, len(panels[0]["series"])))
    return S.png(fig), WIDTH, height, pd.DataFrame(frame)
