"""Reports: the decision section first, then comparison tables (Markdown, CSV, HTML) and plots from recorded runs."""

from __future__ import annotations

import base64
import html
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
from logtrial.errors import DataError
from logtrial.evaluation.paired import FEW_FAILURES
from logtrial.output.decision import (
    METHOD,
    OVERRUN,
    Board,
    board_table,
    decision_boards,
    format_duration,
    movement_sentence,
    noise_movement,
    point_title,
    sentence,
)
from logtrial.output.png import png_bytes
from logtrial.output.tolerance import tolerance_section
from logtrial.running.experiment import Experiment, experiment_order, vocabulary_label

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
# Figures kept per budget in results.csv (prefix b<budget>_).
BUDGET_COLUMNS = ("threshold", "failures", "predicted", "recall_predicted", "recall_detected_or_predicted",
                  "alarms_per_week_per_100_entities", "false_alarms_per_predicted_failure", "lead_time_median_h")


def _short(mapping: dict) -> str:
    """key=value pairs with durations written as 1h / 7d."""
    return " ".join(f"{k}={format_duration(v) if k in ('size', 'step', 'gap', 'horizon') else v}"
                    for k, v in mapping.items())


def load_results(records: list[dict]) -> pd.DataFrame:
    """One row per finished run: config columns, metrics and interval bounds."""
    rows = []
    for r in records:
        if r.get("status") != "finished":
            continue
        cfg = r["config"]
        row = {
            "run_id": r["run_id"], "dataset": cfg["dataset"],
            "windows": _short(cfg["windows"]),
            "task": _short(cfg["task"]),
            "vocabulary": vocabulary_label(cfg.get("vocabulary")),
            "noise": cfg["noise"].get("name", "clean"), "noise_level": cfg["noise"].get("level"),
            "detector": cfg["detector"].get("label") or cfg["detector"]["name"], "seed": cfg["seed"],
            "threshold": r["threshold"]["value"],
        }
        row.update({k: v for k, v in r["metrics"].items() if isinstance(v, (int, float)) or v is None})
        for k, (lo, hi) in (r.get("intervals") or {}).items():
            row[f"{k}_low"] = math.nan if lo is None else lo
            row[f"{k}_high"] = math.nan if hi is None else hi
        for key, point in (r.get("at_budget") or {}).items():
            for name in BUDGET_COLUMNS:
                v = point["threshold"]["value"] if name == "threshold" else point["metrics"].get(name)
                if isinstance(v, (int, float)):
                    row[f"b{key}_{name}"] = v
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
    text = f"{v:.2f}" if abs(v) < 10 else f"{v:.1f}"
    lo, hi = row.get(f"{key}_low"), row.get(f"{key}_high")
    fmt = (lambda x: f"{x:.2f}" if abs(x) < 10 else f"{x:.1f}")
    if lo is not None and not pd.isna(lo):
        text += f" [{fmt(lo)}, {fmt(hi)}]" if hi is not None and not pd.isna(hi) else f" [{fmt(lo)}, no upper bound*]"
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


def order_like(summary: pd.DataFrame, detectors: list[str], noises: list[str]) -> pd.DataFrame:
    """Rows in the experiment's order: by detector as listed, then by noise level as listed."""
    d_rank = {d: i for i, d in enumerate(detectors)}
    n_rank = {n: i for i, n in enumerate(noises)}
    key = summary["detector"].map(d_rank).fillna(len(d_rank)) * 1000 + summary["noise"].map(n_rank).fillna(999)
    return summary.assign(_k=key).sort_values(["dataset", "vocabulary", "windows", "task", "_k"],
                                              kind="stable").drop(columns="_k")


