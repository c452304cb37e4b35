"""Incidents: ground truth as intervals per entity, from inline tags, session labels or a file.

An incident table is a pandas DataFrame with columns ``id`` (int64), ``entity``
(str, ``""`` = every entity), ``start`` and ``end`` (UTC timestamps, the interval
is closed: ``[start, end]``, so a one-line incident has ``start == end``), ``kind``
(``"failure"`` or ``"other"`` for non-failure anomalies) and optionally ``mode``
(failure mode or alert category) and ``group`` (session key, for session labels).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from pathlib import Path

import numpy as np
import pandas as pd
from logtrial.errors import ConfigError, DataError

KINDS = ("failure", "other")
INCIDENT_COLUMNS = ["id", "entity", "start", "end", "kind"]


def text_values(column: pd.Series) -> np.ndarray:
    """A text column as an object array, a missing value as "" (a categorical is expanded from its categories,
    without building a string per row)."""
    if isinstance(column.dtype, pd.CategoricalDtype):
        names = np.asarray([str(c) for c in column.cat.categories] + [""], dtype=object)
        codes = column.cat.codes.to_numpy()
        return names[np.where(codes < 0, len(names) - 1, codes)]
    return column.fillna("").astype(str).to_numpy(dtype=object)


def times_ns(values: pd.Series | pd.Index | np.ndarray) -> np.ndarray:
    """Timestamps as int64 nanoseconds since the Unix epoch (UTC)."""
    idx = pd.DatetimeIndex(values.array if isinstance(values, pd.Series) else values)
    if idx.tz is None:
        idx = idx.tz_localize("UTC")
    return idx.as_unit("ns").asi8.astype(np.int64, copy=False)


def from_ns(values: np.ndarray) -> pd.DatetimeIndex:
    """int64 nanoseconds since the epoch as a UTC DatetimeIndex."""
    return pd.DatetimeIndex(np.asarray(values, dtype="int64").view("datetime64[ns]")).tz_localize("UTC")


def empty_incidents() -> pd.DataFrame:
    """An incident table with no rows and the standard columns."""
    return make_incidents(
        np.zeros(0, dtype=np.int64), np.zeros(0, dtype=object), np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, dtype=object)
    )


def make_incidents(
    ids: np.ndarray,
    entity: np.ndarray,
    start_ns: np.ndarray,
    end_ns: np.ndarray,
    kind: np.ndarray,
    **extra: np.ndarray,
) -> pd.DataFrame:
    """Build an incident table with canonical dtypes from column arrays."""
    df = pd.DataFrame(
        {
            "id": np.asarray(ids, dtype=np.int64),
            "entity": pd.array(np.asarray(entity, dtype=object), dtype="str"),
            "start": from_ns(start_ns),
            "end": from_ns(end_ns),
            "kind": pd.array(np.asarray(kind, dtype=object), dtype="str"),
        }
    )
    for name, values in extra.items():
        df[name] = pd.array(np.asarray(values, dtype=object), dtype="str")
    return df


def incidents_from_tags(
    events: pd.DataFrame,
    gap: pd.Timedelta,
    failure_tags: set[str] | None = None,
    tag_kinds: Mapping[str, str] | None = None,
) -> pd.DataFrame:
    """Incidents from inline alert tags: runs of tagged lines per entity, merged when closer than ``gap``.

    A tag's kind is ``tag_kinds[tag]`` when given there, else ``"failure"`` when
    ``failure_tags`` is None or contains the tag, else ``"other"``. A merged run is
    a failure when any of its lines is. ``mode`` is the tag of the run's first line.
    """
    gap = pd.Timedelta(gap)
    if pd.isna(gap) or gap < pd.Timedelta(0):
        raise ConfigError(f"labels.gap: must be a non-negative duration, got {gap}")
    tags = text_values(events["tag"])
    alert = tags != ""
    sub = events.loc[alert]
    if len(sub) == 0:
        return empty_incidents().assign(mode=pd.array([], dtype="str"))
    sub_tags = tags[alert]
    ent = text_values(sub["entity"])
    ts = times_ns(sub["ts"])
    ent_codes, ent_uniques = pd.factorize(ent, sort=True)
    order = np.lexsort((ts, ent_codes))
    ent_codes, ts, sub_tags = ent_codes[order], ts[order], sub_tags[order]

    uniq_tags, tag_codes = np.unique(sub_tags, return_inverse=True)
    tag_is_failure = np.array([_tag_kind(t, failure_tags, tag_kinds) == "failure" for t in uniq_tags])
    line_failure = tag_is_failure[tag_codes]

    new = np.ones(len(ts), dtype=bool)
    new[1:] = (ent_codes[1:] != ent_codes[:-1]) | ((ts[1:] - ts[:-1]) >= gap.value)
    first = np.flatnonzero(new)
    last = np.r_[first[1:] - 1, len(ts) - 1]
    any_failure = np.maximum.reduceat(line_failure.astype(np.int8), first).astype(bool)
    return make_incidents(
        np.arange(len(first), dtype=np.int64),
        np.asarray(ent_uniques, dtype=object)[ent_codes[first]],
        ts[first],
        ts[last],
        np.where(any_failure, "failure", "other"),
        mode=sub_tags[first],
    )


def _tag_kind(tag: str, failure_tags: set[str] | None, tag_kinds: Mapping[str, str] | None) -> str:
    """Kind of one alert tag under the failure set and explicit mapping."""
    if tag_kinds is not None and tag in tag_kinds:
        kind = tag_kinds[tag]
        if kind not in KINDS:
            raise ConfigError(f"labels.tag_kinds.{tag}: must be one of {list(KINDS)}, got {kind!r}")
        return kind
    if failure_tags is None or tag in failure_tags:
        return "failure"
    return "other"


def incidents_from_sessions(
    events: pd.DataFrame, anomalous_groups: Iterable[str], kind: str = "failure"
) -> pd.DataFrame:
    """Incidents from session labels: each anomalous session seen in the events, over its time span.

    ``entity`` is the entity of the session's first event (often ``""``), ``group``
    holds the session key so that session windows are labelled by key.
    """
    if kind not in KINDS:
        raise ConfigError(f"labels.kind: must be one of {list(KINDS)}, got {kind!r}")
    wanted = pd.Index(pd.unique(np.asarray(list(anomalous_groups), dtype=object))).astype(str)
    keep = events["group"].isin(wanted).to_numpy()  # a missing key is in no list
    sub = events.loc[keep]
    if len(sub) == 0:
        return empty_incidents().assign(group=pd.array([], dtype="str"))
    g = text_values(sub["group"])
    ts = times_ns(sub["ts"])
    ent = text_values(sub["entity"])
    codes, uniques = pd.factorize(g, sort=True)
    order = np.lexsort((ts, codes))
    codes, ts, ent = codes[order], ts[order], ent[order]
    first = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
    last = np.r_[first[1:] - 1, len(ts) - 1]
    return make_incidents(
        np.arange(len(first), dtype=np.int64),
        ent[first],
        ts[first],
        ts[last],
        np.full(len(first), kind, dtype=object),
        group=np.asarray(uniques, dtype=object)[codes[first]],
    )


def read_incidents(path: str | Path) -> pd.DataFrame:
    """Read and validate an incidents CSV (id, entity, start, end, kind[, mode][, group])."""
    path = Path(path)
    try:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise DataError(f"{path}: cannot read incidents CSV: {exc}") from exc
    missing = [c for c in INCIDENT_COLUMNS if c not in raw.columns]
    if missing:
        raise DataError(f"{path}: line 1: missing column(s) {missing}; expected {INCIDENT_COLUMNS}")
    lines = np.arange(len(raw)) + 2  # header is line 1

    ids = pd.to_numeric(raw["id"], errors="coerce")
    bad = ids.isna().to_numpy() | (ids.fillna(0) % 1 != 0).to_numpy()
    _fail(path, lines, bad, raw["id"], "id: expected an integer")
    dup = ids.duplicated(keep="first").to_numpy()
    _fail(path, lines, dup, raw["id"], "id: expected unique ids, duplicate")
    starts = pd.to_datetime(raw["start"], utc=True, errors="coerce", format="mixed")
    ends = pd.to_datetime(raw["end"], utc=True, errors="coerce", format="mixed")
    _fail(path, lines, starts.isna().to_numpy(), raw["start"], "start: expected a timestamp")
    _fail(path, lines, ends.isna().to_numpy(), raw["end"], "end: expected a timestamp")
    _fail(path, lines, (ends < starts).to_numpy(), raw["end"], "end: expected end >= start")
    _fail(path, lines, ~raw["kind"].isin(KINDS).to_numpy(), raw["kind"], f"kind: expected one of {KINDS}")
    extra = {c: raw[c].to_numpy(dtype=object) for c in ("mode", "group") if c in raw.columns}
    return make_incidents(
        ids.to_numpy(dtype=np.int64),
        raw["entity"].to_numpy(dtype=object),
        times_ns(starts),
        times_ns(ends),
        raw["kind"].to_numpy(dtype=object),
        **extra,
    )


def _fail(path: Path, lines: np.ndarray, bad: np.ndarray, values: pd.Series, what: str) -> None:
    """Raise DataError naming the first bad row's line when any row is bad."""
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise DataError(f"{path}: line {lines[i]}: {what}, got {values.iloc[i]!r} ({int(bad.sum())} bad row(s))")


def validate_incidents(incidents: pd.DataFrame, where: str = "incidents") -> None:
    """Check an in-memory incident table has the standard columns and sane values."""
    missing = [c for c in INCIDENT_COLUMNS if c not in incidents.columns]
    if missing:
        raise DataError(f"{where}: missing column(s) {missing}")
    if len(incidents) and not incidents["kind"].isin(KINDS).all():
        raise DataError(f"{where}: kind must be one of {KINDS}")
    if len(incidents) and (incidents["end"] < incidents["start"]).any():
        raise DataError(f"{where}: end must be >= start")
