"""Window builders and window labels: coverage properties, pandas reference, real BGL alert lines, bad config."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from logtrial.errors import ConfigError
from logtrial.labels.incidents import incidents_from_sessions, incidents_from_tags, make_incidents, times_ns
from logtrial.windowing.windows import (
    WindowSet,
    build_windows,
    count_windows,
    label_windows,
    load_window_spec,
    session_windows,
    time_windows,
    window_incident_kind,
)

T0 = pd.Timestamp("2024-01-01", tz="UTC")
H = pd.Timedelta("1h")


def _events(n: int, seed: int, span_h: float = 48.0, n_ent: int = 3, vocab: int = 6) -> pd.DataFrame:
    """Random event table in file order (not time-sorted), some rows without a group."""
    rng = np.random.default_rng(seed)
    offs = rng.integers(0, int(span_h * 3600 * 1e6), n)  # microseconds
    return pd.DataFrame(
        {
            "line": np.arange(1, n + 1, dtype=np.int64),
            "ts": T0 + pd.to_timedelta(offs, unit="us"),
            "entity": pd.array(rng.choice([f"e{i}" for i in range(n_ent)], n), dtype="str"),
            "group": pd.array(np.where(rng.random(n) < 0.2, None, rng.choice(["s1", "s2", "s3", "s4"], n)), dtype="str"),
            "event": rng.integers(0, vocab, n).astype(np.int32),
            "tag": pd.array(np.where(rng.random(n) < 0.05, "ALERT", ""), dtype="str"),
        }
    )


def _membership(ws: WindowSet, events: pd.DataFrame) -> list[np.ndarray]:
    """(window, line) pairs reconstructed from each window's entity and time range (brute force)."""
    ts = times_ns(events["ts"])
    ent = events["entity"].to_numpy(dtype=object)
    starts, ends = times_ns(ws.meta["start"]), times_ns(ws.meta["end"])
    pairs = []
    for w_ent, s, e in zip(ws.meta["entity"].to_numpy(dtype=object), starts, ends):
        pairs.append(np.flatnonzero((ent == w_ent) & (ts >= s) & (ts < e)))
    return pairs


