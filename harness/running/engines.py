"""Engines: where an experiment's fit groups run. One small interface, two engines.

An engine turns fit groups into ``(record, scores)`` pairs, one per run config, as they
finish: ``LocalEngine`` runs them in local worker processes, one per core by default (with
one worker, in this process in order); ``DaskEngine`` sends them to a Dask cluster, each
worker reading data from a shared home. All give the same figures: a fit group depends only
on its own configs, and every worker process uses one numeric thread (torch, BLAS, OpenMP),
so processes do not fight over the cores.

A unit of work is one fit group (runs that share windows and fitted models). Its task payload is
small and JSON-able: where the experiment comes from (file path or raw mapping), the run ids of the
group, the data home and the mirror. Workers load the experiment themselves, keep one ``Runner``
per experiment and home in each worker process (so groups on the same worker share datasets), and
return the group's records with their score tables. Event tables are never shipped in payloads.

The data home must be visible to every worker:

* a plain path or a ``file://`` URL of a folder that all workers see (local disk for a local
  cluster, a network file system for a remote one) is used in place;
* any other fsspec URL (``s3://bucket/logtrial-home``, ``gs://...``, ``memory://...``) is an
  object store holding a copy of a data home (for example a folder where ``logtrial ingest`` has
  run, copied up as is; the store's own fsspec driver must be installed on the workers). Each worker
  copies a snapshot of it once to its local disk (``LOGTRIAL_WORKER_CACHE``, default the system
  temporary folder) and reads from there; a table missing from the store is built on the worker
  from the same inputs, which gives the same numbers because ingest is deterministic.

Before submitting, the client acquires and ingests every dataset of the grid once into a local or
``file://`` home, so workers reuse the tables instead of building them side by side.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
import sys
import tempfile
import threading
import time
import uuid
from collections import OrderedDict
from pathlib import Path
from typing import Iterator, Protocol
from urllib.parse import unquote, urlparse

import pandas as pd
from logtrial.errors import ConfigError, LogtrialError
from logtrial.running.experiment import Experiment, RunConfig, describe_failure, load_experiment
from logtrial.running.runner import Runner

TASK_RETRIES = 2
CONNECT_TIMEOUT = "30s"
RUNNER_CACHE_SIZE = 4
_RUNNERS: OrderedDict[str, object] = OrderedDict()
_RUNNERS_LOCK = threading.Lock()


Results = Iterator[tuple[dict, pd.DataFrame | None]]


class Engine(Protocol):
    """Runs fit groups and yields each run's record with its score table, as they finish."""

    name: str

    def results(self, experiment: Experiment, groups: list[list[RunConfig]], home: str | Path, *,
                mirror: Path | None = None, progress: bool = True) -> Results:
        """(record, scores) per run config of the groups."""
        ...


class LocalEngine:
    """Fit groups in ``workers`` local processes (default: one per core); with one worker, in this process."""

    name = "local"

    def __init__(self, workers: int | None = None) -> None:
        self.workers = workers

    def results(self, experiment: Experiment, groups: list[list[RunConfig]], home: str | Path, *,
                mirror: Path | None = None, progress: bool = True) -> Results:
        """(record, scores) per run config, in group order with one worker, else as groups finish."""
        n = min(self.workers or default_workers(), max(len(groups), 1))
        total = sum(len(g) for g in groups)
        if n <= 1:
            return _with_progress(_sequential(experiment, groups, home, mirror, progress), total, progress,
                                  "1 process")
        return _with_progress(_parallel(experiment, groups, home, mirror, progress, n), total, progress,
                              f"{n} processes")


WORKERS_ENV = "LOGTRIAL_WORKERS"


def default_workers() -> int:
    """Worker processes of the local engine by default: $LOGTRIAL_WORKERS, else the cores this process may use."""
    raw = os.environ.get(WORKERS_ENV, "").strip()
    if raw:
        if not raw.isdigit() or int(raw) < 1:
            raise ConfigError(f"environment variable {WORKERS_ENV}: expected a whole number >= 1, got {raw!r}")
        return int(raw)
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def pin_threads(n: int = 1) -> None:
    """Limit numeric libraries in this process to ``n`` threads (torch, BLAS and OpenMP pools)."""
    for var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS", "LOGTRIAL_TORCH_THREADS"):
        os.environ[var] = str(n)
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(n)
    except ImportError:
        pass
    import torch

    torch.set_num_threads(n)


