"""Splits: chronological parts with embargo, walk-forward folds, leakage guard, random split, healthy sets."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from logtrial.errors import ConfigError, DataError
from logtrial.labels.incidents import make_incidents, read_incidents, times_ns
from logtrial.labels.noise import replay
from logtrial.windowing.splits import (
    RANDOM_WARNING,
    LeakageError,
    Split,
    check_no_leakage,
    chronological_split,
    healthy_mask,
    random_split,
    split_labels,
    walk_forward,
)
from logtrial.windowing.windows import WindowSet, count_windows, label_windows, time_windows

T0 = pd.Timestamp("2024-01-01", tz="UTC")


def _events(n: int, seed: int, days: float = 30.0, n_ent: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    offs = rng.integers(0, int(days * 86_400e6), n)
    return pd.DataFrame(
        {
            "line": np.arange(1, n + 1, dtype=np.int64),
            "ts": T0 + pd.to_timedelta(offs, unit="us"),
            "entity": pd.array(rng.choice([f"e{i}" for i in range(n_ent)], n), dtype="str"),
            "group": pd.array([None] * n, dtype="str"),
            "event": rng.integers(0, 5, n).astype(np.int32),
            "tag": pd.array([""] * n, dtype="str"),
        }
    )


def _intervals(ws: WindowSet, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return times_ns(ws.meta["start"])[idx], times_ns(ws.meta["end"])[idx]


def _assert_disjoint_in_time(ws: WindowSet, a: np.ndarray, b: np.ndarray, gap: int = 0) -> None:
    """Every window of a ends at least `gap` before every window of b starts (brute force)."""
    if len(a) == 0 or len(b) == 0:
        return
    _, ea = _intervals(ws, a)
    sb, _ = _intervals(ws, b)
    assert ea.max() + gap <= sb.min()


@settings(max_examples=30, deadline=None)
@given(
    n=st.integers(20, 400),
    seed=st.integers(0, 10_000),
    size_h=st.sampled_from([1, 3, 12]),
    fr=st.sampled_from([(0.6, 0.2, 0.2), (0.5, 0.0, 0.5), (0.8, 0.1, 0.1), (0.34, 0.33, 0.33)]),
    sliding=st.booleans(),
)
def test_chronological_parts_never_overlap_in_time(n: int, seed: int, size_h: int, fr: tuple, sliding: bool) -> None:
    ev = _events(n, seed)
    size = pd.Timedelta(hours=size_h)
    ws = time_windows(ev, 5, size, size / 2 if sliding else None)
    sp = chronological_split(ws, fr)
    assert sp.embargo == size  # default: one window
    _assert_disjoint_in_time(ws, sp.train, sp.val, sp.embargo.value)
    _assert_disjoint_in_time(ws, sp.val, sp.test, sp.embargo.value)
    _assert_disjoint_in_time(ws, sp.train, sp.test, sp.embargo.value)
    check_no_leakage(sp, ws)
    for part, (lo, hi) in sp.ranges.items():
        s, e = _intervals(ws, getattr(sp, part))
        assert (s >= lo.value).all() and (e <= hi.value).all()
    # every window is either in one part or straddles a boundary / sits in an embargo
    used = np.concatenate([sp.train, sp.val, sp.test])
    assert len(np.unique(used)) == len(used)
    dropped = np.setdiff1d(np.arange(len(ws)), used)
    s, e = _intervals(ws, dropped)
    inside_any = np.zeros(len(dropped), bool)
    for lo, hi in sp.ranges.values():
        inside_any |= (s >= lo.value) & (e <= hi.value) & (hi > lo)
    assert not inside_any.any()


def test_chronological_split_with_horizon_and_embargo() -> None:
    ws = time_windows(_events(2000, 1), 5, pd.Timedelta("1h"))
    sp = chronological_split(ws, (0.6, 0.2, 0.2), horizon=pd.Timedelta("6h"))
    assert sp.embargo == pd.Timedelta("6h")  # labels look one horizon ahead
    _assert_disjoint_in_time(ws, sp.train, sp.val, pd.Timedelta("6h").value)
    # The share of covered time per part follows the fractions (within one embargo each).
    span = (ws.meta["end"].max() - ws.meta["start"].min()).total_seconds()
    train_span = (sp.ranges["train"][1] - sp.ranges["train"][0]).total_seconds()
    assert abs(train_span / span - 0.6) < 1e-6
    with pytest.raises(ConfigError, match="split.embargo: must be at least one window long"):
        chronological_split(ws, embargo="30min")
    with pytest.raises(ConfigError, match="split.fractions"):
        chronological_split(ws, (0.5, 0.2, 0.2))
    with pytest.raises(ConfigError, match="split.fractions"):
        chronological_split(ws, (0.0, 0.5, 0.5))
    # count windows vary in length: default embargo is the longest window
    cw = count_windows(_events(500, 2), 5, 20)
    longest = (cw.meta["end"] - cw.meta["start"]).max()
    assert chronological_split(cw).embargo == longest


def _expected_folds(t0: int, t1: int, tr: pd.Timedelta, te: pd.Timedelta, step: pd.Timedelta, emb: pd.Timedelta) -> int:
    """Number of folds whose test range fits: max i with t0 + i*step + tr + emb + te <= t1, plus one."""
    room = t1 - t0 - tr.value - emb.value - te.value
    return 0 if room < 0 else room // step.value + 1


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 10_000), tr_d=st.integers(3, 10), te_d=st.integers(1, 5), step_d=st.integers(1, 7))
def test_walk_forward_folds(seed: int, tr_d: int, te_d: int, step_d: int) -> None:
    ws = time_windows(_events(800, seed), 5, pd.Timedelta("2h"))
    tr, te, step = pd.Timedelta(days=tr_d), pd.Timedelta(days=te_d), pd.Timedelta(days=step_d)
    folds = walk_forward(ws, tr, te, step)
    s, e = _intervals(ws, np.arange(len(ws)))
    assert len(folds) == _expected_folds(int(s.min()), int(e.max()), tr, te, step, pd.Timedelta("2h"))
    for f in folds:
        check_no_leakage(f, ws)
        _assert_disjoint_in_time(ws, f.train, f.test, f.embargo.value)
        assert f.kind == "walk_forward"
    starts = [f.ranges["test"][0] for f in folds]
    assert all(b - a == step for a, b in zip(starts, starts[1:]))  # retrained every `step`


def test_walk_forward_validation_and_expanding() -> None:
    ws = time_windows(_events(1500, 3), 5, pd.Timedelta("1h"))
    folds = walk_forward(ws, "10 days", "3 days", "3 days", val_span="2 days", expanding=True)
    assert len(folds) >= 3
    for f in folds:
        check_no_leakage(f, ws)
        _assert_disjoint_in_time(ws, f.train, f.val, f.embargo.value)
        _assert_disjoint_in_time(ws, f.val, f.test, f.embargo.value)
        assert f.ranges["train"][0] == ws.meta["start"].min()  # expanding window keeps all history
    with pytest.raises(ConfigError, match="split.step: must be positive"):
        walk_forward(ws, "10 days", "3 days", "0s")
    with pytest.raises(ConfigError, match="split.val_span"):
        walk_forward(ws, "2 days", "1 day", "1 day", val_span="3 days")


def test_leakage_guard_raises() -> None:
    ws = time_windows(_events(1000, 4), 5, pd.Timedelta("1h"))
    sp = chronological_split(ws)
    # move one test window into train: it overlaps test time
    bad = Split(train=np.r_[sp.train, sp.test[:1]], val=sp.val, test=sp.test[1:], ranges=sp.ranges)
    with pytest.raises(LeakageError, match="overlap test time"):
        check_no_leakage(bad, ws)
    # a train window of another entity at the same hour as a test window also leaks time
    s, _ = _intervals(ws, sp.test)
    same_time = np.flatnonzero(times_ns(ws.meta["start"]) == s[0])
    other = np.setdiff1d(same_time, sp.test)
    if len(other):
        with pytest.raises(LeakageError):
            check_no_leakage(Split(train=np.r_[sp.train, other[:1]], val=sp.val, test=sp.test), ws)
    shared = Split(train=sp.train, val=sp.val[:3], test=np.r_[sp.test, sp.val[:1]])
    with pytest.raises(LeakageError, match="both val and test"):
        check_no_leakage(shared, ws)
    assert issubclass(LeakageError, DataError)


def test_random_split_warns_and_leaks() -> None:
    ws = time_windows(_events(1000, 5), 5, pd.Timedelta("1h"))
    sp = random_split(ws, (0.6, 0.2, 0.2), seed=1)
    assert sp.warnings == [RANDOM_WARNING] and sp.kind == "random"
    assert sum(sp.sizes().values()) == len(ws)
    assert np.array_equal(sp.train, random_split(ws, (0.6, 0.2, 0.2), seed=1).train)
    with pytest.raises(LeakageError):
        check_no_leakage(sp, ws)


def test_healthy_set_uses_reported_labels() -> None:
    # Two failures; the reported table drops one. The unreported failure's windows
    # count as healthy, as they would in production (DESIGN.md, Splits).
    ev = _events(3000, 6, days=10, n_ent=2)
    ws = time_windows(ev, 5, pd.Timedelta("1h"))
    ns = lambda d: (T0 + pd.Timedelta(days=d)).value  # noqa: E731
    truth = make_incidents([0, 1], ["e0", "e1"], [ns(2), ns(5)], [ns(2.2), ns(5.2)], ["failure", "failure"])
    reported = replay(truth, {"drop": {"per_kind": {"failure": 0.0}}}, 0).iloc[[0]]
    true_lab = label_windows(ws, truth, "detect")
    healthy = healthy_mask(ws, reported, "detect")
    leaked = (true_lab == 1) & healthy
    assert leaked.sum() > 0
    assert set(ws.meta.loc[leaked, "entity"]) == {"e1"}
    assert not healthy[label_windows(ws, reported, "detect") == 1].any()
    # Predict: windows inside a reported failure are excluded, windows before it are not healthy.
    hp = healthy_mask(ws, reported, "predict", pd.Timedelta("6h"))
    assert hp.sum() < healthy.sum()
    # split_labels: train/val from reported, test from truth
    sp = chronological_split(ws, (0.4, 0.1, 0.5))
    lab = split_labels(ws, sp, truth, reported, "detect")
    assert (lab[sp.test] == true_lab[sp.test]).all()
    assert (lab[sp.train] == label_windows(ws, reported, "detect")[sp.train]).all()


def _simulated(tmp_path):
    """Event table and truth of a small built-in scenario via logtrial.simulation.simulate (skips when absent)."""
    sim = pytest.importorskip("logtrial.simulation.simulate", reason="logtrial.simulation.simulate (issue B) not available yet")
    scenario = sim.load_scenario({"days": 30, "nodes": 8, "seed": 3})
    res = sim.generate(scenario, tmp_path / "sim")
    lines = pd.Series(res.log_path.read_text().splitlines(), dtype="str")
    parts = lines.str.extract(sim.LINE_REGEX)
    events = pd.DataFrame(
        {
            "line": np.arange(1, len(lines) + 1, dtype=np.int64),
            "ts": pd.to_datetime(parts["ts"], utc=True, format="%Y-%m-%dT%H:%M:%S.%fZ"),
            "entity": parts["host"].astype("str"),
            "group": pd.array([None] * len(lines), dtype="str"),
            "event": np.load(res.line_templates_path).astype(np.int32),
            "tag": pd.array([""] * len(lines), dtype="str"),
        }
    )
    return scenario, events, read_incidents(res.incidents_path)


@pytest.mark.slow
def test_walk_forward_on_simulated_scenario(tmp_path) -> None:
    scenario, events, truth = _simulated(tmp_path)
    ws = time_windows(events, int(events["event"].max()) + 1, pd.Timedelta("1h"))
    tr, te, step = pd.Timedelta("7 days"), pd.Timedelta("2 days"), pd.Timedelta("2 days")
    # configured: 30 days of traffic, 7-day training, 1 h embargo, 2-day tests every 2 days
    # -> folds i = 0..10 (fold 10 tests up to day 7 + 20 + 2 + 1 h <= 30): 11 folds
    span = pd.Timedelta(days=scenario.days)
    expected = (span - tr - pd.Timedelta("1h") - te) // step + 1
    assert expected == 11
    assert ws.meta["start"].min() == pd.Timestamp(scenario.start)
    assert ws.meta["end"].max() == pd.Timestamp(scenario.start) + span
    folds = walk_forward(ws, tr, te, step)
    assert len(folds) == expected
    reported = replay(truth, {"drop": 0.3, "delay": {"dist": "uniform"}}, seed=1)
    for f in folds:
        check_no_leakage(f, ws)
        assert len(f.train) and len(f.test)
        _assert_disjoint_in_time(ws, f.train, f.test, f.embargo.value)
        lab = split_labels(ws, f, truth, reported, "predict", pd.Timedelta("6h"))
        assert (lab[f.test] == label_windows(ws, truth, "predict", pd.Timedelta("6h"))[f.test]).all()
