"""One run's figures: window metrics, incident summary, bootstrap intervals and lead times as a record."""

from __future__ import annotations

import numpy as np
import pandas as pd
from logtrial.evaluation.alarms import incident_metrics
from logtrial.evaluation.bootstrap import ALARM_ONLY, bootstrap_ci
from logtrial.evaluation.metrics import window_metrics_tolerant

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
    alarms alone are skipped for ``unit='incident'``) and ``lead_times_h`` (one
    per predicted failure, in failure order).
    """
    window, reasons = window_metrics_tolerant(labels, scores, threshold)
    report = incident_metrics(meta, scores, threshold, incidents, horizon, cooldown, entities, span)
    summary = report.summary()
    undefined = {**reasons, **report.undefined()}
    intervals: dict[str, list[float]] = {}
    if bootstrap:
        n_units = len(report.failures) if unit == "incident" else len(report.entity_names)
        if n_units == 0:
            undefined["intervals"] = f"no {unit} to resample"
        else:
            for name in HEADLINE:
                if unit == "incident" and name in ALARM_ONLY:
                    continue
                lo, hi = bootstrap_ci(report, name, unit=unit, n=int(bootstrap), level=ci_level, seed=seed)
                intervals[name] = [lo, hi]
    metrics: dict = {**window, **summary}
    if undefined:
        metrics["undefined"] = undefined
    lead = report.failures.loc[report.failures["predicted"], "lead_time"]
    return {
        "metrics": metrics,
        "intervals": intervals,
        "lead_times_h": [float(x) for x in lead.dt.total_seconds() / 3600.0],
    }
