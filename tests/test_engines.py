"""Dask engine: same results as the local engine, workers read data from the home, a killed worker loses nothing."""

from __future__ import annotations

import json
import logging
import os
import signal
import time
from pathlib import Path

import pandas as pd
import pytest
import yaml
from conftest import relay_registry
from logtrial.cli import main
from logtrial.running.engines import group_payload, home_snapshot, local_home, run_group, worker_home
from logtrial.running.experiment import load_experiment
from logtrial.running.runner import Runner, fit_groups
from logtrial.running.runs import run_experiment
from logtrial.running.store import RunStore

distributed = pytest.importorskip("distributed")

# A small simulated fleet (ours, invented) so that each grid runs in seconds.
SMALL_REGISTRY = relay_registry("relay-tiny", "{nodes: 8, days: 30, seed: 5, line_rate: 2.0, failures: {rate_per_node_year: 14.0, lead_time_hours: [4, 48], precursor_visibility: 1.0}}")

TIMING_KEYS = ("fit_s", "score_s", "total_s")


def _experiment(tmp_path: Path, **over) -> Path:
    (tmp_path / "tiny.yaml").write_text(SMALL_REGISTRY)
    doc = {
        "experiment": "engine-grid",
        "registry": ["tiny.yaml"],
        "output": "out",
        "datasets": ["relay-tiny"],
        "windows": [{"kind": "time", "size": "1h"}],
        "task": {"name": "predict", "horizon": "12h"},
        "split": {"kind": "chronological", "fractions": [0.5, 0.2, 0.3]},
        "noise": [{"name": "clean", "level": 0.0}, {"name": "drop-50", "level": 0.5, "drop": {"p": 0.5}}],
        "detectors": ["pca", "rate_rule", "logistic"],
        "seeds": [1, 2],
        "threshold": {"kind": "best_f1"},
        "scoring": {"cooldown": "2h", "bootstrap": 30},
        **over,
    }
    path = tmp_path / "exp.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path


def _comparable(record: dict) -> dict:
    """A run record without wall-clock timings (the only fields allowed to differ between engines)."""
    rec = json.loads(json.dumps(record, sort_keys=True, default=str))
    for k in TIMING_KEYS:
        rec.get("timing", {}).pop(k, None)
    return rec


def _results(output: Path) -> dict[str, tuple[dict, pd.DataFrame]]:
    store = RunStore(output)
    return {r["run_id"]: (_comparable(r), pd.read_parquet(store.path(r["run_id"], ".scores.parquet")))
            for r in store.records()}


def _assert_same_results(a: Path, b: Path) -> None:
    ra, rb = _results(a), _results(b)
    assert sorted(ra) == sorted(rb)
    for rid in ra:
        assert ra[rid][0] == rb[rid][0], rid
        pd.testing.assert_frame_equal(ra[rid][1], rb[rid][1])  # pandas' own frame comparison, exact


def _mlflow_hashes(output: Path, name: str) -> list[str]:
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=f"sqlite:///{output / 'mlflow.db'}")
    runs = client.search_runs([client.get_experiment_by_name(name).experiment_id])
    return [r.data.tags["config_hash"] for r in runs]


@pytest.fixture()
def quiet_dask():
    """Keep distributed's warnings (expected when a worker is killed) out of the test output."""
    logger = logging.getLogger("distributed")
    level = logger.level
    logger.setLevel(logging.CRITICAL)
    yield
    logger.setLevel(level)


@pytest.fixture()
def cluster(quiet_dask):
    """A real distributed.LocalCluster of two single-threaded worker processes, listening on loopback only."""
    lc = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address="127.0.0.1:0", silence_logs=logging.CRITICAL)
    try:
        yield lc
    finally:
        lc.close()


# ----- results equal the local engine --------------------------------------------------------------
def test_local_cluster_gives_the_local_engines_results(tmp_path: Path, home: Path, cluster) -> None:
    path = _experiment(tmp_path)
    local = load_experiment(path, output=tmp_path / "local")
    dask = load_experiment(path, output=tmp_path / "dask")
    assert len(local.runs) == 12 and len(fit_groups(local.runs)) == 6
    t0 = time.perf_counter()
    assert run_experiment(local, home, progress=False, track=False) == {"finished": 12, "failed": 0, "skipped": 0}
    t_local = time.perf_counter() - t0
    # The home is given as a file:// URL: workers read the shared folder in place.
    t0 = time.perf_counter()
    counts = run_experiment(dask, home.absolute().as_uri(), progress=False, track=False, engine="dask",
                            scheduler=cluster.scheduler_address)
    t_dask = time.perf_counter() - t0
    assert counts == {"finished": 12, "failed": 0, "skipped": 0}
    _assert_same_results(local.output, dask.output)
    # Both workers took part (Dask's own record of where each task ran).
    with distributed.Client(cluster, set_as_default=False) as client:
        ran_on = client.run(lambda: len(__import__("logtrial.running.engines", fromlist=["_RUNNERS"])._RUNNERS))
    assert sorted(ran_on.values()) == [1, 1], ran_on
    print(f"\nsmall grid (12 runs, 6 groups): local {t_local:.1f}s, dask 2 workers {t_dask:.1f}s")


