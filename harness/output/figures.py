"""Report pictures: operating curves per noise level, failures caught at each budget, lead times, PR curves.

Colours are the Okabe–Ito palette (distinguishable with the common colour-vision
deficiencies, from memory); detectors that are not highlighted are grey.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from logtrial.output.decision import OVERRUN, Board, budget_label, over_budget

OKABE_ITO = ["#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442", "#000000"]
GREY = "#B0B0B0"
HIGHLIGHT = 4


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def read_curve(store, run_id: str) -> pd.DataFrame | None:
    """A run's stored operating curve (rows of part "curve" in its scores file), or None."""
    path = store.path(run_id, ".scores.parquet")
    if not path.is_file():
        return None
    s = pd.read_parquet(path)
    if "curve_caught" not in s.columns:
        return None
    c = s[s["part"] == "curve"]
    # Highest threshold first: alarms (mostly) rise along the line; merging makes a few steps back.
    return c.sort_values("score", ascending=False) if len(c) else None


def colours_for(boards: list[Board], detectors: list[str]) -> dict[str, str]:
    """One Okabe–Ito colour per detector that is ever among the best few; grey for the rest."""
    top = []
    first_point = boards[0].point if boards else None
    for b in boards:
        if b.point != first_point:
            continue
        for d in b.rows["detector"].head(HIGHLIGHT):
            if d not in top:
                top.append(d)
    top = top[:len(OKABE_ITO)]
    return {d: (OKABE_ITO[top.index(d)] if d in top else GREY) for d in detectors}


def operating_curve_figure(records: list[dict], store, boards: list[Board], setting: str,
                           budgets: list[float], colours: dict[str, str]):
    """Share of failures caught and median lead time against alarms/week/100 (log), one column per noise level."""
    plt = _plt()
    noises = list(dict.fromkeys(b.noise for b in boards if b.setting == setting))
    predict = any(b.task == "predict" for b in boards if b.setting == setting)
    fig, axes = plt.subplots(2 if predict else 1, len(noises), figsize=(5.0 * len(noises), 7.6 if predict else 4.2),
                             squeeze=False)
    for col, noise in enumerate(noises):
        mine = [b for b in boards if b.setting == setting and b.noise == noise]
        ref = next((b for b in mine if b.point != "policy"), mine[0])
        highlighted = list(ref.rows["detector"].head(HIGHLIGHT))
        seen: set[str] = set()
        ax = axes[0][col]
        ax2 = axes[1][col] if predict else None
        drawn = []
        for r in sorted(records, key=lambda r: r["config"]["seed"]):
            det = r["config"]["detector"].get("label") or r["config"]["detector"]["name"]
            if r["config"]["noise"].get("name", "clean") != noise or det in seen or det not in set(ref.rows["detector"]):
                continue
            c = read_curve(store, r["run_id"])
            if c is None:
                continue
            seen.add(det)
            top = det in highlighted
            colour = colours.get(det, GREY) if top else GREY
            x = c["curve_alarms_per_week_per_100"].clip(lower=0.1)
            n = int(c["curve_failures"].iloc[0])
            kw = dict(color=colour, lw=1.8 if top else 0.8, alpha=1.0 if top else 0.6, zorder=3 if top else 1,
                      marker="." if top else None, ms=3)
            ax.plot(x, c["curve_caught"] / max(n, 1), label=det if top else None, **kw)
            if predict:
                ax2.plot(x, c["curve_lead_median_h"], **kw)
            drawn.append(n)
        n = max(drawn) if drawn else 0
        for b in budgets:
            for a in (ax, ax2) if predict else (ax,):
                a.axvline(b, color="#444444", ls=":", lw=1)
            ax.text(b, 0.5, f" budget {b:g}", ha="left", va="center", rotation=90, fontsize=7, color="#444444",
                    transform=ax.get_xaxis_transform())
        xlabel = "alarms per week per 100 entities (test, log scale; none drawn at 0.1)"
        ax.set_xscale("log")
        ax.set_ylim(-0.02, 1.05)
        ax.set_title(f"{noise} labels (n = {n} test failures)")
        ax.set_ylabel("share of failures " + ("predicted" if predict else "caught"))
        ax.set_xlabel(xlabel, fontsize=9)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="upper left", title="best at first budget", title_fontsize=7)
        if predict:
            ax2.set_xscale("log")
            ax2.set_xlabel(xlabel, fontsize=9)
            ax2.grid(alpha=0.3)
            ax2.set_ylabel("median lead time of predicted failures (hours)")
            if ref.horizon_h:
                ax2.axhline(ref.horizon_h, color="#444444", ls="--", lw=1)
                ax2.text(ax2.get_xlim()[0], ref.horizon_h, f" horizon {ref.horizon_h:g} h", va="bottom", fontsize=8)
    fig.suptitle("Operating curves on the test split, for reading; the decision uses thresholds chosen on "
                 "validation (dotted: budgets)", fontsize=10)
    fig.tight_layout()
    return fig


