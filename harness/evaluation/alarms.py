"""Incident-level scoring: alerts merged into alarms per entity, alarms matched to failures and other anomalies.

Rules (one set for every detector)
----------------------------------
- **Alert**: a window with ``score >= threshold``; its time is the window ``end``
  (the moment the window's evidence is complete).
- **Alarm**: per entity, alerts in time order; an alert less than ``cooldown``
  after the *previous alert* joins the running alarm (so chains of close alerts
  merge into one alarm however long the chain). An alarm's ``time`` is its
  first alert, ``last_time`` its last alert. A gap of exactly ``cooldown``
  starts a new alarm; simultaneous alerts of one entity are always one alarm
  (also with a zero cool-down, which otherwise merges nothing).
- **Matching** (same entity, or any entity for an incident whose entity is ""
  or "*", i.e. fleet-wide): an alarm is *active* from its first to its last
  alert. It *predicts* failure F when it is active at some moment of
  ``[F.start - horizon, F.start)`` (an alarm that began earlier and is still
  going counts, with its warning taken from the start of the horizon); it
  *detects* F when its windows (``[w_start, last_time)``) meet ``[F.start, F.end]``,
  so a short failure inside one window is detected by that window's alert. With
  no horizon (the detect task) nothing is predicted, only detected.
- **Alarm kinds**: ``predicted`` or ``detected`` (true alarms; an alarm that
  both predicts one failure and detects another is ``predicted``), else
  ``nonfailure`` when it is active at or after ``O.start - horizon`` and its first
  window starts no later than ``O.end`` for a non-failure anomaly O, else ``false``.
- **Lead time** of a predicted failure: ``F.start`` minus the earliest moment an
  alarm was active within its horizon. ``matched_id`` is the matched incident with the
  earliest start.
- **False alarms per predicted failure** = (false + non-failure alarms) /
  predicted failures: a non-failure alarm still pages an operator for no
  failure, so it counts; both parts are also reported on their own. With no
  predicted failure the ratio is ``inf`` when any such alarm exists, ``nan``
  when none does; :meth:`IncidentReport.undefined` says why.
- **Failures counted** are those whose start lies in the evaluated span
  ``[span_start, span_end)``; alarms are matched against every incident given,
  so an alarm just before the span's end that predicts a failure after it is a
  true alarm (that failure is not counted).
- **Rates**: alarms per week per 100 entities = alarms / weeks / (entities / 100),
  where the weeks are those of the span the alarms were counted over: every
  evaluated window raises alarms, so it is the windows' span (earliest start to
  latest end), even when failures are counted over a shorter span (e.g. from
  the test start plus the horizon). Dividing by the shorter span would inflate
  the rate (by 25 % for a 7-day horizon on a 35-day test span).
- **Lead-time shares**: failures predicted at least 1 h / 6 h / 24 h ahead,
  over all counted failures.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from logtrial.errors import ConfigError, DataError, MetricError
from logtrial.labels.incidents import from_ns, times_ns
from logtrial.windowing.windows import parse_duration

FLEET_WIDE = ("", "*")
ALARM_COLUMNS = ["entity", "time", "last_time", "n_alerts", "window_start", "matched_id", "match"]
FAILURE_COLUMNS = ["id", "entity", "start", "end", "predicted", "detected", "lead_time"]
_WEEK_NS = pd.Timedelta(weeks=1).value


def check_cooldown(cooldown: object, where: str = "metrics.cooldown") -> pd.Timedelta:
    """A non-negative cool-down duration, or ConfigError naming the field."""
    cd = parse_duration(cooldown, where)
    if cd < pd.Timedelta(0):
        raise ConfigError(f"{where}: must not be negative, got {cd}")
    return cd


def check_horizon(horizon: object, where: str = "task.horizon") -> pd.Timedelta:
    """A non-negative horizon (None means zero: detection only), or ConfigError naming the field."""
    if horizon is None:
        return pd.Timedelta(0)
    h = parse_duration(horizon, where)
    if h < pd.Timedelta(0):
        raise ConfigError(f"{where}: must not be negative, got {h}")
    return h


def alert_arrays(
    meta: pd.DataFrame, scores: np.ndarray, threshold: float, with_start: bool = False
) -> tuple[np.ndarray, ...]:
    """Entity names and alert times (ns, window end) of the windows whose score reaches the threshold.

    With ``with_start`` the alerting windows' start times (ns) come third.
    """
    s = np.asarray(scores, dtype=np.float64)
    if s.ndim != 1 or len(s) != len(meta):
        raise DataError(f"scores: expected one score per window ({len(meta)}), got shape {s.shape}")
    if np.isnan(s).any():
        raise DataError(f"scores: {int(np.isnan(s).sum())} windows have a NaN score; detectors must score every window")
    hit = s >= threshold
    ent = meta["entity"].fillna("").astype(str).to_numpy(dtype=object)
    if with_start:
        return ent[hit], times_ns(meta["end"])[hit], times_ns(meta["start"])[hit]
    return ent[hit], times_ns(meta["end"])[hit]


def merge_alerts(
    entity: np.ndarray, times: np.ndarray, cooldown: pd.Timedelta, starts: np.ndarray | None = None
) -> pd.DataFrame:
    """Alarms (entity, time, last_time, n_alerts, window_start) from alerts, merging chains closer than the cool-down.

    ``starts`` are the alerting windows' start times (ns); without them an alert's
    window is taken to be the instant of its time.
    """
    cd = check_cooldown(cooldown).value
    ent = np.asarray(entity, dtype=object)
    t = np.asarray(times, dtype=np.int64)
    if len(t) == 0:
        return pd.DataFrame(
            {
                "entity": pd.array([], dtype="str"),
                "time": from_ns(np.zeros(0, np.int64)),
                "last_time": from_ns(np.zeros(0, np.int64)),
                "n_alerts": np.zeros(0, np.int64),
                "window_start": from_ns(np.zeros(0, np.int64)),
            }
        )
    w0 = t if starts is None else np.asarray(starts, dtype=np.int64)
    codes, names = pd.factorize(ent, sort=True)
    order = np.lexsort((t, codes))
    c, ts, ws = codes[order], t[order], w0[order]
    gap = np.diff(ts)
    new = np.r_[True, (c[1:] != c[:-1]) | ((gap >= cd) & (gap > 0))]
    first = np.flatnonzero(new)
    last = np.r_[first[1:], len(ts)] - 1
    return pd.DataFrame(
        {
            "entity": pd.array(np.asarray(names, dtype=object)[c[first]], dtype="str"),
            "time": from_ns(ts[first]),
            "last_time": from_ns(ts[last]),
            "n_alerts": (last - first + 1).astype(np.int64),
            "window_start": from_ns(ws[first]),
        }
    )


def alarm_counts(
    entity: np.ndarray, times: np.ndarray, scores: np.ndarray, cooldown: pd.Timedelta, thresholds: np.ndarray
) -> np.ndarray:
    """Number of merged alarms at each candidate threshold, all thresholds at once.

    An alert starts a new alarm exactly when no alert of its entity lies less than
    ``cooldown`` before it, i.e. when ``m < threshold <= s`` with ``s`` its score and
    ``m`` the highest score of its entity's earlier windows within the cool-down.
    Windows at the same (entity, time) act as one alert with their highest score.
    """
    cd = check_cooldown(cooldown)
    s = np.asarray(scores, dtype=np.float64)
    thr = np.asarray(thresholds, dtype=np.float64)
    if len(s) == 0:
        return np.zeros(len(thr), dtype=np.int64)
    frame = pd.DataFrame(
        {"code": pd.factorize(np.asarray(entity, dtype=object), sort=True)[0], "t": np.asarray(times, np.int64), "s": s}
    )
    frame = frame.groupby(["code", "t"], sort=True, as_index=False)["s"].max()
    if cd > pd.Timedelta(0):
        indexed = frame.set_index(from_ns(frame["t"].to_numpy()))
        prev = indexed.groupby("code", sort=True)["s"].rolling(cd, closed="neither").max()
        m = np.nan_to_num(prev.to_numpy(dtype=np.float64), nan=-np.inf)
    else:
        m = np.full(len(frame), -np.inf)
    sv = frame["s"].to_numpy()
    at_least = np.sort(sv)
    joined = np.sort(np.minimum(sv, m))
    n_alerts = len(at_least) - np.searchsorted(at_least, thr, side="left")
    n_joined = len(joined) - np.searchsorted(joined, thr, side="left")
    return (n_alerts - n_joined).astype(np.int64)


def _incident_arrays(incidents: pd.DataFrame) -> dict[str, np.ndarray]:
    """Incident columns as arrays (entity str, start/end ns, kind, id), validated."""
    missing = [c for c in ("id", "entity", "start", "end", "kind") if c not in incidents.columns]
    if missing:
        raise DataError(f"incidents: missing column {missing[0]!r} (expected id, entity, start, end, kind)")
    kind = incidents["kind"].astype(str).to_numpy(dtype=object)
    bad = ~np.isin(kind, ("failure", "other"))
    if bad.any():
        raise DataError(f"incidents: row {int(np.flatnonzero(bad)[0])} has kind {kind[bad][0]!r}, expected 'failure' or 'other'")
    start, end = times_ns(incidents["start"]), times_ns(incidents["end"])
    if (end < start).any():
        raise DataError(f"incidents: row {int(np.flatnonzero(end < start)[0])} ends before it starts")
    return {
        "id": incidents["id"].to_numpy(dtype=object),
        "entity": incidents["entity"].fillna("").astype(str).to_numpy(dtype=object),
        "start": start,
        "end": end,
        "kind": kind,
    }


def _pairs(alarm_entity: np.ndarray, inc_entity: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(alarm index, incident index) pairs of the same entity, plus every alarm with each fleet-wide incident."""
    fleet = np.isin(inc_entity, FLEET_WIDE)
    a = pd.DataFrame({"entity": alarm_entity, "a": np.arange(len(alarm_entity))})
    i = pd.DataFrame({"entity": inc_entity[~fleet], "i": np.flatnonzero(~fleet)})
    same = a.merge(i, on="entity", how="inner", sort=False)
    fleet_idx = np.flatnonzero(fleet)
    a_idx = np.concatenate([same["a"].to_numpy(np.int64), np.repeat(np.arange(len(alarm_entity)), len(fleet_idx))])
    i_idx = np.concatenate([same["i"].to_numpy(np.int64), np.tile(fleet_idx, len(alarm_entity))])
    return a_idx.astype(np.int64), i_idx.astype(np.int64)


