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
