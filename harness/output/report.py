"""Reports: comparison tables (Markdown, CSV, HTML) and plots from recorded runs."""

from __future__ import annotations

import base64
import html
import io
import math
from pathlib import Path

import numpy as np
import pandas as pd
from logtrial.errors import DataError
from logtrial.running.experiment import vocabulary_label

# Headline figures: (record key, column title).
HEADLINE = [
    ("auprc", "AUPRC"),
    ("auroc", "AUROC"),
    ("f1", "F1"),
    ("recall_predicted", "failures predicted"),
    ("false_alarms_per_predicted_failure", "false alarms / predicted failure"),
    ("alarms_per_week_per_100_entities", "alarms / week / 100 nodes"),
    ("lead_time_median_h", "median lead (h)"),
]
# For the detect task nothing is predicted ahead: count failures caught during them instead.
HEADLINE_DETECT = [
    ("auprc", "AUPRC"),
    ("auroc", "AUROC"),
    ("f1", "F1"),
    ("recall_detected_or_predicted", "failures caught"),
    ("false_alarms_per_caught_failure", "false alarms / caught failure"),
    ("alarms_per_week_per_100_entities", "alarms / week / 100 nodes"),
]
CURVES = [("auprc", "AUPRC"), ("recall_predicted", "share of failures predicted"),
          ("false_alarms_per_predicted_failure", "false alarms per predicted failure")]


def load_results(records: list[dict]) -> pd.DataFrame:
    """One row per finished run: config columns, metrics and interval bounds."""
    rows = []
    for r in records:
        if r.get("status") != "finished":
            continue
        cfg = r["config"]
        row = {
            "run_id": r["run_id"], "dataset": cfg["dataset"],
            "windows": " ".join(f"{k}={v}" for k, v in cfg["windows"].items()),
            "task": " ".join(f"{k}={v}" for k, v in cfg["task"].items()),
            "vocabulary": vocabulary_label(cfg.get("vocabulary")),
            "noise": cfg["noise"].get("name", "clean"), "noise_level": cfg["noise"].get("level"),
            "detector": cfg["detector"].get("label") or cfg["detector"]["name"], "seed": cfg["seed"],
            "threshold": r["threshold"]["value"],
        }
        row.update({k: v for k, v in r["metrics"].items() if isinstance(v, (int, float)) or v is None})
        for k, (lo, hi) in (r.get("intervals") or {}).items():
            row[f"{k}_low"], row[f"{k}_high"] = lo, hi
        rows.append(row)
    if not rows:
        raise DataError("no finished runs to report (run the experiment first: logtrial run EXPERIMENT.yaml)")
    return pd.DataFrame(rows)


def summarise(results: pd.DataFrame) -> pd.DataFrame:
    """Mean over seeds per (dataset, windows, task, noise, detector); intervals averaged over seeds."""
    keys = ["dataset", "vocabulary", "windows", "task", "noise", "detector"]
    num = [c for c in results.columns if c not in keys + ["run_id", "seed", "noise_level"]
           and pd.api.types.is_numeric_dtype(results[c])]
    with np.errstate(all="ignore"):
        agg = results.groupby(keys, sort=False)[num].mean()
    agg["seeds"] = results.groupby(keys, sort=False)["seed"].nunique()
    agg["noise_level"] = results.groupby(keys, sort=False)["noise_level"].first()
    return agg.reset_index()


def _cell(row: pd.Series, key: str) -> str:
    v = row.get(key)
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "–"
    if isinstance(v, float) and math.isinf(v):
        return "∞"
    text = f"{v:.3f}" if abs(v) < 10 else f"{v:.1f}"
    lo, hi = row.get(f"{key}_low"), row.get(f"{key}_high")
    if lo is not None and hi is not None and not (pd.isna(lo) or pd.isna(hi)):
        fmt = (lambda x: "∞" if math.isinf(x) else (f"{x:.2f}" if abs(x) < 10 else f"{x:.0f}"))
        text += f" [{fmt(lo)}, {fmt(hi)}]"
    return text


def headline_table(summary: pd.DataFrame) -> pd.DataFrame:
    """The comparison table a person reads: one row per detector and noise level."""
    out = pd.DataFrame({"dataset": summary["dataset"], "detector": summary["detector"], "noise": summary["noise"]})
    for pos, col in ((2, "task"), (2, "windows"), (2, "vocabulary")):
        if summary[col].nunique() > 1:  # only the axes that vary get a column
            out.insert(pos, col, summary[col])
    detect = summary["task"].astype(str).str.contains("name=detect").all()
    for key, title in (HEADLINE_DETECT if detect else HEADLINE):
        if key in summary.columns:
            out[title] = [_cell(r, key) for _, r in summary.iterrows()]
    return out


def compact(table: pd.DataFrame) -> pd.DataFrame:
    """The table for a terminal: constant columns dropped, interval brackets removed."""
    keep = [c for c in table.columns if c in ("detector", "noise") or table[c].nunique() > 1]
    out = table[keep].copy()
    for c in out.columns:
        if c not in ("detector", "noise", "dataset"):
            out[c] = out[c].astype(str).str.replace(r" \[.*\]$", "", regex=True)
    return out


