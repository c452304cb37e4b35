"""Splits: chronological train / validation / test with an embargo, walk-forward folds, and a leakage guard.

A window belongs to a part only when it lies wholly inside that part's time
range ``[lo, hi)``; windows straddling a boundary or falling in an embargo gap
are dropped. The embargo defaults to the longest window (and at least the
prediction horizon when one is given), so labels of training windows, which
look up to one horizon ahead, never see test time. An explicit embargo must be
at least one window long for time windows; session and count windows vary in
length, so any non-negative embargo is accepted for them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from logtrial.errors import ConfigError, DataError
from logtrial.labels.incidents import from_ns, times_ns
from logtrial.windowing.windows import WindowSet, label_windows, parse_duration

RANDOM_WARNING = (
    "random split requested: training windows interleave with test time, so scores are "
    "optimistic (temporal leakage); use a chronological split for reported results"
)


class LeakageError(DataError):
    """A training window overlaps test time."""


@dataclass
class Split:
    """Index arrays of train / validation / test windows and the time ranges they were cut from."""

    train: np.ndarray
    val: np.ndarray
    test: np.ndarray
    ranges: dict[str, tuple[pd.Timestamp, pd.Timestamp]] = field(default_factory=dict)
    embargo: pd.Timedelta = pd.Timedelta(0)
    kind: str = "chronological"
    warnings: list[str] = field(default_factory=list)

    def sizes(self) -> dict[str, int]:
        """Number of windows per part."""
        return {"train": len(self.train), "val": len(self.val), "test": len(self.test)}


def _times(windows: WindowSet) -> tuple[np.ndarray, np.ndarray]:
    """Start and end (exclusive) of every window, ns."""
    return times_ns(windows.meta["start"]), times_ns(windows.meta["end"])


def _max_length(windows: WindowSet) -> pd.Timedelta:
    """Longest window (nominal size for time windows)."""
    size = windows.info.get("size")
    if size is not None:
        return pd.Timedelta(size)
    if len(windows) == 0:
        return pd.Timedelta(0)
    s, e = _times(windows)
    return pd.Timedelta(int((e - s).max()), unit="ns")


def _embargo(windows: WindowSet, embargo: object, horizon: object) -> pd.Timedelta:
    """Resolve and validate the embargo gap."""
    longest = _max_length(windows)
    floor = longest
    if horizon is not None:
        floor = max(floor, parse_duration(horizon, "split.horizon"))
    if embargo is None:
        return floor
    emb = parse_duration(embargo, "split.embargo")
    if emb < pd.Timedelta(0):
        raise ConfigError(f"split.embargo: must not be negative, got {emb}")
    if windows.info.get("size") is not None and emb < longest:
        raise ConfigError(f"split.embargo: must be at least one window long ({longest}), got {emb}")
    return emb


def _inside(s: np.ndarray, e: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """Indices of windows wholly inside [lo, hi)."""
    return np.flatnonzero((s >= lo) & (e <= hi)).astype(np.int64)


def _check_fractions(fractions: tuple[float, float, float]) -> tuple[float, float, float]:
    """Validate three non-negative fractions summing to one."""
    fr = tuple(float(f) for f in fractions)
    if len(fr) != 3 or any(f < 0 for f in fr) or abs(sum(fr) - 1.0) > 1e-9:
        raise ConfigError(f"split.fractions: expected three non-negative numbers summing to 1, got {fractions}")
    if fr[0] == 0 or fr[2] == 0:
        raise ConfigError(f"split.fractions: train and test fractions must be positive, got {fractions}")
    return fr  # type: ignore[return-value]


def chronological_split(
    windows: WindowSet,
    fractions: tuple[float, float, float] = (0.6, 0.2, 0.2),
    embargo: pd.Timedelta | str | None = None,
    horizon: pd.Timedelta | str | None = None,
) -> Split:
    """Train / validation / test by time, cut at fractions of the covered time span, with embargo gaps."""
    fr = _check_fractions(fractions)
    emb = _embargo(windows, embargo, horizon)
    s, e = _times(windows)
    if len(windows) == 0:
        raise DataError("split: no windows to split")
    t0, t1 = int(s.min()), int(e.max())
    total = t1 - t0
    c1 = t0 + int(round(total * fr[0]))
    c2 = t0 + int(round(total * (fr[0] + fr[1])))
    g = emb.value
    if fr[1] > 0:
        bounds = {"train": (t0, c1), "val": (c1 + g, c2), "test": (c2 + g, t1)}
    else:
        bounds = {"train": (t0, c1), "val": (c1, c1), "test": (c1 + g, t1)}
    parts = {k: (_inside(s, e, lo, hi) if hi > lo else np.zeros(0, np.int64)) for k, (lo, hi) in bounds.items()}
    return Split(
        train=parts["train"],
        val=parts["val"],
        test=parts["test"],
        ranges={k: (from_ns(np.array([lo]))[0], from_ns(np.array([max(lo, hi)]))[0]) for k, (lo, hi) in bounds.items()},
        embargo=emb,
    )


def walk_forward(
    windows: WindowSet,
    train_span: pd.Timedelta | str,
    test_span: pd.Timedelta | str,
    step: pd.Timedelta | str,
    embargo: pd.Timedelta | str | None = None,
    horizon: pd.Timedelta | str | None = None,
    val_span: pd.Timedelta | str | None = None,
    expanding: bool = False,
) -> list[Split]:
    """Walk-forward folds mimicking periodic retraining: train on a span, test on the next, advance by step.

    Fold i trains on ``[t0 + i*step, t0 + i*step + train_span)`` (from ``t0`` when
    ``expanding``), optionally keeps the last ``val_span`` of it (after an embargo)
    for validation, and tests on ``[train_end + embargo, ... + test_span)``. Folds
    are produced while the test range fits inside the covered time.
    """
    tr = parse_duration(train_span, "split.train_span")
    te = parse_duration(test_span, "split.test_span")
    st = parse_duration(step, "split.step")
    for name, v in (("train_span", tr), ("test_span", te), ("step", st)):
        if v <= pd.Timedelta(0):
            raise ConfigError(f"split.{name}: must be positive, got {v}")
    vs = None if val_span is None else parse_duration(val_span, "split.val_span")
    emb = _embargo(windows, embargo, horizon)
    if vs is not None and (vs <= pd.Timedelta(0) or vs + emb >= tr):
        raise ConfigError(f"split.val_span: must be positive and leave training time before it, got {vs}")
    if len(windows) == 0:
        raise DataError("split: no windows to split")
    s, e = _times(windows)
    t0, t1 = int(s.min()), int(e.max())
    g = emb.value
    folds: list[Split] = []
    i = 0
    while True:
        a = t0 + i * st.value
        b = a + tr.value
        test_lo, test_hi = b + g, b + g + te.value
        if test_hi > t1:
            break
        train_lo = t0 if expanding else a
        if vs is None:
            bounds = {"train": (train_lo, b), "val": (b, b), "test": (test_lo, test_hi)}
        else:
            bounds = {"train": (train_lo, b - vs.value - g), "val": (b - vs.value, b), "test": (test_lo, test_hi)}
        parts = {k: (_inside(s, e, lo, hi) if hi > lo else np.zeros(0, np.int64)) for k, (lo, hi) in bounds.items()}
        folds.append(
            Split(
                train=parts["train"],
                val=parts["val"],
                test=parts["test"],
                ranges={k: (from_ns(np.array([lo]))[0], from_ns(np.array([hi]))[0]) for k, (lo, hi) in bounds.items()},
                embargo=emb,
                kind="walk_forward",
            )
        )
        i += 1
    return folds


def random_split(windows: WindowSet, fractions: tuple[float, float, float] = (0.6, 0.2, 0.2), seed: int = 0) -> Split:
    """Random train / validation / test partition (leaks time; carries a warning for the run record)."""
    fr = _check_fractions(fractions)
    n = len(windows)
    perm = np.random.default_rng(int(seed)).permutation(n)
    n_train = int(round(n * fr[0]))
    n_val = int(round(n * fr[1]))
    return Split(
        train=np.sort(perm[:n_train]).astype(np.int64),
        val=np.sort(perm[n_train : n_train + n_val]).astype(np.int64),
        test=np.sort(perm[n_train + n_val :]).astype(np.int64),
        embargo=pd.Timedelta(0),
        kind="random",
        warnings=[RANDOM_WARNING],
    )


def check_no_leakage(split: Split, windows: WindowSet) -> None:
    """Raise LeakageError if parts share windows or any training window's [start, end) overlaps a test window.

    Random splits fail this check by design; the runner records their warning instead of calling it.
    """
    for a, b in (("train", "test"), ("train", "val"), ("val", "test")):
        common = np.intersect1d(getattr(split, a), getattr(split, b))
        if len(common):
            raise LeakageError(f"split: {len(common)} window(s) are in both {a} and {b}, e.g. window {int(common[0])}")
    if len(split.train) == 0 or len(split.test) == 0:
        return
    s, e = _times(windows)
    ts, te = s[split.test], e[split.test]
    o = np.argsort(ts, kind="stable")
    ts_sorted, te_cummax = ts[o], np.maximum.accumulate(te[o])
    rs, re = s[split.train], e[split.train]
    j = np.searchsorted(ts_sorted, re, side="left") - 1  # last test window starting before the train window ends
    bad = np.zeros(len(rs), dtype=bool)
    ok = j >= 0
    bad[ok] = te_cummax[j[ok]] > rs[ok]
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        w = int(split.train[k])
        raise LeakageError(
            f"split: {int(bad.sum())} training window(s) overlap test time, e.g. window {w} "
            f"[{from_ns(s[[w]])[0]}, {from_ns(e[[w]])[0]})"
        )


def healthy_mask(
    windows: WindowSet, reported_incidents: pd.DataFrame, task: str, horizon: pd.Timedelta | None = None
) -> np.ndarray:
    """Windows that look healthy by the *reported* labels (label 0), as a production team would pick them."""
    return label_windows(windows, reported_incidents, task, horizon) == 0


def split_labels(
    windows: WindowSet,
    split: Split,
    truth: pd.DataFrame,
    reported: pd.DataFrame,
    task: str,
    horizon: pd.Timedelta | None = None,
) -> np.ndarray:
    """Per-window labels: reported incidents for train and validation windows, the truth for test windows.

    Windows in no part get -1.
    """
    rep = label_windows(windows, reported, task, horizon)
    tru = label_windows(windows, truth, task, horizon)
    out = np.full(len(windows), -1, dtype=np.int8)
    out[split.train] = rep[split.train]
    out[split.val] = rep[split.val]
    out[split.test] = tru[split.test]
    return out
