"""Window-level metrics (precision, recall, F1, AUROC, AUPRC) and bootstrap intervals for incident reports.

Window-level conventions
------------------------
- Labels are int8: 1 positive, 0 negative, -1 excluded; excluded windows are
  dropped before any metric is computed.
- A window alerts when ``score >= threshold``.
- Precision with no alerting window is 0.0 (the ``zero_division=0`` convention
  of scikit-learn).
- Recall, F1 and AUPRC need at least one positive window; AUROC needs both
  classes. The low-level functions raise :class:`MetricError` with a message
  saying what is missing; :func:`window_metrics_tolerant` (used by runs)
  records ``nan`` plus the reason instead.
- AUROC is the rank statistic with tied scores counted one half (equal to the
  trapezoidal area under the ROC curve); AUPRC is average precision,
  ``sum_k (R_k - R_{k-1}) * P_k`` over distinct score thresholds in decreasing
  order.

Bootstrap
---------
:func:`bootstrap_ci` resamples failures (``unit='incident'``) or entities with
their failures and alarms (``unit='entity'``) and returns a percentile interval.

Run record
----------
:func:`evaluate_run` gathers one run's window metrics, incident summary,
bootstrap intervals of the headline figures and lead times into a plain dict.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Callable

import numpy as np
import pandas as pd

from harness.errors import ConfigError, DataError

if TYPE_CHECKING:  # imported for type hints only; alarms imports this module
    from harness.alarms import IncidentReport


class MetricError(DataError):
    """A metric is undefined for the given labels or scores."""


WINDOW_METRICS = ("precision", "recall", "f1", "auroc", "auprc")


# ---------------------------------------------------------------------------
# Window level
# ---------------------------------------------------------------------------


def clean_inputs(labels: np.ndarray, scores: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Labels (bool) and scores (float64) of the non-excluded windows, validated."""
    y = np.asarray(labels)
    s = np.asarray(scores, dtype=np.float64)
    if y.ndim != 1 or s.ndim != 1 or len(y) != len(s):
        raise MetricError(
            f"labels and scores must be 1-d arrays of equal length, got shapes {y.shape} and {s.shape}"
        )
    bad = ~np.isin(y, (-1, 0, 1))
    if bad.any():
        raise MetricError(f"labels must be 1, 0 or -1 (excluded); window {int(np.flatnonzero(bad)[0])} has {y[bad][0].item()!r}")
    keep = y != -1
    y, s = y[keep] == 1, s[keep]
    nonfinite = ~np.isfinite(s)
    if nonfinite.any():
        raise MetricError(
            f"scores must be finite; {int(nonfinite.sum())} of {len(s)} evaluated windows are NaN or infinite"
        )
    if len(y) == 0:
        raise MetricError("no evaluated windows (all labels are -1 or the split is empty)")
    return y, s


def _need_positive(y: np.ndarray, what: str) -> None:
    """Raise when there is no positive window."""
    if not y.any():
        raise MetricError(f"{what} is undefined: no positive window among the {len(y)} evaluated windows (all labels 0)")


def confusion(labels: np.ndarray, scores: np.ndarray, threshold: float) -> dict[str, int]:
    """True/false positives and negatives when windows with score >= threshold alert."""
    y, s = clean_inputs(labels, scores)
    alert = s >= threshold
    tp = int(np.count_nonzero(alert & y))
    fp = int(np.count_nonzero(alert & ~y))
    fn = int(np.count_nonzero(~alert & y))
    return {"tp": tp, "fp": fp, "fn": fn, "tn": len(y) - tp - fp - fn}


def precision(labels: np.ndarray, scores: np.ndarray, threshold: float) -> float:
    """Share of alerting windows that are positive (0.0 when nothing alerts)."""
    c = confusion(labels, scores, threshold)
    den = c["tp"] + c["fp"]
    return c["tp"] / den if den else 0.0


def recall(labels: np.ndarray, scores: np.ndarray, threshold: float) -> float:
    """Share of positive windows that alert."""
    y, _ = clean_inputs(labels, scores)
    _need_positive(y, "recall")
    c = confusion(labels, scores, threshold)
    return c["tp"] / (c["tp"] + c["fn"])


def f1(labels: np.ndarray, scores: np.ndarray, threshold: float) -> float:
    """Harmonic mean of precision and recall at the threshold."""
    y, _ = clean_inputs(labels, scores)
    _need_positive(y, "F1")
    c = confusion(labels, scores, threshold)
    return 2 * c["tp"] / (2 * c["tp"] + c["fp"] + c["fn"])


