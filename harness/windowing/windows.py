"""Windows: cut an event table into session, time or count windows with counts, sequences and labels."""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp
from logtrial.errors import ConfigError, DataError
from logtrial.labels.incidents import from_ns, times_ns


@dataclass
class WindowSet:
    """A set of windows over one event table: metadata, count matrix, ragged sequences, labels.

    - ``meta``: one row per window, columns ``id`` (int64, 0..n-1), ``entity`` (str),
      ``start`` and ``end`` (UTC timestamps, end exclusive), ``n_events`` (int64).
    - ``counts``: CSR matrix, windows x vocabulary, event occurrences per window.
    - ``seq_values`` / ``seq_offsets``: ragged event-id sequences in time order;
      window i holds ``seq_values[seq_offsets[i]:seq_offsets[i+1]]``.
    - ``labels``: optional int8 array (1 = positive for the task, 0 = negative,
      -1 = excluded from training for the task, e.g. windows inside a failure for
      ``predict``).
    - ``vocab_size``: number of distinct event ids (columns of ``counts``).
    """

    meta: pd.DataFrame
    counts: sp.csr_matrix
    seq_values: np.ndarray
    seq_offsets: np.ndarray
    vocab_size: int
    labels: np.ndarray | None = None
    info: dict = field(default_factory=dict)

    def __len__(self) -> int:
        """Number of windows."""
        return len(self.meta)

    def sequence(self, i: int) -> np.ndarray:
        """Event-id sequence of window ``i``."""
        return self.seq_values[self.seq_offsets[i] : self.seq_offsets[i + 1]]

    def subset(self, index: np.ndarray) -> "WindowSet":
        """Windows at the given positions (or boolean mask), ids kept, sequences repacked."""
        idx = np.asarray(index)
        if idx.dtype == bool:
            idx = np.flatnonzero(idx)
        starts = self.seq_offsets[idx]
        ends = self.seq_offsets[idx + 1]
        lengths = ends - starts
        offsets = np.zeros(len(idx) + 1, dtype=np.int64)
        np.cumsum(lengths, out=offsets[1:])
        if len(idx):
            gather = np.repeat(starts - offsets[:-1], lengths) + np.arange(offsets[-1])
            values = self.seq_values[gather]
        else:
            values = self.seq_values[:0]
        return WindowSet(
            meta=self.meta.iloc[idx].reset_index(drop=True),
            counts=self.counts[idx],
            seq_values=values,
            seq_offsets=offsets,
            vocab_size=self.vocab_size,
            labels=None if self.labels is None else self.labels[idx],
            info=dict(self.info),
        )


# ---------------------------------------------------------------------------
# Builders
#
# Conventions: events are ordered per window key in time order (stable, so lines
# with equal timestamps keep file order). Time windows are aligned to the Unix
# epoch: window k of a (size, step) set covers [k*step, k*step + size), which for
# tumbling windows equals ``pd.Grouper(freq=size, origin="epoch")``. Empty windows
# are not produced. Session and count windows run from their first event to just
# after their last one: ``end = last event time + 1 microsecond`` (end exclusive,
# like every window). Windows are ordered by (key, start). Session windows carry
# one extra meta column, ``group`` (the session key).
# ---------------------------------------------------------------------------

_ONE_US = 1_000
TASKS = ("detect", "predict")
WINDOW_KINDS = ("session", "time", "count")


@dataclass(frozen=True)
class WindowSpec:
    """How to cut windows: kind session | time (size, step) | count (n, step)."""

    kind: str
    size: pd.Timedelta | None = None
    step: pd.Timedelta | int | None = None
    n: int | None = None

    def as_dict(self) -> dict:
        """Plain, canonical form for hashing and run records."""
        out: dict = {"kind": self.kind}
        if self.size is not None:
            out["size"] = str(self.size)
        if self.n is not None:
            out["n"] = int(self.n)
        if self.step is not None:
            out["step"] = str(self.step) if isinstance(self.step, pd.Timedelta) else int(self.step)
        return out