def test_cli_workers_starts_a_local_cluster_with_the_same_results(tmp_path: Path, home: Path, quiet_dask,
                                                                  capsys) -> None:
    path = _experiment(tmp_path, detectors=["pca", "rate_rule"], seeds=[1])
    assert main(["run", str(path), "--out", str(tmp_path / "local"), "--no-track"]) == 0
    assert main(["run", str(path), "--out", str(tmp_path / "dask"), "--no-track", "--engine", "dask",
                 "--workers", "2"]) == 0
    err = capsys.readouterr().err
    assert "local cluster of 2 worker process(es)" in err
    _assert_same_results(tmp_path / "local", tmp_path / "dask")
    # Rerun: everything already finished, nothing submitted.
    assert main(["run", str(path), "--out", str(tmp_path / "dask"), "--no-track", "--engine", "dask",
                 "--workers", "2"]) == 0
    assert "4 already done" in capsys.readouterr().out


# ----- fault: a worker killed mid-grid -------------------------------------------------------------
def test_killed_worker_mid_grid_each_config_recorded_once(tmp_path: Path, home: Path, cluster) -> None:
    path = _experiment(tmp_path)
    exp = load_experiment(path, output=tmp_path / "dask")
    seen: list[tuple[str, str]] = []  # (run id, status) of every record handed to on_finish
    killed: dict = {}
    client = distributed.Client(cluster, set_as_default=False)

    def kill_a_busy_worker(record: dict) -> None:
        seen.append((record["run_id"], record["status"]))
        if killed:
            return
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:
            busy = [w for w, keys in client.processing().items() if keys]
            if busy:
                pid = client.run(os.getpid, workers=[busy[0]])[busy[0]]
                killed.update(worker=busy[0], pid=pid, after=len(seen),
                              tasks=list(client.processing()[busy[0]]))
                os.kill(pid, signal.SIGKILL)  # the worker process dies without any goodbye
                return
            time.sleep(0.05)

    try:
        counts = run_experiment(exp, home, progress=False, engine="dask", scheduler=cluster.scheduler_address,
                                on_finish=kill_a_busy_worker)
        if counts["failed"]:  # a unit of work lost beyond Dask's retries: a rerun finishes it
            counts = run_experiment(exp, home, progress=False, engine="dask", scheduler=cluster.scheduler_address,
                                    on_finish=lambda r: seen.append((r["run_id"], r["status"])))
    finally:
        client.close()
    print(f"\nkilled worker pid {killed.get('pid')} after {killed.get('after')} record(s) with "
          f"{len(killed.get('tasks', []))} task(s) in flight; reruns needed: {int(bool(counts.get('skipped')))}")
    assert killed and killed["tasks"] and killed["after"] < len(exp.runs), killed  # it died with work in flight
    records = RunStore(exp.output).records()
    assert sorted(r["run_id"] for r in records) == sorted(r.run_id for r in exp.runs)
    assert all(r["status"] == "finished" for r in records)
    finished_ids = [rid for rid, status in seen if status == "finished"]
    assert sorted(finished_ids) == sorted(r.run_id for r in exp.runs)  # each config finished exactly once
    hashes = _mlflow_hashes(exp.output, "engine-grid")
    assert sorted(hashes) == sorted(r.run_id for r in exp.runs)  # MLflow: exactly one run per config hash
    # And the numbers are still the local engine's.
    local = load_experiment(path, output=tmp_path / "local")
    run_experiment(local, home, progress=False, track=False)
    _assert_same_results(local.output, exp.output)