def average_ranks(values: np.ndarray) -> np.ndarray:
    """1-based ranks of the values, ties sharing the mean of their ranks."""
    order = np.argsort(values, kind="stable")
    sorted_v = values[order]
    new = np.r_[True, sorted_v[1:] != sorted_v[:-1]]
    group = np.cumsum(new) - 1
    first = np.flatnonzero(new)
    last = np.r_[first[1:], len(values)] - 1
    mean_rank = (first + last) / 2.0 + 1.0
    ranks = np.empty(len(values), dtype=np.float64)
    ranks[order] = mean_rank[group]
    return ranks


def auroc(labels: np.ndarray, scores: np.ndarray) -> float:
    """Area under the ROC curve (probability a positive outranks a negative, ties count half)."""
    y, s = clean_inputs(labels, scores)
    n_pos = int(y.sum())
    n_neg = len(y) - n_pos
    if n_pos == 0 or n_neg == 0:
        which, only = ("positive", 0) if n_pos == 0 else ("negative", 1)
        raise MetricError(
            f"AUROC is undefined: no {which} window among the {len(y)} evaluated windows (all labels {only})"
        )
    r = average_ranks(s)
    u = r[y].sum() - n_pos * (n_pos + 1) / 2.0
    return float(u / (n_pos * n_neg))