def match_alarms(
    alarms: pd.DataFrame, incidents: pd.DataFrame, horizon: pd.Timedelta | None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Alarm table with ``matched_id`` and ``match``, and per-incident first predicting alarm / detection flags."""
    h = check_horizon(horizon).value
    inc = _incident_arrays(incidents)
    t = times_ns(alarms["time"]) if len(alarms) else np.zeros(0, np.int64)
    w = times_ns(alarms["window_start"]) if "window_start" in alarms and len(alarms) else t
    last = times_ns(alarms["last_time"]) if "last_time" in alarms and len(alarms) else t
    a_idx, i_idx = _pairs(alarms["entity"].fillna("").astype(str).to_numpy(dtype=object), inc["entity"])
    ta, wa, tl, s, e = t[a_idx], w[a_idx], last[a_idx], inc["start"][i_idx], inc["end"][i_idx]
    is_fail = inc["kind"][i_idx] == "failure"
    # Predicted: the alarm is active (first..last alert) at some moment of [s - h, s).
    pred = is_fail & (ta < s) & (tl >= s - h)
    # Detected: the alarm's windows [w, last) meet [s, e] (an instant alert: its time in [s, e]).
    det = is_fail & (wa <= e) & ((tl > s) | ((tl == s) & (wa == tl)))
    nonf = ~is_fail & (tl >= s - h) & (wa <= e)
    rank = np.where(pred, 0, np.where(det, 1, np.where(nonf, 2, 3)))
    hit = rank < 3
    pairs = pd.DataFrame({"a": a_idx[hit], "rank": rank[hit], "start": s[hit], "i": i_idx[hit]})
    best = pairs.sort_values(["a", "rank", "start", "i"], kind="stable").drop_duplicates("a", keep="first")
    match = np.full(len(alarms), "false", dtype=object)
    matched = np.full(len(alarms), None, dtype=object)
    names = np.array(["predicted", "detected", "nonfailure"], dtype=object)
    match[best["a"].to_numpy()] = names[best["rank"].to_numpy()]
    matched[best["a"].to_numpy()] = inc["id"][best["i"].to_numpy()]
    out = alarms.copy()
    out["matched_id"] = pd.Series(matched, index=out.index, dtype=object)
    out["match"] = pd.array(match, dtype="str")

    n_inc = len(inc["start"])
    first_pred = np.full(n_inc, np.iinfo(np.int64).max, dtype=np.int64)
    # Warned from the alarm's start, or from the start of the horizon when the alarm began earlier.
    np.minimum.at(first_pred, i_idx[pred], np.maximum(ta[pred], (s - h)[pred]))
    detected = np.zeros(n_inc, dtype=bool)
    detected[i_idx[det]] = True
    per_incident = pd.DataFrame(
        {"first_pred_ns": first_pred, "predicted": first_pred != np.iinfo(np.int64).max, "detected": detected}
    )
    return out, per_incident


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
    weeks = report.alarm_weeks
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


@dataclass
class IncidentReport:
    """Per-failure and per-alarm tables of one scored run, with the span and fleet size they cover."""

    failures: pd.DataFrame
    alarms: pd.DataFrame
    n_entities: int
    span: tuple[pd.Timestamp, pd.Timestamp]
    entity_names: tuple[str, ...] = ()
    horizon: pd.Timedelta = pd.Timedelta(0)
    cooldown: pd.Timedelta = pd.Timedelta(0)
    threshold: float = float("nan")
    alarm_span: tuple[pd.Timestamp, pd.Timestamp] | None = None

    @property
    def span_weeks(self) -> float:
        """Length of the evaluated span (where failures are counted) in weeks."""
        return (pd.Timestamp(self.span[1]) - pd.Timestamp(self.span[0])).value / _WEEK_NS

    @property
    def alarm_weeks(self) -> float:
        """Length in weeks of the span the alarms were counted over (the evaluated span when not given)."""
        lo, hi = self.alarm_span if self.alarm_span is not None else self.span
        return (pd.Timestamp(hi) - pd.Timestamp(lo)).value / _WEEK_NS

    def summary(self) -> dict[str, float]:
        """Headline incident-level figures (see the module docstring for each rule).

        ``detected`` counts failures with an alarm during them, predicted or not;
        ``detected_only`` those of them that were not predicted; ``alarms`` all alarms.
        """
        code = self.alarms["match"].to_numpy(dtype=object)
        kinds = np.array(
            [[np.sum(code == "false"), np.sum(code == "nonfailure"), np.sum(np.isin(code, ("predicted", "detected")))]],
            dtype=np.float64,
        )
        values = summarise_weighted(self, np.ones((1, len(self.failures))), kinds)
        out: dict[str, float] = {}
        for name, v in values.items():
            x = float(v[0])
            out[name] = int(x) if name in _COUNTS else x
        return out

    def undefined(self) -> dict[str, str]:
        """Why each NaN or infinite headline figure is so."""
        s = self.summary()
        why: dict[str, str] = {}
        if s["failures"] == 0:
            msg = "no failure starts in the evaluated span"
            for k in ("recall_predicted", "recall_detected_or_predicted", "share_lead_ge_1h", "share_lead_ge_6h", "share_lead_ge_24h"):
                why[k] = msg
        if s["predicted"] == 0:
            why["lead_time_median_h"] = "no failure was predicted"
            paged = s["false_alarms"] + s["nonfailure_alarms"]
            why["false_alarms_per_predicted_failure"] = (
                f"{paged} alarms matched no failure and no failure was predicted (infinite)"
                if paged
                else "no failure was predicted and no alarm was raised in vain (0/0)"
            )
        if s["predicted"] + s["detected_only"] == 0:
            paged = s["false_alarms"] + s["nonfailure_alarms"]
            why["false_alarms_per_caught_failure"] = (
                f"{paged} alarms matched no failure and no failure was predicted or detected (infinite)"
                if paged
                else "no failure was caught and no alarm was raised in vain (0/0)"
            )
        return why


_COUNTS = ("failures", "predicted", "detected", "detected_only", "alarms", "false_alarms", "nonfailure_alarms")


def evaluation_span(meta: pd.DataFrame) -> tuple[pd.Timestamp, pd.Timestamp]:
    """Time covered by a set of windows: earliest start to latest end."""
    if len(meta) == 0:
        raise MetricError("cannot take the span of an empty set of windows")
    return pd.Timestamp(meta["start"].min()), pd.Timestamp(meta["end"].max())


def incident_metrics(
    windows_meta: pd.DataFrame,
    scores: np.ndarray,
    threshold: float,
    incidents: pd.DataFrame,
    horizon: pd.Timedelta | None,
    cooldown: pd.Timedelta,
    entities: int | None = None,
    span: tuple[pd.Timestamp, pd.Timestamp] | None = None,
) -> IncidentReport:
    """Alarms and failure outcomes of one detector's scores on the evaluated windows, as an IncidentReport.

    ``entities`` (fleet size) and ``span`` default to the distinct entities and the
    time range of ``windows_meta``. ``span`` only decides which failures count;
    alarm rates divide by the windows' own span, over which the alarms were counted.
    """
    h = check_horizon(horizon)
    cd = check_cooldown(cooldown)
    win_entities = np.asarray(pd.unique(windows_meta["entity"].fillna("").astype(str).to_numpy(dtype=object)), dtype=object)
    n_ent = len(win_entities) if entities is None else entities
    if isinstance(n_ent, bool) or not isinstance(n_ent, (int, np.integer)) or n_ent <= 0:
        raise ConfigError(f"metrics.entities: expected a positive number of entities, got {n_ent!r}")
    alarm_span = evaluation_span(windows_meta)
    lo, hi = alarm_span if span is None else (pd.Timestamp(span[0]), pd.Timestamp(span[1]))
    if not hi > lo:
        raise MetricError(f"evaluated span must have positive length, got {lo} .. {hi}")

    ent, t, w = alert_arrays(windows_meta, scores, threshold, with_start=True)
    alarms = merge_alerts(ent, t, cd, w)
    alarms, per_inc = match_alarms(alarms, incidents, h)

    inc = _incident_arrays(incidents)
    in_span = (inc["kind"] == "failure") & (inc["start"] >= lo.value) & (inc["start"] < hi.value)
    sel = np.flatnonzero(in_span)
    first = per_inc["first_pred_ns"].to_numpy()[sel]
    predicted = per_inc["predicted"].to_numpy()[sel]
    lead = np.where(predicted, inc["start"][sel] - np.where(predicted, first, 0), np.iinfo(np.int64).min)
    failures = pd.DataFrame(
        {
            "id": pd.Series(inc["id"][sel], dtype=object),
            "entity": pd.array(inc["entity"][sel], dtype="str"),
            "start": from_ns(inc["start"][sel]),
            "end": from_ns(inc["end"][sel]),
            "predicted": predicted,
            "detected": per_inc["detected"].to_numpy()[sel],
            "lead_time": pd.to_timedelta(lead, unit="ns"),
        }
    )
    fail_entities = [e for e in failures["entity"].astype(str) if e not in FLEET_WIDE]
    names = tuple(sorted(set(win_entities.tolist()) | set(fail_entities)))
    return IncidentReport(
        failures=failures,
        alarms=alarms[ALARM_COLUMNS].reset_index(drop=True),
        n_entities=int(n_ent),
        span=(lo, hi),
        entity_names=names,
        horizon=h,
        cooldown=cd,
        threshold=float(threshold),
        alarm_span=alarm_span,
    )
