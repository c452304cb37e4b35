"""Window-level metrics, alarm merging, incident matching and bootstrap intervals.

External references: scikit-learn (precision_score, recall_score, f1_score,
roc_auc_score, average_precision_score), scipy (rankdata, stats.bootstrap),
hand-worked timelines whose expected numbers are derived in the comments, and
the real BGL 2k sample of Loghub (Zhu et al., ISSRE 2023).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from logtrial.errors import ConfigError, DataError
from logtrial.evaluation.alarms import IncidentReport, alarm_counts, incident_metrics, merge_alerts
from logtrial.evaluation.bootstrap import bootstrap_ci
from logtrial.evaluation.metrics import (
    MetricError,
    auprc,
    auroc,
    average_ranks,
    precision,
    window_metrics,
    window_metrics_tolerant,
)
from sklearn import metrics as skm

# ---------------------------------------------------------------------------
# Window level against scikit-learn
# ---------------------------------------------------------------------------


def sklearn_window_metrics(labels: np.ndarray, scores: np.ndarray, threshold: float) -> dict[str, float]:
    """The five window metrics as scikit-learn computes them (excluded windows dropped first)."""
    keep = labels != -1
    y, s = labels[keep], scores[keep]
    pred = s >= threshold
    return {
        "precision": skm.precision_score(y, pred, zero_division=0),
        "recall": skm.recall_score(y, pred, zero_division=0),
        "f1": skm.f1_score(y, pred, zero_division=0),
        "auroc": skm.roc_auc_score(y, s),
        "auprc": skm.average_precision_score(y, s),
    }


def assert_close(ours: dict[str, float], ref: dict[str, float]) -> None:
    """Every metric equal to 1e-12."""
    for name, value in ref.items():
        assert ours[name] == pytest.approx(value, abs=1e-12, rel=0), name


@pytest.mark.parametrize("seed", range(20))
def test_window_metrics_equal_sklearn_on_random_inputs(seed: int) -> None:
    # Reference: scikit-learn 1.x metrics; continuous scores, some windows excluded (-1).
    rng = np.random.default_rng(seed)
    n = int(rng.integers(20, 400))
    labels = rng.choice(np.array([-1, 0, 1], dtype=np.int8), size=n, p=[0.1, 0.7, 0.2])
    labels[:2] = [0, 1]
    scores = rng.normal(size=n) + labels.clip(0)
    threshold = float(np.quantile(scores, rng.uniform(0.3, 0.95)))
    assert_close(window_metrics(labels, scores, threshold), sklearn_window_metrics(labels, scores, threshold))


@settings(max_examples=150, deadline=None)
@given(
    st.lists(st.tuples(st.sampled_from([-1, 0, 1]), st.integers(0, 4)), min_size=2, max_size=60),
    st.integers(0, 5),
)
def test_window_metrics_equal_sklearn_on_tie_heavy_inputs(pairs: list[tuple[int, int]], cut: int) -> None:
    # Reference: scikit-learn; scores take only five values, so most windows tie.
    labels = np.array([p[0] for p in pairs], dtype=np.int8)
    scores = np.array([p[1] for p in pairs], dtype=np.float64) / 4.0
    kept = labels[labels != -1]
    assume(len(set(kept.tolist())) == 2)  # single-class inputs: see the edge-case tests below
    threshold = cut / 4.0
    assert_close(window_metrics(labels, scores, threshold), sklearn_window_metrics(labels, scores, threshold))


def test_ranks_equal_scipy_rankdata() -> None:
    # Reference: scipy.stats.rankdata(method="average").
    rng = np.random.default_rng(3)
    values = rng.integers(0, 10, size=500).astype(float)
    np.testing.assert_array_equal(average_ranks(values), scipy.stats.rankdata(values, method="average"))


def test_constant_scores_give_chance_auroc() -> None:
    # Reference: scikit-learn; all scores tied -> ROC is the diagonal (0.5), AP = positive share.
    labels = np.array([0, 1, 0, 1, 1], dtype=np.int8)
    scores = np.zeros(5)
    assert auroc(labels, scores) == pytest.approx(skm.roc_auc_score(labels, scores), abs=1e-12) == 0.5
    assert auprc(labels, scores) == pytest.approx(skm.average_precision_score(labels, scores), abs=1e-12) == 0.6


def test_no_alert_and_all_alert_thresholds() -> None:
    # Reference: scikit-learn with zero_division=0: nothing alerting gives precision 0, recall 0, F1 0.
    labels = np.array([0, 1, 0, 1, 0, 0], dtype=np.int8)
    scores = np.array([0.1, 0.9, 0.3, 0.4, 0.2, 0.8])
    assert_close(window_metrics(labels, scores, 5.0), sklearn_window_metrics(labels, scores, 5.0))
    assert window_metrics(labels, scores, 5.0)["precision"] == 0.0
    # Everything alerting: precision = positive share 2/6, recall 1.
    everything = window_metrics(labels, scores, -5.0)
    assert_close(everything, sklearn_window_metrics(labels, scores, -5.0))
    assert everything["precision"] == pytest.approx(2 / 6) and everything["recall"] == 1.0


def test_all_zero_labels_raise_clear_message_and_tolerant_wrapper_records_reason() -> None:
    labels = np.zeros(8, dtype=np.int8)
    labels[0] = -1  # an excluded positive-looking window must not rescue the metric
    scores = np.linspace(0, 1, 8)
    with pytest.raises(MetricError, match="AUROC is undefined: no positive window among the 7 evaluated"):
        auroc(labels, scores)
    with pytest.raises(MetricError, match=r"AUPRC \(average precision\) is undefined: no positive window"):
        auprc(labels, scores)
    with pytest.raises(MetricError, match="recall is undefined"):
        window_metrics(labels, scores, 0.5)
    assert issubclass(MetricError, DataError)
    values, reasons = window_metrics_tolerant(labels, scores, 0.5)
    assert set(reasons) == {"recall", "f1", "auroc", "auprc"}
    assert all(np.isnan(values[k]) for k in reasons)
    assert "all labels 0" in reasons["auroc"]
    # Precision stays defined: alerts exist and none is positive -> 0, as scikit-learn says.
    keep = labels != -1
    assert values["precision"] == skm.precision_score(labels[keep], scores[keep] >= 0.5, zero_division=0) == 0.0
    # scikit-learn itself only warns here (and returns nan / 0.0), which is why we raise instead.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert np.isnan(skm.roc_auc_score(labels[keep], scores[keep]))


def test_all_one_labels() -> None:
    # Reference: scikit-learn: AP of an all-positive set is 1; AUROC has no negatives and is refused.
    labels = np.ones(6, dtype=np.int8)
    scores = np.array([0.3, 0.1, 0.7, 0.7, 0.2, 0.9])
    assert auprc(labels, scores) == skm.average_precision_score(labels, scores) == 1.0
    with pytest.raises(MetricError, match="no negative window"):
        auroc(labels, scores)
    values, reasons = window_metrics_tolerant(labels, scores, 0.5)
    assert list(reasons) == ["auroc"]
    assert values["recall"] == pytest.approx(skm.recall_score(labels, scores >= 0.5))


def test_bad_inputs_name_the_problem() -> None:
    with pytest.raises(MetricError, match="equal length"):
        precision(np.array([0, 1]), np.array([0.1]), 0.5)
    with pytest.raises(MetricError, match="NaN or infinite"):
        auroc(np.array([0, 1]), np.array([0.1, np.nan]))
    with pytest.raises(MetricError, match="window 1 has 2"):
        auroc(np.array([0, 2]), np.array([0.1, 0.2]))
    with pytest.raises(MetricError, match="no evaluated windows"):
        auroc(np.array([-1, -1]), np.array([0.1, 0.2]))


def test_real_bgl_windows_match_sklearn(bgl_events: pd.DataFrame) -> None:
    # Reference: scikit-learn on real logs (Loghub BGL 2k sample): 30-min windows per node,
    # a window is positive when it holds an alert-tagged line, scored by its event count.
    from logtrial.windowing.windows import time_windows

    ws = time_windows(bgl_events, int(bgl_events["event"].max()) + 1, pd.Timedelta("30min"))
    tagged = bgl_events.assign(t=bgl_events["tag"] != "")
    pos_entities_times = tagged.loc[tagged["t"], ["entity", "ts"]]
    # label each window by whether a tagged line of its node falls in [start, end)
    merged = ws.meta.reset_index().merge(pos_entities_times, on="entity", how="left")
    inside = (merged["ts"] >= merged["start"]) & (merged["ts"] < merged["end"])
    labels = np.zeros(len(ws), dtype=np.int8)
    labels[merged.loc[inside, "index"].unique()] = 1
    scores = ws.meta["n_events"].to_numpy(dtype=float)
    assert 0 < labels.sum() < len(labels)
    assert_close(window_metrics(labels, scores, 2.0), sklearn_window_metrics(labels, scores, 2.0))


# ---------------------------------------------------------------------------
# Alarm merging
# ---------------------------------------------------------------------------

DAY = pd.Timestamp("2024-03-04", tz="UTC")


def at(hhmm: str, day: int = 0) -> pd.Timestamp:
    """A time on the worked timeline's day (plus ``day`` days)."""
    return DAY + pd.Timedelta(days=day) + pd.Timedelta(hhmm + ":00")


