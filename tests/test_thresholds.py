"""Threshold policies: validation of the config, and each rule against an outside reference.

References: scikit-learn (precision_recall_curve, precision_score), numpy.quantile,
and hand-made timelines whose expected thresholds are derived in the comments.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from logtrial.errors import ConfigError
from logtrial.evaluation.alarms import merge_alerts
from logtrial.evaluation.metrics import MetricError
from logtrial.evaluation.thresholds import ThresholdPolicy, choose_threshold, load_policy
from logtrial.labels.incidents import times_ns
from sklearn import metrics as skm

T0 = pd.Timestamp("2024-05-06", tz="UTC")


def random_split(seed: int, n: int = 300) -> tuple[np.ndarray, np.ndarray]:
    """Labels (with some -1) and tie-heavy scores that lean towards the positives."""
    rng = np.random.default_rng(seed)
    labels = rng.choice(np.array([-1, 0, 1], dtype=np.int8), size=n, p=[0.05, 0.8, 0.15])
    labels[:2] = [0, 1]
    scores = np.round(rng.normal(size=n) + 1.2 * labels.clip(0), 1)
    return labels, scores


def daily_meta(entities: list[str], days: int) -> pd.DataFrame:
    """One window per entity and day, [day, day + 1)."""
    starts = T0 + pd.to_timedelta(np.arange(days), unit="D")
    rows = [(e, s, s + pd.Timedelta("1D")) for e in entities for s in starts]
    meta = pd.DataFrame(rows, columns=["entity", "start", "end"])
    meta.insert(0, "id", np.arange(len(meta)))
    return meta


# ---------------------------------------------------------------------------
# Config validation
# ---------------------------------------------------------------------------


def test_load_policy_accepts_each_kind() -> None:
    assert load_policy({"kind": "best_f1"}) == ThresholdPolicy("best_f1")
    assert load_policy({"kind": "min_precision", "p": 0.9}).p == 0.9
    assert load_policy({"kind": "max_alarms", "k": 2}).k == 2.0
    assert load_policy({"kind": "quantile", "q": 0.99}).as_dict() == {"kind": "quantile", "q": 0.99}
    assert load_policy(load_policy({"kind": "quantile", "q": 0.5})) == ThresholdPolicy("quantile", q=0.5)


@pytest.mark.parametrize(
    ("source", "message"),
    [
        ("best_f1", "threshold: expected a mapping"),
        ({"kind": "best-f1"}, "threshold.kind: must be one of"),
        ({"kind": "best_f1", "p": 0.5}, "threshold.p: not a field of the best_f1 policy"),
        ({"kind": "min_precision"}, "threshold.p: required for the min_precision policy"),
        ({"kind": "min_precision", "p": 0}, r"threshold.p: precision target must lie in \(0, 1\]"),
        ({"kind": "min_precision", "p": "high"}, "threshold.p: expected a number"),
        ({"kind": "max_alarms", "k": -1}, "threshold.k: alarms per entity-week must be positive"),
        ({"kind": "max_alarms", "k": True}, "threshold.k: expected a number"),
        ({"kind": "quantile", "q": 1.5}, r"threshold.q: quantile must lie in \[0, 1\]"),
        ({"kind": "quantile", "q": float("nan")}, "threshold.q: expected a finite number"),
    ],
)
def test_load_policy_rejects_with_field_name(source: object, message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        load_policy(source)  # type: ignore[arg-type]


# ---------------------------------------------------------------------------
# best_f1
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(12))
def test_best_f1_equals_brute_force_over_sklearn_curve(seed: int) -> None:
    # Reference: scikit-learn precision_recall_curve gives precision/recall at every distinct
    # score cut; the best-F1 cut is the highest threshold among those reaching the maximum F1.
    labels, scores = random_split(seed)
    keep = labels != -1
    p, r, thr = skm.precision_recall_curve(labels[keep], scores[keep])
    p, r = p[:-1], r[:-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        f1 = np.where(p + r > 0, 2 * p * r / (p + r), 0.0)
    best = thr[np.isclose(f1, f1.max(), rtol=0, atol=1e-12)].max()
    choice = choose_threshold({"kind": "best_f1"}, scores, labels, None)
    assert choice.threshold == best
    assert choice.achieved["f1"] == pytest.approx(f1.max(), abs=1e-12)
    assert choice.achieved["f1"] == pytest.approx(skm.f1_score(labels[keep], scores[keep] >= best), abs=1e-12)
    assert choice.as_dict()["policy"] == {"kind": "best_f1"}


def test_best_f1_tie_goes_to_higher_threshold() -> None:
    # Worked by hand: positive at 3, two negatives at 2, positive at 1 (2 positives).
    # Cut 3: tp=1, fp=0, fn=1 -> F1 = 2tp/(2tp+fp+fn) = 2/3.
    # Cut 2: tp=1, fp=2, fn=1 -> 2/5.
    # Cut 1: tp=2, fp=2, fn=0 -> 4/6 = 2/3, a tie with cut 3.
    labels = np.array([1, 0, 0, 1], dtype=np.int8)
    scores = np.array([3.0, 2.0, 2.0, 1.0])
    choice = choose_threshold({"kind": "best_f1"}, scores, labels, None)
    assert choice.threshold == 3.0  # cuts 3 and 1 both give F1 = 2/3; the higher one wins
    assert choice.achieved["f1"] == pytest.approx(2 / 3)


def test_best_f1_needs_a_positive() -> None:
    with pytest.raises(MetricError, match="best_f1 threshold: no positive window"):
        choose_threshold({"kind": "best_f1"}, np.array([0.1, 0.2]), np.array([0, -1]), None)


# ---------------------------------------------------------------------------
# min_precision
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(("seed", "p"), [(0, 0.5), (1, 0.7), (2, 0.9), (3, 0.6), (4, 0.8)])
def test_min_precision_meets_target_at_lowest_such_threshold(seed: int, p: float) -> None:
    # Reference: scikit-learn precision_score at the chosen cut, and at every lower distinct cut.
    labels, scores = random_split(seed)
    keep = labels != -1
    y, s = labels[keep], scores[keep]
    choice = choose_threshold({"kind": "min_precision", "p": p}, scores, labels, None)
    assert choice.achieved["feasible"] is True
    assert skm.precision_score(y, s >= choice.threshold) >= p
    assert choice.achieved["precision"] == pytest.approx(skm.precision_score(y, s >= choice.threshold), abs=1e-12)
    for lower in np.unique(s[s < choice.threshold]):
        assert skm.precision_score(y, s >= lower) < p


def test_min_precision_infeasible_alerts_nowhere() -> None:
    # Worked by hand: the top-scored window is negative and every cut has precision <= 1/2,
    # so p = 0.9 cannot be met: the threshold lies just above the highest score.
    labels = np.array([0, 1, 0, 1], dtype=np.int8)
    scores = np.array([0.9, 0.8, 0.7, 0.1])
    choice = choose_threshold({"kind": "min_precision", "p": 0.9}, scores, labels, None)
    assert choice.achieved["feasible"] is False
    assert choice.threshold > 0.9 and not (scores >= choice.threshold).any()
    assert choice.threshold == np.nextafter(0.9, 1.0)


# ---------------------------------------------------------------------------
# max_alarms
# ---------------------------------------------------------------------------


def test_max_alarms_on_hand_made_timeline() -> None:
    # Two entities, one window a day for 7 days: span 1 week, so 2 entity-weeks.
    # A scores 0.9, 0.8 on days 1-2, B 0.7 on day 1, everything else 0.1.
    meta = daily_meta(["A", "B"], 7)
    scores = np.full(14, 0.1)
    scores[[0, 1, 7]] = [0.9, 0.8, 0.7]
    # Cool-down 1 h, nothing merges (alerts are a day apart). k = 1 per entity-week allows
    # 2 alarms: cut 0.7 gives 3 alarms (rate 1.5), cut 0.8 gives 2 (rate 1.0) -> 0.8.
    choice = choose_threshold({"kind": "max_alarms", "k": 1}, scores, None, meta, pd.Timedelta("1h"))
    assert choice.threshold == 0.8
    assert choice.achieved == {"alarms": 2, "alarms_per_entity_week": 1.0, "alarms_per_week_per_100_entities": 100.0,
                               "entity_weeks": 2.0, "windows": 14}
    # Cool-down 2 days: alerts one day apart chain. Cut 0.7: A's days 1-2 form one alarm, B one
    # -> 2 alarms. Even cut 0.1 (every window alerts) gives one unbroken daily chain per entity
    # -> 2 alarms, rate 1.0, so the lowest candidate 0.1 is chosen.
    choice = choose_threshold({"kind": "max_alarms", "k": 1}, scores, None, meta, pd.Timedelta("2D"))
    assert choice.threshold == 0.1
    assert choice.achieved["alarms"] == 2
    # Same cool-down with k = 0.5 (1 alarm allowed): B's chain is one alarm at any cut that
    # reaches it, so B must stay silent (cut above 0.7); A's alerts at 0.8-0.9 chain into one
    # alarm -> cut 0.8 gives exactly 1 alarm.
    choice = choose_threshold({"kind": "max_alarms", "k": 0.5}, scores, None, meta, pd.Timedelta("2D"))
    assert choice.threshold == 0.8
    assert choice.achieved["alarms"] == 1
    # k = 7 per entity-week allows 14 alarms: every window may alert (cut 0.1, 14 daily alerts
    # with a 1 h cool-down).
    choice = choose_threshold({"kind": "max_alarms", "k": 7}, scores, None, meta, "1h")
    assert choice.threshold == 0.1 and choice.achieved["alarms"] == 14
    # k = 0.25 allows half an alarm: only "nothing alerts" qualifies.
    choice = choose_threshold({"kind": "max_alarms", "k": 0.25}, scores, None, meta, "1h")
    assert choice.threshold > 0.9 and choice.achieved["alarms"] == 0


@pytest.mark.parametrize("seed", range(4))
def test_max_alarms_respects_k_and_is_lowest(seed: int) -> None:
    # Reference: the direct definition, merging alerts at the chosen cut and at the next lower
    # candidate with logtrial.evaluation.alarms.merge_alerts (which the hand-worked timelines of
    # tests/test_metrics.py pin down).
    rng = np.random.default_rng(seed)
    ents = [f"e{i}" for i in range(5)]
    starts = T0 + pd.to_timedelta(np.arange(14 * 24), unit="h")
    meta = pd.DataFrame([(e, s, s + pd.Timedelta("1h")) for e in ents for s in starts], columns=["entity", "start", "end"])
    scores = np.round(rng.gamma(2.0, size=len(meta)), 1)
    cd = pd.Timedelta("3h")
    k = 3.0
    ent = meta["entity"].to_numpy(dtype=object)
    ends = times_ns(meta["end"])
    entity_weeks = 5 * 2.0

    def rate(t: float) -> float:
        hit = scores >= t
        return len(merge_alerts(ent[hit], ends[hit], cd)) / entity_weeks

    choice = choose_threshold({"kind": "max_alarms", "k": k}, scores, None, meta, cd)
    assert rate(choice.threshold) <= k
    assert choice.achieved["alarms_per_entity_week"] == pytest.approx(rate(choice.threshold))
    for lower in np.unique(scores[scores < choice.threshold]):
        assert rate(lower) > k


@pytest.mark.parametrize("seed", range(3))
def test_alarm_budget_is_max_alarms_in_operator_units(seed: int) -> None:
    # One rule, two units: a budget of b alarms per week per 100 entities is k = b / 100 per entity-week.
    rng = np.random.default_rng(seed)
    meta = daily_meta([f"e{i}" for i in range(8)], 28)
    scores = np.round(rng.gamma(2.0, size=len(meta)), 2)
    for b in (2.0, 5.0, 20.0, 150.0):
        by_budget = choose_threshold({"kind": "alarm_budget", "per_week_per_100": b}, scores, None, meta, "1h")
        by_k = choose_threshold({"kind": "max_alarms", "k": b / 100}, scores, None, meta, "1h")
        assert by_budget.threshold == by_k.threshold
        assert by_budget.achieved["alarms_per_week_per_100_entities"] <= b
        assert by_budget.achieved["alarms_per_week_per_100_entities"] == pytest.approx(
            100 * by_budget.achieved["alarms_per_entity_week"])


def test_alarm_budget_on_hand_made_timeline() -> None:
    # 2 entities x 7 days = 2 entity-weeks; a budget of 100 per week per 100 entities = 2 alarms:
    # the same cut (0.8) as max_alarms k=1 in test_max_alarms_on_hand_made_timeline.
    meta = daily_meta(["A", "B"], 7)
    scores = np.full(14, 0.1)
    scores[[0, 1, 7]] = [0.9, 0.8, 0.7]
    choice = choose_threshold({"kind": "alarm_budget", "per_week_per_100": 100}, scores, None, meta, "1h")
    assert choice.threshold == 0.8 and choice.achieved["alarms"] == 2
    assert choice.policy.as_dict() == {"kind": "alarm_budget", "per_week_per_100": 100.0}
    with pytest.raises(ConfigError, match="threshold.per_week_per_100: alarms per week per 100 entities must be positive"):
        load_policy({"kind": "alarm_budget", "per_week_per_100": 0})


def test_max_alarms_needs_cooldown_and_meta() -> None:
    meta = daily_meta(["A"], 7)
    with pytest.raises(ConfigError, match="metrics.cooldown: required by the max_alarms"):
        choose_threshold({"kind": "max_alarms", "k": 1}, np.zeros(7), None, meta, None)
    with pytest.raises(MetricError, match="needs the validation window meta"):
        choose_threshold({"kind": "max_alarms", "k": 1}, np.zeros(7), None, None, "1h")


# ---------------------------------------------------------------------------
# quantile, determinism
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("q", [0.0, 0.5, 0.9, 0.99, 1.0])
def test_quantile_equals_numpy(q: float) -> None:
    # Reference: numpy.quantile (default linear method), on every window including label -1.
    labels, scores = random_split(7)
    choice = choose_threshold({"kind": "quantile", "q": q}, scores, labels, None)
    assert choice.threshold == np.quantile(scores, q)
    assert choice.achieved["alert_share"] == pytest.approx(np.mean(scores >= np.quantile(scores, q)))


def test_same_inputs_same_choice_and_bad_scores_refused() -> None:
    labels, scores = random_split(5)
    meta = pd.DataFrame(
        {
            "entity": np.where(np.arange(len(scores)) % 2, "a", "b"),
            "start": T0 + pd.to_timedelta(np.arange(len(scores)), unit="h"),
        }
    )
    meta["end"] = meta["start"] + pd.Timedelta("1h")
    for policy in ({"kind": "best_f1"}, {"kind": "min_precision", "p": 0.6}, {"kind": "max_alarms", "k": 5}, {"kind": "quantile", "q": 0.9}):
        first = choose_threshold(policy, scores, labels, meta, "2h").as_dict()
        assert choose_threshold(policy, scores.copy(), labels.copy(), meta.copy(), "2h").as_dict() == first
    with pytest.raises(MetricError, match="NaN or infinite"):
        choose_threshold({"kind": "quantile", "q": 0.5}, np.array([0.1, np.nan]), None, None)
    with pytest.raises(MetricError, match="needs validation labels"):
        choose_threshold({"kind": "best_f1"}, scores, None, None)