def _sequential(experiment: Experiment, groups: list[list[RunConfig]], home: str | Path,
                mirror: Path | None, progress: bool) -> Results:
    """Every group in this process, one after the other, sharing one Runner."""
    pin_threads(1)
    runner = Runner(experiment, home, progress=progress, mirror=mirror)
    for group in groups:
        yield from runner.execute_group(group)


def _local_worker_start() -> None:
    """Initialiser of a local worker process: one numeric thread, no console logging from libraries."""
    pin_threads(1)
    logging.getLogger("mlflow").setLevel(logging.WARNING)
    logging.getLogger("alembic").setLevel(logging.WARNING)


def _parallel(experiment: Experiment, groups: list[list[RunConfig]], home: str | Path, mirror: Path | None,
              progress: bool, n: int) -> Results:
    """Groups as tasks of a pool of ``n`` fresh worker processes; (record, scores) as groups finish."""
    import multiprocessing as mp
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    ingest_once(experiment, groups, home, mirror, progress)
    # Fresh interpreters (spawn): no torch or BLAS thread pools inherited half-initialised from this one.
    with ProcessPoolExecutor(max_workers=n, mp_context=mp.get_context("spawn"),
                             initializer=_local_worker_start) as pool:
        pending = {pool.submit(run_group, group_payload(experiment, g, home, mirror)): g for g in groups}
        while pending:
            done, _ = wait(pending, timeout=HEARTBEAT_S, return_when=FIRST_COMPLETED)
            if not done:
                yield None  # a heartbeat: nothing finished yet
                continue
            for fut in done:
                group = pending.pop(fut)
                try:
                    pairs = fut.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker fails its runs; the grid goes on
                    pairs = _failed_records(experiment, group, exc, "local worker failed")
                yield from pairs


HEARTBEAT_S = 30.0


def _clock(seconds: float) -> str:
    """Seconds as 1h02m, 3m05s or 12s."""
    s = int(round(seconds))
    if s >= 3600:
        return f"{s // 3600}h{s % 3600 // 60:02d}m"
    if s >= 60:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s}s"


def _with_progress(items, total: int, progress: bool, where: str) -> Results:
    """Pass (record, scores) pairs through, printing grid progress with an ETA; ``None`` items are heartbeats.

    A line goes out when a run finishes, and at least every ``HEARTBEAT_S`` seconds while none
    does (the parallel engine sends heartbeats), so logs that are not a terminal keep moving.
    """
    t0 = time.monotonic()
    done = 0
    last = t0
    _say(progress, f"grid: {total} runs in {where}")
    for item in items:
        now = time.monotonic()
        if item is None:
            if now - last >= HEARTBEAT_S - 0.5:
                eta = f", ETA {_clock((now - t0) / done * (total - done))}" if done else ""
                _say(progress, f"grid: {done}/{total} runs done, {_clock(now - t0)} elapsed{eta} (working)")
                last = now
            continue
        done += 1
        last = now
        eta = _clock((now - t0) / done * (total - done))
        _say(progress, f"grid: {done}/{total} runs done, {_clock(now - t0)} elapsed, ETA {eta}")
        yield item


class DaskEngine:
    """Fit groups as tasks on a Dask cluster: a local one of ``workers`` processes, or the one at ``scheduler``."""

    name = "dask"

    def __init__(self, scheduler: str | None = None, workers: int | None = None) -> None:
        self.scheduler = scheduler
        self.workers = workers

    def results(self, experiment: Experiment, groups: list[list[RunConfig]], home: str | Path, *,
                mirror: Path | None = None, progress: bool = True) -> Results:
        """(record, scores) per run config, in the order units of work finish."""
        return dask_results(experiment, groups, home, mirror=mirror, scheduler=self.scheduler,
                            workers=self.workers, progress=progress)


def make_engine(engine: str, scheduler: str | None = None, workers: int | None = None) -> Engine:
    """The engine named ``local`` (``workers`` processes, default one per core) or ``dask``."""
    if engine == "local":
        return LocalEngine(workers=workers)
    if engine == "dask":
        return DaskEngine(scheduler=scheduler, workers=workers)
    raise ConfigError(f"engine: must be local or dask, got {engine!r}")


# ----- data home ---------------------------------------------------------------------------------
def is_url(home: str | Path) -> bool:
    """True when the home is written as a URL (``scheme://...``) rather than a plain path."""
    return isinstance(home, str) and "://" in home


def local_home(home: str | Path) -> Path | None:
    """The local folder of a plain path or ``file://`` URL home; None for any other URL."""
    if not is_url(home):
        return Path(home).expanduser().absolute()
    parsed = urlparse(str(home))
    if parsed.scheme != "file":
        return None
    if parsed.netloc not in ("", "localhost"):
        raise ConfigError(f"LOGTRIAL_HOME: file:// URL must name a local path, got host {parsed.netloc!r}")
    return Path(unquote(parsed.path)).absolute()


