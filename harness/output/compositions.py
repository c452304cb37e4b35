"""Compositions beside their members: does a two-stage detector raise exactly the alarms of one of its parts?

A composition adds nothing measurable when, on the same test windows, it raises its alerts
exactly where one of its members (run on its own in the same grid) or one of its ablations
does. For every composite run this module finds the runs of the same dataset, windows, task,
noise and seed whose detector is one of the composite's members, or the same composite with
``combine: stage1_only`` / ``stage2_only``, and compares their test alerts (score at or
above the run's own threshold) window by window. Equal alerts give equal alarms.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

COMPOSITES = ("two_stage", "two_stage_supervised")
CONTEXT = ("dataset", "windows", "task", "noise", "seed", "vocabulary")


def _context(rec: dict) -> str:
    cfg = rec["config"]
    return repr([cfg.get(k) if k != "noise" else cfg["noise"].get("name") for k in CONTEXT])


def _label(rec: dict) -> str:
    det = rec["config"]["detector"]
    return str(det.get("label") or det["name"])


def _relatives(rec: dict, others: list[dict]) -> list[dict]:
    """Runs in the same context whose detector is a member or an ablation of the composite run ``rec``."""
    det = rec["config"]["detector"]
    params = det.get("params") or {}
    names = {m["name"] for stage in ("stage1", "stage2") for m in params.get(stage, [])}
    out = []
    for o in others:
        od = o["config"]["detector"]
        if o is rec:
            continue
        if od["name"] in names and od["name"] not in COMPOSITES:
            out.append(o)
        elif od["name"] == det["name"] and (od.get("params") or {}).get("combine") != params.get("combine"):
            same_members = all((od.get("params") or {}).get(s) == params.get(s) for s in ("stage1", "stage2"))
            if same_members:
                out.append(o)
    return out


def alerts_of(rec: dict, store) -> np.ndarray | None:
    """The run's test alerts (score >= its threshold) in window order, or None without a score table."""
    path = store.path(rec["run_id"], ".scores.parquet")
    if not path.is_file():
        return None
    scores = pd.read_parquet(path)
    test = scores[scores["part"] == "test"].sort_values("window")
    return (test["score"].to_numpy() >= float(rec["threshold"]["value"]))


def equal_alarms(records: list[dict], store) -> pd.DataFrame:
    """Per composite and relative: in how many shared contexts the test alerts were identical."""
    finished = [r for r in records if r.get("status") == "finished"]
    by_context: dict[str, list[dict]] = {}
    for r in finished:
        by_context.setdefault(_context(r), []).append(r)
    rows = []
    cache: dict[str, np.ndarray | None] = {}

    def alerts(r: dict) -> np.ndarray | None:
        if r["run_id"] not in cache:
            cache[r["run_id"]] = alerts_of(r, store)
        return cache[r["run_id"]]

    for r in finished:
        det = r["config"]["detector"]
        if det["name"] not in COMPOSITES or str((det.get("params") or {}).get("combine", "")).endswith("_only"):
            continue  # ablations are compared as relatives of their full composition
        mine = alerts(r)
        if mine is None:
            continue
        for o in _relatives(r, by_context[_context(r)]):
            theirs = alerts(o)
            if theirs is None or len(theirs) != len(mine):
                continue
            rows.append({"composite": _label(r), "relative": _label(o), "equal": bool(np.array_equal(mine, theirs)),
                         "alerts": int(mine.sum())})
    if not rows:
        return pd.DataFrame(columns=["composite", "relative", "runs", "equal"])
    df = pd.DataFrame(rows)
    return (df.groupby(["composite", "relative"], sort=False)
              .agg(runs=("equal", "size"), equal=("equal", "sum")).reset_index())


def composition_section(records: list[dict], store) -> list[str]:
    """Markdown lines: which compositions raise the same alarms as one of their members or ablations."""
    table = equal_alarms(records, store)
    if table.empty:
        return []
    lines = ["## Compositions beside their members", "",
             "A composition adds nothing measurable where its test alarms are exactly those of one of its members "
             "(run alone in this grid) or of one of its ablations.", ""]
    for composite, rows in table.groupby("composite", sort=False):
        differs = []
        for row in rows.itertuples(index=False):
            if row.equal == row.runs:
                lines.append(f"- `{composite}` raises exactly the alarms of `{row.relative}` in all {row.runs} runs: "
                             f"it adds nothing measurable over it.")
            elif row.equal:
                lines.append(f"- `{composite}` raises exactly the alarms of `{row.relative}` in {row.equal} of "
                             f"{row.runs} runs.")
            else:
                differs.append(f"`{row.relative}`")
        if differs:
            lines.append(f"- `{composite}` raises alarms of its own: they differ from those of {', '.join(differs)} "
                         f"in every run compared.")
    return lines + [""]