def test_merge_chains_by_previous_alert() -> None:
    # Worked by hand, cool-down 15 min. Entity A alerts at 07:00, 07:10, 07:20, 07:30:
    # each alert is 10 min after the previous one, so the chain is ONE alarm even though
    # 07:30 is 30 min after the alarm's first alert (the rule compares with the previous
    # alert, not the alarm start). 07:45 is exactly 15 min after 07:30: a gap equal to the
    # cool-down starts a new alarm. Entity B's alert at 07:05 is separate (other entity).
    times = [at(x) for x in ("07:20", "07:00", "07:30", "07:10", "07:45")] + [at("07:05")]
    ent = np.array(["A"] * 5 + ["B"], dtype=object)
    ns = pd.DatetimeIndex(times).as_unit("ns").asi8
    alarms = merge_alerts(ent, ns, pd.Timedelta("15min"))
    assert alarms["entity"].tolist() == ["A", "A", "B"]
    assert alarms["time"].tolist() == [at("07:00"), at("07:45"), at("07:05")]
    assert alarms["last_time"].tolist() == [at("07:30"), at("07:45"), at("07:05")]
    assert alarms["n_alerts"].tolist() == [4, 1, 1]


def test_alarm_counts_for_all_thresholds_equal_merging_each_threshold() -> None:
    # Reference: the direct definition (merge the alerts at each threshold and count),
    # including windows sharing an end time on one entity.
    rng = np.random.default_rng(11)
    n = 300
    ent = rng.choice(np.array(["a", "b", "c"], dtype=object), size=n)
    ns = (DAY.value + rng.integers(0, 48, size=n) * pd.Timedelta("10min").value).astype(np.int64)
    scores = rng.integers(0, 20, size=n) / 19.0
    cands = np.r_[np.unique(scores), 2.0]
    for cd in (pd.Timedelta(0), pd.Timedelta("15min"), pd.Timedelta("25min"), pd.Timedelta("2h")):
        fast = alarm_counts(ent, ns, scores, cd, cands)
        slow = [len(merge_alerts(ent[scores >= t], ns[scores >= t], cd)) for t in cands]
        np.testing.assert_array_equal(fast, slow)