def decision_markdown(boards: list[Board], records: list[dict]) -> list[str]:
    """The decision section in Markdown: method, rankings per budget and noise level, sentences, noise movement."""
    if not boards:
        return ["## Decision", "", "No run recorded per-failure outcomes; re-run the experiment to rank detectors.", ""]
    out = ["## Decision: which detector at which alarm budget", "",
           f"At a budget, detectors whose test alarms stayed within {OVERRUN:g}x of it come first (the others are "
           f"marked OVER); then ranked by failures caught on the test split, ties by median lead time. "
           f"Thresholds are chosen on the "
           f"validation split for each budget (alarms per week per 100 entities). Paired comparison: {METHOD}. "
           f"'same' = cannot be told apart from the best (p >= 0.05). With several seeds a failure counts as "
           f"caught when at least half the seeds catch it.", ""]
    for setting in dict.fromkeys(b.setting for b in boards):
        mine = [b for b in boards if b.setting == setting]
        out += [f"### {setting}", ""]
        for b in mine:
            out += [f"#### {point_title(b, records)} — {b.noise} labels (n = {b.n} test failures; {b.power_note})", ""]
            out += [f"> **Warning:** {w}" for w in b.warnings] + ([""] if b.warnings else [])
            out += [to_markdown(board_table(b)), ""]
        out += ["**What to pick**", ""]
        first_noise = mine[0].noise
        out += [f"- {sentence(b, records)}" for b in mine if b.noise == first_noise] + [""]
        moves = noise_movement(mine)
        out += ["**How the ranking moves with label noise** (rank at each noise level)", ""]
        for (st, point), table in moves.items():
            if st != setting:
                continue
            title = point_title(next(b for b in mine if b.point == point), records)
            out += [f"At {title}: {movement_sentence(table)}", "",
                    to_markdown(table.astype({c: "Int64" for c in table.columns[1:]})), ""]
    return out


def decision_text(boards: list[Board], records: list[dict]) -> str:
    """The decision section for the terminal: per budget the first noise level's ranking, sentences, warnings."""
    if not boards:
        return "decision: no run recorded per-failure outcomes; re-run the experiment"
    lines = ["DECISION (test split; thresholds chosen on validation; paired test: exact McNemar)"]
    for setting in dict.fromkeys(b.setting for b in boards):
        mine = [b for b in boards if b.setting == setting]
        lines.append(f"\n{setting}")
        first_noise = mine[0].noise
        for b in mine:
            if b.noise != first_noise:
                continue
            lines += ["", f"{point_title(b, records)} - {b.noise} labels, n = {b.n} test failures; {b.power_note}"]
            lines += [f"  WARNING: {w}" for w in b.warnings]
            lines.append(to_text(board_table(b).drop(columns=["false alarms per failure"])))
            lines.append(sentence(b, records))
            for other in (o for o in mine if o.point == b.point and o.noise != first_noise):
                top = other.rows.iloc[0]
                ties = [d for d, same in zip(other.rows["detector"].iloc[1:], other.rows["same_as_best"].iloc[1:]) if same]
                warn = f" (WARNING: fewer than {FEW_FAILURES} failures)" if other.n < FEW_FAILURES else ""
                lines.append(f"  with {other.noise} labels: best {top['detector']} {top['k']}/{top['n']}"
                             f"{'; same: ' + ', '.join(ties) if ties else ''}{warn}")
        moves = noise_movement(mine)
        for (st, point), table in moves.items():
            if st == setting:
                title = point_title(next(b for b in mine if b.point == point), records)
                lines.append(f"noise, at {title}: {movement_sentence(table)}")
    return "\n".join(lines)


def write_experiment_report(exp: Experiment) -> dict:
    """Write the report of an experiment's recorded runs (its detectors, noise levels, runs and tolerance block)."""
    return write_report(exp.output, exp.name, *experiment_order(exp), run_ids={r.run_id for r in exp.runs},
                        description=exp.raw.get("description"), tolerance=exp.raw.get("tolerance"))


