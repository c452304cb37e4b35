"""Distributed ingest: parse, mask and match byte ranges on a Dask cluster against templates learnt first.

Two passes (measured against sequential Drain in bench/two_pass.py; DEVELOPERS.md gives
the figures): the first ranges of the log (LEARN_SHARE of them, at least one) are mined
sequentially here; the rest are parsed, masked and matched to the frozen templates on
the cluster, one task per range; lines that match no frozen template are mined here,
in file order, continuing from the learnt state.
"""

from __future__ import annotations

import logging
import math
from collections import deque
from itertools import islice
from typing import Iterator, Sequence

from logtrial.data.mining import DrainMiner
from logtrial.data.pipeline import RangeJob, RangeResult, parse_range
from logtrial.errors import ConfigError

LEARN_SHARE = 0.1
CONNECT_TIMEOUT = "20s"


def learn_count(n_ranges: int) -> int:
    """How many leading ranges the first pass learns on."""
    return max(1, math.ceil(LEARN_SHARE * n_ranges))


def match_range(job: RangeJob, frozen: DrainMiner) -> RangeResult:
    """Parse and mask one range, then match its contents to the frozen templates (-1: none)."""
    res = parse_range(job)
    if res.chunk is not None:
        res.matched = frozen.match_masked_many(res.chunk.content.to_pylist()
                                               if hasattr(res.chunk.content, "to_pylist") else res.chunk.content)
    return res


def dask_map(jobs: Sequence[RangeJob], frozen: DrainMiner, scheduler: str | None, workers: int,
             ahead: int = 2) -> Iterator[RangeResult]:
    """match_range over the jobs on a Dask cluster (the one at ``scheduler``, else a local one), results in order."""
    if not jobs:
        return
    from distributed import Client, LocalCluster

    cluster = None
    if scheduler is None:
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address="127.0.0.1:0", silence_logs=logging.ERROR)
        client = Client(cluster, set_as_default=False)
    else:
        try:
            client = Client(scheduler, set_as_default=False, timeout=CONNECT_TIMEOUT)
        except (OSError, TimeoutError) as exc:
            raise ConfigError(f"--scheduler: cannot reach a Dask scheduler at {scheduler!r}: {exc}") from None
    try:
        shared = client.scatter(frozen, broadcast=True)
        it = iter(jobs)
        window = max(1, workers) * ahead
        pending = deque(client.submit(match_range, j, shared, pure=False) for j in islice(it, window))
        while pending:
            result = pending.popleft().result()
            for j in islice(it, 1):
                pending.append(client.submit(match_range, j, shared, pure=False))
            yield result
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