def test_alarm_count_is_not_monotone_in_threshold() -> None:
    # Worked by hand, cool-down 15 min: alerts at 00:00 and 00:20 (score 1) are two alarms;
    # lowering the threshold adds 00:10 (score 0.5), which chains them into one alarm.
    ns = pd.DatetimeIndex([at("00:00"), at("00:10"), at("00:20")]).as_unit("ns").asi8
    counts = alarm_counts(np.array(["A"] * 3, dtype=object), ns, np.array([1.0, 0.5, 1.0]), pd.Timedelta("15min"), np.array([0.5, 1.0]))
    assert counts.tolist() == [1, 2]


# ---------------------------------------------------------------------------
# Incident level: a worked timeline
# ---------------------------------------------------------------------------

ALERTS = {
    # entity A: failure F1 10:00-11:00, horizon 6 h -> prediction range [04:00, 10:00)
    "A": [
        at("03:50"), at("04:00"),  # one alarm 03:50..04:00, still active at 04:00 -> predicts F1, lead 6 h
        at("05:30"), at("05:40"),  # one alarm at 05:30 -> predicts F1, lead 10:00-05:30 = 4.5 h
        at("05:55"),  # 15 min after 05:40 = exactly the cool-down -> new alarm, predicts F1
        at("07:00"), at("07:10"), at("07:20"), at("07:30"),  # one chained alarm, predicts F1
        at("10:20"),  # inside F1 -> detects it (F1 already predicted)
    ],
    # entity B: maintenance O1 12:00-13:00 ('other'); fleet-wide failure F4 at 02:00 next day
    "B": [
        at("09:00"),  # in [O1.start - 6 h, O1.end] = [06:00, 13:00] -> non-failure alarm
        at("12:30"),  # inside O1 -> non-failure alarm
        at("19:00"),  # before F4's range [20:00, 02:00) and far from O1 -> false alarm
        at("01:00", 1),  # in F4's range -> predicts fleet-wide F4, lead 1 h
    ],
    # entity C: F2 14:00-14:30 (no warning), F3 22:00-23:00 (never alerted),
    # F5 at 05:00 next day, after the evaluated span ends (04:00 next day)
    "C": [
        at("14:10"),  # inside F2 -> detects F2 only
        at("03:30", 1),  # predicts F5 (a true alarm) but F5 lies outside the span: not counted
    ],
    "D": [],  # quiet node: counts as an entity, nothing else
}