def write_report(output: Path, title: str, detectors: list[str] | None = None,
                 noises: list[str] | None = None, run_ids: set[str] | None = None,
                 description: str | None = None, tolerance: dict | None = None) -> dict:
    """Write report.md, results.csv, summary.csv, report.html and PNG plots into ``output``; return paths.

    With ``run_ids`` only those runs are reported (records of other configurations left in
    the same folder, e.g. from an earlier version of the experiment, are ignored). The
    decision section comes first (after the experiment's ``description``); ``decision`` in the
    result is its terminal form.
    """
    from logtrial.output.figures import (
        budget_dots_figure,
        colours_for,
        lead_time_figure,
        operating_curve_figure,
        pr_figure,
    )
    from logtrial.running.store import RunStore

    store = RunStore(output)
    records = [r for r in store.records() if run_ids is None or r.get("run_id") in run_ids]
    results = load_results(records)
    summary = order_like(summarise(results), detectors or [], noises or [])
    table = headline_table(summary)
    failed = [r for r in records if r.get("status") == "failed"]
    finished = [r for r in records if r.get("status") == "finished"]
    det_order = detectors or list(summary["detector"].drop_duplicates())
    boards = decision_boards(finished, det_order, noises or list(summary["noise"].drop_duplicates()))
    out = Path(output)
    results.sort_values(["dataset", "detector", "noise", "seed"]).to_csv(out / "results.csv", index=False,
                                                                         float_format="%.6g")
    summary.to_csv(out / "summary.csv", index=False, float_format="%.6g")
    first_noise = summary["noise"].iloc[0]
    budgets = sorted({float(k) for r in finished for k in r.get("at_budget", {})})
    colours = colours_for(boards, det_order)
    figs = {}
    settings = list(dict.fromkeys(b.setting for b in boards))
    if settings:
        setting = settings[0]  # pictures show the first setting (dataset, vocabulary, windows, task)
        in_setting = [r for r in finished if _setting_of(r) == setting]
        figs["operating_curves.png"] = operating_curve_figure(in_setting, store, boards, setting, budgets, colours)
        figs["budget_dots.png"] = budget_dots_figure(boards, setting, lambda b: point_title(b, finished, short=True), colours)
        first = next(b for b in boards if b.setting == setting)
        if first.task == "predict":  # lead times at the loosest budget (most predicted failures to show)
            point = str(max((b.point for b in boards if b.point != "policy"), key=float, default="policy"))
            figs["lead_times.png"] = lead_time_figure(in_setting, first_noise, det_order, first.horizon_h, point)
        figs["pr_curves.png"] = pr_figure(in_setting, store, first_noise, det_order, colours)
    pngs = {name: png_bytes(f) for name, f in figs.items()}
    noise_section = tolerance_section(records, out, tolerance, detectors)  # empty unless the noise is swept
    for name, blob in pngs.items():
        (out / name).write_bytes(blob)
    note = ("Each cell: mean over seeds, with its 95 % interval (averaged over seeds) in brackets: Wilson score "
            "intervals for shares of failures, bootstrap intervals for the other figures. Test windows are scored "
            "against the true incidents; noise only touches training and validation labels. Each detector uses "
            "its own threshold from the experiment's threshold policy here, so alarm rates differ; compare "
            "detectors in the decision section above.")
    unbounded = sorted({k for r in finished for k in (r.get("interval_notes") or {})})
    foot = (f"* no upper bound: in some resamples alarms were raised but no failure caught, so the ratio "
            f"({', '.join(unbounded)}) is unbounded there; read the alarm counts instead." if unbounded else "")
    decision_md = decision_markdown(boards, finished)
    curves_note = ("Operating curves are computed on the test split over every distinct threshold (a few hundred "
                   "shown): they are for reading; the headline points use thresholds chosen on validation.")
    intro = [" ".join(str(description).split()), ""] if description else []
    md = [f"# {title}", ""] + intro + decision_md + ["## All figures at the threshold policy", "", note, "",
                                             to_markdown(table), ""]
    if foot:
        md += [foot, ""]
    if failed:
        md += [f"{len(failed)} run(s) failed:", ""] + [f"- `{r['run_id']}`: {r.get('error', '')}" for r in failed] + [""]
    shown = [f"The pictures show the first setting: {settings[0]}."] if len(settings) > 1 else []
    md += ["## Pictures", "", *shown, curves_note, ""]
    md += [f"![{name.removesuffix('.png').replace('_', ' ')}]({name})\n" for name in pngs] + noise_section.markdown
    from logtrial.output.sections import extra_sections

    extra_md = extra_sections(records, store, out)
    md += extra_md
    (out / "report.md").write_text("\n".join(md))
    (out / "report.html").write_text(_html(title, intro + decision_md, note, foot, table, curves_note, pngs, failed,
                                             noise_section.html + _md_to_html(extra_md, out)))
    return {"markdown": out / "report.md", "html": out / "report.html", "csv": out / "results.csv",
            "table": table, "failed": len(failed), "decision": decision_text(boards, finished),
            "boards": boards, "pictures": list(pngs)}


