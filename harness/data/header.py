"""Header: split decoded lines into the format's fields, parse their timestamps, find session keys."""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa
from logtrial.data.registry import LineFormat


def parse_timestamps(values: list[str], fmt: LineFormat) -> np.ndarray:
    """Timestamps (datetime64[us], UTC) of joined header values per the format's rule; NaT where one does not parse."""
    ts = fmt.timestamp
    assert ts is not None
    arr = np.asarray(values, dtype=object)
    if ts.unit is not None:
        num = pd.to_numeric(arr, errors="coerce")
        out = pd.to_datetime(num, unit=ts.unit, errors="coerce", utc=True)
    else:
        pattern = ts.format
        if ts.default_year is not None:
            arr = np.asarray([f"{ts.default_year} {v}" for v in values], dtype=object)
            pattern = "%Y " + pattern
        # Repeated whitespace (e.g. "Jul  1") parses the same as one space.
        if any("  " in v for v in arr):
            arr = np.asarray([" ".join(v.split()) for v in arr], dtype=object)
        out = _strptime(arr, pattern)
        out = _localize(out, ts.tz) if out.tz is None else out
    return np.asarray(out.tz_convert("UTC").tz_localize(None), dtype="datetime64[us]")


def stands_alone(fmt: LineFormat) -> bool:
    """Tell whether each timestamp value parses the same whatever the other lines hold (no local-time
    inference from the order of the lines)."""
    ts = fmt.timestamp
    if ts is None:
        return True
    return ts.unit is not None or ts.tz == "UTC" or "%z" in (ts.format or "") or "%Z" in (ts.format or "")


def _localize(local: pd.DatetimeIndex, tz: str) -> pd.DatetimeIndex:
    """Local wall-clock times in ``tz`` as aware times; across clock changes, repeated hours are
    inferred from the order of the lines (else taken as the first occurrence) and skipped hours
    shifted forward."""
    if tz == "UTC":
        return local.tz_localize("UTC")
    try:
        return local.tz_localize(tz, ambiguous="infer", nonexistent="shift_forward")
    except ValueError:
        return local.tz_localize(tz, ambiguous=np.ones(len(local), dtype=bool), nonexistent="shift_forward")


_FRACTION = re.compile(r"(.*%S)([.,:])%f")


def _strptime(values: np.ndarray, pattern: str) -> pd.DatetimeIndex:
    """Parse strings with a strftime pattern; NaT where one does not parse.

    A trailing fraction of a second (``%S.%f`` and the like) is split off so that the
    rest, repeated within each second, goes through pandas' parse cache, and the
    fraction is added as microseconds; same result as parsing the whole pattern.
    """
    m = _FRACTION.fullmatch(pattern)
    zoned = "%z" in pattern or "%Z" in pattern  # offsets may change (clock changes): convert to UTC
    if not m:
        return pd.DatetimeIndex(pd.to_datetime(values, format=pattern, errors="coerce", utc=zoned))
    head_fmt, sep = m.group(1), m.group(2)
    parts = [v.rpartition(sep) for v in values]
    heads = np.asarray([p[0] if p[1] else "" for p in parts], dtype=object)
    fracs = [p[2] for p in parts]
    good = np.fromiter((0 < len(f) <= 9 and f.isdigit() for f in fracs), dtype=bool, count=len(fracs))
    micros = np.asarray([int(f[:6].ljust(6, "0")) if ok else 0 for f, ok in zip(fracs, good)], dtype="int64")
    base = pd.DatetimeIndex(pd.to_datetime(heads, format=head_fmt, errors="coerce", cache=True, utc=zoned))
    out = base + pd.to_timedelta(micros, unit="us")
    return out.where(good, pd.NaT)


@dataclass
class ParsedChunk:
    """Parsed rows of one chunk of lines, column by column (plain lists and arrays, no pandas strings)."""

    line: np.ndarray
    ts: np.ndarray
    content: list | pa.Array | None  # None once split into tokens (`shape_keys.TokenColumn`)
    entity: list | pa.Array | str
    group: list | pa.Array | str | None
    tag: list | pa.Array | str

    def __len__(self) -> int:
        return len(self.line)