def timeline() -> tuple[pd.DataFrame, np.ndarray, pd.DataFrame]:
    """Window meta (5-min windows, 4 entities, 00:00 to 04:00 next day), scores, incidents."""
    ends = pd.date_range(at("00:05"), at("04:00", 1), freq="5min")
    rows, scores = [], []
    for ent, alerts in ALERTS.items():
        for e in ends:
            rows.append((ent, e - pd.Timedelta("5min"), e))
            scores.append(1.0 if e in alerts else 0.0)
    meta = pd.DataFrame(rows, columns=["entity", "start", "end"])
    meta.insert(0, "id", np.arange(len(meta)))
    incidents = pd.DataFrame(
        [
            ("F1", "A", at("10:00"), at("11:00"), "failure"),
            ("O1", "B", at("12:00"), at("13:00"), "other"),
            ("F2", "C", at("14:00"), at("14:30"), "failure"),
            ("F3", "C", at("22:00"), at("23:00"), "failure"),
            ("F4", "*", at("02:00", 1), at("03:00", 1), "failure"),
            ("F5", "C", at("05:00", 1), at("06:00", 1), "failure"),
        ],
        columns=["id", "entity", "start", "end", "kind"],
    )
    return meta, np.array(scores), incidents


def test_worked_timeline_predict_task() -> None:
    meta, scores, incidents = timeline()
    rep = incident_metrics(meta, scores, 0.5, incidents, pd.Timedelta("6h"), pd.Timedelta("15min"), None, None)
    a = rep.alarms
    # A: 03:50 (active into the horizon), 05:30/05:55/07:00 predicted, 10:20 detected; B: 09:00, 12:30 non-failure,
    # 19:00 false, 01:00 predicted (F4); C: 14:10 detected, 03:30 predicted (F5).
    expected = [
        ("A", at("03:50"), 2, "predicted", "F1"),
        ("A", at("05:30"), 2, "predicted", "F1"),
        ("A", at("05:55"), 1, "predicted", "F1"),
        ("A", at("07:00"), 4, "predicted", "F1"),
        ("A", at("10:20"), 1, "detected", "F1"),
        ("B", at("09:00"), 1, "nonfailure", "O1"),
        ("B", at("12:30"), 1, "nonfailure", "O1"),
        ("B", at("19:00"), 1, "false", None),
        ("B", at("01:00", 1), 1, "predicted", "F4"),
        ("C", at("14:10"), 1, "detected", "F2"),
        ("C", at("03:30", 1), 1, "predicted", "F5"),
    ]
    got = list(zip(a["entity"], a["time"], a["n_alerts"], a["match"], a["matched_id"]))
    assert got == expected
    assert a.loc[3, "last_time"] == at("07:30")

    f = rep.failures.set_index("id")
    assert list(f.index) == ["F1", "F2", "F3", "F4"]  # F5 starts after the span: not counted
    assert f["predicted"].tolist() == [True, False, False, True]
    assert f["detected"].tolist() == [True, True, False, False]
    # The 03:50 alarm began before the horizon [04:00, 10:00) and was still active at 04:00:
    # the warning counts from the horizon's start, 6 h ahead (not 6 h 10 min).
    assert f.loc["F1", "lead_time"] == pd.Timedelta("6h")
    assert f.loc["F4", "lead_time"] == pd.Timedelta("1h")
    assert pd.isna(f.loc["F2", "lead_time"])

    s = rep.summary()
    assert s["failures"] == 4 and s["predicted"] == 2 and s["detected"] == 2 and s["detected_only"] == 1
    assert s["recall_predicted"] == 0.5  # F1, F4 of 4
    assert s["recall_detected_or_predicted"] == 0.75  # plus F2
    assert s["alarms"] == 11 and s["false_alarms"] == 1 and s["nonfailure_alarms"] == 2
    # (1 false + 2 non-failure) / 2 predicted failures
    assert s["false_alarms_per_predicted_failure"] == 1.5
    # 11 alarms over 28 h = 1/6 week, 4 entities: 11 / (1/6) / (4/100) = 1650
    assert s["alarms_per_week_per_100_entities"] == pytest.approx(1650.0)
    assert s["lead_time_median_h"] == pytest.approx(3.5)  # median of 6 h and 1 h
    # lead >= 1 h: F1 and F4 (exactly 1 h counts) of 4 failures; >= 6 h: F1 (exactly 6 h); none 24 h
    assert (s["share_lead_ge_1h"], s["share_lead_ge_6h"], s["share_lead_ge_24h"]) == (0.5, 0.25, 0.0)
    assert rep.undefined() == {}


