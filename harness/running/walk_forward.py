"""Walk-forward evaluation: retrain on a moving span, test on the next, and read figures against model age.

An experiment asks for it with a top-level ``evaluation`` block instead of ``split``::

    evaluation: {kind: walk_forward, train: 56d, validation: 14d, test: 56d, step: 28d,
                 window: expanding, age_bin: 7d}

Fold ``i`` learns from ``train`` (from the data's start when ``window: expanding``, else the
last ``train`` before the fold), picks its threshold on the ``validation`` span that follows,
and is tested on the ``test`` span after an embargo (the longest window, and the task's
horizon). Folds advance by ``step`` while the test span fits in the data. Within a fold, a
failure's *model age* is the time from the start of the test span (the day the model was
deployed) to the failure; figures are counted per ``age_bin`` and added up over the folds.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from logtrial.errors import ConfigError
from logtrial.evaluation.alarms import incident_metrics
from logtrial.windowing.splits import Split, walk_forward
from logtrial.windowing.windows import WindowSet, parse_duration

FIELDS = ("kind", "train", "validation", "test", "step", "window", "age_bin", "embargo")
DEFAULT_TOLERANCE = 0.1  # a drop of failures predicted by more than 10 points marks the retraining interval


def canonical_walk_forward(raw: Any, where: str = "evaluation") -> dict:
    """The validated ``evaluation: {kind: walk_forward, ...}`` block in canonical form (a run's split)."""
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: expected a mapping like {{kind: walk_forward, train: 56d, validation: 14d, "
                          f"test: 56d, step: 28d, window: expanding, age_bin: 7d}}")
    unknown = sorted(set(raw) - set(FIELDS) - {"tolerance"})
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: {', '.join(FIELDS)}, tolerance)")
    if raw.get("kind") != "walk_forward":
        raise ConfigError(f"{where}.kind: must be walk_forward, got {raw.get('kind')!r} "
                          f"(a single chronological split is the `split` block)")
    out: dict = {"kind": "walk_forward"}
    for key in ("train", "validation", "test", "step"):
        if raw.get(key) is None:
            raise ConfigError(f"{where}.{key}: is required (a duration such as 28d)")
        value = parse_duration(raw[key], f"{where}.{key}", unit_required=True)
        if value <= pd.Timedelta(0):
            raise ConfigError(f"{where}.{key}: must be a positive duration, got {raw[key]!r}")
        out[key] = str(value)
    window = raw.get("window", "expanding")
    if window not in ("expanding", "sliding"):
        raise ConfigError(f"{where}.window: must be expanding or sliding, got {window!r}")
    out["window"] = window
    age_bin = parse_duration(raw.get("age_bin", "7d"), f"{where}.age_bin", unit_required=True)
    if not pd.Timedelta(0) < age_bin <= pd.Timedelta(out["test"]):
        raise ConfigError(f"{where}.age_bin: must be positive and at most the test span ({out['test']}), "
                          f"got {raw.get('age_bin')!r}")
    out["age_bin"] = str(age_bin)
    if raw.get("embargo") is not None:
        out["embargo"] = str(parse_duration(raw["embargo"], f"{where}.embargo", unit_required=True))
    tol = raw.get("tolerance", DEFAULT_TOLERANCE)
    if isinstance(tol, bool) or not isinstance(tol, (int, float)) or not 0 < tol < 1:
        raise ConfigError(f"{where}.tolerance: expected a share between 0 and 1 (e.g. 0.1), got {tol!r}")
    out["tolerance"] = float(tol)
    return out


def is_walk_forward(split: dict) -> bool:
    """True for a run whose split is a walk-forward evaluation."""
    return split.get("kind") == "walk_forward"


def fold_splits(windows: WindowSet, spec: dict, horizon: pd.Timedelta | None) -> list[Split]:
    """The folds of a walk-forward spec over a window set (validation is the last part of each training span)."""
    val = pd.Timedelta(spec["validation"])
    folds = walk_forward(windows, pd.Timedelta(spec["train"]) + val, spec["test"], spec["step"],
                         embargo=spec.get("embargo"), horizon=horizon, val_span=val,
                         expanding=spec["window"] == "expanding")
    if not folds:
        raise ConfigError(f"evaluation: train {spec['train']} + validation {spec['validation']} + test {spec['test']} "
                          f"do not fit in the data's time span; shorten them")
    return folds


def figures_by_age(meta: pd.DataFrame, scores: np.ndarray, threshold: float, incidents: pd.DataFrame,
                   horizon: pd.Timedelta | None, cooldown: pd.Timedelta, test_range: tuple, count_from: pd.Timestamp,
                   age_bin: pd.Timedelta) -> list[dict]:
    """Failures, failures predicted and alarms of one fold's test span, per model-age bin from its start."""
    lo, hi = test_range
    out = []
    k = 0
    while lo + k * age_bin < hi:
        b_lo, b_hi = lo + k * age_bin, min(lo + (k + 1) * age_bin, hi)
        span_lo = max(b_lo, count_from)
        row = {"age_days": round((b_lo - lo) / pd.Timedelta(days=1), 6),
               "days": round((b_hi - b_lo) / pd.Timedelta(days=1), 6),
               "failures": 0, "predicted": 0}
        if span_lo < b_hi:
            s = incident_metrics(meta, scores, threshold, incidents, horizon, cooldown, None, (span_lo, b_hi)).summary()
            row["failures"], row["predicted"] = int(s["failures"]), int(s["predicted"])
        # alarms raised by windows that end in this age bin
        in_bin = ((meta["end"] > b_lo) & (meta["end"] <= b_hi)).to_numpy()
        row["alerts"] = int((scores[in_bin] >= threshold).sum())
        row["entities"] = int(meta.loc[in_bin, "entity"].nunique())
        out.append(row)
        k += 1
    return out


def policies(record: dict) -> dict[str, float]:
    """Threshold of each alarm policy of a run record: the chosen threshold, then one per alarm budget."""
    out = {"threshold": float(record["threshold"]["value"])}
    for key, entry in (record.get("at_budget") or {}).items():
        value = (entry.get("threshold") or {}).get("value")
        if value is not None:
            out[f"budget {key}"] = float(value)
    return out


def pooled_by_age(folds: list[dict]) -> dict[str, list[dict]]:
    """Per policy, failures and failures predicted per age bin added up over the folds, with the recall."""
    out: dict[str, list[dict]] = {}
    for fold in folds:
        for policy, rows in fold["by_age"].items():
            acc = out.setdefault(policy, [])
            for i, row in enumerate(rows):
                if i >= len(acc):
                    acc.append({"age_days": row["age_days"], "failures": 0, "predicted": 0, "alerts": 0, "folds": 0,
                                "entity_weeks": 0.0})
                acc[i]["failures"] += row["failures"]
                acc[i]["predicted"] += row["predicted"]
                acc[i]["alerts"] += row["alerts"]
                acc[i]["folds"] += 1
                acc[i]["entity_weeks"] += row.get("entities", 0) * row.get("days", 0.0) / 7.0
    for rows in out.values():
        for row in rows:
            row["recall_predicted"] = row["predicted"] / row["failures"] if row["failures"] else float("nan")
            row["alerts_per_week_per_100"] = (100.0 * row["alerts"] / row["entity_weeks"] if row["entity_weeks"]
                                              else float("nan"))
    return out


def retraining_interval(rows: list[dict], tolerance: float, alpha: float = 0.05) -> float | None:
    """Model age (days) of the first bin whose failures predicted fall more than ``tolerance`` below a fresh model's.

    The fresh model is the first age bin. A later bin counts only when its share predicted
    is more than ``tolerance`` below the fresh share and the drop is beyond noise: Fisher's
    exact test, one-sided, at level ``alpha`` (scipy.stats.fisher_exact). None when no bin
    qualifies. Rows need ``age_days``, ``failures`` and ``predicted``.
    """
    from scipy.stats import fisher_exact

    valid = [r for r in sorted(rows, key=lambda r: r["age_days"]) if r["failures"] > 0]
    if len(valid) < 2:
        return None
    k0, n0 = valid[0]["predicted"], valid[0]["failures"]
    for row in valid[1:]:
        k, n = row["predicted"], row["failures"]
        if k / n < k0 / n0 - tolerance:
            _, p = fisher_exact([[k0, n0 - k0], [k, n - k]], alternative="greater")
            if p < alpha:
                return float(row["age_days"])
    return None


def combine_folds(records: list[dict], spec: dict) -> dict:
    """One walk-forward record from its folds' records: the last fold's figures as headline, every fold kept."""
    finished = [r for r in records if r.get("status") == "finished"]
    if len(finished) < len(records):
        bad = next(r for r in records if r.get("status") != "finished")
        raise RuntimeError(f"fold {records.index(bad)} failed: {bad.get('error')}")
    last = dict(finished[-1])
    folds = [{
        "fold": i,
        "ranges": r["walk_forward_fold"]["ranges"],
        "threshold": r["threshold"]["value"],
        "metrics": {k: v for k, v in r["metrics"].items() if k != "undefined"},
        "by_age": r["walk_forward_fold"]["by_age"],
    } for i, r in enumerate(finished)]
    pooled = pooled_by_age(folds)
    tol = float(spec.get("tolerance", DEFAULT_TOLERANCE))
    last.pop("walk_forward_fold", None)
    last["walk_forward"] = {
        "folds": folds,
        "by_age": pooled,
        "tolerance": tol,
        "retrain_after_days": {p: retraining_interval(rows, tol) for p, rows in pooled.items()},
    }
    timing = {k: round(sum(r["timing"][k] for r in finished), 3) for k in ("fit_s", "score_s", "total_s")}
    last["timing"] = {**timing, "reused_fit": all(r["timing"]["reused_fit"] for r in finished)}
    last["warnings"] = sorted({w for r in finished for w in r.get("warnings", [])})
    return last