def budget_dots_figure(boards: list[Board], setting: str, records_title, colours: dict[str, str]):
    """Sorted dots with Wilson whiskers of the share caught, one panel per (operating point, noise level)."""
    plt = _plt()
    mine = [b for b in boards if b.setting == setting]
    points = list(dict.fromkeys(b.point for b in mine))
    noises = list(dict.fromkeys(b.noise for b in mine))
    n_det = max(len(b.rows) for b in mine)
    fig, axes = plt.subplots(len(noises), len(points), figsize=(3.6 * len(points), 0.28 * n_det * len(noises) + 1.6),
                             squeeze=False, sharex=True)
    for i, noise in enumerate(noises):
        for j, point in enumerate(points):
            ax = axes[i][j]
            b = next((b for b in mine if b.noise == noise and b.point == point), None)
            if b is None:
                ax.set_visible(False)
                continue
            rows = b.rows.iloc[::-1]
            y = np.arange(len(rows))
            for yy, (_, r) in zip(y, rows.iterrows()):
                colour = colours.get(r["detector"], GREY)
                colour = "#000000" if colour == GREY and r["same_as_best"] else colour
                ax.plot([r["low"], r["high"]], [yy, yy], color=colour, lw=1.5)
                ax.plot(r["share"], yy, "o", color=colour, mfc=colour if r["same_as_best"] else "white", ms=5)
            over = over_budget(b).iloc[::-1]
            ax.set_yticks(y, [f"{d} ({k}/{n}){' OVER' if o else ''}"
                              for d, k, n, o in zip(rows["detector"], rows["k"], rows["n"], over)], fontsize=7)
            ax.set_xlim(-0.02, 1.02)
            ax.grid(alpha=0.3, axis="x")
            ax.set_title(f"{records_title(b)}\n{noise} labels, n = {b.n}", fontsize=8)
            if i == len(noises) - 1:
                ax.set_xlabel("share of failures " + ("predicted" if b.task == "predict" else "caught"), fontsize=8)
    fig.suptitle("Failures caught at each operating point (whisker: 95 % Wilson interval; filled: not "
                 "distinguishable from the best by an exact McNemar test; OVER: raised more than "
                 f"{OVERRUN:g}x the budget on test)", fontsize=9)
    fig.tight_layout()
    return fig


def lead_time_figure(records: list[dict], noise: str, order: list[str], horizon_h: float | None, point: str):
    """Lead times (hours) of predicted failures per detector at one noise level and operating point."""
    plt = _plt()
    data: dict[str, list[float]] = {}
    for r in records:
        if r.get("status") == "finished" and r["config"]["noise"].get("name", "clean") == noise:
            det = r["config"]["detector"].get("label") or r["config"]["detector"]["name"]
            p = r if point == "policy" else r.get("at_budget", {}).get(point, r)
            data.setdefault(det, []).extend(p.get("lead_times_h") or [])
    rank = {d: i for i, d in enumerate(order)}
    names = sorted(data, key=lambda d: (rank.get(d, len(rank)), d))
    fig, ax = plt.subplots(figsize=(max(6, 0.7 * len(names) + 2), 4.2))
    ax.boxplot([data[n] if data[n] else [np.nan] for n in names], showfliers=True)
    ax.set_xticks(range(1, len(names) + 1), [f"{n} (n={len(data[n])})" for n in names], rotation=35, ha="right")
    if horizon_h:
        ax.axhline(horizon_h, color="#D55E00", ls="--", lw=1)
        ax.text(0.6, horizon_h, f"horizon {horizon_h:g} h", color="#D55E00", va="bottom", fontsize=8)
    ax.set_ylabel("lead time before failure (hours)")
    ax.set_xlabel("detector (n: predicted failures, all seeds)")
    where = budget_label(point) if point != "policy" else "the threshold policy"
    ax.set_title(f"Warning lead time of predicted failures at {where} ({noise} labels)", fontsize=10)
    ax.grid(alpha=0.3, axis="y")
    fig.tight_layout()
    return fig


def pr_figure(records: list[dict], store, noise: str, order: list[str], colours: dict[str, str]):
    """Precision-recall curves on the test windows per detector (first seed) at one noise level."""
    plt = _plt()
    from sklearn.metrics import precision_recall_curve

    fig, ax = plt.subplots(figsize=(6.4, 4.8))
    rank = {d: i for i, d in enumerate(order)}
    seen: set[str] = set()
    n_pos = 0

    def det_of(r: dict) -> str:
        return r["config"]["detector"].get("label") or r["config"]["detector"]["name"]

    for r in sorted((r for r in records if r.get("status") == "finished"),
                    key=lambda r: (rank.get(det_of(r), len(rank)), det_of(r), r["config"]["seed"])):
        det = det_of(r)
        if r["config"]["noise"].get("name", "clean") != noise or det in seen:
            continue
        path = store.path(r["run_id"], ".scores.parquet")
        if not path.is_file():
            continue
        s = pd.read_parquet(path)
        s = s[(s["part"] == "test") & (s["label"] >= 0)]
        if s["label"].nunique() < 2:
            continue
        p, rc, _ = precision_recall_curve(s["label"], s["score"])
        n_pos = int((s["label"] == 1).sum())
        colour = colours.get(det, GREY)
        ap = r["metrics"].get("auprc", math.nan)
        ax.plot(rc, p, color=colour, lw=1.8 if colour != GREY else 0.8,
                label=f"{det} (AP {ap:.2f})" if colour != GREY else None)
        seen.add(det)
    ax.set_xlabel("recall (test windows)")
    ax.set_ylabel("precision (test windows)")
    ax.set_title(f"Precision-recall on test windows ({noise} labels; n = {n_pos} positive windows; grey: others)",
                 fontsize=9)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig
