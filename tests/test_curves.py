"""Operating curves and the alarm-rate denominator.

References: a worked timeline computed by hand (the rate), and the direct per-threshold
evaluation of logtrial.evaluation.alarms.incident_metrics (whose matching rules the
hand-worked timelines of tests/test_metrics.py pin down) for every curve point.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from logtrial.evaluation.alarms import incident_metrics
from logtrial.evaluation.curves import operating_curve, pick_points

T0 = pd.Timestamp("2024-03-04", tz="UTC")


def hourly_meta(entities: list[str], hours: int) -> pd.DataFrame:
    starts = T0 + pd.to_timedelta(np.arange(hours), unit="h")
    rows = [(e, s, s + pd.Timedelta("1h")) for e in entities for s in starts]
    return pd.DataFrame(rows, columns=["entity", "start", "end"])


def incidents(rows: list[tuple[str, str, float, float]]) -> pd.DataFrame:
    """(entity, kind, start hour, end hour) -> incident table."""
    return pd.DataFrame({
        "id": [f"i{k}" for k in range(len(rows))],
        "entity": [r[0] for r in rows],
        "kind": [r[1] for r in rows],
        "start": [T0 + pd.Timedelta(hours=r[2]) for r in rows],
        "end": [T0 + pd.Timedelta(hours=r[3]) for r in rows],
    })


def test_alarm_rate_divides_by_the_span_the_alarms_were_counted_over() -> None:
    # Worked by hand: 4 entities, hourly windows over 14 days (the test split, 2 weeks).
    # Failures count from day 7 (test start + a 7-day horizon), but alarms are raised on
    # every test window. Six isolated alerts (each its own alarm, cool-down 1 h):
    #   A at hours 10, 100, 200; B at 50; C at 300; D at 330.
    # Rate = 6 alarms / 2 weeks / (4 / 100) = 75 per week per 100 entities.
    # Dividing by the failure-counting span (1 week) would give 150.
    meta = hourly_meta(["A", "B", "C", "D"], 14 * 24)
    scores = np.zeros(len(meta))
    hours = 14 * 24
    for ent, h in (("A", 10), ("A", 100), ("A", 200), ("B", 50), ("C", 300), ("D", 330)):
        scores["ABCD".index(ent) * hours + h] = 1.0
    inc = incidents([("A", "failure", 250, 251)])
    span = (T0 + pd.Timedelta("7D"), T0 + pd.Timedelta("14D"))
    rep = incident_metrics(meta, scores, 0.5, inc, pd.Timedelta("7D"), pd.Timedelta("1h"), span=span)
    s = rep.summary()
    assert s["alarms"] == 6
    assert s["alarms_per_week_per_100_entities"] == pytest.approx(75.0)
    assert rep.span_weeks == pytest.approx(1.0) and rep.alarm_weeks == pytest.approx(2.0)
    curve = operating_curve(meta, scores, inc, pd.Timedelta("7D"), pd.Timedelta("1h"), span=span)
    at = curve[curve["threshold"] == 1.0].iloc[0]
    assert at["alarms"] == 6 and at["alarms_per_week_per_100_entities"] == pytest.approx(75.0)


def _random_case(seed: int) -> tuple[pd.DataFrame, np.ndarray, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    ents = [f"n{i}" for i in range(6)]
    meta = hourly_meta(ents, 21 * 24)
    scores = np.round(rng.gamma(1.5, size=len(meta)), 1)
    rows = []
    for _ in range(14):
        e = str(rng.choice(ents))
        s = float(rng.integers(30, 21 * 24 - 5))
        rows.append((e, "failure", s, s + float(rng.integers(0, 4))))
        idx = ents.index(e) * 21 * 24 + np.arange(max(0, int(s) - 8), int(s))
        scores[idx] += rng.uniform(0, 3, size=len(idx))  # some precursors
    rows.append(("*", "failure", 200.5, 201.0))  # fleet-wide
    rows.append(("n1", "other", 90.0, 95.0))
    rows.append(("ghost", "failure", 120.0, 121.0))  # an entity with no windows: never caught
    return meta, scores, incidents(rows)


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("horizon,cooldown", [("12h", "2h"), ("6h", "0s"), (None, "1h"), (None, "3h")])
def test_curve_points_equal_the_direct_evaluation(seed: int, horizon: str | None, cooldown: str) -> None:
    meta, scores, inc = _random_case(seed)
    h = pd.Timedelta(horizon) if horizon else None
    cd = pd.Timedelta(cooldown)
    span = (T0 + pd.Timedelta("1D"), T0 + pd.Timedelta("21D"))
    curve = operating_curve(meta, scores, inc, h, cd, span=span, max_points=60)
    assert 2 <= len(curve) <= 62
    for _, pt in curve.iterrows():
        rep = incident_metrics(meta, scores, pt["threshold"], inc, h, cd, span=span)
        s = rep.summary()
        caught = s["predicted"] if h is not None else s["predicted"] + s["detected_only"]
        assert pt["alarms"] == s["alarms"]
        assert pt["caught"] == caught
        assert pt["alarms_per_week_per_100_entities"] == pytest.approx(s["alarms_per_week_per_100_entities"])
        if h is not None and caught:
            assert pt["lead_time_median_h"] == pytest.approx(s["lead_time_median_h"])
    assert curve.attrs["failures"] == s["failures"]


def test_pick_points_keeps_ends_and_limit() -> None:
    counts = np.r_[np.arange(5000, 0, -1), 0]
    idx = pick_points(counts, 300)
    assert idx[0] == 0 and idx[-1] == len(counts) - 1
    assert len(idx) <= 302 and np.all(np.diff(idx) > 0)
    assert np.array_equal(pick_points(np.array([3, 2, 0]), 300), np.arange(3))


def test_unbounded_ratio_interval_gets_a_note_not_infinity() -> None:
    # A predicts its failure; B and C only raise false alarms. Resampling entities, draws without A
    # have alarms but no predicted failure: false alarms per predicted failure is unbounded there.
    from logtrial.evaluation.run_figures import evaluate_run

    meta = hourly_meta(["A", "B", "C"], 7 * 24)
    scores = np.zeros(len(meta))
    hours = 7 * 24
    scores[[100, hours + 20, hours + 60, 2 * hours + 90]] = 1.0
    inc = incidents([("A", "failure", 104, 105)])
    rec = evaluate_run(meta, scores, np.zeros(len(meta), np.int8), 0.5, inc, pd.Timedelta("12h"),
                       pd.Timedelta("1h"), bootstrap=500, unit="entity", seed=1)
    assert rec["metrics"]["false_alarms_per_predicted_failure"] == 3.0
    lo, hi = rec["intervals"]["false_alarms_per_predicted_failure"]
    assert hi is None and lo is not None and np.isfinite(lo)
    assert "no finite bound" in rec["interval_notes"]["false_alarms_per_predicted_failure"]
    # The share predicted is 1/1: its Wilson interval is wide, not a point.
    lo, hi = rec["intervals"]["recall_predicted"]
    assert hi == 1.0 and lo < 0.25