def home_snapshot(url: str, cache_root: Path) -> Path:
    """Local copy of an fsspec-URL data home under ``cache_root`` (copied once per content listing)."""
    import fsspec

    fs, root = fsspec.core.url_to_fs(url)
    root = root.rstrip("/")
    listing = fs.find(root, detail=True)
    if not listing:
        raise ConfigError(f"LOGTRIAL_HOME: {url} holds no files (expected a copied data home)")
    basis = sorted((name[len(root):].lstrip("/"), int(info.get("size") or 0)) for name, info in listing.items())
    key = hashlib.sha256(json.dumps([url, basis]).encode()).hexdigest()[:16]
    final = Path(cache_root) / f"home-{key}"
    if (final / ".complete").is_file():
        return final
    Path(cache_root).mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".home-{key}.tmp-", dir=cache_root))
    try:
        for rel, _size in basis:
            target = tmp / rel
            target.parent.mkdir(parents=True, exist_ok=True)
            fs.get_file(f"{root}/{rel}", str(target))
        (tmp / ".complete").write_text(url + "\n")
        try:
            os.rename(tmp, final)
        except OSError:
            if not (final / ".complete").is_file():
                raise
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    return final


def worker_home(home: str) -> Path:
    """The local folder a worker reads the data home from (in place, or a snapshot of a URL home)."""
    path = local_home(home)
    if path is not None:
        return path
    cache = Path(os.environ.get("LOGTRIAL_WORKER_CACHE") or Path(tempfile.gettempdir()) / "logtrial-worker")
    return home_snapshot(home, cache)


# ----- task payloads and the worker side ---------------------------------------------------------
def experiment_source(experiment: Experiment) -> str | dict:
    """What a worker needs to load the experiment: its file path, or its mapping with absolute registry paths."""
    if experiment.path is not None:
        return str(Path(experiment.path).absolute())
    raw = dict(experiment.raw)
    if experiment.registry_files:
        raw["registry"] = [str(Path(p).absolute()) for p in experiment.registry_files]
    return raw


def experiment_fingerprint(experiment: Experiment) -> str:
    """Hash of the experiment's content and its registry files, so workers notice an edited file."""
    h = hashlib.sha256(json.dumps(experiment.raw, sort_keys=True, default=str).encode())
    for p in experiment.registry_files:
        h.update(Path(p).read_bytes() if Path(p).is_file() else str(p).encode())
    return h.hexdigest()[:16]


def group_payload(experiment: Experiment, group: list[RunConfig], home: str | Path,
                  mirror: Path | None) -> dict:
    """The JSON-able description of one unit of work (no data, only where to find it)."""
    return {
        "experiment": experiment_source(experiment),
        "fingerprint": experiment_fingerprint(experiment),
        "output": str(Path(experiment.output).absolute()),
        "runs": [r.run_id for r in group],
        "home": str(home) if is_url(home) else str(Path(home).expanduser().absolute()),
        "mirror": str(Path(mirror).absolute()) if mirror is not None else None,
    }


def _cached_runner(payload: dict):
    """The worker process's Runner for this experiment and home (built on first use, a few kept)."""
    key = json.dumps([payload["experiment"], payload["fingerprint"], payload["output"], payload["home"],
                      payload["mirror"]], sort_keys=True, default=str)
    with _RUNNERS_LOCK:
        runner = _RUNNERS.get(key)
        if runner is None:
            exp = load_experiment(payload["experiment"], output=payload["output"])
            mirror = Path(payload["mirror"]) if payload["mirror"] else None
            runner = Runner(exp, worker_home(payload["home"]), progress=False, mirror=mirror)
            _RUNNERS[key] = runner
            while len(_RUNNERS) > RUNNER_CACHE_SIZE:
                _RUNNERS.popitem(last=False)
        _RUNNERS.move_to_end(key)
    return runner


def run_group(payload: dict) -> list[tuple[dict, pd.DataFrame | None]]:
    """Execute one fit group on a worker: its run records with their score tables."""
    runner = _cached_runner(payload)
    by_id = {r.run_id: r for r in runner.exp.runs}
    missing = [rid for rid in payload["runs"] if rid not in by_id]
    if missing:
        raise ConfigError(
            f"{payload['experiment'] if isinstance(payload['experiment'], str) else 'experiment'}: run "
            f"{missing[0]} is not in the grid as loaded on this worker (a different file or logtrial version?)"
        )
    return runner.execute_group([by_id[rid] for rid in payload["runs"]])