def test_worked_timeline_detect_task() -> None:
    # Same alerts with no horizon: nothing is predicted. True alarms: A 10:20 (in F1) and
    # C 14:10 (in F2); non-failure: B 12:30 (in O1; 09:00 no longer counts without a horizon).
    # The other 8 alarms are false, and with no predicted failure the ratio is infinite.
    meta, scores, incidents = timeline()
    rep = incident_metrics(meta, scores, 0.5, incidents, None, pd.Timedelta("15min"), None, None)
    s = rep.summary()
    assert s["predicted"] == 0 and s["detected"] == 2
    assert s["recall_detected_or_predicted"] == 0.5
    assert (s["false_alarms"], s["nonfailure_alarms"]) == (8, 1)
    assert s["false_alarms_per_predicted_failure"] == float("inf")
    assert np.isnan(s["lead_time_median_h"])
    why = rep.undefined()
    assert "9 alarms matched no failure" in why["false_alarms_per_predicted_failure"]
    assert why["lead_time_median_h"] == "no failure was predicted"


def test_no_alarm_and_no_failure_give_nan_with_reasons() -> None:
    meta, scores, incidents = timeline()
    quiet = incident_metrics(meta, scores, 2.0, incidents.iloc[:0], pd.Timedelta("6h"), pd.Timedelta("15min"), 4, None)
    s = quiet.summary()
    assert s["alarms"] == 0 and s["failures"] == 0
    assert np.isnan(s["recall_predicted"]) and np.isnan(s["false_alarms_per_predicted_failure"])
    assert "0/0" in quiet.undefined()["false_alarms_per_predicted_failure"]
    assert quiet.undefined()["recall_predicted"] == "no failure starts in the evaluated span"