class LineParser:
    """Applies one line format to chunks of lines."""

    def __init__(self, fmt: LineFormat, path_group: str | None = None):
        self.fmt = fmt
        self.rx = fmt.compiled()
        self.fields = ["content"]
        if fmt.timestamp:
            self.fields += [f for f in fmt.timestamp.fields if f not in self.fields]
        for name in (fmt.entity, fmt.group.field if fmt.group else None, fmt.tag.field if fmt.tag else None):
            if name and name not in self.fields:
                self.fields.append(name)
        self.group_rx = re.compile(fmt.group.pattern) if fmt.group and fmt.group.pattern else None
        self.path_group = path_group
        self.group_indices = tuple(self.rx.groupindex[f] for f in self.fields)
        self.position = {f: i for i, f in enumerate(self.fields)}

    def _column(self, cols: list, name: str) -> list:
        """One header field's values ("" where its optional group did not take part)."""
        values = cols[self.position[name]]
        return [v or "" for v in values] if None in values else list(values)

    def parse(self, lines: list[str], first_line: int) -> tuple[ParsedChunk | None, list[tuple[int, str, str]]]:
        """Split lines into header fields; return the parsed rows and (line, reason, text) rejects."""
        match = self.rx.match
        matches = [match(s) for s in lines]
        ok = np.fromiter((m is not None for m in matches), dtype=bool, count=len(matches))
        bad = [(first_line + int(i), "line does not match the format's regex", lines[i]) for i in np.flatnonzero(~ok)]
        good = [m for m in matches if m is not None] if len(bad) else matches
        if not good:
            return None, bad
        # One C-level m.group(*indices) per line returns every wanted field at once.
        idx = self.group_indices
        rows = [m.group(*idx) for m in good] if len(idx) > 1 else [(m.group(idx[0]),) for m in good]
        cols = list(zip(*rows))
        line = np.flatnonzero(ok).astype(np.int64) + first_line
        content = [c.strip() for c in self._column(cols, "content")]
        keep = None
        if self.fmt.timestamp:
            fields = [self._column(cols, f) for f in self.fmt.timestamp.fields]
            joined = fields[0] if len(fields) == 1 else [" ".join(v) for v in zip(*fields)]
            ts = parse_timestamps(joined, self.fmt)
            nat = np.isnat(ts)
            if nat.any():
                expect = self.fmt.timestamp.format or f"epoch {self.fmt.timestamp.unit}"
                bad += [(int(line[i]), f"timestamp {joined[i]!r} does not match {expect!r}",
                         lines[int(line[i]) - first_line]) for i in np.flatnonzero(nat)]
                keep = np.flatnonzero(~nat)
        else:
            # No timestamp in the format: the line number stands in as seconds since the epoch,
            # so time-ordered stages still see the file order.
            ts = line.astype("datetime64[s]").astype("datetime64[us]")
        entity: list | str = self._column(cols, self.fmt.entity) if self.fmt.entity else ""
        group: list | str | None
        if self.group_rx is not None:
            # First match in the content is the session key (a line naming several keys counts for the first).
            which = 1 if self.group_rx.groups else 0
            search = self.group_rx.search
            group = [m.group(which) if (m := search(c)) else None for c in content]
        elif self.fmt.group and self.fmt.group.field:
            group = [v or None for v in self._column(cols, self.fmt.group.field)]
        else:
            group = self.path_group
        tag: list | str = ""
        if self.fmt.tag:
            normal = self.fmt.tag.normal
            tag = [("" if v == normal else v) for v in self._column(cols, self.fmt.tag.field)]
        chunk = ParsedChunk(line, ts, content, entity, group, tag)
        if keep is not None:
            chunk = take_rows(chunk, keep)
        bad.sort()
        return (chunk if len(chunk) else None), bad


def take_rows(chunk: ParsedChunk, keep: np.ndarray) -> ParsedChunk:
    """The rows of a chunk at the given positions (columns may be lists or Arrow arrays)."""
    where = pa.array(keep)

    def pick(v):
        return [v[i] for i in keep] if isinstance(v, list) else v.take(where) if isinstance(v, pa.Array) else v

    return ParsedChunk(chunk.line[keep], chunk.ts[keep], pick(chunk.content), pick(chunk.entity), pick(chunk.group),
                  pick(chunk.tag))


def path_group(path: str, fmt: LineFormat) -> str | None:
    """Session key taken from the file's path (relative to the dataset folder), when the format says so."""
    if not (fmt.group and fmt.group.path):
        return None
    m = re.search(fmt.group.path, path)
    return (m.group(1) if m.groups() else m.group(0)) if m else None
