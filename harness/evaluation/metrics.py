"""Window-level metrics: precision, recall, F1, AUROC, AUPRC.

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

Incident-level figures are in ``alarms``, their bootstrap intervals in
``bootstrap`` and one run's record in ``run_figures``.
"""

from __future__ import annotations

from typing import Callable

import numpy as np
from logtrial.errors import MetricError

__all__ = ["MetricError"]  # re-exported: metric errors are raised by every evaluation module


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
