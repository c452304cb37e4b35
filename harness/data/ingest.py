"""Ingest: stream log files through the line format and the template miner into a Parquet event table."""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from logtrial import __version__
from logtrial.data.mining import TemplateMiner, registry_miner
from logtrial.data.registry import LineFormat, Miner
from logtrial.errors import DataError

# Bump when the event-table layout or parsing rules change: old caches are then rebuilt.
TABLE_VERSION = 1
CHUNK_LINES = 200_000
QUARANTINE_TEXT_CHARS = 500

EVENT_SCHEMA = pa.schema(
    [
        ("line", pa.int64()),
        ("ts", pa.timestamp("us", tz="UTC")),
        ("entity", pa.string()),
        ("group", pa.string()),
        ("event", pa.int32()),
        ("tag", pa.string()),
    ]
)


@dataclass
class IngestResult:
    """Where an event table lives and what went into it."""

    folder: Path
    events: Path
    templates: Path
    manifest: dict
    cached: bool

    @property
    def quarantine(self) -> Path:
        """Path of the quarantine file (lines that failed the format)."""
        return self.folder / "quarantine.tsv"


@dataclass
class _Counters:
    lines: int = 0
    rows: int = 0
    quarantined: int = 0
    bad_encoding_lines: int = 0
    first_bad_encoding: list = field(default_factory=list)
    reasons: dict = field(default_factory=dict)


