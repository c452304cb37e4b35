"""Sliding time windows are built from slices: memory per (event, window) pair stays at a few int32s."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pandas as pd
import pytest
from logtrial.windowing import windows as W


def test_sliding_windows_allocate_no_int64_per_pair(monkeypatch: pytest.MonkeyPatch) -> None:
    # NumPy reports its buffers to tracemalloc (standard library), so the traced peak covers them.
    rng = np.random.default_rng(0)
    n = 40_000
    ts = pd.Timestamp("2024-01-01", tz="UTC") + pd.to_timedelta(np.sort(rng.integers(0, 6 * 3600 * 10**6, n)), unit="us")
    events = pd.DataFrame({"line": np.arange(n), "ts": ts,
                           "entity": pd.array(rng.choice(["a", "b", "c"], n), dtype="str"),
                           "group": pd.array([None] * n, dtype="str"), "event": rng.integers(0, 50, n).astype(np.int32),
                           "tag": pd.array([""] * n, dtype="str")})
    monkeypatch.setattr(W, "_SLICE_BLOCK", 1 << 15)
    tracemalloc.start()
    ws = W.time_windows(events, 50, pd.Timedelta("1h"), pd.Timedelta("1min"))
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    pairs = int(ws.seq_offsets[-1])
    assert pairs > 50 * n  # about 60 windows per event
    # sequences (int32) + count-matrix indices and data (int32 each) = 12 bytes per pair; a single
    # int64 array per pair on top would already pass 20.
    assert peak < 20 * pairs, peak / pairs
    assert ws.seq_values.dtype == np.int32


def _events(n: int, seed: int, entities: int = 5) -> pd.DataFrame:
    """A small event table with missing entities and session keys (unit fixture)."""
    rng = np.random.default_rng(seed)
    ts = pd.Timestamp("2024-01-01", tz="UTC") + pd.to_timedelta(np.sort(rng.integers(0, 2 * 86_400 * 10**6, n)),
                                                                 unit="us")
    names = np.array([f"node-{i}" for i in range(entities)] + [None], dtype=object)
    groups = np.array([f"s{i}" for i in range(n // 10)] + [None], dtype=object)
    return pd.DataFrame({"line": np.arange(n), "ts": ts,
                         "entity": pd.array(rng.choice(names, n), dtype="str"),
                         "group": pd.array(rng.choice(groups, n), dtype="str"),
                         "event": rng.integers(0, 40, n).astype(np.int32),
                         "tag": pd.array(rng.choice(["", "", "", "FATAL"], n), dtype="str")})


def _same_windows(a: W.WindowSet, b: W.WindowSet) -> None:
    pd.testing.assert_frame_equal(a.meta, b.meta)
    assert (a.counts != b.counts).nnz == 0 and a.counts.dtype == b.counts.dtype
    np.testing.assert_array_equal(a.seq_values, b.seq_values)
    np.testing.assert_array_equal(a.seq_offsets, b.seq_offsets)


def test_slice_bounds_packed_key_equals_dense_ranks() -> None:
    # reference: numpy's searchsorted per entity, one entity at a time (no packed key at all)
    rng = np.random.default_rng(3)
    n = 5_000
    c = np.sort(rng.integers(0, 7, n))
    t = np.concatenate([np.sort(rng.integers(-10**12, 10**12, (c == k).sum())) for k in range(7)])
    w_code = np.sort(rng.integers(0, 7, 800))
    w_start = rng.integers(-2 * 10**12, 2 * 10**12, 800)
    w_end = w_start + rng.integers(0, 10**11, 800)
    lo, hi = W._slice_bounds(c, t, w_code, w_start, w_end)
    first = np.searchsorted(c, np.arange(7))
    for j in range(800):
        k = w_code[j]
        seg = t[c == k]
        assert lo[j] == first[k] + np.searchsorted(seg, w_start[j], side="left")
        assert hi[j] == first[k] + np.searchsorted(seg, w_end[j], side="left")
    # times so far apart that entity * span overflows int64 fall back to dense ranks: same bounds
    spread = t * 10**6
    lo2, hi2 = W._slice_bounds(c, spread, w_code, w_start * 10**6, w_end * 10**6)
    np.testing.assert_array_equal(lo2, lo)
    np.testing.assert_array_equal(hi2, hi)


def test_windows_from_categorical_events_equal_windows_from_text() -> None:
    # reference: the same windows built from the plain text table (pandas' own factorize of strings)
    from logtrial.windowing.windows import window_events

    events = _events(6_000, 1)
    slim = window_events(events)
    assert isinstance(slim["entity"].dtype, pd.CategoricalDtype) and slim["entity"].cat.codes.dtype == np.int8
    assert list(window_events(events, keep_group=False).columns) == ["ts", "entity", "event"]
    for spec in ({"kind": "time", "size": "1h", "step": "15min"}, {"kind": "time", "size": "30min"},
                 {"kind": "count", "n": 50, "step": 20}, {"kind": "session"}):
        _same_windows(W.build_windows(slim, 40, spec), W.build_windows(events, 40, spec))


@pytest.mark.filterwarnings("ignore:Series.values returning:DeprecationWarning")  # pyarrow's from_pandas, writing
def test_event_table_read_as_categoricals_gives_the_same_windows_and_incidents(tmp_path) -> None:
    # reference: the table read back as text by pyarrow, as before
    import pyarrow as pa
    import pyarrow.parquet as pq
    from logtrial.data.ingest import TEXT_COLUMNS, read_events
    from logtrial.labels.incidents import incidents_from_sessions, incidents_from_tags
    from logtrial.windowing.windows import window_events

    events = _events(4_000, 2)
    path = tmp_path / "events.parquet"
    pq.write_table(pa.Table.from_pandas(events, preserve_index=False), path)
    text, cats = read_events(path), read_events(path, categories=TEXT_COLUMNS)
    assert all(isinstance(cats[c].dtype, pd.CategoricalDtype) for c in TEXT_COLUMNS)
    pd.testing.assert_frame_equal(incidents_from_tags(cats, pd.Timedelta("10min")),
                                  incidents_from_tags(text, pd.Timedelta("10min")))
    pd.testing.assert_frame_equal(incidents_from_sessions(cats, ["s1", "s7", "s30"]),
                                  incidents_from_sessions(text, ["s1", "s7", "s30"]))
    spec = {"kind": "time", "size": "1h", "step": "20min"}
    _same_windows(W.build_windows(window_events(cats), 40, spec), W.build_windows(text, 40, spec))