def _setting_of(record: dict) -> str:
    from logtrial.output.decision import setting_label

    return setting_label(record["config"])


def _md_to_html(lines: list[str], folder: Path | None = None) -> str:
    """A small Markdown subset (headings, quotes, bullets, pipe tables, PNG images in ``folder``) as HTML."""
    parts, table, bullets = [], [], []

    def flush() -> None:
        if table:
            head = [c.strip() for c in table[0].strip("|").split("|")]
            body = [[c.strip() for c in row.strip("|").split("|")] for row in table[2:]]
            cls = ' class="decision"' if head and head[0] == "rank" else ""
            parts.append(f"<table{cls}><thead><tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in head)
                         + "</tr></thead><tbody>" + "".join(
                             "<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in row) + "</tr>" for row in body)
                         + "</tbody></table>")
            table.clear()
        if bullets:
            parts.append("<ul>" + "".join(f"<li>{html.escape(b)}</li>" for b in bullets) + "</ul>")
            bullets.clear()

    for line in (part for block in lines for part in block.split("\n")):
        if line.startswith("|"):
            table.append(line)
            continue
        if line.startswith("- "):
            bullets.append(line[2:])
            continue
        flush()
        if line.startswith("#"):
            level = len(line) - len(line.lstrip("#"))
            parts.append(f"<h{level}>{html.escape(line[level:].strip())}</h{level}>")
        elif (image := re.fullmatch(r"!\[(.*)\]\(([\w.-]+\.png)\)", line.strip())) and folder is not None \
                and (folder / image.group(2)).is_file():
            blob = base64.b64encode((folder / image.group(2)).read_bytes()).decode()
            parts.append(f'<figure><img alt="{html.escape(image.group(1))}" src="data:image/png;base64,{blob}">'
                         f"<figcaption>{html.escape(image.group(2))}</figcaption></figure>")
        elif line.startswith("> "):
            parts.append(f'<p class="warn">{html.escape(line[2:].replace("**", ""))}</p>')
        elif line.strip():
            parts.append(f"<p>{html.escape(line.replace('**', ''))}</p>")
    flush()
    return "".join(parts)


def _html(title: str, decision_md: list[str], note: str, foot: str, table: pd.DataFrame, curves_note: str,
          pngs: dict[str, bytes], failed: list[dict], extra: str = "") -> str:
    """The self-contained HTML page: decision first, then the full table and the pictures (inline PNG)."""
    imgs = "".join(f'<figure><img alt="{html.escape(n)}" src="data:image/png;base64,{base64.b64encode(b).decode()}">'
                   f"<figcaption>{html.escape(n)}</figcaption></figure>" for n, b in pngs.items())
    fails = ("<p class='warn'>" + html.escape(f"{len(failed)} run(s) failed: ")
             + html.escape("; ".join(f"{r['run_id']}: {r.get('error', '')}" for r in failed)) + "</p>") if failed else ""
    return (
        "<!doctype html><html lang='en'><head><meta charset='utf-8'><title>" + html.escape(title) + "</title>"
        "<link rel='icon' href='data:,'><style>"
        "body{font-family:sans-serif;margin:2em;color:#222;max-width:1400px}"
        "table{border-collapse:collapse;font-size:13px;margin:0.5em 0 1em}"
        "th,td{border:1px solid #ccc;padding:4px 8px;text-align:left}th{background:#f3f3f3}"
        ".warn{background:#fff4e5;border-left:4px solid #E69F00;padding:4px 8px}"
        "img{max-width:100%}figure{margin:1.5em 0}</style></head><body>"
        f"<h1>{html.escape(title)}</h1>" + _md_to_html(decision_md)
        + f"<h2>All figures at the threshold policy</h2><p>{html.escape(note)}</p>"
        + table.to_html(index=False, escape=True) + (f"<p>{html.escape(foot)}</p>" if foot else "") + fails
        + f"<h2>Pictures</h2><p>{html.escape(curves_note)}</p>" + imgs + extra + "</body></html>"
    )