def file_sha256(path: Path, block: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file, streamed."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(block):
            h.update(chunk)
    return h.hexdigest()


def _relative_names(files: list[Path]) -> list[str]:
    """File paths relative to the folder that holds them all (what a path session key is read from)."""
    if len(files) == 1:
        return [files[0].name]
    root = Path(os.path.commonpath([str(p.resolve().parent) for p in files]))
    return [p.resolve().relative_to(root).as_posix() for p in files]


def cache_key(files: list[Path], fmt: LineFormat, miner: Miner) -> tuple[str, dict]:
    """Hash of everything an event table depends on: input bytes, format, miner settings, code version."""
    inputs = [{"file": rel, "size": p.stat().st_size, "sha256": file_sha256(p)}
              for p, rel in zip(files, _relative_names(files))]
    basis = {
        "inputs": inputs,
        "format": fmt.model_dump(mode="json"),
        "miner": miner.model_dump(mode="json"),
        "table_version": TABLE_VERSION,
        "code_version": __version__,
    }
    digest = hashlib.sha256(json.dumps(basis, sort_keys=True).encode()).hexdigest()
    return digest, basis


def _decoded_lines(path: Path, encoding: str, counters: _Counters, strict: bool) -> Iterator[list[str]]:
    """Yield chunks of decoded lines (without newlines); undecodable bytes are replaced and counted."""
    with open(path, "rb") as fh:
        lineno = counters.lines
        file_start = lineno
        first = True
        while True:
            raw = fh.readlines(1 << 24)
            if not raw:
                break
            if first and encoding.replace("-", "").replace("_", "").lower() in ("utf8", "utf8sig"):
                # A UTF-8 byte-order mark is not part of the first line.
                if raw[0].startswith(b"\xef\xbb\xbf"):
                    raw[0] = raw[0][3:]
            first = False
            blob = b"".join(raw)
            try:
                text = blob.decode(encoding)
                lines = text.split("\n")
                if lines and lines[-1] == "":
                    lines.pop()
            except UnicodeDecodeError:
                lines = []
                for i, b in enumerate(raw):
                    try:
                        s = b.decode(encoding)
                    except UnicodeDecodeError as exc:
                        if strict:
                            raise DataError(
                                f"{path}: line {lineno - file_start + i + 1}: byte {exc.start} is not valid {encoding} "
                                f"(expected {encoding} text; ingest without --strict to replace such bytes)"
                            ) from None
                        s = b.decode(encoding, errors="replace")
                        counters.bad_encoding_lines += 1
                        if len(counters.first_bad_encoding) < 5:
                            counters.first_bad_encoding.append(f"{path.name}:{lineno - file_start + i + 1}")
                    lines.append(s[:-1] if s.endswith("\n") else s)
            lines = [s[:-1] if s.endswith("\r") else s for s in lines]
            lineno += len(lines)
            yield lines


def _parse_timestamps(values: list[str], fmt: LineFormat) -> np.ndarray:
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
class _Chunk:
    """Parsed rows of one chunk of lines, column by column (plain lists and arrays, no pandas strings)."""

    line: np.ndarray
    ts: np.ndarray
    content: list
    entity: list | str
    group: list | str | None
    tag: list | str

    def __len__(self) -> int:
        return len(self.line)


class _LineParser:
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

    def parse(self, lines: list[str], first_line: int) -> tuple[_Chunk | None, list[tuple[int, str, str]]]:
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
            ts = _parse_timestamps(joined, self.fmt)
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
        chunk = _Chunk(line, ts, content, entity, group, tag)
        if keep is not None:
            chunk = _take(chunk, keep)
        bad.sort()
        return (chunk if len(chunk) else None), bad


def _take(chunk: _Chunk, keep: np.ndarray) -> _Chunk:
    """The rows of a chunk at the given positions."""
    pick = (lambda v: [v[i] for i in keep] if isinstance(v, list) else v)  # noqa: E731
    return _Chunk(chunk.line[keep], chunk.ts[keep], pick(chunk.content), pick(chunk.entity), pick(chunk.group),
                  pick(chunk.tag))


def _path_group(path: str, fmt: LineFormat) -> str | None:
    """Session key taken from the file's path (relative to the dataset folder), when the format says so."""
    if not (fmt.group and fmt.group.path):
        return None
    m = re.search(fmt.group.path, path)
    return (m.group(1) if m.groups() else m.group(0)) if m else None


def ingest_files(
    name: str,
    files: list[Path],
    fmt: LineFormat,
    miner_settings: Miner,
    out_root: Path,
    *,
    force: bool = False,
    strict: bool = False,
    progress: bool = False,
    miner: TemplateMiner | None = None,
) -> IngestResult:
    """Build (or reuse) the event table, template dictionary and manifest for the given log files."""
    files = [Path(f) for f in files]
    for f in files:
        if not f.is_file():
            raise DataError(f"{f}: log file not found")
    empty = [f for f in files if f.stat().st_size == 0]
    if len(empty) == len(files):
        raise DataError(f"{empty[0]}: file is empty (expected log lines)")
    files = [f for f in files if f not in empty]
    key, basis = cache_key(files, fmt, miner_settings)
    basis["empty_files"] = [f.name for f in empty]
    folder = Path(out_root) / name / key[:16]
    manifest_path = folder / "manifest.json"
    if not force and manifest_path.is_file():
        manifest = json.loads(manifest_path.read_text())
        if manifest.get("key") == key:
            if strict and manifest.get("bad_encoding_lines"):
                first = ", ".join(str(x) for x in manifest.get("first_bad_encoding_lines") or [])
                raise DataError(f"{files[0].parent}: {manifest['bad_encoding_lines']} line(s) are not valid "
                                f"{fmt.encoding} (first: {first}); expected {fmt.encoding} text "
                                "(ingest without --strict to replace such bytes)")
            return IngestResult(folder, folder / "events.parquet", folder / "templates.csv", manifest, cached=True)

    miner = miner or registry_miner(miner_settings.model_dump())
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{key[:16]}.tmp-", dir=folder.parent))
    try:
        counters = _Counters()
        _write_table(files, fmt, miner, tmp, counters, strict, progress)
        if counters.rows == 0:
            first = next(iter(counters.reasons), "no lines")
            raise DataError(
                f"{files[0]}: no line matched the format ({counters.quarantined} quarantined; first reason: {first}); "
                "expected at least one line with the format's fields"
            )
        templates = pd.DataFrame(
            {"event": np.arange(len(miner.templates()), dtype=np.int32), "template": miner.templates(),
             "count": np.asarray(miner.counts(), dtype=np.int64)}
        )
        templates.to_csv(tmp / "templates.csv", index=False)
        manifest = {
            "key": key,
            "dataset": name,
            **basis,
            "rows": counters.rows,
            "lines": counters.lines,
            "quarantined": counters.quarantined,
            "quarantine_reasons": counters.reasons,
            "bad_encoding_lines": counters.bad_encoding_lines,
            "first_bad_encoding_lines": counters.first_bad_encoding,
            "templates": len(templates),
            "mined_lines": counters.rows,
        }
        (tmp / "manifest.json").write_text(json.dumps(manifest, indent=2, sort_keys=True))
        if folder.exists() and not force and (folder / "manifest.json").is_file():
            # Another process finished the same table meanwhile: keep theirs (identical inputs and settings).
            shutil.rmtree(tmp, ignore_errors=True)
            manifest = json.loads((folder / "manifest.json").read_text())
            return IngestResult(folder, folder / "events.parquet", folder / "templates.csv", manifest, cached=True)
        if folder.exists():
            shutil.rmtree(folder)
        os.replace(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return IngestResult(folder, folder / "events.parquet", folder / "templates.csv", manifest, cached=False)


def _write_table(
    files: list[Path], fmt: LineFormat, miner: TemplateMiner, out: Path, counters: _Counters, strict: bool,
    progress: bool,
) -> None:
    """Stream all files chunk by chunk into events.parquet and quarantine.tsv inside ``out``."""
    from tqdm import tqdm

    total = sum(f.stat().st_size for f in files)
    bar = tqdm(total=total, unit="B", unit_scale=True, desc="ingest", disable=not progress, file=sys.stderr)
    writer = pq.ParquetWriter(out / "events.parquet", EVENT_SCHEMA, compression="zstd")
    with open(out / "quarantine.tsv", "w", encoding="utf-8") as qf:
        # `line` counts across all files (the event table's numbering); `file_line` within `file`.
        qf.write("line\tfile\tfile_line\treason\ttext\n")
        try:
            for path, rel in zip(files, _relative_names(files)):
                parser = _LineParser(fmt, _path_group(rel, fmt))
                file_start = counters.lines
                for lines in _decoded_lines(path, fmt.encoding, counters, strict):
                    first = counters.lines + 1
                    counters.lines += len(lines)
                    chunk, bad = parser.parse(lines, first)
                    for ln, reason, text in bad:
                        kind = "timestamp does not parse" if reason.startswith("timestamp") else reason
                        counters.reasons[kind] = counters.reasons.get(kind, 0) + 1
                        clean = text[:QUARANTINE_TEXT_CHARS].replace("\t", " ")
                        qf.write(f"{ln}\t{rel}\t{ln - file_start}\t{reason}\t{clean}\n")
                    counters.quarantined += len(bad)
                    if chunk is not None:
                        events = np.asarray(miner.add_many(chunk.content), dtype=np.int32)
                        writer.write_table(_arrow_chunk(chunk, events))
                        counters.rows += len(chunk)
                    bar.update(sum(len(s) + 1 for s in lines))
        finally:
            writer.close()
            bar.close()


def _arrow_chunk(chunk: _Chunk, events: np.ndarray) -> pa.Table:
    """One chunk of the event table as Arrow, in the table's schema."""
    n = len(chunk)

    def text(v: list | str | None) -> pa.Array:
        return pa.array(v, type=pa.string()) if isinstance(v, list) else pa.nulls(n, pa.string()).fill_null(v) \
            if v is not None else pa.nulls(n, pa.string())

    cols = [
        pa.array(chunk.line),
        pa.array(chunk.ts, type=pa.timestamp("us")).cast(pa.timestamp("us", tz="UTC")),
        text(chunk.entity),
        text(chunk.group),
        pa.array(events, type=pa.int32()),
        text(chunk.tag),
    ]
    return pa.Table.from_arrays(cols, schema=EVENT_SCHEMA)


def read_events(path: Path) -> pd.DataFrame:
    """Load an event table written by ingest."""
    return pq.read_table(path).to_pandas()


def dataset_folder(entry, home: Path, mirror: Path | None = None, progress: bool = False) -> Path:
    """The local folder holding an entry's files, acquiring (or generating) them first when needed."""
    if entry.generator is not None:
        from logtrial.simulation.simulate import ensure_generated, load_scenario

        return ensure_generated(load_scenario(entry.generator), home / "generated", progress=progress)
    from logtrial.data.acquire import fetch

    return fetch(entry, home=home, mirror=mirror, progress=progress).path


def entry_files(entry, home: Path, mirror: Path | None = None, progress: bool = False) -> list[Path]:
    """Local paths of an entry's log files, acquiring (or generating) them first when needed."""
    from logtrial.data.acquire import log_files

    return log_files(entry, dataset_folder(entry, home, mirror, progress))


def ingest_entry(entry, home: Path, mirror: Path | None = None, **kwargs) -> IngestResult:
    """Acquire (if needed) and ingest a registry entry into ``home/tables``."""
    files = entry_files(entry, home, mirror, progress=kwargs.get("progress", False))
    return ingest_files(entry.name, files, entry.format, entry.miner, home / "tables", **kwargs)