def test_run_record_combines_window_incident_and_interval_figures() -> None:
    from logtrial.evaluation.run_figures import evaluate_run

    meta, scores, incidents = timeline()
    # Window labels for the check: A's windows ending in F1's prediction range [04:00, 10:00).
    labels = ((meta["entity"] == "A") & (meta["end"] >= at("04:00")) & (meta["end"] < at("10:00"))).to_numpy().astype(np.int8)
    rec = evaluate_run(meta, scores, labels, 0.5, incidents, pd.Timedelta("6h"), pd.Timedelta("15min"),
                       bootstrap=300, ci_level=0.9, unit="entity", seed=3)
    m = rec["metrics"]
    # Window level: scikit-learn; 8 alerting windows of A lie in the range (04:00, 05:30, 05:40,
    # 05:55, 07:00-07:30) out of 72 positives (6 h of 5-min windows) -> recall 8/72; 16 windows
    # alert in all -> precision 8/16.
    assert_close(m, sklearn_window_metrics(labels, scores, 0.5))
    assert (m["recall"], m["precision"]) == (pytest.approx(8 / 72), 0.5)
    # Incident level: the worked numbers of test_worked_timeline_predict_task.
    assert (m["predicted"], m["false_alarms_per_predicted_failure"]) == (2, 1.5)
    assert rec["lead_times_h"] == [6.0, 1.0]
    assert "undefined" not in m
    for name, (lo, hi) in rec["intervals"].items():
        assert lo <= m[name] <= hi, name
    # Shares of failures: Wilson score interval on k of n failures (scipy.stats.binomtest as the reference).
    from scipy.stats import binomtest

    ci = binomtest(m["predicted"], m["failures"]).proportion_ci(confidence_level=0.9, method="wilson")
    assert rec["intervals"]["recall_predicted"] == [pytest.approx(ci.low), pytest.approx(ci.high)]
    # Other figures: the bootstrap over entities.
    assert rec["intervals"]["false_alarms_per_predicted_failure"] == list(
        bootstrap_ci(incident_metrics(meta, scores, 0.5, incidents, "6h", "15min"),
                     "false_alarms_per_predicted_failure", "entity", 300, 0.9, 3)
    )
    assert rec["outcomes"]["predicted"].count("1") == m["predicted"]
    # Incident unit: alarm-only figures get no interval; bootstrap 0: only the Wilson intervals.
    rec = evaluate_run(meta, scores, labels, 0.5, incidents, "6h", "15min", bootstrap=100, unit="incident")
    assert "alarms_per_week_per_100_entities" not in rec["intervals"] and "recall_predicted" in rec["intervals"]
    no_boot = evaluate_run(meta, scores, labels, 0.5, incidents, "6h", "15min", bootstrap=0)["intervals"]
    assert set(no_boot) == {"recall_predicted", "recall_detected_or_predicted", "share_lead_ge_1h",
                            "share_lead_ge_6h", "share_lead_ge_24h"}
    # No positive window: window figures become NaN with the reason recorded.
    rec = evaluate_run(meta, scores, np.zeros(len(meta), np.int8), 0.5, incidents, "6h", "15min", bootstrap=0)
    assert np.isnan(rec["metrics"]["auroc"]) and "no positive window" in rec["metrics"]["undefined"]["auroc"]


def test_incident_metrics_validates_inputs() -> None:
    meta, scores, incidents = timeline()
    with pytest.raises(DataError, match="one score per window"):
        incident_metrics(meta, scores[:-1], 0.5, incidents, "6h", "15min", None, None)
    with pytest.raises(ConfigError, match="metrics.cooldown"):
        incident_metrics(meta, scores, 0.5, incidents, "6h", "-1min", None, None)
    with pytest.raises(ConfigError, match="task.horizon"):
        incident_metrics(meta, scores, 0.5, incidents, "soon", "15min", None, None)
    bad = incidents.assign(kind=["failure", "outage", "failure", "failure", "failure", "failure"])
    with pytest.raises(DataError, match="row 1 has kind 'outage'"):
        incident_metrics(meta, scores, 0.5, bad, "6h", "15min", None, None)