def _failed_records(experiment: Experiment, group: list[RunConfig], exc: BaseException,
                    what: str = "dask task failed") -> list[tuple[dict, None]]:
    """`failed` records for every run of a unit of work that did not come back (rerun to retry them)."""
    error = f"{what}: {describe_failure(exc)}"
    return [({"run_id": r.run_id, "status": "failed", "config": r.canonical(), "experiment": experiment.name,
              "error": error, "traceback": ""}, None) for r in group]


# ----- the client side ---------------------------------------------------------------------------
def check_engine_options(engine: str, scheduler: str | None, workers: int | None) -> None:
    """Reject engine options that do not fit together (named as on the command line)."""
    if engine not in ("local", "dask"):
        raise ConfigError(f"--engine: must be local or dask, got {engine!r}")
    if engine != "dask" and scheduler is not None:
        raise ConfigError("--scheduler: only with --engine dask")
    if scheduler is not None and workers is not None:
        raise ConfigError("--workers: starts a local cluster, so give either --scheduler ADDRESS or --workers N")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise ConfigError(f"--workers: expected a whole number >= 1, got {workers!r}")
    if scheduler is not None and not str(scheduler).strip():
        raise ConfigError("--scheduler: expected an address such as tcp://127.0.0.1:8786")


def ingest_once(experiment: Experiment, groups: list[list[RunConfig]], home: str | Path,
                mirror: Path | None, progress: bool) -> None:
    """Acquire and ingest each dataset of the groups once on the client, so workers only read tables."""
    from logtrial.data.ingest import entry_files, ingest_files
    from logtrial.data.registry import get_entry, load_registry

    folder = local_home(home)
    if folder is None:
        return  # an object-store home is populated by the user; workers build what is missing
    registry = load_registry(experiment.registry_files)
    for name in dict.fromkeys(r.dataset for g in groups for r in g):
        try:
            entry = get_entry(name, registry)
            files = entry_files(entry, folder, mirror, progress=progress)
            ingest_files(entry.name, files, entry.format, entry.miner, folder / "tables", progress=progress)
        except LogtrialError as exc:
            # Each run on this dataset meets the same error on its worker and is recorded as failed.
            _say(progress, f"dask: dataset {name} could not be prepared on the client: {exc}")


def dask_results(
    experiment: Experiment,
    groups: list[list[RunConfig]],
    home: str | Path,
    *,
    mirror: Path | None = None,
    scheduler: str | None = None,
    workers: int | None = None,
    progress: bool = True,
) -> Iterator[tuple[dict, pd.DataFrame | None]]:
    """Run the fit groups on a Dask cluster and yield (record, scores) per run config as they finish."""
    check_engine_options("dask", scheduler, workers)
    if not groups:
        return
    from distributed import Client, LocalCluster, as_completed

    cluster = None
    if scheduler is None:
        n = workers or os.cpu_count() or 1
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address="127.0.0.1:0", silence_logs=logging.ERROR)
        try:
            client = Client(cluster, set_as_default=False)
        except BaseException:
            cluster.close()
            raise
        where = f"a local cluster of {n} worker process(es)"
    else:
        try:
            client = Client(scheduler, set_as_default=False, timeout=CONNECT_TIMEOUT)
        except (OSError, TimeoutError) as exc:
            raise ConfigError(f"--scheduler: cannot reach a Dask scheduler at {scheduler!r}: {exc}") from None
        where = f"the cluster at {scheduler}"
    try:
        ingest_once(experiment, groups, home, mirror, progress)
        _say(progress, f"dask: {len(groups)} unit(s) of work on {where}")
        futures = {}
        for group in groups:
            payload = group_payload(experiment, group, home, mirror)
            fut = client.submit(run_group, payload, retries=TASK_RETRIES, pure=False,
                                key=f"logtrial-group-{group[0].run_id}-{uuid.uuid4().hex[:8]}")
            futures[fut.key] = (fut, group)
        for fut in as_completed([f for f, _ in futures.values()], loop=client.loop):
            group = futures[fut.key][1]
            try:
                pairs = fut.result()
            except Exception as exc:  # noqa: BLE001 - a lost unit of work is recorded; a rerun retries it
                pairs = _failed_records(experiment, group, exc)
            yield from pairs
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def _say(progress: bool, msg: str) -> None:
    if progress:
        print(msg, file=sys.stderr, flush=True)