def to_markdown(table: pd.DataFrame) -> str:
    """A Markdown pipe table."""
    cols = list(table.columns)
    lines = ["| " + " | ".join(cols) + " |", "|" + "|".join("---" for _ in cols) + "|"]
    lines += ["| " + " | ".join(str(v) for v in row) + " |" for row in table.itertuples(index=False)]
    return "\n".join(lines)


def to_text(table: pd.DataFrame, max_width: int = 160) -> str:
    """A plain aligned table for the terminal."""
    cols = list(table.columns)
    widths = [max(len(str(c)), *(len(str(v)) for v in table[c])) for c in cols]
    head = "  ".join(str(c).ljust(w) for c, w in zip(cols, widths))
    body = ["  ".join(str(v).ljust(w) for v, w in zip(row, widths)) for row in table.itertuples(index=False)]
    return "\n".join([head, "  ".join("-" * w for w in widths), *body])


def _noise_axis(summary: pd.DataFrame) -> tuple[dict, str]:
    """x position per noise level: its numeric level when every level has one, else its order."""
    names = list(dict.fromkeys(summary["noise"]))
    levels = summary.groupby("noise", sort=False)["noise_level"].first()
    if levels.notna().all():
        return {n: float(levels[n]) for n in names}, "noise level"
    return {n: float(i) for i, n in enumerate(names)}, "noise spec"


def robustness_figure(summary: pd.DataFrame):
    """Metric against noise level, one line per detector, shaded intervals."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    xs, xlabel = _noise_axis(summary)
    curves = CURVES
    if summary["task"].astype(str).str.contains("name=detect").all():
        curves = [("auprc", "AUPRC"), ("recall_detected_or_predicted", "share of failures caught"),
                  ("false_alarms_per_caught_failure", "false alarms per caught failure")]
    present = [(k, t) for k, t in curves if k in summary.columns]
    fig, axes = plt.subplots(1, len(present), figsize=(5.2 * len(present), 4.2), squeeze=False)
    colours = plt.get_cmap("tab20").colors
    for ax, (key, title) in zip(axes[0], present):
        varying = [c for c in ("dataset", "vocabulary", "windows", "task") if summary[c].nunique() > 1]
        series = summary["detector"]
        for c in varying:
            series = series + " | " + summary[c].astype(str)
        for i, (det, g) in enumerate(summary.groupby(series, sort=False)):
            g = g.assign(x=g["noise"].map(xs)).sort_values("x")
            y = g[key].replace([np.inf, -np.inf], np.nan)
            (line,) = ax.plot(g["x"], y, marker="o", label=det, color=colours[(2 * i) % 20 + (2 * i) // 20 % 2])
            if f"{key}_low" in g:
                lo = g[f"{key}_low"].replace([np.inf, -np.inf], np.nan)
                hi = g[f"{key}_high"].replace([np.inf, -np.inf], np.nan)
                ax.fill_between(g["x"], lo, hi, alpha=0.07, color=line.get_color())
        if key.startswith("false_alarms_per"):
            ax.set_yscale("log")
        ax.set_title(title)
        ax.set_xlabel(xlabel)
        ax.set_xticks(list(xs.values()), [f"{n}" for n in xs] if xlabel == "noise spec" else
                      [f"{v:g}" for v in xs.values()], rotation=30 if xlabel == "noise spec" else 0)
        ax.grid(alpha=0.3)
    axes[0][0].legend(fontsize=7, ncol=2)
    fig.suptitle("Robustness to label noise (test scored against the truth; shaded: bootstrap interval)")
    fig.tight_layout()
    return fig


def lead_time_figure(records: list[dict], noise: str, order: list[str] | None = None):
    """Distribution of lead times (hours) of predicted failures per detector at one noise level."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    data: dict[str, list[float]] = {}
    for r in records:
        if r.get("status") == "finished" and r["config"]["noise"].get("name", "clean") == noise:
            det = r["config"]["detector"].get("label") or r["config"]["detector"]["name"]
            data.setdefault(det, []).extend(r.get("lead_times_h") or [])
    fig, ax = plt.subplots(figsize=(max(6, 0.7 * len(data) + 2), 4.2))
    rank = {d: i for i, d in enumerate(order or [])}
    names = sorted(data, key=lambda d: (rank.get(d, len(rank)), d))
    ax.boxplot([data[n] if data[n] else [np.nan] for n in names], showfliers=True)
    ax.set_xticks(range(1, len(names) + 1), names, rotation=35, ha="right")
    ax.set_ylabel("lead time before failure (hours)")
    ax.set_title(f"Warning lead time of predicted failures (noise: {noise}, all seeds)")
    ax.grid(alpha=0.3, axis="y")
    fig.tight_layout()
    return fig