# ---------------------------------------------------------------------------
# Bootstrap
# ---------------------------------------------------------------------------


def synthetic_report(n_entities: int, seed: int) -> IncidentReport:
    """One failure per entity, predicted with probability 0.6, lead 0.5-30 h, 0-3 false alarms each."""
    rng = np.random.default_rng(seed)
    names = [f"n{i:03d}" for i in range(n_entities)]
    start = DAY + pd.to_timedelta(rng.integers(0, 7 * 24, n_entities), unit="h")
    pred = rng.random(n_entities) < 0.6
    lead = pd.to_timedelta(np.where(pred, rng.uniform(0.5, 30, n_entities), np.nan), unit="h")
    failures = pd.DataFrame(
        {
            "id": np.arange(n_entities),
            "entity": names,
            "start": start,
            "end": start + pd.Timedelta("1h"),
            "predicted": pred,
            "detected": pred | (rng.random(n_entities) < 0.3),
            "lead_time": lead,
        }
    )
    n_false = rng.integers(0, 4, n_entities)
    a_ent = np.repeat(names, n_false)
    kinds = ["false", "nonfailure"]
    alarms = pd.DataFrame(
        {
            "entity": list(a_ent) + [n for n, p in zip(names, pred) if p],
            "time": DAY,
            "last_time": DAY,
            "n_alerts": 1,
            "matched_id": None,
            "match": [kinds[i % 2] for i in range(len(a_ent))] + ["predicted"] * int(pred.sum()),
        }
    )
    return IncidentReport(failures, alarms, n_entities, (DAY, DAY + pd.Timedelta(weeks=2)), tuple(names))


@pytest.mark.parametrize(
    ("metric", "unit"),
    [
        ("recall_predicted", "incident"),
        ("recall_predicted", "entity"),
        ("false_alarms_per_predicted_failure", "entity"),
        ("alarms_per_week_per_100_entities", "entity"),
        ("lead_time_median_h", "incident"),
        ("share_lead_ge_6h", "entity"),
    ],
)
def test_bootstrap_contains_estimate_and_is_deterministic(metric: str, unit: str) -> None:
    rep = synthetic_report(120, seed=5)
    point = rep.summary()[metric]
    lo, hi = bootstrap_ci(rep, metric, unit=unit, n=800, seed=1)
    assert lo <= point <= hi and lo < hi
    assert bootstrap_ci(rep, metric, unit=unit, n=800, seed=1) == (lo, hi)


def test_bootstrap_resamples_depend_on_the_seed() -> None:
    rep = synthetic_report(60, seed=2)
    seen: dict[int, list[float]] = {1: [], 2: []}
    for seed in seen:
        bootstrap_ci(rep, lambda r, seed=seed: seen[seed].append(r.summary()["recall_predicted"]) or 0.0, n=50, seed=seed)
    assert seen[1] != seen[2]
    again: list[float] = []
    bootstrap_ci(rep, lambda r: again.append(r.summary()["recall_predicted"]) or 0.0, n=50, seed=1)
    assert again == seen[1]


@pytest.mark.parametrize("unit", ["incident", "entity"])
def test_bootstrap_named_metric_equals_function_of_resampled_report(unit: str) -> None:
    # The vectorised path and the explicit resample-then-summarise path draw the same units.
    rep = synthetic_report(40, seed=8)
    for name in ("recall_predicted", "lead_time_median_h", "false_alarms_per_predicted_failure"):
        fast = bootstrap_ci(rep, name, unit=unit, n=200, seed=4)
        slow = bootstrap_ci(rep, lambda r, name=name: r.summary()[name], unit=unit, n=200, seed=4)
        assert fast == pytest.approx(slow, abs=1e-12), name