def test_a_lost_unit_of_work_is_recorded_failed_and_a_rerun_completes_it(tmp_path: Path, home: Path, quiet_dask,
                                                                        monkeypatch) -> None:
    # In-process workers (threads) so that the patched worker function is the one Dask calls.
    import logtrial.running.engines as engines

    exp = load_experiment(_experiment(tmp_path, detectors=["pca", "rate_rule"], seeds=[1]))
    doomed = fit_groups(exp.runs)[0]
    calls: list[str] = []
    real = engines._cached_runner

    def unreachable_for_one_group(payload: dict):
        if payload["runs"][0] == doomed[0].run_id:
            calls.append(payload["runs"][0])
            raise OSError("shared data home unreachable")
        return real(payload)

    monkeypatch.setattr(engines, "_cached_runner", unreachable_for_one_group)
    lc = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp",
                                  host="127.0.0.1", dashboard_address="127.0.0.1:0",
                                  silence_logs=logging.CRITICAL)
    try:
        first = run_experiment(exp, home, progress=False, engine="dask", scheduler=lc.scheduler_address)
        assert first == {"finished": 2, "failed": 2, "skipped": 0}
        assert len(calls) == 1 + engines.TASK_RETRIES  # Dask retried the task before giving up
        failed = [r for r in RunStore(exp.output).records() if r["status"] == "failed"]
        assert sorted(r["run_id"] for r in failed) == sorted(r.run_id for r in doomed)
        assert all("shared data home unreachable" in r["error"] for r in failed)
        monkeypatch.setattr(engines, "_cached_runner", real)
        second = run_experiment(exp, home, progress=False, engine="dask", scheduler=lc.scheduler_address)
        # The same workers (with their cached Runners) notice an edited experiment file.
        grown = load_experiment(_experiment(tmp_path, detectors=["pca", "rate_rule", "logistic"], seeds=[1]))
        third = run_experiment(grown, home, progress=False, track=False, engine="dask",
                               scheduler=lc.scheduler_address)
    finally:
        lc.close()
    assert third == {"finished": 2, "failed": 0, "skipped": 4}
    assert second == {"finished": 2, "failed": 0, "skipped": 2}
    records = RunStore(exp.output).records()
    assert len(records) == 6 and all(r["status"] == "finished" for r in records)
    # MLflow (reference library): the finished runs replaced the failed attempts, one run per config hash.
    assert sorted(_mlflow_hashes(exp.output, "engine-grid")) == sorted(r.run_id for r in exp.runs)


# ----- what a unit of work carries, and where workers read data ------------------------------------
def test_payload_names_data_but_carries_none(tmp_path: Path, home: Path) -> None:
    exp = load_experiment(_experiment(tmp_path))
    group = fit_groups(exp.runs)[0]
    payload = group_payload(exp, group, home, None)
    blob = json.dumps(payload)  # plain JSON (standard library): no arrays, no frames
    assert len(blob) < 2000, len(blob)
    assert payload["runs"] == [r.run_id for r in group]
    assert payload["experiment"] == str(exp.path.absolute()) and Path(payload["home"]).is_absolute()
    # An experiment given as a mapping travels as the mapping, with registry paths made absolute.
    raw = yaml.safe_load(exp.path.read_text())
    raw["registry"] = [str(tmp_path / "tiny.yaml")]
    from_dict = load_experiment(raw, output=tmp_path / "d")
    p2 = group_payload(from_dict, fit_groups(from_dict.runs)[0], home, None)
    assert p2["experiment"]["registry"] == [str(tmp_path / "tiny.yaml")]
    assert [r.run_id for r in load_experiment(p2["experiment"], output=p2["output"]).runs] == \
        [r.run_id for r in from_dict.runs]


def test_worker_reads_an_object_store_home_through_fsspec(tmp_path: Path, home: Path) -> None:
    fsspec = pytest.importorskip("fsspec")
    exp = load_experiment(_experiment(tmp_path, detectors=["pca"], seeds=[1]))
    group = fit_groups(exp.runs)[0]
    expected = Runner(exp, home, progress=False).execute_group(group)  # also fills the home
    # Copy the data home into fsspec's in-memory filesystem (the reference object-store stand-in).
    mem = fsspec.filesystem("memory")
    url = f"memory://logtrial-test-{os.getpid()}/home"
    try:
        mem.put(str(home), url, recursive=True)
        cache = tmp_path / "worker-cache"
        snap = home_snapshot(url, cache)
        assert sorted(p.relative_to(snap).as_posix() for p in snap.rglob("*") if p.is_file()
                      and p.name != ".complete") == \
            sorted(p.relative_to(home).as_posix() for p in home.rglob("*") if p.is_file())
        assert home_snapshot(url, cache) == snap  # same listing: the snapshot is reused
        os.environ["LOGTRIAL_WORKER_CACHE"] = str(cache)
        try:
            got = run_group(group_payload(exp, group, url, None))
        finally:
            os.environ.pop("LOGTRIAL_WORKER_CACHE", None)
    finally:
        mem.rm(url.split("/home")[0], recursive=True)
    assert [_comparable(r) for r, _ in got] == [_comparable(r) for r, _ in expected]
    for (_, a), (_, b) in zip(got, expected):
        pd.testing.assert_frame_equal(a, b)