def pr_figure(records: list[dict], store, noise: str, order: list[str] | None = None):
    """Precision-recall curves on the test windows per detector (first seed) at one noise level."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from sklearn.metrics import precision_recall_curve

    fig, ax = plt.subplots(figsize=(6.4, 4.8))
    ax.set_prop_cycle(color=plt.get_cmap("tab20").colors)
    rank = {d: i for i, d in enumerate(order or [])}
    seen = set()

    def position(r: dict) -> tuple:
        det = r["config"]["detector"].get("label") or r["config"]["detector"]["name"]
        return rank.get(det, len(rank)), det, r["config"]["seed"]

    for r in sorted((r for r in records if r.get("status") == "finished"), key=position):
        det = r["config"]["detector"].get("label") or r["config"]["detector"]["name"]
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
        ax.plot(rc, p, label=f"{det} (AP {r['metrics'].get('auprc', float('nan')):.2f})")
        seen.add(det)
    ax.set_xlabel("recall (test windows)")
    ax.set_ylabel("precision")
    ax.set_title(f"Precision-recall, test split (noise: {noise})")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def _png(fig) -> bytes:
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    plt.close(fig)
    return buf.getvalue()


def order_like(summary: pd.DataFrame, detectors: list[str], noises: list[str]) -> pd.DataFrame:
    """Rows in the experiment's order: by detector as listed, then by noise level as listed."""
    d_rank = {d: i for i, d in enumerate(detectors)}
    n_rank = {n: i for i, n in enumerate(noises)}
    key = summary["detector"].map(d_rank).fillna(len(d_rank)) * 1000 + summary["noise"].map(n_rank).fillna(999)
    return summary.assign(_k=key).sort_values(["dataset", "vocabulary", "windows", "task", "_k"],
                                              kind="stable").drop(columns="_k")


def write_report(output: Path, title: str, detectors: list[str] | None = None,
                 noises: list[str] | None = None, run_ids: set[str] | None = None) -> dict:
    """Write report.md, results.csv, summary.csv, report.html and PNG plots into ``output``; return paths.

    With ``run_ids`` only those runs are reported (records of other configurations left in
    the same folder, e.g. from an earlier version of the experiment, are ignored).
    """
    from logtrial.running.store import RunStore

    store = RunStore(output)
    records = [r for r in store.records() if run_ids is None or r.get("run_id") in run_ids]
    results = load_results(records)
    summary = order_like(summarise(results), detectors or [], noises or [])
    table = headline_table(summary)
    failed = [r for r in records if r.get("status") == "failed"]
    out = Path(output)
    results.sort_values(["dataset", "detector", "noise", "seed"]).to_csv(out / "results.csv", index=False,
                                                                         float_format="%.6g")
    summary.to_csv(out / "summary.csv", index=False, float_format="%.6g")
    first_noise = summary["noise"].iloc[0]
    # Lead-time and PR plots pool runs: only those of the first dataset / vocabulary / windows / task.
    axes = ["dataset", "vocabulary", "windows", "task"]
    same = (results[axes] == summary[axes].iloc[0]).all(axis=1)
    plotted = [r for r in records if r.get("run_id") in set(results.loc[same, "run_id"])]
    figs = {"robustness.png": robustness_figure(summary)}
    if not summary["task"].astype(str).str.contains("name=detect").all():  # lead times exist only when predicting
        figs["lead_times.png"] = lead_time_figure(plotted, first_noise, list(summary["detector"].drop_duplicates()))
    figs["pr_curves.png"] = pr_figure(plotted, store, first_noise, list(summary["detector"].drop_duplicates()))
    pngs = {name: _png(f) for name, f in figs.items()}
    for name, blob in pngs.items():
        (out / name).write_bytes(blob)
    note = ("Each cell: mean over seeds, with the bootstrap interval (averaged over seeds) in brackets. "
            "Test windows are scored against the true incidents; noise only touches training and "
            "validation labels.")
    md = [f"# {title}", "", note, "", to_markdown(table), ""]
    if failed:
        md += [f"{len(failed)} run(s) failed:", ""] + [f"- `{r['run_id']}`: {r.get('error', '')}" for r in failed] + [""]
    md += [f"![{name.removesuffix('.png').replace('_', ' ')}]({name})\n" for name in pngs]
    from logtrial.output.sections import extra_sections

    md += extra_sections(records, store, out)
    (out / "report.md").write_text("\n".join(md))
    imgs = "".join(f'<figure><img alt="{html.escape(n)}" src="data:image/png;base64,{base64.b64encode(b).decode()}">'
                   f"</figure>" for n, b in pngs.items())
    page = (
        "<!doctype html><html><head><meta charset='utf-8'><title>" + html.escape(title) + "</title><style>"
        "body{font-family:sans-serif;margin:2em;color:#222}table{border-collapse:collapse;font-size:13px}"
        "th,td{border:1px solid #ccc;padding:4px 8px;text-align:left}th{background:#f3f3f3}"
        "img{max-width:100%}figure{margin:1.5em 0}</style></head><body>"
        f"<h1>{html.escape(title)}</h1><p>{html.escape(note)}</p>"
        + table.to_html(index=False, escape=True) + imgs + "</body></html>"
    )
    (out / "report.html").write_text(page)
    return {"markdown": out / "report.md", "html": out / "report.html", "csv": out / "results.csv",
            "table": table, "failed": len(failed)}
