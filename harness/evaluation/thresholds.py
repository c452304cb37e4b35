"""Threshold policies: one rule per experiment, applied on the validation split to every detector.

Policies (a window alerts when ``score >= threshold``):

- ``best_f1``: the score cut that maximises window F1 on validation windows;
  among equal F1 the higher threshold wins.
- ``min_precision`` (``p``): the lowest threshold whose window precision is at
  least ``p``. Precision is not monotone in the threshold, so every candidate is
  checked. When none reaches ``p`` the threshold is just above the highest score
  (nothing alerts) and ``achieved['feasible']`` is False.
- ``max_alarms`` (``k``): the lowest threshold whose merged alarms (alerts
  merged per entity with the experiment's cool-down, see ``logtrial.evaluation.alarms``)
  number at most ``k`` per entity-week on validation. Merging makes the alarm
  count non-monotone in the threshold (an extra alert can join two alarms), so
  the count is computed exactly for every candidate at once.
- ``alarm_budget`` (``per_week_per_100``): the same rule as ``max_alarms`` in the
  unit operators budget in, alarms per week per 100 entities
  (``per_week_per_100 = 100 * k``); both run through one function. An experiment's
  ``budgets: [2, 5, 20]`` evaluates every detector at each such budget.
- ``quantile`` (``q``): ``numpy.quantile(scores, q)`` (linear interpolation).

Candidates are the distinct validation scores plus one value just above the
highest. ``best_f1`` and ``min_precision`` use labelled windows only (label -1
is ignored); ``max_alarms`` and ``quantile`` use every validation window, since
alerting does not depend on labels. The choice is deterministic.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from logtrial.errors import ConfigError
from logtrial.evaluation.alarms import alarm_counts, check_cooldown, evaluation_span
from logtrial.evaluation.metrics import MetricError, clean_inputs, pr_points
from logtrial.labels.incidents import times_ns

POLICY_KINDS = {
    "best_f1": None, "min_precision": "p", "max_alarms": "k", "alarm_budget": "per_week_per_100", "quantile": "q",
}


@dataclass(frozen=True)
class ThresholdPolicy:
    """One threshold rule: kind best_f1 | min_precision (p) | max_alarms (k) | quantile (q)."""

    kind: str
    p: float | None = None
    k: float | None = None
    q: float | None = None
    per_week_per_100: float | None = None

    def as_dict(self) -> dict:
        """Canonical plain form for hashing and run records."""
        param = POLICY_KINDS[self.kind]
        out: dict = {"kind": self.kind}
        if param is not None:
            out[param] = float(getattr(self, param))
        return out


@dataclass
class ThresholdChoice:
    """The threshold a policy chose on validation, with what it achieved there."""

    threshold: float
    policy: ThresholdPolicy
    achieved: dict = field(default_factory=dict)

    def as_dict(self) -> dict:
        """Plain form for the run record."""
        return {"threshold": float(self.threshold), "policy": self.policy.as_dict(), "achieved": dict(self.achieved)}


def _number(value: object, where: str) -> float:
    """A finite real number or ConfigError naming the field."""
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ConfigError(f"{where}: expected a number, got {value!r}")
    x = float(value)
    if not np.isfinite(x):
        raise ConfigError(f"{where}: expected a finite number, got {value!r}")
    return x


def load_policy(source: dict | ThresholdPolicy, where: str = "threshold") -> ThresholdPolicy:
    """Validate a threshold config mapping into a ThresholdPolicy; ConfigError names the field."""
    if isinstance(source, ThresholdPolicy):
        source = source.as_dict()
    if not isinstance(source, dict):
        raise ConfigError(f"{where}: expected a mapping with a 'kind', got {type(source).__name__}")
    kind = source.get("kind")
    if kind not in POLICY_KINDS:
        raise ConfigError(f"{where}.kind: must be one of {list(POLICY_KINDS)}, got {kind!r}")
    param = POLICY_KINDS[kind]
    allowed = {"kind"} | ({param} if param else set())
    unknown = sorted(set(source) - allowed)
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: not a field of the {kind} policy (allowed: {sorted(allowed)})")
    if param is None:
        return ThresholdPolicy(kind=kind)
    if param not in source:
        raise ConfigError(f"{where}.{param}: required for the {kind} policy")
    x = _number(source[param], f"{where}.{param}")
    if param == "p" and not 0.0 < x <= 1.0:
        raise ConfigError(f"{where}.p: precision target must lie in (0, 1], got {x}")
    if param == "q" and not 0.0 <= x <= 1.0:
        raise ConfigError(f"{where}.q: quantile must lie in [0, 1], got {x}")
    if param == "k" and not x > 0.0:
        raise ConfigError(f"{where}.k: alarms per entity-week must be positive, got {x}")
    if param == "per_week_per_100" and not x > 0.0:
        raise ConfigError(f"{where}.per_week_per_100: alarms per week per 100 entities must be positive, got {x}")
    return ThresholdPolicy(kind=kind, **{param: x})


def _above(scores: np.ndarray) -> float:
    """A threshold just above every score, so nothing alerts."""
    return float(np.nextafter(np.max(scores), np.inf)) if len(scores) else float("inf")


def _best_f1(labels: np.ndarray, scores: np.ndarray) -> tuple[float, dict]:
    """Threshold maximising F1 (higher threshold on ties) and the precision/recall/F1 there."""
    thr, tp, fp, y = pr_points(labels, scores)
    n_pos = int(y.sum())
    if n_pos == 0:
        raise MetricError("best_f1 threshold: no positive window in the validation split (all labels 0)")
    f1 = 2 * tp / (2 * tp + fp + (n_pos - tp))
    i = int(np.argmax(f1))  # thresholds decrease, so the first maximum is the highest threshold
    return float(thr[i]), {
        "f1": float(f1[i]),
        "precision": float(tp[i] / (tp[i] + fp[i])),
        "recall": float(tp[i] / n_pos),
    }


def _min_precision(labels: np.ndarray, scores: np.ndarray, p: float) -> tuple[float, dict]:
    """Lowest threshold with precision >= p, or just above every score when none reaches p."""
    thr, tp, fp, y = pr_points(labels, scores)
    prec = tp / (tp + fp)
    ok = np.flatnonzero(prec >= p)
    n_pos = int(y.sum())
    if len(ok) == 0:
        _, s = clean_inputs(labels, scores)
        return _above(s), {"feasible": False, "precision": 0.0, "recall": 0.0, "alerts": 0}
    i = int(ok[-1])  # thresholds decrease: the last feasible one is the lowest
    return float(thr[i]), {
        "feasible": True,
        "precision": float(prec[i]),
        "recall": float(tp[i] / n_pos) if n_pos else float("nan"),
        "alerts": int(tp[i] + fp[i]),
    }


def budget_key(budget: float) -> str:
    """The key of a budget in run records (``format(b, "g")``: 2 -> "2", 2.5 -> "2.5")."""
    return format(float(budget), "g")


def budget_policy(budget: float) -> ThresholdPolicy:
    """The alarm_budget policy for a budget in alarms per week per 100 entities."""
    return load_policy({"kind": "alarm_budget", "per_week_per_100": budget}, "budgets[]")


def _max_alarms(scores: np.ndarray, meta: pd.DataFrame, k: float, cooldown: pd.Timedelta) -> tuple[float, dict]:
    """Lowest threshold whose merged alarms per entity-week on validation are at most k (the budget rule)."""
    lo, hi = evaluation_span(meta)
    weeks = (hi - lo) / pd.Timedelta(weeks=1)
    if not weeks > 0:
        raise MetricError(f"max_alarms threshold: validation span has no length ({lo} .. {hi})")
    ent = meta["entity"].fillna("").astype(str).to_numpy(dtype=object)
    n_ent = len(pd.unique(ent))
    cand = np.r_[np.unique(scores), _above(scores)]
    counts = alarm_counts(ent, times_ns(meta["end"]), scores, cooldown, cand)
    rate = counts / (n_ent * weeks)
    i = int(np.flatnonzero(rate <= k)[0])  # the last candidate alerts nowhere, so one always qualifies
    return float(cand[i]), {
        "alarms": int(counts[i]),
        "alarms_per_entity_week": float(rate[i]),
        "alarms_per_week_per_100_entities": float(100.0 * rate[i]),
        "entity_weeks": float(n_ent * weeks),
    }


def choose_threshold(
    policy: ThresholdPolicy | dict,
    scores_val: np.ndarray,
    labels_val: np.ndarray | None,
    meta_val: pd.DataFrame | None,
    cooldown: pd.Timedelta | None = None,
) -> ThresholdChoice:
    """Apply a threshold policy to validation scores and record the chosen threshold and what it achieved."""
    pol = load_policy(policy)
    s = np.asarray(scores_val, dtype=np.float64)
    if s.ndim != 1 or len(s) == 0:
        raise MetricError(f"threshold policy {pol.kind}: needs a non-empty 1-d array of validation scores, got shape {s.shape}")
    if not np.isfinite(s).all():
        raise MetricError(f"threshold policy {pol.kind}: {int((~np.isfinite(s)).sum())} validation scores are NaN or infinite")
    if pol.kind in ("best_f1", "min_precision"):
        if labels_val is None:
            raise MetricError(f"threshold policy {pol.kind}: needs validation labels")
        if pol.kind == "best_f1":
            thr, achieved = _best_f1(labels_val, s)
        else:
            thr, achieved = _min_precision(labels_val, s, float(pol.p))
    elif pol.kind in ("max_alarms", "alarm_budget"):
        if meta_val is None or len(meta_val) != len(s):
            raise MetricError(f"threshold policy {pol.kind}: needs the validation window meta, one row per score")
        if cooldown is None:
            raise ConfigError(f"metrics.cooldown: required by the {pol.kind} threshold policy")
        k = float(pol.k) if pol.kind == "max_alarms" else float(pol.per_week_per_100) / 100.0
        thr, achieved = _max_alarms(s, meta_val, k, check_cooldown(cooldown))
    else:
        thr = float(np.quantile(s, float(pol.q)))
        achieved = {"alert_share": float(np.mean(s >= thr))}
    achieved["windows"] = int(len(s))
    return ThresholdChoice(threshold=thr, policy=pol, achieved=achieved)