def test_home_paths_and_file_urls(tmp_path: Path) -> None:
    # RFC 8089 file URIs as Python's pathlib writes them (reference: pathlib.Path.as_uri).
    assert local_home(tmp_path.as_uri()) == tmp_path
    assert local_home(str(tmp_path)) == tmp_path
    assert local_home("file://localhost" + str(tmp_path)) == tmp_path
    assert local_home("s3://bucket/home") is None
    assert worker_home(tmp_path.as_uri()) == tmp_path
    from logtrial.errors import ConfigError

    with pytest.raises(ConfigError, match="LOGTRIAL_HOME"):
        local_home("file://otherhost/data")
    with pytest.raises(ConfigError, match="holds no files"):
        home_snapshot("memory://logtrial-empty-home", tmp_path / "c")


def test_group_results_do_not_depend_on_what_the_worker_ran_before(tmp_path: Path, home: Path) -> None:
    # Workers see groups in any order and share one Runner's caches between them: the records of
    # each group must be the same whichever groups that Runner computed before.
    exp = load_experiment(_experiment(tmp_path, detectors=["pca", "rate_rule"], seeds=[1, 2]))
    groups = fit_groups(exp.runs)
    forward = Runner(exp, home, progress=False)
    backward = Runner(exp, home, progress=False)
    a = {r["run_id"]: _comparable(r) for g in groups for r, _ in forward.execute_group(g)}
    b = {r["run_id"]: _comparable(r) for g in reversed(groups) for r, _ in backward.execute_group(g)}
    assert a == b and len(a) == 8
    assert all(r["status"] == "finished" for r in a.values())


def test_a_random_split_is_drawn_with_each_runs_own_seed(tmp_path: Path, home: Path) -> None:
    # A random split drawn with one run's seed must not reach another seed's runs through the
    # Runner's shared cache (else results would depend on which group a worker ran first).
    exp = load_experiment(_experiment(tmp_path, detectors=["pca"], noise=[{"name": "clean"}], seeds=[1, 2],
                                      split={"kind": "random", "fractions": [0.5, 0.2, 0.3]}))
    run1, run2 = sorted(exp.runs, key=lambda r: r.seed)
    shared = Runner(exp, home, progress=False)
    shared.prepared(run1)
    after_other = shared.prepared(run2).split
    alone = Runner(exp, home, progress=False).prepared(run2).split
    for part in ("train", "val", "test"):
        assert (getattr(after_other, part) == getattr(alone, part)).all()
    assert not (after_other.train == shared.prepared(run1).split.train).all()


@pytest.mark.parametrize(
    "flags, needle",
    [
        (["--scheduler", "tcp://127.0.0.1:8786"], "--scheduler: only with --engine dask"),
        (["--workers", "0"], "--workers: expected a whole number >= 1"),
        (["--engine", "dask", "--workers", "0"], "--workers: expected a whole number >= 1"),
        (["--engine", "dask", "--workers", "2", "--scheduler", "tcp://127.0.0.1:8786"],
         "give either --scheduler ADDRESS or --workers N"),
    ],
)
def test_bad_engine_options_exit_2_and_nothing_recorded(tmp_path: Path, home: Path, capsys, flags, needle) -> None:
    path = _experiment(tmp_path)
    assert main(["run", str(path), *flags]) == 2
    assert needle in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


def test_unreachable_scheduler_exit_2_before_any_work(tmp_path: Path, home: Path, capsys, quiet_dask,
                                                      monkeypatch) -> None:
    import logtrial.running.engines as engines

    monkeypatch.setattr(engines, "CONNECT_TIMEOUT", "1s")
    path = _experiment(tmp_path)
    # Port 1 on loopback: nothing listens there, so the connection is refused until the timeout.
    assert main(["run", str(path), "--engine", "dask", "--scheduler", "tcp://127.0.0.1:1"]) == 2
    assert "--scheduler: cannot reach a Dask scheduler at 'tcp://127.0.0.1:1'" in capsys.readouterr().err
    assert not (home / "tables").exists()  # nothing ingested
    assert RunStore(tmp_path / "out").records() == []


def test_unknown_engine_is_refused_by_the_parser(tmp_path: Path, capsys) -> None:
    with pytest.raises(SystemExit) as exc:
        main(["run", str(_experiment(tmp_path)), "--engine", "spark"])
    assert exc.value.code == 2 and "invalid choice: 'spark'" in capsys.readouterr().err
