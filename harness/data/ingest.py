"""Ingest: stream log files through the line format and the template miner into a Parquet event table."""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import socket
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Generator, Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from logtrial import __version__
from logtrial.data.distributed import LEARN_SHARE, dask_map, learn_count
from logtrial.data.header import ParsedChunk, _strptime, path_group, stands_alone  # noqa: F401  (_strptime: tests)
from logtrial.data.lines import RANGE_BYTES, byte_ranges
from logtrial.data.mining import DrainMiner, TemplateMiner, registry_miner
from logtrial.data.pipeline import RangeJob, RangeResult, default_workers, ordered_map, parse_range
from logtrial.data.registry import LineFormat, Miner
from logtrial.errors import ConfigError, DataError

# Bump when the event-table layout or parsing rules change: old caches are then rebuilt.
TABLE_VERSION = 1
QUARANTINE_TEXT_CHARS = 500
# Caps on rejected lines (a decompression bomb or a wrong format must not fill the disk).
MAX_REJECTED_SHARE = 0.5  # of all lines, checked from SHARE_FROM_LINES lines on and at the end (common practice)
SHARE_FROM_LINES = 10_000
MAX_QUARANTINE_BYTES = 256 * 2**20
SMALL_RANGE_BYTES = 1 << 23  # 8 MiB: measured a little faster than 4 and 16 MiB on 2 cores (bench/ingest.py)
ROW_GROUP_ROWS = 1 << 18
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,127}")
_TMP_MARK = ".tmp-"
_OWNER = "owner.json"

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
    events: list = field(default_factory=list)  # template ids per chunk (distributed ingest counts from them)


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


def cache_key(files: list[Path], fmt: LineFormat, miner: Miner, engine: str = "local") -> tuple[str, dict]:
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
    if engine == "dask":  # two-pass mining: a table of its own (sequential tables keep their keys)
        basis["engine"] = {"kind": "dask", "learn_share": LEARN_SHARE}
    digest = hashlib.sha256(json.dumps(basis, sort_keys=True).encode()).hexdigest()
    return digest, basis


