"""Operating curves: failures caught and median lead time against the alarm rate, over the test thresholds.

For reading only: the headline figures use thresholds chosen on validation. A curve
shows what every other threshold would have given on the test split, under exactly
the rules of :mod:`logtrial.evaluation.alarms` (alerts merged per entity with the
cool-down; a failure is *predicted* when an alarm is active within its horizon, or,
for the detect task (no horizon), *caught* when an alarm is running as it starts or an
alarm's windows meet it).

The alarm count is computed for every distinct test score at once
(:func:`~logtrial.evaluation.alarms.alarm_counts`); the failures caught are then
computed exactly at a few hundred of those thresholds, spread evenly over the rank
of the threshold and over the logarithm of the alarm count.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from logtrial.evaluation.alarms import (
    FLEET_WIDE,
    _incident_arrays,
    alarm_counts,
    check_cooldown,
    check_horizon,
    evaluation_span,
)
from logtrial.labels.incidents import times_ns

CURVE_COLUMNS = ["threshold", "alarms", "alarms_per_week_per_100_entities", "caught", "share_caught", "lead_time_median_h"]
CURVE_NOTE = ("test-side operating curve, for reading; headline points use thresholds chosen on the validation split")
_WEEK_NS = pd.Timedelta(weeks=1).value


def pick_points(counts: np.ndarray, max_points: int) -> np.ndarray:
    """Indices of at most ``max_points`` thresholds: even in rank and in log alarm count, ends included."""
    n = len(counts)
    if n <= max_points:
        return np.arange(n)
    half = max(max_points // 2, 2)
    by_rank = np.round(np.linspace(0, n - 1, half)).astype(np.int64)
    logc = np.log1p(np.asarray(counts, dtype=np.float64))
    targets = np.linspace(logc.min(), logc.max(), max_points - half)
    # counts fall (not always strictly) as the threshold rises: match each target to the nearest count.
    order = np.argsort(logc, kind="stable")
    pos = np.clip(np.searchsorted(logc[order], targets), 0, n - 1)
    by_count = order[pos]
    return np.unique(np.r_[by_rank, by_count, 0, n - 1])[:max_points + 2]


def operating_curve(
    meta: pd.DataFrame,
    scores: np.ndarray,
    incidents: pd.DataFrame,
    horizon: pd.Timedelta | None,
    cooldown: pd.Timedelta,
    span: tuple[pd.Timestamp, pd.Timestamp] | None = None,
    entities: int | None = None,
    max_points: int = 300,
) -> pd.DataFrame:
    """Alarm rate, failures caught (count, share) and median lead time at up to ``max_points`` test thresholds.

    ``span`` decides which failures count (as in ``incident_metrics``); the alarm rate
    divides by the windows' own span, over which the alarms are counted.
    """
    h = check_horizon(horizon).value
    cd = check_cooldown(cooldown).value
    s = np.asarray(scores, dtype=np.float64)
    a_lo, a_hi = evaluation_span(meta)
    lo, hi = (a_lo, a_hi) if span is None else (pd.Timestamp(span[0]), pd.Timestamp(span[1]))
    names = meta["entity"].fillna("").astype(str).to_numpy(dtype=object)
    codes, uniq = pd.factorize(names, sort=True)
    n_ent = len(uniq) if entities is None else int(entities)
    end, start = times_ns(meta["end"]), times_ns(meta["start"])
    weeks = (a_hi - a_lo).value / _WEEK_NS

    cand = np.unique(s)
    cand = np.r_[cand, np.nextafter(cand[-1], np.inf)] if len(cand) else np.array([np.inf])
    counts_all = alarm_counts(names, end, s, pd.Timedelta(cd), cand)
    pick = pick_points(counts_all, max_points)
    thr = cand[pick]

    inc = _incident_arrays(incidents)
    sel = (inc["kind"] == "failure") & (inc["start"] >= lo.value) & (inc["start"] < hi.value)
    f_s, f_e = inc["start"][sel], inc["end"][sel]
    lookup = {n: i for i, n in enumerate(uniq)}
    f_ent = inc["entity"][sel]
    fleet = np.isin(f_ent, FLEET_WIDE)
    f_code = np.array([lookup.get(e, -1) for e in f_ent], dtype=np.int64)
    n_fail = int(sel.sum())

    # Ranks of every instant involved, so that (entity, time) becomes one sortable integer.
    probe = f_s - h if h > 0 else f_s
    instants = np.unique(np.r_[end, probe])
    width = len(instants) + 1
    end_rank = np.searchsorted(instants, end)
    probe_key = f_code * width + np.searchsorted(instants, probe)
    order = np.lexsort((end, codes))
    o_code, o_end, o_start, o_rank = codes[order], end[order], start[order], end_rank[order]
    o_score = s[order]

    rows = []
    for t in thr:
        hit = o_score >= t
        c, te, ws, rk = o_code[hit], o_end[hit], o_start[hit], o_rank[hit]
        if len(c):
            gap = np.diff(te)
            new = np.r_[True, (c[1:] != c[:-1]) | ((gap >= cd) & (gap > 0))]
            first = np.flatnonzero(new)
            last = np.r_[first[1:] - 1, len(c) - 1]
            a_code, a_first, a_last, a_w = c[first], te[first], te[last], ws[first]
            a_key = a_code * width + rk[last]
        else:
            a_code = a_first = a_last = a_w = a_key = np.zeros(0, np.int64)
        n_alarms = len(a_code)
        caught = np.zeros(n_fail, dtype=bool)
        lead = np.full(n_fail, np.nan)
        if n_fail and n_alarms:
            j = np.searchsorted(a_key, probe_key, side="left")
            jj = np.minimum(j, n_alarms - 1)
            same = (j < n_alarms) & (a_code[jj] == f_code) & (f_code >= 0) & ~fleet
            # Predicted: the first alarm still active at s - h began before s (with no horizon this
            # is an alarm already running when the failure starts, as in incident_metrics).
            pred = same & (a_first[jj] < f_s)
            lead = np.where(pred, f_s - np.maximum(a_first[jj], f_s - h), np.nan) / 3.6e12
            caught = pred
            if h == 0:
                ok1 = same & (a_w[jj] <= f_e) & ((a_last[jj] > f_s) | ((a_last[jj] == f_s) & (a_w[jj] == a_last[jj])))
                j2 = np.minimum(j + 1, n_alarms - 1)
                ok2 = (same & (a_last[jj] == f_s) & (j + 1 < n_alarms) & (a_code[j2] == f_code)
                       & (a_w[j2] <= f_e) & (a_last[j2] > f_s))
                caught = pred | ok1 | ok2
            for i in np.flatnonzero(fleet):  # fleet-wide failures: any entity's alarm counts
                act = (a_first < f_s[i]) & (a_last >= f_s[i] - h)
                if act.any():
                    caught[i] = True
                    lead[i] = (f_s[i] - np.maximum(a_first[act], f_s[i] - h).min()) / 3.6e12
                elif h == 0:
                    caught[i] = bool(((a_w <= f_e[i]) & ((a_last > f_s[i]) | ((a_last == f_s[i]) & (a_w == a_last)))).any())
        k = int(caught.sum())
        rows.append((float(t), n_alarms, n_alarms / weeks / (n_ent / 100.0) if weeks > 0 else np.nan, k,
                     k / n_fail if n_fail else np.nan,
                     float(np.median(lead[caught])) if h > 0 and k else np.nan))
    out = pd.DataFrame(rows, columns=CURVE_COLUMNS)
    out.attrs["failures"] = n_fail
    return out