def _check_consistent(ws: WindowSet) -> None:
    """Counts, sequences and meta agree with each other."""
    assert ws.seq_offsets[0] == 0 and ws.seq_offsets[-1] == len(ws.seq_values)
    assert (np.diff(ws.seq_offsets) == ws.meta["n_events"].to_numpy()).all()
    assert (np.asarray(ws.counts.sum(axis=1)).ravel() == ws.meta["n_events"].to_numpy()).all()
    assert (ws.meta["n_events"] > 0).all()  # empty windows are not produced
    assert (ws.meta["end"] > ws.meta["start"]).all()
    assert list(ws.meta["id"]) == list(range(len(ws)))
    for i in range(0, len(ws), max(1, len(ws) // 7)):
        seq = ws.sequence(i)
        assert (np.bincount(seq, minlength=ws.vocab_size) == ws.counts[i].toarray().ravel()).all()


@settings(max_examples=30, deadline=None)
@given(n=st.integers(0, 300), seed=st.integers(0, 10_000), size_min=st.sampled_from([7, 30, 60, 180]))
def test_fixed_time_windows_cover_each_event_exactly_once(n: int, seed: int, size_min: int) -> None:
    ev = _events(n, seed)
    ws = time_windows(ev, 6, pd.Timedelta(minutes=size_min))
    assert ws.meta["n_events"].sum() == n
    assert ws.counts.sum() == n
    if n:
        _check_consistent(ws)
        # each event falls in exactly one window of its entity (brute-force membership)
        members = np.concatenate(_membership(ws, ev))
        assert np.array_equal(np.sort(members), np.arange(n))


@settings(max_examples=30, deadline=None)
@given(n=st.integers(0, 200), seed=st.integers(0, 10_000), size_min=st.sampled_from([10, 60, 90]))
def test_sliding_with_step_equal_size_is_fixed(n: int, seed: int, size_min: int) -> None:
    ev = _events(n, seed)
    size = pd.Timedelta(minutes=size_min)
    a = time_windows(ev, 6, size)
    b = time_windows(ev, 6, size, size)
    pd.testing.assert_frame_equal(a.meta, b.meta)
    assert (a.counts != b.counts).nnz == 0
    assert np.array_equal(a.seq_values, b.seq_values) and np.array_equal(a.seq_offsets, b.seq_offsets)


@settings(max_examples=25, deadline=None)
@given(n=st.integers(1, 200), seed=st.integers(0, 10_000), step_div=st.sampled_from([2, 3, 4]))
def test_sliding_windows_match_brute_force(n: int, seed: int, step_div: int) -> None:
    ev = _events(n, seed, span_h=6)
    size = pd.Timedelta("1h")
    ws = time_windows(ev, 6, size, size / step_div)
    _check_consistent(ws)
    members = _membership(ws, ev)
    assert all(len(m) == k for m, k in zip(members, ws.meta["n_events"]))
    # each event is in ceil(size/step) windows (exact when step divides size)
    per_event = np.bincount(np.concatenate(members), minlength=n)
    assert (per_event == step_div).all()
    # sequences are the events in time order (stable on equal times)
    i = int(np.argmax(ws.meta["n_events"]))
    order = np.lexsort((ev["line"].to_numpy()[members[i]], ev["ts"].to_numpy()[members[i]]))
    assert np.array_equal(ws.sequence(i), ev["event"].to_numpy()[members[i][order]])


@settings(max_examples=30, deadline=None)
@given(n=st.integers(0, 200), seed=st.integers(0, 10_000), wn=st.integers(1, 12), frac=st.floats(0.01, 1.0))
def test_count_windows(n: int, seed: int, wn: int, frac: float) -> None:
    ev = _events(n, seed)
    step = max(1, int(round(wn * frac)))
    ws = count_windows(ev, 6, wn, step)
    assert (ws.meta["n_events"] <= wn).all()
    if n == 0:
        assert len(ws) == 0
        return
    _check_consistent(ws)
    # reference: per entity, positions 0..c-1 in (ts, line) order; windows start at j*step
    for ent, g in ev.groupby("entity"):
        seq = g.sort_values(["ts", "line"], kind="stable")["event"].to_numpy()
        c = len(seq)
        expected = []
        j = 0
        while j * step < c:
            if j > 0 and (j - 1) * step + wn >= c:
                break
            expected.append(seq[j * step : j * step + wn])
            j += 1
        got_idx = np.flatnonzero(ws.meta["entity"].to_numpy(dtype=object) == ent)
        assert len(got_idx) == len(expected)
        for k, e in zip(got_idx, expected):
            assert np.array_equal(ws.sequence(k), e)
    if step == wn:
        assert ws.meta["n_events"].sum() == n  # tumbling count windows cover each event once


def test_session_windows() -> None:
    ev = _events(500, 1)
    ws = session_windows(ev, 6)
    _check_consistent(ws)
    ref = ev.dropna(subset=["group"]).groupby("group")  # reference: pandas groupby
    assert list(ws.meta["group"]) == sorted(ref.groups)
    assert list(ws.meta["n_events"]) == list(ref.size().sort_index())
    assert list(ws.meta["start"]) == list(ref["ts"].min().sort_index())
    # documented: end = last event + 1 microsecond (exclusive end)
    assert list(ws.meta["end"]) == list(ref["ts"].max().sort_index() + pd.Timedelta("1us"))
    first_entity = ev.dropna(subset=["group"]).sort_values(["ts", "line"]).groupby("group")["entity"].first()
    assert list(ws.meta["entity"]) == list(first_entity.sort_index())
    assert ws.info["dropped_events"] == int(ev["group"].isna().sum())


def test_window_spec_and_build() -> None:
    ev = _events(300, 2)
    spec = load_window_spec({"kind": "time", "size": "30min", "step": "10min"})
    ws = build_windows(ev, 6, spec)
    assert ws.info == {"kind": "time", "size": pd.Timedelta("30min"), "step": pd.Timedelta("10min")}
    assert len(build_windows(ev, 6, {"kind": "count", "n": 20})) == len(count_windows(ev, 6, 20))
    assert len(build_windows(ev, 6, {"kind": "session"})) == 4
    assert load_window_spec(spec.as_dict()) == spec


@pytest.mark.parametrize(
    ("cfg", "message"),
    [
        ({"kind": "time", "size": "0s"}, "windows.size: must be positive"),
        ({"kind": "time", "size": 0}, "windows.size: must be positive"),
        ({"kind": "time", "size": "1h", "step": "2h"}, "windows.step: must not exceed size"),
        ({"kind": "time", "size": "fortnight"}, "windows.size: expected a duration"),
        ({"kind": "count", "n": 0}, "windows.n: must be positive"),
        ({"kind": "count", "n": 5, "step": 6}, "windows.step"),
        ({"kind": "sliding", "size": "1h"}, "windows.kind: must be one of"),
        ({"kind": "time"}, "windows.size: required"),
        ({"kind": "time", "size": "1h", "width": 3}, "windows.width: unknown field"),
    ],
)
def test_bad_window_config_names_the_field(cfg: dict, message: str) -> None:
    with pytest.raises(ConfigError) as err:
        load_window_spec(cfg)
    assert message in str(err.value)


def test_horizon_shorter_than_window_is_rejected() -> None:
    ws = time_windows(_events(50, 3), 6, pd.Timedelta("2h"))
    inc = make_incidents([0], ["e0"], [T0.value], [T0.value], ["failure"])
    with pytest.raises(ConfigError, match="task.horizon must be at least the window size"):
        label_windows(ws, inc, "predict", pd.Timedelta("1h"))
    with pytest.raises(ConfigError, match="task.horizon: required"):
        label_windows(ws, inc, "predict")
    with pytest.raises(ConfigError, match="task.name"):
        label_windows(ws, inc, "forecast")


def test_labels_detect_and_predict_by_hand() -> None:
    # Hand-built case: entity a, hourly windows 00:00..05:00, a failure 03:30-04:10,
    # an 'other' incident at 01:15, a global failure (entity "") at 10:00.
    times = [T0 + pd.Timedelta(minutes=m) for m in (10, 70, 130, 200, 250, 310, 610)]
    ev = pd.DataFrame(
        {
            "line": np.arange(1, 8, dtype=np.int64),
            "ts": times,
            "entity": pd.array(["a"] * 6 + ["b"], dtype="str"),
            "group": pd.array([None] * 7, dtype="str"),
            "event": np.zeros(7, dtype=np.int32),
            "tag": pd.array([""] * 7, dtype="str"),
        }
    )
    ws = time_windows(ev, 1, H)
    ns = lambda m: (T0 + pd.Timedelta(minutes=m)).value  # noqa: E731
    inc = make_incidents(
        [0, 1, 2], ["a", "a", ""], [ns(210), ns(75), ns(600)], [ns(250), ns(75), ns(600)], ["failure", "other", "failure"]
    )
    # windows: a@00, a@01, a@02, a@03, a@04, a@05, b@10
    assert list(label_windows(ws, inc, "detect")) == [0, 0, 0, 1, 1, 0, 1]
    # predict, horizon 2h: failure a starts 03:30 -> windows ending in (01:30, 03:30] -> a@01 (ends 02:00), a@02 (03:00)
    # global failure 10:00: windows ending in (08:00, 10:00] -> none have events there
    assert list(label_windows(ws, inc, "predict", pd.Timedelta("2h"))) == [0, 1, 1, -1, -1, 0, -1]
    assert list(window_incident_kind(ws, inc)) == ["none", "other", "none", "failure", "failure", "none", "failure"]


def test_session_labels_map_by_key() -> None:
    ev = _events(400, 4)
    ws = session_windows(ev, 6)
    inc = incidents_from_sessions(ev, ["s2", "s4"])
    # incidents carry entity of the first event, but session windows are matched by key
    assert list(label_windows(ws, inc, "detect")) == [0, 1, 0, 1]


def _bgl_windows(bgl_events: pd.DataFrame) -> tuple[WindowSet, int]:
    vocab = int(bgl_events["event"].max()) + 1
    return time_windows(bgl_events, vocab, H), vocab


def test_bgl_fixed_windows_equal_pandas_grouper(bgl_events: pd.DataFrame) -> None:
    # Reference: pandas groupby + pd.Grouper(freq="1h") on the real BGL 2k sample.
    ws, vocab = _bgl_windows(bgl_events)
    ref = bgl_events.groupby(["entity", pd.Grouper(key="ts", freq="1h", origin="epoch")]).size()
    ref = ref[ref > 0]
    got = ws.meta.set_index(["entity", "start"])["n_events"]
    assert len(got) == len(ref) == 1881  # distinct (node, hour) pairs, also counted with awk
    assert got.sort_index().to_numpy().tolist() == ref.sort_index().to_numpy().tolist()
    assert list(got.sort_index().index) == list(ref.sort_index().index)
    # the count matrix equals the pandas crosstab of (node, hour) x event
    ref_counts = (
        bgl_events.groupby(["entity", pd.Grouper(key="ts", freq="1h"), "event"]).size().unstack(fill_value=0)
    )
    ref_counts = ref_counts[ref_counts.sum(axis=1) > 0]
    dense = ws.counts.toarray()
    got_counts = pd.DataFrame(dense, index=got.index).sort_index()
    assert np.array_equal(got_counts[list(ref_counts.columns)].to_numpy(), ref_counts.sort_index().to_numpy())
    # the same in 5-minute sliding steps of 15-minute windows: each line in exactly 3 windows
    sl = time_windows(bgl_events, vocab, pd.Timedelta("15min"), pd.Timedelta("5min"))
    assert sl.counts.sum() == 3 * len(bgl_events)


# Hand-computed from the real BGL 2k alert lines (file lines 104-163): node
# R30-M0-N9-C:J16-U01 logs only KERNDTLB alerts on 2005-06-11, per hour:
# 17h 6 (lines 104-109), 18h 10 (110-119), 19h 15 (120-134), 20h 3 (135-137),
# 21h 11 (138-148), 22h 12 (149-160), 23h 3 (161-163).
R30_TABLE = [("17", 6), ("18", 10), ("19", 15), ("20", 3), ("21", 11), ("22", 12), ("23", 3)]
# Other hand-read rows: node, hour start, lines in that hour, detect label.
OTHER_ROWS = [
    ("R04-M1-N4-I:J18-U11", "2005-06-04 00:00", 1, 1),  # line 9, APPREAD
    ("R27-M1-N4-I:J18-U01", "2005-06-04 00:00", 1, 1),  # line 10, APPREAD
    ("R02-M1-N0-C:J12-U11", "2005-06-03 15:00", 4, 0),  # lines 1-4, normal ('-')
    ("R63-M1-NF-C:J15-U11", "2005-10-28 12:00", 1, 1),  # line 1520, KERNTERM
    ("R63-M1-N5-C:J17-U01", "2005-10-28 13:00", 1, 1),  # line 1521, KERNREC
    ("R46-M1-N5-C:J16-U01", "2005-12-01 06:00", 1, 0),  # line 1852, normal
]


def test_bgl_window_labels_against_hand_table(bgl_events: pd.DataFrame) -> None:
    ws, _ = _bgl_windows(bgl_events)
    inc = incidents_from_tags(bgl_events, H)
    labels = label_windows(ws, inc, "detect")
    meta = ws.meta.assign(label=labels).set_index(["entity", "start"])
    for hour, n in R30_TABLE:
        row = meta.loc[("R30-M0-N9-C:J16-U01", pd.Timestamp(f"2005-06-11 {hour}:00", tz="UTC"))]
        assert (row["n_events"], row["label"]) == (n, 1)
    assert (meta.loc["R30-M0-N9-C:J16-U01", "label"] == 1).sum() == 7
    for node, start, n, lab in OTHER_ROWS:
        row = meta.loc[(node, pd.Timestamp(start, tz="UTC"))]
        assert (row["n_events"], row["label"]) == (n, lab)
    # 90 distinct (node, hour) pairs hold alert lines, and no normal line shares a
    # node-hour with an alert (counted from the file with awk): 90 positive windows.
    assert int(labels.sum()) == 90
    # predict, horizon 1h: every alerting node's windows lie inside its incident, so
    # they are excluded (-1); no other window of those nodes ends in the hour before.
    pred = label_windows(ws, inc, "predict", H)
    assert int((pred == -1).sum()) == 90 and int((pred == 1).sum()) == 0