def require_unit(value: object, field_name: str) -> None:
    """Refuse a duration without a unit (`60` could be seconds, minutes or hours); ConfigError naming the field."""
    if isinstance(value, bool) or isinstance(value, (int, float)) or (
            isinstance(value, str) and value.strip().lstrip("+-").replace(".", "", 1).isdigit()):
        raise ConfigError(f"{field_name}: {value!r} has no unit; write a duration with its unit such as '60s', "
                          "'60min' or '1h'")


def parse_duration(value: object, field_name: str, unit_required: bool = False) -> pd.Timedelta:
    """A duration from a string ('1h', '2 days'), a Timedelta, or (unless ``unit_required``, as for anything a
    user writes in an experiment file) a number of seconds; ConfigError naming the field."""
    if unit_required:
        require_unit(value, field_name)
    if isinstance(value, bool) or value is None:
        raise ConfigError(f"{field_name}: expected a duration such as '1h', got {value!r}")
    try:
        if isinstance(value, (int, float, np.integer, np.floating)):
            td = pd.Timedelta(seconds=float(value))
        else:
            # "2d" means two days; pandas is retiring the lower-case unit, so spell it "D".
            text = re.sub(r"(?<=\d)\s*d\b", "D", value) if isinstance(value, str) else value
            td = pd.Timedelta(text)
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"{field_name}: expected a duration such as '1h', got {value!r}") from exc
    if pd.isna(td):
        raise ConfigError(f"{field_name}: expected a duration such as '1h', got {value!r}")
    return td


def load_window_spec(source: dict | WindowSpec, where: str = "windows") -> WindowSpec:
    """Validate a window config dict into a WindowSpec; ConfigError names the field."""
    if isinstance(source, WindowSpec):
        source = source.as_dict()
    if not isinstance(source, dict):
        raise ConfigError(f"{where}: expected a mapping, got {type(source).__name__}")
    allowed = {"kind", "size", "step", "n"}
    unknown = sorted(set(source) - allowed)
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: {sorted(allowed)})")
    kind = source.get("kind")
    if kind not in WINDOW_KINDS:
        raise ConfigError(f"{where}.kind: must be one of {list(WINDOW_KINDS)}, got {kind!r}")
    if kind == "session":
        extra = [k for k in ("size", "step", "n") if source.get(k) is not None]
        if extra:
            raise ConfigError(f"{where}.{extra[0]}: not used by session windows")
        return WindowSpec(kind="session")
    if kind == "time":
        if source.get("n") is not None:
            raise ConfigError(f"{where}.n: not used by time windows (use size)")
        if "size" not in source:
            raise ConfigError(f"{where}.size: required for time windows")
        size = parse_duration(source["size"], f"{where}.size")
        if size <= pd.Timedelta(0):
            raise ConfigError(f"{where}.size: must be positive, got {size}")
        step = size if source.get("step") is None else parse_duration(source["step"], f"{where}.step")
        if step <= pd.Timedelta(0):
            raise ConfigError(f"{where}.step: must be positive, got {step}")
        if step > size:
            raise ConfigError(f"{where}.step: must not exceed size ({size}), got {step}")
        return WindowSpec(kind="time", size=size, step=step)
    if source.get("size") is not None:
        raise ConfigError(f"{where}.size: not used by count windows (use n)")
    n = _positive_int(source.get("n"), f"{where}.n")
    step = n if source.get("step") is None else _positive_int(source.get("step"), f"{where}.step")
    if step > n:
        raise ConfigError(f"{where}.step: must not exceed n ({n}), got {step}")
    return WindowSpec(kind="count", n=n, step=step)


def _positive_int(value: object, field_name: str) -> int:
    """A positive integer or ConfigError naming the field."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ConfigError(f"{field_name}: expected a positive integer, got {value!r}")
    if value <= 0:
        raise ConfigError(f"{field_name}: must be positive, got {value}")
    return int(value)


def build_windows(events: pd.DataFrame, vocab_size: int, spec: WindowSpec | dict) -> WindowSet:
    """Windows of the configured kind over an event table."""
    spec = load_window_spec(spec)
    if spec.kind == "session":
        return session_windows(events, vocab_size)
    if spec.kind == "time":
        return time_windows(events, vocab_size, spec.size, spec.step)
    return count_windows(events, vocab_size, spec.n, spec.step)


def _check_vocab(ev: np.ndarray, vocab_size: int) -> None:
    """Event ids must lie in [0, vocab_size)."""
    if len(ev) and (ev.min() < 0 or ev.max() >= vocab_size):
        raise DataError(f"events.event: ids must lie in [0, {vocab_size}), got range [{ev.min()}, {ev.max()}]")


def _entity_sorted(events: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Entity codes, entity names per event, ns times, and the (entity, time) stable order."""
    codes, names = entity_codes(events["entity"])
    ts = times_ns(events["ts"])
    order = np.lexsort((ts, codes))
    return codes, names, ts, order


