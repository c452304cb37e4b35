"""Sessions from files: windows built from external event-id sequences (one window per session).

Many public log releases come already parsed into one line of event ids per session.
``windows_from_sequences`` turns such sequences into a ``WindowSet`` (validated: every id
an integer in range, order kept, counts built from the set's own copy of the sequences);
``read_sequence_file`` and ``read_labelled_sessions`` read the two common file layouts:
plain text with one session per line (ids separated by spaces or commas), or a CSV with a
sequence column and a label column.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd
import scipy.sparse as sp
from logtrial.errors import DataError
from logtrial.windowing.windows import WindowSet

# Session files carry no time: session i is laid out at i seconds after the epoch, its
# events one millisecond apart, so time-based code (splits, alarms) sees a valid layout.
SESSION_SPACING_NS = 1_000_000_000
EVENT_SPACING_NS = 1_000_000


@dataclass
class Sessions:
    """Event-id sequences of sessions (ragged), their keys and labels (1 abnormal, 0 normal)."""

    values: np.ndarray
    offsets: np.ndarray
    keys: np.ndarray
    labels: np.ndarray

    def __len__(self) -> int:
        """Number of sessions."""
        return len(self.offsets) - 1


def ragged(sequences: Sequence[Sequence[int]] | tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """(values, offsets) of a list of sequences, or a copy of a given (values, offsets) pair."""
    if isinstance(sequences, tuple) and len(sequences) == 2 and isinstance(sequences[1], np.ndarray):
        values, offsets = (np.array(a) for a in sequences)
    else:
        lens = np.fromiter((len(s) for s in sequences), dtype=np.int64, count=len(sequences))
        offsets = np.zeros(len(lens) + 1, dtype=np.int64)
        np.cumsum(lens, out=offsets[1:])
        parts = [np.asarray(s) for s in sequences]
        values = np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)
    return values, offsets


def windows_from_sequences(
    sequences: Sequence[Sequence[int]] | tuple[np.ndarray, np.ndarray],
    vocab_size: int,
    *,
    keys: Sequence[str] | None = None,
    labels: Sequence[int] | None = None,
    entity: str = "",
) -> WindowSet:
    """A session WindowSet from event-id sequences (ids 0..vocab_size-1), one window per sequence, order kept."""
    values, offsets = ragged(sequences)
    if isinstance(vocab_size, bool) or not isinstance(vocab_size, (int, np.integer)) or vocab_size < 1:
        raise DataError(f"sessions: vocab_size must be a positive whole number, got {vocab_size!r}")
    if offsets.ndim != 1 or len(offsets) < 1 or offsets[0] != 0 or (np.diff(offsets) < 0).any():
        raise DataError("sessions: offsets must start at 0 and never decrease (one more offset than sessions)")
    if int(offsets[-1]) != len(values):
        raise DataError(f"sessions: offsets end at {int(offsets[-1])} but {len(values)} event ids were given")
    if len(values) and not np.issubdtype(values.dtype, np.integer):
        whole = np.issubdtype(values.dtype, np.floating) and np.all(np.mod(values, 1) == 0)
        if not whole:
            raise DataError(f"sessions: event ids must be whole numbers, got dtype {values.dtype}")
    values = values.astype(np.int64)
    bad = (values < 0) | (values >= vocab_size)
    if bad.any():
        pos = int(np.argmax(bad))
        session = int(np.searchsorted(offsets, pos, side="right") - 1)
        raise DataError(
            f"sessions: session {session} (0-based), event {pos - int(offsets[session])}: id {int(values[pos])} "
            f"outside 0..{vocab_size - 1}"
        )
    n = len(offsets) - 1
    if keys is None:
        keys = [f"s{i}" for i in range(n)]
    keys = np.asarray(keys, dtype=object).astype(str)
    if len(keys) != n:
        raise DataError(f"sessions: {len(keys)} keys for {n} sessions")
    if len(set(keys)) != n:
        raise DataError("sessions: session keys must be unique")
    lab = None
    if labels is not None:
        lab = np.asarray(labels).astype(np.int8)
        if lab.shape != (n,):
            raise DataError(f"sessions: {len(lab)} labels for {n} sessions")
    seq = values.astype(np.int32)
    # the count matrix gets its own copies: building it sorts its index array in place
    counts = sp.csr_matrix((np.ones(len(seq), dtype=np.int32), seq.copy(), offsets.copy()), shape=(n, int(vocab_size)))
    counts.sum_duplicates()
    lens = np.diff(offsets)
    start = np.arange(n, dtype=np.int64) * SESSION_SPACING_NS
    end = start + np.maximum(lens - 1, 0) * EVENT_SPACING_NS + 1_000
    meta = pd.DataFrame({
        "id": np.arange(n, dtype=np.int64),
        "entity": pd.array([entity] * n, dtype="str"),
        "start": pd.to_datetime(start, utc=True),
        "end": pd.to_datetime(end, utc=True),
        "n_events": lens.astype(np.int64),
        "group": pd.array(keys, dtype="str"),
    })
    return WindowSet(meta, counts, seq, offsets.astype(np.int64), int(vocab_size), labels=lab,
                     info={"kind": "session", "source": "sequences"})


def _parse_ids(text: str, where: str) -> np.ndarray:
    """Event ids of one session written as integers separated by spaces or commas."""
    tokens = text.replace(",", " ").split()
    try:
        return np.array([int(t) for t in tokens], dtype=np.int64)
    except ValueError:
        bad = next(t for t in tokens if not t.lstrip("-").isdigit())
        raise DataError(f"{where}: expected whole-number event ids separated by spaces, found {bad!r}") from None


def read_sequence_file(path: str | Path, first_id: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """(values, offsets) of a text file with one session per line; ids shifted so ``first_id`` becomes 0."""
    path = Path(path)
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except FileNotFoundError:
        raise DataError(f"{path}: session file not found") from None
    except UnicodeDecodeError as exc:
        raise DataError(f"{path}: not UTF-8 text (byte {exc.start})") from None
    seqs = []
    for no, line in enumerate(lines, 1):
        if not line.strip():
            if no == len(lines):
                continue
            raise DataError(f"{path}: line {no}: empty line (one session of event ids per line expected)")
        ids = _parse_ids(line, f"{path}: line {no}") - first_id
        if (ids < 0).any():
            raise DataError(f"{path}: line {no}: event id {int(ids.min()) + first_id} below the first id {first_id}")
        seqs.append(ids)
    if not seqs:
        raise DataError(f"{path}: no sessions (one line of event ids per session expected)")
    return ragged(seqs)


def read_labelled_sessions(path: str | Path, sequence: str, label: str, anomalous: str,
                           key: str | None = None, first_id: int = 1) -> Sessions:
    """Sessions of a CSV with a sequence column (ids separated by spaces) and a label column."""
    path = Path(path)
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False)
    except FileNotFoundError:
        raise DataError(f"{path}: session file not found") from None
    except (UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise DataError(f"{path}: cannot read as CSV ({exc})") from None
    for col in [c for c in (sequence, label, key) if c is not None]:
        if col not in df.columns:
            raise DataError(f"{path}: line 1: expected a column {col!r}, found {list(df.columns)}")
    seqs = []
    for no, text in enumerate(df[sequence].tolist(), 2):
        ids = _parse_ids(text, f"{path}: line {no}, column {sequence!r}") - first_id
        if (ids < 0).any():
            raise DataError(f"{path}: line {no}: event id {int(ids.min()) + first_id} below the first id {first_id}")
        seqs.append(ids)
    values, offsets = ragged(seqs)
    keys = df[key].to_numpy(dtype=object) if key else np.array([f"s{i}" for i in range(len(df))], dtype=object)
    return Sessions(values, offsets, keys.astype(str), (df[label] == anomalous).to_numpy().astype(np.int8))


def normal_and_abnormal(normal: str | Path, abnormal: str | Path, first_id: int = 1) -> Sessions:
    """Sessions of a normal file followed by an abnormal file (one session per line each)."""
    nv, no = read_sequence_file(normal, first_id)
    av, ao = read_sequence_file(abnormal, first_id)
    n_norm, n_abn = len(no) - 1, len(ao) - 1
    keys = np.r_[[f"normal-{i}" for i in range(n_norm)], [f"abnormal-{i}" for i in range(n_abn)]].astype(str)
    return Sessions(np.r_[nv, av], np.r_[no, ao[1:] + no[-1]], keys,
                    np.r_[np.zeros(n_norm, np.int8), np.ones(n_abn, np.int8)])


def session_events(sessions: Sessions, order_seed: int = 0) -> pd.DataFrame:
    """An event table of sessions laid out in a seeded random order (files carry no time).

    Columns as every event table: line, ts, entity (""), group (session key), event, tag ("").
    """
    n = len(sessions)
    order = np.random.default_rng(order_seed).permutation(n)
    slot = np.empty(n, dtype=np.int64)
    slot[order] = np.arange(n)
    lens = np.diff(sessions.offsets)
    owner = np.repeat(np.arange(n), lens)
    within = np.arange(len(sessions.values)) - np.repeat(sessions.offsets[:-1], lens)
    ts = slot[owner] * SESSION_SPACING_NS + within * EVENT_SPACING_NS
    events = pd.DataFrame({
        "line": np.arange(1, len(owner) + 1, dtype=np.int64),
        "ts": pd.to_datetime(ts, utc=True),
        "entity": pd.array([""] * len(owner), dtype="str"),
        "group": pd.array(sessions.keys[owner], dtype="str"),
        "event": sessions.values.astype(np.int32),
        "tag": pd.array([""] * len(owner), dtype="str"),
    })
    return events.iloc[np.argsort(ts, kind="stable")].reset_index(drop=True)


def load_entry_sessions(entry) -> tuple[Sessions, int, str]:
    """Sessions of a registry session-file dataset, its vocabulary size and a key hashing files and settings."""
    import hashlib
    import json

    spec = entry.sessions
    folder = spec.resolve(entry.name)
    files = [spec.normal, spec.abnormal] if spec.file is None else [spec.file]
    h = hashlib.sha256(json.dumps(spec.model_dump(exclude={"folder", "folder_env"}), sort_keys=True).encode())
    for name in files:
        path = folder / name
        if not path.is_file():
            raise DataError(f"{path}: session file of dataset '{entry.name}' not found")
        h.update(path.read_bytes())
    if spec.file is None:
        sessions = normal_and_abnormal(folder / spec.normal, folder / spec.abnormal, spec.first_id)
    else:
        sessions = read_labelled_sessions(folder / spec.file, spec.sequence, spec.label, spec.anomalous, spec.key,
                                          spec.first_id)
    seen = int(sessions.values.max()) + 1 if len(sessions.values) else 1
    vocab = spec.vocab_size or seen
    if seen > vocab:
        raise DataError(f"dataset '{entry.name}': event id {seen - 1 + spec.first_id} exceeds sessions.vocab_size "
                        f"{vocab} (ids from {spec.first_id})")
    return sessions, int(vocab), f"{entry.name}-{h.hexdigest()[:16]}"
