"""One run's figures: window metrics, incident summary, bootstrap intervals and lead times as a record."""

from __future__ import annotations

import numpy as np
import pandas as pd
from logtrial.evaluation.alarms import incident_metrics
from logtrial.evaluation.bootstrap import ALARM_ONLY, bootstrap_ci
from logtrial.evaluation.metrics import window_metrics_tolerant
from logtrial.evaluation.paired import wilson_interval

HEADLINE = (
    "recall_predicted",
    "recall_detected_or_predicted",
    "false_alarms_per_predicted_failure",
    "false_alarms_per_caught_failure",
    "alarms_per_week_per_100_entities",
    "lead_time_median_h",
    "share_lead_ge_1h",
    "share_lead_ge_6h",
    "share_lead_ge_24h",
)
# Shares of failures: a Wilson score interval on k of n failures (never collapses at 0 or n).
PROPORTIONS = {
    "recall_predicted": "predicted",
    "recall_detected_or_predicted": None,
    "share_lead_ge_1h": 1,
    "share_lead_ge_6h": 6,
    "share_lead_ge_24h": 24,
}


def window_metrics_safe(labels: np.ndarray, scores: np.ndarray, threshold: float) -> dict:
    """Window metrics as a record: NaN for undefined ones, with the reasons under ``undefined``."""
    values, reasons = window_metrics_tolerant(labels, scores, threshold)
    out: dict = dict(values)
    if reasons:
        out["undefined"] = reasons
    return out


def evaluate_run(
    meta: pd.DataFrame,
    scores: np.ndarray,
    labels: np.ndarray,
    threshold: float,
    incidents: pd.DataFrame,
    horizon: pd.Timedelta | None,
    cooldown: pd.Timedelta,
    span: tuple[pd.Timestamp, pd.Timestamp] | None = None,
    bootstrap: int = 1000,
    ci_level: float = 0.95,
    unit: str = "entity",
    seed: int = 0,
    entities: int | None = None,
) -> dict:
    """Window and incident figures of one run's test windows, bootstrap intervals and lead times, as a record.

    Returns ``metrics`` (window metrics, then the incident summary; reasons for
    NaN or infinite figures under ``metrics['undefined']``), ``intervals``
    (headline figure -> [low, high]; empty when ``bootstrap`` is 0; figures about
    alarms alone are skipped for ``unit='incident'``; shares of failures get a
    Wilson interval on k of n failures instead; an unbounded bootstrap bound is
    stored as None with the reason under ``interval_notes``), ``lead_times_h``
    (one per predicted failure, in failure order) and ``outcomes`` (per counted
    failure, in failure order, "1" when predicted / caught, else "0").
    """
    window, reasons = window_metrics_tolerant(labels, scores, threshold)
    report = incident_metrics(meta, scores, threshold, incidents, horizon, cooldown, entities, span)
    summary = report.summary()
    undefined = {**reasons, **report.undefined()}
    intervals: dict[str, list[float | None]] = {}
    notes: dict[str, str] = {}
    f = report.failures
    pred = f["predicted"].to_numpy(dtype=bool)
    caught = pred | f["detected"].to_numpy(dtype=bool)
    lead_h = (f["lead_time"].dt.total_seconds() / 3600.0).to_numpy()
    hits = {"recall_predicted": pred, "recall_detected_or_predicted": caught}
    hits.update({f"share_lead_ge_{h}h": pred & (lead_h >= h) for h in (1, 6, 24)})
    for name, hit in hits.items():
        if len(f):
            intervals[name] = list(wilson_interval(int(hit.sum()), len(f), ci_level))
    if bootstrap:
        n_units = len(report.failures) if unit == "incident" else len(report.entity_names)
        if n_units == 0:
            undefined["intervals"] = f"no {unit} to resample"
        else:
            for name in HEADLINE:
                if (unit == "incident" and name in ALARM_ONLY) or name in PROPORTIONS:
                    continue
                lo, hi = bootstrap_ci(report, name, unit=unit, n=int(bootstrap), level=ci_level, seed=seed)
                bounds: list[float | None] = [lo, hi]
                for side, b in enumerate((lo, hi)):
                    if np.isinf(b):
                        bounds[side] = None
                        notes[name] = ("no finite bound: some resamples hold alarms but no failure caught, "
                                       "so the ratio is unbounded there; read the count of alarms instead")
                intervals[name] = bounds
    metrics: dict = {**window, **summary}
    if undefined:
        metrics["undefined"] = undefined
    lead = report.failures.loc[report.failures["predicted"], "lead_time"]
    out = {
        "metrics": metrics,
        "intervals": intervals,
        "lead_times_h": [float(x) for x in lead.dt.total_seconds() / 3600.0],
        "outcomes": {"predicted": "".join("1" if x else "0" for x in pred),
                     "caught": "".join("1" if x else "0" for x in caught)},
    }
    if notes:
        out["interval_notes"] = notes
    return out