def check_name(name: str) -> str:
    """A dataset name that stays one folder inside the data home; ConfigError otherwise."""
    if not isinstance(name, str) or not _NAME.fullmatch(name):
        raise ConfigError(
            f"dataset name {name!r}: expected letters, digits, '.', '_' or '-' (starting with a letter or digit, "
            "at most 128 characters); a name must not hold a path"
        )
    return name


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
    workers: int | None = None,
    max_rejected_share: float = MAX_REJECTED_SHARE,
    max_quarantine_bytes: int = MAX_QUARANTINE_BYTES,
    range_bytes: int | None = None,
    engine: str = "local",
    scheduler: str | None = None,
) -> IngestResult:
    """Build (or reuse) the event table, template dictionary and manifest for the given log files.

    ``engine="dask"`` mines in two passes on a Dask cluster (see logtrial.data.distributed):
    template ids may differ slightly from sequential Drain, so such tables are cached apart.
    """
    check_name(name)
    if not 0.0 <= max_rejected_share <= 1.0:
        raise ConfigError(f"max_rejected_share: expected a share between 0 and 1, got {max_rejected_share!r}")
    if max_quarantine_bytes < 0:
        raise ConfigError(f"max_quarantine_bytes: expected a size of at least 0, got {max_quarantine_bytes!r}")
    files = [Path(f) for f in files]
    for f in files:
        if not f.is_file():
            raise DataError(f"{f}: log file not found")
    empty = [f for f in files if f.stat().st_size == 0]
    if len(empty) == len(files):
        raise DataError(f"{empty[0]}: file is empty (expected log lines)")
    files = [f for f in files if f not in empty]
    if engine not in ("local", "dask"):
        raise ConfigError(f"engine: expected 'local' or 'dask', got {engine!r}")
    if engine == "dask" and miner is not None and not isinstance(miner, DrainMiner):
        raise ConfigError("engine dask: needs the built-in drain miner (templates are matched on the cluster)")
    key, basis = cache_key(files, fmt, miner_settings, engine)
    basis["empty_files"] = [f.name for f in empty]
    out_root = Path(out_root)
    folder = out_root / name / key[:16]
    if not folder.resolve().is_relative_to(out_root.resolve()):
        raise ConfigError(f"dataset name {name!r}: the table folder {folder} would lie outside {out_root}")
    clean_stale_temporaries(out_root)
    manifest_path = folder / "manifest.json"
    if not force and manifest_path.is_file():
        manifest = json.loads(manifest_path.read_text())
        if manifest.get("key") == key:
            broken = cache_damage(folder, manifest)
            if broken is None:
                if strict and manifest.get("bad_encoding_lines"):
                    first = ", ".join(str(x) for x in manifest.get("first_bad_encoding_lines") or [])
                    raise DataError(f"{files[0].parent}: {manifest['bad_encoding_lines']} line(s) are not valid "
                                    f"{fmt.encoding} (first: {first}); expected {fmt.encoding} text "
                                    "(ingest without --strict to replace such bytes)")
                return IngestResult(folder, folder / "events.parquet", folder / "templates.csv", manifest, cached=True)
            print(f"{folder}: cached event table is damaged ({broken}); rebuilding it", file=sys.stderr)

    miner = miner or registry_miner(miner_settings.model_dump())
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{key[:16]}{_TMP_MARK}", dir=folder.parent))
    try:
        (tmp / _OWNER).write_text(json.dumps({"pid": os.getpid(), "host": socket.gethostname()}))
        counters = _Counters()
        caps = _Caps(max_rejected_share, max_quarantine_bytes)
        _write_table(files, fmt, miner, tmp, counters, strict, progress, caps,
                     default_workers() if workers is None else max(1, int(workers)),
                     range_bytes or default_range_bytes(fmt), engine, scheduler)
        if counters.rows == 0:
            first = next(iter(counters.reasons), "no lines")
            raise DataError(
                f"{files[0]}: no line matched the format ({counters.quarantined} quarantined; first reason: {first}); "
                "expected at least one line with the format's fields"
            )
        caps.check_share(files[0], counters, final=True)
        n_templates = len(miner.templates())
        counts = (np.bincount(np.concatenate(counters.events), minlength=n_templates) if engine == "dask"
                  else np.asarray(miner.counts(), dtype=np.int64))
        templates = pd.DataFrame(
            {"event": np.arange(n_templates, dtype=np.int32), "template": miner.templates(),
             "count": np.asarray(counts, dtype=np.int64)}
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
        (tmp / _OWNER).unlink()
        if folder.exists() and not force and (folder / "manifest.json").is_file():
            theirs = json.loads((folder / "manifest.json").read_text())
            if theirs.get("key") == key and cache_damage(folder, theirs) is None:
                # Another process finished the same table meanwhile: keep theirs (identical inputs and settings).
                shutil.rmtree(tmp, ignore_errors=True)
                return IngestResult(folder, folder / "events.parquet", folder / "templates.csv", theirs, cached=True)
        if folder.exists():
            shutil.rmtree(folder)
        os.replace(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return IngestResult(folder, folder / "events.parquet", folder / "templates.csv", manifest, cached=False)


def default_range_bytes(fmt: LineFormat) -> int:
    """Bytes per parsed range: small enough to keep workers busy, unless local times are inferred per chunk.

    Local wall-clock times in a zone with clock changes are told apart by their order within
    one chunk, so such formats keep the chunks ingest always used (RANGE_BYTES); for every
    other format the cut changes nothing in the output.
    """
    if stands_alone(fmt):
        return SMALL_RANGE_BYTES
    return RANGE_BYTES


def cache_damage(folder: Path, manifest: dict) -> str | None:
    """Why a cached table cannot be reused (unreadable Parquet footer, row count unlike the manifest's, a
    missing file), or None when it is intact."""
    for name in ("events.parquet", "templates.csv", "quarantine.tsv"):
        if not (folder / name).is_file():
            return f"{name} is missing"
    try:
        rows = pq.read_metadata(folder / "events.parquet").num_rows
    except (OSError, pa.ArrowException) as exc:
        return f"events.parquet is unreadable: {str(exc).splitlines()[0][:200]}"
    if rows != manifest.get("rows"):
        return f"events.parquet holds {rows} rows, the manifest says {manifest.get('rows')}"
    return None


def clean_stale_temporaries(out_root: Path) -> list[Path]:
    """Remove temporary table folders left by ingests that were killed (their process is gone); return them."""
    removed: list[Path] = []
    if not Path(out_root).is_dir():
        return removed
    host = socket.gethostname()
    for tmp in Path(out_root).glob(f"*/.*{_TMP_MARK}*"):
        if not tmp.is_dir():
            continue
        try:
            owner = json.loads((tmp / _OWNER).read_text())
            alive = owner.get("host") != host or pid_alive(int(owner["pid"]))
        except (OSError, ValueError, KeyError, TypeError):
            # No readable owner: only a folder older than a minute (the owner is written right after creation).
            alive = time.time() - tmp.stat().st_mtime < 60
        if alive:
            continue
        size = sum(p.stat().st_size for p in tmp.rglob("*") if p.is_file())
        shutil.rmtree(tmp, ignore_errors=True)
        print(f"removed {tmp} ({size / 2**20:.1f} MiB), left by an ingest that was stopped", file=sys.stderr)
        removed.append(tmp)
    return removed


def pid_alive(pid: int) -> bool:
    """Tell whether a process with this id runs on this machine."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@dataclass
class _Caps:
    """Limits on rejected lines: a share of all lines, and the size of the quarantine file."""

    share: float
    quarantine_bytes: int

    def check_share(self, path: Path, counters: _Counters, final: bool = False) -> None:
        """Stop when too many lines were rejected (checked after SHARE_FROM_LINES lines, and at the end)."""
        if counters.lines == 0 or (not final and counters.lines < SHARE_FROM_LINES):
            return
        share = counters.quarantined / counters.lines
        if share > self.share:
            first = next(iter(counters.reasons), "")
            raise DataError(
                f"{path}: ingest stopped: {counters.quarantined:,} of {counters.lines:,} lines ({share:.1%}) were "
                f"rejected ({first}), more than the cap of {self.share:.0%}; expected lines in the format's shape "
                "(check the format, or raise --max-rejected-share)"
            )

    def check_size(self, path: Path, counters: _Counters, written: int) -> None:
        """Stop when the quarantine file grows past its cap."""
        if written > self.quarantine_bytes:
            raise DataError(
                f"{path}: ingest stopped: the quarantine file passed {self.quarantine_bytes / 2**20:,.0f} MiB after "
                f"{counters.lines:,} lines ({counters.quarantined:,} rejected); expected mostly well-formed lines "
                "(check the input, or raise --max-quarantine-mb)"
            )


def _write_table(
    files: list[Path], fmt: LineFormat, miner: TemplateMiner, out: Path, counters: _Counters, strict: bool,
    progress: bool, caps: _Caps, workers: int, range_bytes: int, engine: str = "local", scheduler: str | None = None,
) -> None:
    """Stream all files range by range into events.parquet and quarantine.tsv inside ``out``.

    Workers parse (and, for our Drain miner, mask) line-aligned byte ranges; this process
    takes their results in file order, numbers the lines, mines templates and writes.
    """
    from tqdm import tqdm

    total = sum(f.stat().st_size for f in files)
    bar = tqdm(total=total, unit="B", unit_scale=True, desc="ingest", disable=not progress, file=sys.stderr)
    masks = tuple(miner.mask_patterns()) if isinstance(miner, DrainMiner) else None
    names = _relative_names(files)
    plan = [(path, rel, byte_ranges(path, range_bytes)) for path, rel in zip(files, names)]
    if sum(len(r) for _, _, r in plan) < 2:
        workers = 1  # one range: nothing to run side by side
    # the local engine also splits the masked contents into tokens in the workers (the miner keys lines by them)
    delimiters = tuple(miner.delimiters()) if masks is not None and engine != "dask" else None
    jobs = [RangeJob(rng, fmt, path_group(rel, fmt), strict, masks, delimiters)
            for path, rel, ranges in plan for rng in ranges]
    owners = [(path, rel, i == 0) for path, rel, ranges in plan for i in range(len(ranges))]
    if engine == "dask":
        if masks is None:
            raise ConfigError("engine dask: needs the built-in drain miner (templates are matched on the cluster)")
        learn = learn_count(len(jobs))

        def staged() -> Generator[RangeResult, None, None]:
            yield from ordered_map(parse_range, jobs[:learn], 1)
            # the learnt templates are frozen only now: every learn range has been mined by the loop below
            yield from dask_map(jobs[learn:], miner.frozen_copy(), scheduler, workers)

        results: Generator[RangeResult, None, None] = staged()
    else:
        results = ordered_map(parse_range, jobs, workers)
    writer = _EventWriter(out / "events.parquet")
    written = 0
    with open(out / "quarantine.tsv", "w", encoding="utf-8") as qf:
        # `line` counts across all files (the event table's numbering); `file_line` within `file`.
        qf.write("line\tfile\tfile_line\treason\ttext\n")
        try:
            file_start = 0
            for (path, rel, first_of_file), res in zip(owners, results):
                if first_of_file:
                    file_start = counters.lines
                offset = counters.lines  # lines before this range
                if res.strict_error is not None:
                    at, byte = res.strict_error
                    raise DataError(
                        f"{path}: line {offset - file_start + at}: byte {byte} is not valid {fmt.encoding} "
                        f"(expected {fmt.encoding} text; ingest without --strict to replace such bytes)"
                    )
                for at in res.bad_lines:
                    counters.bad_encoding_lines += 1
                    if len(counters.first_bad_encoding) < 5:
                        counters.first_bad_encoding.append(f"{path.name}:{offset - file_start + at}")
                counters.lines += res.n_lines
                for rel_ln, reason, text in res.rejects:
                    ln = offset + rel_ln
                    kind = "timestamp does not parse" if reason.startswith("timestamp") else reason
                    counters.reasons[kind] = counters.reasons.get(kind, 0) + 1
                    clean = text[:QUARANTINE_TEXT_CHARS].replace("\t", " ")
                    row = f"{ln}\t{rel}\t{ln - file_start}\t{reason}\t{clean}\n"
                    qf.write(row)
                    written += len(row)
                counters.quarantined += len(res.rejects)
                caps.check_size(path, counters, written)
                caps.check_share(path, counters)
                chunk = res.chunk
                if chunk is not None:
                    chunk.line += offset
                    contents = chunk.content
                    if res.matched is not None:
                        events = res.matched.astype(np.int32, copy=True)
                        residue = np.flatnonzero(events < 0)
                        if len(residue):
                            events[residue] = miner.add_many_masked(_take(contents, residue))
                    elif res.masked:
                        events = np.asarray(miner.add_many_masked(contents, res.tokens), dtype=np.int32)
                    else:
                        plain = contents.to_pylist() if isinstance(contents, pa.Array) else contents
                        events = np.asarray(miner.add_many(plain), dtype=np.int32)
                    writer.write_table(_arrow_chunk(chunk, events))
                    if engine == "dask":
                        counters.events.append(events)
                    counters.rows += len(chunk)
                bar.update(res.n_bytes)
        finally:
            results.close()  # on an error, stop the worker pool (or cluster) now, not when the frame is collected
            writer.close()
            bar.close()


class _EventWriter:
    """Writes the event table in row groups of at least ROW_GROUP_ROWS rows (few, large groups write faster)."""

    def __init__(self, path: Path):
        # dictionaries only where values repeat a lot (session keys and line numbers rarely do)
        self._writer = pq.ParquetWriter(path, EVENT_SCHEMA, compression="zstd",
                                        use_dictionary=["entity", "event", "tag"])
        self._held: list[pa.Table] = []
        self._rows = 0

    def write_table(self, table: pa.Table) -> None:
        """Add rows; write a row group once enough are held."""
        self._held.append(table)
        self._rows += table.num_rows
        if self._rows >= ROW_GROUP_ROWS:
            self._flush()

    def _flush(self) -> None:
        if self._held:
            self._writer.write_table(pa.concat_tables(self._held), row_group_size=max(self._rows, 1))
        self._held, self._rows = [], 0

    def close(self) -> None:
        """Write what is held and close the file."""
        try:
            self._flush()
        finally:
            self._writer.close()


def _take(contents: pa.Array | list[str], rows: np.ndarray) -> pa.Array | list[str]:
    """The contents at the given rows."""
    if isinstance(contents, pa.Array):
        return contents.take(pa.array(rows))
    return [contents[i] for i in rows.tolist()]


def _arrow_chunk(chunk: ParsedChunk, events: np.ndarray) -> pa.Table:
    """One chunk of the event table as Arrow, in the table's schema."""
    n = len(chunk)

    def text(v: list | pa.Array | str | None) -> pa.Array:
        if isinstance(v, pa.Array):
            return v
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


def read_events(path: Path, columns: list[str] | None = None, categories: Sequence[str] = ()) -> pd.DataFrame:
    """Load an event table written by ingest (all columns, or the given ones; ``categories`` as pandas categoricals)."""
    table = pq.read_table(path, columns=columns, read_dictionary=list(categories) or None)
    # Arrow's buffers are freed column by column as pandas takes them over, and handed back to the system
    frame = table.to_pandas(self_destruct=True, split_blocks=True)
    del table
    pa.default_memory_pool().release_unused()
    return frame


TEXT_COLUMNS = ["entity", "group", "tag"]  # few distinct values each: read as categoricals, a code per event


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