def test_weighted_median_equals_numpy_median_of_repeated_values() -> None:
    # Reference: numpy.median of the values repeated by their weights.
    from logtrial.evaluation.alarms import _weighted_median

    rng = np.random.default_rng(12)
    values = rng.normal(size=15)
    weights = rng.integers(0, 4, size=(30, 15))
    weights[0] = 0
    got = _weighted_median(values, weights)
    assert np.isnan(got[0])
    for row, w in zip(got[1:], weights[1:]):
        assert row == pytest.approx(np.median(np.repeat(values, w)), abs=1e-12)


def test_bootstrap_narrows_with_more_units() -> None:
    # Common practice: the width of a proportion's interval shrinks like 1/sqrt(units).
    small = bootstrap_ci(synthetic_report(25, seed=3), "recall_predicted", unit="entity", n=1000, seed=0)
    large = bootstrap_ci(synthetic_report(400, seed=3), "recall_predicted", unit="entity", n=1000, seed=0)
    assert (large[1] - large[0]) < 0.6 * (small[1] - small[0])


def test_bootstrap_matches_scipy_percentile_interval() -> None:
    # Reference: scipy.stats.bootstrap(method="percentile") of the mean of the per-failure
    # "predicted" flags, which is recall_predicted; the two differ only by Monte-Carlo error.
    rep = synthetic_report(200, seed=9)
    ours = bootstrap_ci(rep, "recall_predicted", unit="incident", n=4000, seed=0)
    flags = rep.failures["predicted"].to_numpy(dtype=float)
    ref = scipy.stats.bootstrap(
        (flags,), np.mean, n_resamples=4000, confidence_level=0.95, method="percentile", rng=np.random.default_rng(0)
    ).confidence_interval
    assert ours[0] == pytest.approx(ref.low, abs=0.015)
    assert ours[1] == pytest.approx(ref.high, abs=0.015)


def test_bootstrap_rejects_bad_requests() -> None:
    rep = synthetic_report(10, seed=1)
    with pytest.raises(ConfigError, match="use unit='entity'"):
        bootstrap_ci(rep, "false_alarms", unit="incident")
    with pytest.raises(ConfigError, match="bootstrap.metric: unknown figure 'nope'"):
        bootstrap_ci(rep, "nope")
    with pytest.raises(ConfigError, match="bootstrap.unit"):
        bootstrap_ci(rep, "recall_predicted", unit="node")
    with pytest.raises(ConfigError, match="bootstrap.level"):
        bootstrap_ci(rep, "recall_predicted", level=95)


def test_short_failure_inside_one_window_is_detected_by_that_window() -> None:
    # Worked by hand: hourly windows of node n1 on a day; an alert line burst lasts from
    # 10:20 to 10:25 (a real-log pattern: BGL alert runs are often seconds long). The
    # window [10:00, 11:00) alerts; its alert time is 11:00 (window end), after the
    # failure ended, yet the window holds the failure, so the failure is detected.
    day = pd.Timestamp("2026-01-05", tz="UTC")
    starts = [day + pd.Timedelta(hours=h) for h in range(8, 13)]
    meta = pd.DataFrame({"entity": ["n1"] * 5, "start": starts, "end": [s + pd.Timedelta(hours=1) for s in starts]})
    scores = np.array([0.1, 0.1, 0.9, 0.1, 0.1])  # only the 10:00 window alerts
    inc = pd.DataFrame({"id": [1], "entity": ["n1"], "start": [day + pd.Timedelta("10h20min")],
                        "end": [day + pd.Timedelta("10h25min")], "kind": ["failure"]})
    rep = incident_metrics(meta, scores, 0.5, inc, None, pd.Timedelta("1h"))
    s = rep.summary()
    assert s["detected"] == 1 and s["false_alarms"] == 0 and s["recall_detected_or_predicted"] == 1.0
    # The next window [11:00, 12:00) does not overlap it: an alert there is a false alarm.
    rep2 = incident_metrics(meta, np.array([0.1, 0.1, 0.1, 0.9, 0.1]), 0.5, inc, None, pd.Timedelta("1h"))
    assert rep2.summary()["detected"] == 0 and rep2.summary()["false_alarms"] == 1