WINDOW_COLUMNS = ["ts", "entity", "event", "group"]


def window_events(events: pd.DataFrame, keep_group: bool = True) -> pd.DataFrame:
    """The columns windows are built from (the session key only when kept); text as categoricals with the
    narrowest codes (a byte per event for up to 127 entities)."""
    wanted = [c for c in WINDOW_COLUMNS if c in events.columns and (keep_group or c != "group")]
    slim = events[wanted].copy()
    for name in ("entity", "group"):
        if name in slim:
            col = slim[name]
            if not isinstance(col.dtype, pd.CategoricalDtype):
                col = col.fillna("") if name == "entity" else col
                slim[name] = col.astype("category")
            else:  # codes read from Arrow are int32 whatever the number of categories
                slim[name] = pd.Categorical.from_codes(col.cat.codes.to_numpy(), dtype=col.dtype)
    return slim


def entity_codes(entity: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Codes of an entity column (a missing entity is "") and the names they stand for, sorted.

    A categorical column is coded from its categories, without a string per event.
    """
    if isinstance(entity.dtype, pd.CategoricalDtype):
        cat = entity.array
        names = np.asarray([str(x) for x in cat.categories] + [""], dtype=object)
        raw = np.asarray(cat.codes, dtype=np.int64)
        raw = np.where(raw < 0, len(names) - 1, raw)
        uniques, inverse = np.unique(names, return_inverse=True)
        return inverse[raw].astype(np.int64), np.asarray(uniques, dtype=object)
    codes, uniques = pd.factorize(entity.fillna("").astype("str"), sort=True)
    return codes, np.asarray(uniques, dtype=object)


def session_windows(events: pd.DataFrame, vocab_size: int) -> WindowSet:
    """One window per session key (``group``); events without a key are left out.

    ``meta.entity`` is the entity of the session's first event; ``meta.group`` holds the key.
    """
    ev = events["event"].to_numpy()
    _check_vocab(ev, vocab_size)
    key_codes, uniques = session_codes(events["group"])
    idx_keep = np.flatnonzero(key_codes >= 0)
    codes = key_codes[idx_keep]
    del key_codes
    ts_all = times_ns(events["ts"])
    t_keep = ts_all[idx_keep]
    del ts_all
    order = np.lexsort((t_keep, codes))
    ev_idx = idx_keep[order]
    codes_sorted = codes[order]
    t_sorted = t_keep[order]
    del order, codes, t_keep, idx_keep
    ent_codes, ent_names = entity_codes(events["entity"])
    info = {"kind": "session", "dropped_events": int(len(events) - len(ev_idx))}
    # a session is a run of one key in the (key, time) order: a slice of the sorted events
    lo = np.flatnonzero(np.r_[True, codes_sorted[1:] != codes_sorted[:-1]]) if len(ev_idx) else np.zeros(0, np.int64)
    hi = np.r_[lo[1:], len(ev_idx)].astype(np.int64)
    ev_sorted = ev[ev_idx].astype(np.int32, copy=False)
    ws = _assemble_slices(ent_codes[ev_idx[lo]], t_sorted[lo], t_sorted[hi - 1] + _ONE_US if len(lo) else lo,
                          lo, hi, ev_sorted, ent_names, vocab_size, info)
    ws.meta["group"] = pd.array(uniques[codes_sorted[lo]], dtype="str")
    return ws


def session_codes(group: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Codes of session keys in name order (-1 where an event has no key: missing or empty) and the key names.

    A categorical column is coded from its categories, without a string per event.
    """
    if isinstance(group.dtype, pd.CategoricalDtype):
        cat = group.array
        uniques, inverse = np.unique(np.asarray([str(x) for x in cat.categories], dtype=object),
                                     return_inverse=True)
        raw = np.asarray(cat.codes, dtype=np.int64)
        codes = np.where(raw >= 0, inverse[np.maximum(raw, 0)], -1) if len(inverse) else np.full(len(raw), -1)
        empty = np.flatnonzero(uniques == "")
        if len(empty):
            codes[codes == empty[0]] = -1
        return codes.astype(np.int64), np.asarray(uniques, dtype=object)
    grp = group.fillna("").astype("str")
    has = (grp != "").to_numpy()
    codes = np.full(len(grp), -1, dtype=np.int64)
    keep = np.flatnonzero(has)
    kept, uniques = pd.factorize(grp.iloc[keep], sort=True)
    codes[keep] = kept
    return codes, np.asarray(uniques, dtype=object)


def time_windows(
    events: pd.DataFrame, vocab_size: int, size: pd.Timedelta, step: pd.Timedelta | None = None
) -> WindowSet:
    """Fixed (step None or = size) or sliding time windows per entity, aligned to the Unix epoch."""
    size = pd.Timedelta(size)
    step = size if step is None else pd.Timedelta(step)
    if size <= pd.Timedelta(0):
        raise ConfigError(f"windows.size: must be positive, got {size}")
    if step <= pd.Timedelta(0) or step > size:
        raise ConfigError(f"windows.step: must be positive and at most size ({size}), got {step}")
    ev = events["event"].to_numpy()
    _check_vocab(ev, vocab_size)
    codes, names, ts, order = _entity_sorted(events)
    info = {"kind": "time", "size": size, "step": step}
    s, d = size.value, step.value
    c = codes[order]
    t = ts[order]
    del ts, codes
    ev_sorted = ev[order].astype(np.int32, copy=False)
    del order
    w_code, k = _nonempty_windows(c, t, s, d)
    starts = k * d
    del k
    lo, hi = _slice_bounds(c, t, w_code, starts, starts + s)
    del t, c
    return _assemble_slices(w_code, starts, starts + s, lo, hi, ev_sorted, names, vocab_size, info)


def _nonempty_windows(c: np.ndarray, t: np.ndarray, s: int, d: int) -> tuple[np.ndarray, np.ndarray]:
    """(entity code, window number k) of every window [k*d, k*d + s) holding an event, in (entity, k) order.

    Events are sorted by (entity, time). Event i lies in windows k_lo..k_hi; the windows an
    event adds to those of the entity's previous event start after that event's k_hi.
    """
    if len(t) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    k_hi = np.floor_divide(t, d)
    from_k = t - s
    np.floor_divide(from_k, d, out=from_k)
    from_k += 1  # k_lo: the first window holding the event
    # after the entity's previous event, only windows past that event's k_hi are new
    later = k_hi[:-1] + 1
    np.maximum(later, from_k[1:], out=later)
    same = c[1:] == c[:-1]
    np.copyto(from_k[1:], later, where=same)
    del later, same
    new = k_hi - from_k
    del k_hi
    new += 1
    np.maximum(new, 0, out=new)
    total = int(new.sum())
    has = np.flatnonzero(new)
    new, from_k = new[has], from_k[has]
    cum = np.zeros(len(new) + 1, dtype=np.int64)
    np.cumsum(new, out=cum[1:])
    # window j belongs to the event `has[r]` with cum[r] <= j < cum[r+1]; its k counts on from that event's from_k
    k = np.repeat(from_k - cum[:-1], new) + np.arange(total, dtype=np.int64)
    w_code = np.repeat(c[has], new)
    return w_code, k


def _slice_bounds(
    c: np.ndarray, t: np.ndarray, w_code: np.ndarray, w_start: np.ndarray, w_end: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Positions [lo, hi) in the (entity, time)-sorted events of each window's events (time in [start, end))."""
    if len(t) == 0 or len(w_code) == 0:
        return np.zeros(len(w_code), np.int64), np.zeros(len(w_code), np.int64)
    # (entity, time) packs into one sortable int64 key: entity * span + (time - t0) where that cannot overflow
    t0 = min(int(t.min()), int(w_start.min()))
    span = max(int(t.max()), int(w_end.max())) - t0 + 1
    if span * (int(c.max()) + 1) < 2**62:
        ev_key = c.astype(np.int64)
        ev_key *= span
        ev_key += t
        ev_key -= t0
        win_base = w_code * span - t0
        lo = np.searchsorted(ev_key, win_base + w_start, side="left")
        hi = np.searchsorted(ev_key, win_base + w_end, side="left")
        return lo, hi
    # else times become dense ranks first
    stamps = np.unique(np.concatenate([t, w_start, w_end]))
    span = len(stamps)
    ev_key = c.astype(np.int64) * span + np.searchsorted(stamps, t)
    lo = np.searchsorted(ev_key, w_code * span + np.searchsorted(stamps, w_start), side="left")
    hi = np.searchsorted(ev_key, w_code * span + np.searchsorted(stamps, w_end), side="left")
    return lo, hi


# Windows are turned into counts and sequences this many event slots at a time (bounds temporaries).
_SLICE_BLOCK = 1 << 20


def _assemble_slices(
    w_code: np.ndarray,
    start_ns: np.ndarray,
    end_ns: np.ndarray,
    lo: np.ndarray,
    hi: np.ndarray,
    ev_sorted: np.ndarray,
    names: np.ndarray,
    vocab_size: int,
    info: dict,
) -> WindowSet:
    """A WindowSet from windows given as slices [lo, hi) of the (entity, time)-sorted event ids ``ev_sorted``.

    Sequences and counts are built block by block with int32 positions; no array holds
    an int64 per (event, window) pair.
    """
    n_win = len(lo)
    lengths = (hi - lo).astype(np.int64)
    offsets = np.zeros(n_win + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    total = int(offsets[-1])
    pos_type = np.int32 if len(ev_sorted) < 2**31 else np.int64
    values = np.empty(total, dtype=np.int32)
    # count matrix arrays, filled block by block (a window's distinct events never outnumber its events)
    indptr = np.zeros(n_win + 1, dtype=np.int64)
    indices = np.empty(total, dtype=np.int32)
    data = np.empty(total, dtype=np.int32)
    nnz = 0
    w = 0
    while w < n_win:
        # windows [w, w_end) hold at most _SLICE_BLOCK events (at least one window per block)
        w_end = max(w + 1, int(np.searchsorted(offsets, offsets[w] + _SLICE_BLOCK, side="right")) - 1)
        w_end = min(w_end, n_win)
        a, b = int(offsets[w]), int(offsets[w_end])
        n_lens = lengths[w:w_end].astype(pos_type)
        local = (offsets[w:w_end] - a).astype(pos_type)
        gather = np.repeat(lo[w:w_end].astype(pos_type) - local, n_lens) + np.arange(b - a, dtype=pos_type)
        block_values = ev_sorted[gather]
        del gather
        values[a:b] = block_values
        block = sp.csr_matrix(
            (np.ones(b - a, dtype=np.int32), block_values, np.r_[local, b - a].astype(np.int64)),
            shape=(w_end - w, vocab_size),
        )
        block.sum_duplicates()
        indices[nnz : nnz + block.nnz] = block.indices
        data[nnz : nnz + block.nnz] = block.data
        indptr[w + 1 : w_end + 1] = block.indptr[1:] + nnz
        nnz += block.nnz
        del block, block_values
        w = w_end
    counts = sp.csr_matrix((data[:nnz], indices[:nnz], indptr), shape=(n_win, vocab_size), copy=False)
    counts.has_sorted_indices = True
    meta = pd.DataFrame(
        {
            "id": np.arange(n_win, dtype=np.int64),
            "entity": pd.array(names[w_code], dtype="str") if n_win else pd.array([], dtype="str"),
            "start": from_ns(start_ns),
            "end": from_ns(end_ns),
            "n_events": lengths,
        }
    )
    return WindowSet(meta, counts, values, offsets, vocab_size, info=info)


def count_windows(events: pd.DataFrame, vocab_size: int, n: int, step: int | None = None) -> WindowSet:
    """Windows of ``n`` consecutive events per entity, advancing by ``step`` events (default n).

    The last window of an entity may be shorter; a window whose events all lie in
    the previous window is not produced.
    """
    n = _positive_int(n, "windows.n")
    step = n if step is None else _positive_int(step, "windows.step")
    if step > n:
        raise ConfigError(f"windows.step: must not exceed n ({n}), got {step}")
    ev = events["event"].to_numpy()
    _check_vocab(ev, vocab_size)
    codes, names, ts, order = _entity_sorted(events)
    c = codes[order]
    m = len(order)
    if m == 0:
        empty = np.zeros(0, np.int64)
        info = {"kind": "count", "n": n, "step": step}
        return _assemble_slices(empty, empty, empty, empty, empty, ev[:0].astype(np.int32), names, vocab_size, info)
    # each window is a slice of the entity's run in the (entity, time) order
    first = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
    cnt = np.diff(np.r_[first, m])
    j_last = np.where(cnt > n, np.minimum((cnt - 1) // step, 1 + (cnt - n - 1) // step), 0)
    n_win = j_last + 1
    cum = np.zeros(len(n_win) + 1, dtype=np.int64)
    np.cumsum(n_win, out=cum[1:])
    run = np.repeat(np.arange(len(first)), n_win)
    j = np.arange(int(cum[-1]), dtype=np.int64) - cum[:-1][run]
    lo = first[run] + j * step
    hi = np.minimum(lo + n, first[run] + cnt[run])
    del run, j
    t = ts[order]
    info = {"kind": "count", "n": n, "step": step}
    ev_sorted = ev[order].astype(np.int32, copy=False)
    del order
    return _assemble_slices(c[lo], t[lo], t[hi - 1] + _ONE_US, lo, hi, ev_sorted, names, vocab_size, info)


# ---------------------------------------------------------------------------
# Labels
#
# Incidents are closed intervals [start, end]; windows are [start, end). A window
# overlaps an incident when incident.start < window.end and incident.end >=
# window.start, for the same entity; an incident whose entity is "" applies to
# every entity. Session windows are matched by key instead of time when both the
# window meta and the incident table have a ``group`` column: a session overlaps
# the incidents that carry its key (incidents without a key fall back to time).
# ---------------------------------------------------------------------------


def _window_arrays(windows: WindowSet) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Entity names, start ns and end ns of every window."""
    meta = windows.meta
    return (
        meta["entity"].fillna("").astype(str).to_numpy(dtype=object),
        times_ns(meta["start"]),
        times_ns(meta["end"]),
    )


def _overlaps(w_ent: np.ndarray, ws: np.ndarray, we: np.ndarray, incidents: pd.DataFrame) -> np.ndarray:
    """Per window: does it overlap any of the given incidents in time (same entity or global)?"""
    if len(incidents) == 0 or len(ws) == 0:
        return np.zeros(len(ws), dtype=bool)
    i_ent = incidents["entity"].fillna("").astype(str).to_numpy(dtype=object)
    i_s, i_e = times_ns(incidents["start"]), times_ns(incidents["end"])

    def hit(sel_w: np.ndarray, sel_i: np.ndarray) -> np.ndarray:
        """Overlap of the selected windows with the selected incidents (prefix max of ends)."""
        o = np.argsort(i_s[sel_i], kind="stable")
        s_sorted = i_s[sel_i][o]
        e_cummax = np.maximum.accumulate(i_e[sel_i][o])
        j = np.searchsorted(s_sorted, we[sel_w], side="left") - 1  # last incident with start < window end
        ok = j >= 0
        res = np.zeros(len(sel_w), dtype=bool)
        res[ok] = e_cummax[j[ok]] >= ws[sel_w][ok]
        return res

    return _by_entity(w_ent, i_ent, hit)


def _by_entity(w_ent: np.ndarray, i_ent: np.ndarray, hit) -> np.ndarray:
    """Per window: ``hit(windows, incidents)`` against the incidents of its entity and the global ('') ones."""
    out = np.zeros(len(w_ent), dtype=bool)
    glob = i_ent == ""
    if glob.any():
        out |= hit(np.arange(len(w_ent)), np.flatnonzero(glob))
    if (~glob).any():
        codes, _ = pd.factorize(np.concatenate([w_ent, i_ent[~glob]]))
        w_codes, i_codes = codes[: len(w_ent)], codes[len(w_ent) :]
        w_order = np.argsort(w_codes, kind="stable")
        w_sorted = w_codes[w_order]
        i_idx = np.flatnonzero(~glob)
        for code in np.unique(i_codes):
            lo, hi = np.searchsorted(w_sorted, [code, code + 1])
            if lo == hi:
                continue
            sel_w = w_order[lo:hi]
            out[sel_w] |= hit(sel_w, i_idx[i_codes == code])
    return out


def _overlap_mask(windows: WindowSet, incidents: pd.DataFrame) -> np.ndarray:
    """Per window: does it overlap any given incident (by session key when both sides have one)?"""
    w_ent, ws, we = _window_arrays(windows)
    if "group" in windows.meta.columns and "group" in incidents.columns:
        keyed = incidents["group"].notna().to_numpy() & (incidents["group"].astype(str) != "").to_numpy()
        out = windows.meta["group"].astype(str).isin(incidents.loc[keyed, "group"].astype(str)).to_numpy()
        return out | _overlaps(w_ent, ws, we, incidents.loc[~keyed])
    return _overlaps(w_ent, ws, we, incidents)


def _window_size(windows: WindowSet) -> pd.Timedelta | None:
    """Nominal window length for time windows, else None (length varies)."""
    size = windows.info.get("size")
    return None if size is None else pd.Timedelta(size)


def check_task(task: str, horizon: pd.Timedelta | None, windows: WindowSet | None = None) -> pd.Timedelta | None:
    """Validate a task name and horizon (against the window size for time windows)."""
    if task not in TASKS:
        raise ConfigError(f"task.name: must be one of {list(TASKS)}, got {task!r}")
    if task == "detect":
        return None
    if horizon is None:
        raise ConfigError("task.horizon: required for the predict task")
    horizon = parse_duration(horizon, "task.horizon")
    if horizon <= pd.Timedelta(0):
        raise ConfigError(f"task.horizon: must be positive, got {horizon}")
    size = None if windows is None else _window_size(windows)
    if size is not None and horizon < size:
        raise ConfigError(f"task.horizon must be at least the window size ({size}), got {horizon}")
    return horizon


def label_windows(
    windows: WindowSet, incidents: pd.DataFrame, task: str, horizon: pd.Timedelta | None = None
) -> np.ndarray:
    """Window labels (int8) for a task: detect 1/0; predict 1 (failure ahead) / 0 / -1 (inside a failure)."""
    horizon = check_task(task, horizon, windows)
    failures = incidents.loc[incidents["kind"] == "failure"]
    inside = _overlap_mask(windows, failures)
    if task == "detect":
        return inside.astype(np.int8)
    w_ent, ws, we = _window_arrays(windows)
    ahead = _failure_ahead(w_ent, we, failures, horizon.value)
    labels = np.where(ahead, 1, 0).astype(np.int8)
    labels[inside] = -1
    return labels


def _failure_ahead(w_ent: np.ndarray, we: np.ndarray, failures: pd.DataFrame, h: int) -> np.ndarray:
    """Per window: does a failure of its entity (or a global one) start in [end, end + horizon)?"""
    if len(failures) == 0 or len(we) == 0:
        return np.zeros(len(we), dtype=bool)
    f_ent = failures["entity"].fillna("").astype(str).to_numpy(dtype=object)
    f_s = times_ns(failures["start"])

    def hit(sel_w: np.ndarray, sel_f: np.ndarray) -> np.ndarray:
        """Does any of the selected failures start in [end, end + horizon) of the selected windows?"""
        starts = np.sort(f_s[sel_f])
        lo = np.searchsorted(starts, we[sel_w], side="left")
        hi = np.searchsorted(starts, we[sel_w] + h, side="left")
        return hi > lo

    return _by_entity(w_ent, f_ent, hit)


def window_incident_kind(windows: WindowSet, incidents: pd.DataFrame) -> np.ndarray:
    """Per window, the kind of incident it overlaps: 'failure' (wins), 'other' or 'none'."""
    fail = _overlap_mask(windows, incidents.loc[incidents["kind"] == "failure"])
    other = _overlap_mask(windows, incidents.loc[incidents["kind"] == "other"])
    return np.where(fail, "failure", np.where(other, "other", "none")).astype(object)
