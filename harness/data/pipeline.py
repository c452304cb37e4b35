"""Pipeline: parse and mask line-aligned byte ranges in worker processes, handing results back in file order."""

from __future__ import annotations

import multiprocessing as mp
import os
from collections import deque
from concurrent.futures import Future, ProcessPoolExecutor
from dataclasses import dataclass, field
from itertools import islice
from typing import Callable, Generator, Iterable, TypeVar

import numpy as np
import pyarrow as pa
from logtrial.data.header import ParsedChunk
from logtrial.data.header_columns import ColumnParser
from logtrial.data.lines import ByteRange, decode_range
from logtrial.data.masking import mask_contents
from logtrial.data.registry import LineFormat
from logtrial.data.shape_keys import TokenColumn, tokenise_column

J = TypeVar("J")
R = TypeVar("R")


@dataclass(frozen=True)
class RangeJob:
    """One byte range to parse: the format, the file's path session key, and the masks to apply (None: none)."""

    rng: ByteRange
    fmt: LineFormat
    path_group: str | None
    strict: bool
    masks: tuple[str, ...] | None
    delimiters: tuple[str, ...] | None = None  # set: also split the masked contents into tokens (`tokenise_column`)


@dataclass
class RangeResult:
    """A parsed range; line numbers (rows and rejects) count from 1 within the range."""

    n_lines: int
    n_bytes: int
    chunk: ParsedChunk | None
    rejects: list[tuple[int, str, str]] = field(default_factory=list)
    bad_lines: list[int] = field(default_factory=list)
    strict_error: tuple[int, int] | None = None
    masked: bool = False
    matched: np.ndarray | None = None  # template ids against frozen templates (-1: none), distributed ingest only
    tokens: TokenColumn | None = None  # the masked contents as tokens, when the job asked for them


def parse_range(job: RangeJob) -> RangeResult:
    """Decode, split and (when asked) mask one byte range."""
    decoded = decode_range(job.rng, job.fmt.encoding, job.strict, column=True)
    if decoded.strict_error is not None:
        return RangeResult(0, job.rng.size, None, strict_error=decoded.strict_error)
    chunk, rejects = ColumnParser(job.fmt, job.path_group).parse(decoded.lines, 1)
    masked = job.masks is not None
    tokens = None
    if chunk is not None and masked:
        chunk.content = mask_contents(chunk.content, job.masks)
        if job.delimiters is not None and isinstance(chunk.content, pa.Array):
            tokens = tokenise_column(chunk.content, job.delimiters)
            chunk.content = None  # the tokens carry it (less to send back)
    return RangeResult(len(decoded.lines), job.rng.size, chunk, rejects, decoded.bad_lines, masked=masked,
                       tokens=tokens)


def default_workers() -> int:
    """Worker processes by default: the cores this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not every platform has affinity masks
        return max(1, os.cpu_count() or 1)


def ordered_map(fn: Callable[[J], R], jobs: Iterable[J], workers: int, ahead: int = 2) -> Generator[R, None, None]:
    """fn over jobs, in order; with workers > 1 in that many processes, at most ``ahead`` jobs per worker in flight.

    The bound keeps memory flat when the consumer (the miner) is slower than the workers.
    """
    if workers <= 1 or mp.current_process().daemon:  # a daemonic process (e.g. a Dask worker) may not fork
        for job in jobs:
            yield fn(job)
        return
    # fork where there is one: workers start at once and never re-import the caller's main module
    method = "fork" if "fork" in mp.get_all_start_methods() else "spawn"
    pool = ProcessPoolExecutor(workers, mp_context=mp.get_context(method))
    try:
        it = iter(jobs)
        pending: deque[Future] = deque(pool.submit(fn, j) for j in islice(it, workers * ahead))
        while pending:
            result = pending.popleft().result()
            for j in islice(it, 1):
                pending.append(pool.submit(fn, j))
            yield result
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