def pr_points(labels: np.ndarray, scores: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Distinct thresholds (decreasing) with the true and false positive counts at each (score >= threshold)."""
    y, s = clean_inputs(labels, scores)
    order = np.argsort(-s, kind="stable")
    s_sorted, y_sorted = s[order], y[order]
    last_of_value = np.r_[s_sorted[1:] != s_sorted[:-1], True]
    tp = np.cumsum(y_sorted)[last_of_value]
    fp = np.cumsum(~y_sorted)[last_of_value]
    return s_sorted[last_of_value], tp.astype(np.int64), fp.astype(np.int64), y


def auprc(labels: np.ndarray, scores: np.ndarray) -> float:
    """Average precision: recall-weighted mean of precision over the distinct score thresholds."""
    _, tp, fp, y = pr_points(labels, scores)
    _need_positive(y, "AUPRC (average precision)")
    prec = tp / (tp + fp)
    rec = tp / tp[-1]
    return float(np.sum(np.diff(np.r_[0.0, rec]) * prec))


def window_metrics(labels: np.ndarray, scores: np.ndarray, threshold: float) -> dict[str, float]:
    """Precision, recall and F1 at the threshold plus AUROC and AUPRC; raises MetricError when one is undefined."""
    return {
        "precision": precision(labels, scores, threshold),
        "recall": recall(labels, scores, threshold),
        "f1": f1(labels, scores, threshold),
        "auroc": auroc(labels, scores),
        "auprc": auprc(labels, scores),
    }


def window_metrics_tolerant(
    labels: np.ndarray, scores: np.ndarray, threshold: float
) -> tuple[dict[str, float], dict[str, str]]:
    """Window metrics with NaN for each undefined one, plus the reason per NaN metric."""
    values: dict[str, float] = {}
    reasons: dict[str, str] = {}
    funcs: dict[str, Callable[[], float]] = {
        "precision": lambda: precision(labels, scores, threshold),
        "recall": lambda: recall(labels, scores, threshold),
        "f1": lambda: f1(labels, scores, threshold),
        "auroc": lambda: auroc(labels, scores),
        "auprc": lambda: auprc(labels, scores),
    }
    for name, fn in funcs.items():
        try:
            values[name] = float(fn())
        except MetricError as exc:
            values[name] = float("nan")
            reasons[name] = str(exc)
    return values, reasons


# ---------------------------------------------------------------------------
# Bootstrap over incidents or entities
# ---------------------------------------------------------------------------

ALARM_ONLY = ("false_alarms", "nonfailure_alarms", "alarms", "alarms_per_week_per_100_entities")
UNITS = ("incident", "entity")


def _weighted_median(values: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Median of ``values`` repeated ``weights[r]`` times, for each row r (NaN when a row's weight is 0)."""
    order = np.argsort(values, kind="stable")
    v = values[order]
    w = weights[:, order]
    cum = np.cumsum(w, axis=1)
    total = cum[:, -1] if w.shape[1] else np.zeros(len(w))
    out = np.full(len(w), np.nan)
    ok = total > 0
    if not ok.any():
        return out
    lo_k = (total[ok] - 1) // 2
    hi_k = total[ok] // 2
    i_lo = (cum[ok] <= lo_k[:, None]).sum(axis=1)
    i_hi = (cum[ok] <= hi_k[:, None]).sum(axis=1)
    out[ok] = (v[i_lo] + v[i_hi]) / 2.0
    return out


def summarise_weighted(report: "IncidentReport", wf: np.ndarray, wa: np.ndarray) -> dict[str, np.ndarray]:
    """Headline incident figures for each row of failure weights ``wf`` and per-alarm-kind weights ``wa``.

    ``wf`` is (resamples x failures), how often each failure is drawn; ``wa`` is
    (resamples x 3), the drawn counts of false, non-failure and true alarms.
    """
    f = report.failures
    pred = f["predicted"].to_numpy(dtype=bool)
    det = f["detected"].to_numpy(dtype=bool)
    lead_h = (f["lead_time"].dt.total_seconds() / 3600.0).to_numpy(dtype=np.float64)
    wf = np.asarray(wf, dtype=np.float64)
    wa = np.asarray(wa, dtype=np.float64)
    n_fail = wf.sum(axis=1)
    n_pred = wf @ pred
    n_det = wf @ det
    n_any = wf @ (pred | det)
    false_a, nonf_a, true_a = wa[:, 0], wa[:, 1], wa[:, 2]
    paged_for_nothing = false_a + nonf_a
    with np.errstate(divide="ignore", invalid="ignore"):
        recall_pred = np.where(n_fail > 0, n_pred / np.where(n_fail > 0, n_fail, 1), np.nan)
        recall_any = np.where(n_fail > 0, n_any / np.where(n_fail > 0, n_fail, 1), np.nan)
        fa_per = np.where(
            n_pred > 0,
            paged_for_nothing / np.where(n_pred > 0, n_pred, 1),
            np.where(paged_for_nothing > 0, np.inf, np.nan),
        )
        fa_per_caught = np.where(
            n_any > 0,
            paged_for_nothing / np.where(n_any > 0, n_any, 1),
            np.where(paged_for_nothing > 0, np.inf, np.nan),
        )
    weeks = report.span_weeks
    alarms = false_a + nonf_a + true_a
    out: dict[str, np.ndarray] = {
        "failures": n_fail,
        "predicted": n_pred,
        "detected": n_det,
        "detected_only": wf @ (det & ~pred),
        "recall_predicted": recall_pred,
        "recall_detected_or_predicted": recall_any,
        "alarms": alarms,
        "false_alarms": false_a,
        "nonfailure_alarms": nonf_a,
        "false_alarms_per_predicted_failure": fa_per,
        "false_alarms_per_caught_failure": fa_per_caught,
        "alarms_per_week_per_100_entities": alarms / weeks / (report.n_entities / 100.0),
        "lead_time_median_h": _weighted_median(lead_h[pred], wf[:, pred]),
    }
    for hours in (1, 6, 24):
        hit = pred & (lead_h >= hours)
        with np.errstate(divide="ignore", invalid="ignore"):
            out[f"share_lead_ge_{hours}h"] = np.where(n_fail > 0, (wf @ hit) / np.where(n_fail > 0, n_fail, 1), np.nan)
    return out


def _alarm_kind_counts(report: "IncidentReport") -> tuple[np.ndarray, np.ndarray]:
    """Per alarm its kind code (0 false, 1 non-failure, 2 true) and its entity's unit index."""
    a = report.alarms
    match = a["match"].to_numpy(dtype=object)
    code = np.where(match == "false", 0, np.where(match == "nonfailure", 1, 2))
    ent_idx = _entity_index(report, a["entity"].to_numpy(dtype=object))
    return code, ent_idx


def _entity_index(report: "IncidentReport", names: np.ndarray) -> np.ndarray:
    """Index of each name in ``report.entity_names`` (-1 for fleet-wide / unknown)."""
    lookup = {name: i for i, name in enumerate(report.entity_names)}
    return np.array([lookup.get(str(n), -1) for n in names], dtype=np.int64) if len(names) else np.zeros(0, np.int64)


def _resample_indices(n_units: int, n: int, seed: int) -> np.ndarray:
    """(n x n_units) unit indices drawn with replacement."""
    rng = np.random.default_rng(seed)
    return rng.integers(0, n_units, size=(n, n_units))


def _counts_from_indices(idx: np.ndarray, n_units: int) -> np.ndarray:
    """(n x n_units) how often each unit was drawn in each resample."""
    n = idx.shape[0]
    flat = (idx + (np.arange(n) * n_units)[:, None]).ravel()
    return np.bincount(flat, minlength=n * n_units).reshape(n, n_units)


def _rows_of_units(unit_of_row: np.ndarray, draw: np.ndarray, n_units: int) -> np.ndarray:
    """Row positions belonging to each drawn unit, in draw order, repeated as often as drawn."""
    known = np.flatnonzero(unit_of_row >= 0)
    order = known[np.argsort(unit_of_row[known], kind="stable")]
    size = np.bincount(unit_of_row[known], minlength=n_units)
    first = np.r_[0, np.cumsum(size)[:-1]]
    take = size[draw]
    offsets = np.repeat(first[draw] - np.r_[0, np.cumsum(take)[:-1]], take)
    return order[offsets + np.arange(int(take.sum()))]


def _resampled_report(report: "IncidentReport", unit: str, draw: np.ndarray) -> "IncidentReport":
    """A report whose failures (and for entities, alarms) are the drawn units, repeated as drawn."""
    from harness.alarms import IncidentReport

    if unit == "incident":
        failures = report.failures.iloc[draw].reset_index(drop=True)
        alarms = report.alarms
    else:
        f_idx = _entity_index(report, report.failures["entity"].to_numpy(dtype=object))
        a_idx = _entity_index(report, report.alarms["entity"].to_numpy(dtype=object))
        n_units = len(report.entity_names)
        f_rows = np.concatenate([np.flatnonzero(f_idx < 0), _rows_of_units(f_idx, draw, n_units)])
        failures = report.failures.iloc[f_rows].reset_index(drop=True)
        alarms = report.alarms.iloc[_rows_of_units(a_idx, draw, n_units)].reset_index(drop=True)
    return IncidentReport(
        failures=failures,
        alarms=alarms,
        n_entities=report.n_entities,
        span=report.span,
        entity_names=report.entity_names,
        horizon=report.horizon,
        cooldown=report.cooldown,
        threshold=report.threshold,
    )


def bootstrap_ci(
    report: "IncidentReport",
    metric: str | Callable[["IncidentReport"], float],
    unit: str = "incident",
    n: int = 1000,
    level: float = 0.95,
    seed: int = 0,
) -> tuple[float, float]:
    """Percentile bootstrap interval of an incident-level figure, resampling failures or entities.

    ``metric`` is a key of ``report.summary()`` (computed vectorised) or a function
    of a resampled report. With ``unit='incident'`` failures are drawn with
    replacement and alarms stay as they are (so figures about alarms alone are
    refused); with ``unit='entity'`` entities are drawn with their failures and
    alarms, and fleet-wide failures are kept in every resample. Resamples where
    the figure is undefined (NaN, e.g. no failure drawn) are left out.
    """
    if unit not in UNITS:
        raise ConfigError(f"bootstrap.unit: must be one of {list(UNITS)}, got {unit!r}")
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise ConfigError(f"bootstrap.n: expected a positive integer, got {n!r}")
    if not (0.0 < float(level) < 1.0):
        raise ConfigError(f"bootstrap.level: must lie strictly between 0 and 1, got {level!r}")
    if isinstance(metric, str):
        known = list(report.summary())
        if metric not in known:
            raise ConfigError(f"bootstrap.metric: unknown figure {metric!r} (known: {known})")
        if unit == "incident" and metric in ALARM_ONLY:
            raise ConfigError(
                f"bootstrap.metric: {metric!r} depends on alarms only and does not vary over incidents; use unit='entity'"
            )
    n_units = len(report.failures) if unit == "incident" else len(report.entity_names)
    if n_units == 0:
        raise MetricError(f"bootstrap over {unit} units needs at least one unit, the report has none")
    draws = _resample_indices(n_units, int(n), seed)
    if callable(metric):
        values = np.array([float(metric(_resampled_report(report, unit, d))) for d in draws])
    else:
        values = _vectorised_values(report, metric, unit, draws, n_units)
    values = values[~np.isnan(values)]
    if len(values) == 0:
        return float("nan"), float("nan")
    alpha = (1.0 - float(level)) / 2.0
    lo, hi = np.quantile(values, [alpha, 1.0 - alpha], method="inverted_cdf")
    return float(lo), float(hi)


def _vectorised_values(report: "IncidentReport", metric: str, unit: str, draws: np.ndarray, n_units: int) -> np.ndarray:
    """The named figure for every resample at once."""
    counts = _counts_from_indices(draws, n_units).astype(np.float64)
    code, a_ent = _alarm_kind_counts(report)
    if unit == "incident":
        wf = counts
        kinds = np.bincount(code, minlength=3).astype(np.float64)
        wa = np.broadcast_to(kinds, (len(draws), 3))
    else:
        f_ent = _entity_index(report, report.failures["entity"].to_numpy(dtype=object))
        ones = np.ones((len(draws), 1))
        wf = np.where(f_ent[None, :] >= 0, counts[:, np.maximum(f_ent, 0)], ones) if len(f_ent) else counts[:, :0]
        per_entity = np.zeros((n_units, 3))
        known = a_ent >= 0
        np.add.at(per_entity, (a_ent[known], code[known]), 1.0)
        wa = counts @ per_entity
    return np.asarray(summarise_weighted(report, wf, wa)[metric], dtype=np.float64)


# ---------------------------------------------------------------------------
# One run's figures
# ---------------------------------------------------------------------------

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
    from harness.alarms import incident_metrics

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
