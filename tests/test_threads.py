"""Thread pinning: a grid with LOF gives bit-identical figures on the local engine and on Dask workers."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from logtrial.running.experiment import load_experiment
from logtrial.running.runs import run_experiment
from logtrial.running.store import RunStore
from logtrial.running.threads import pinned_threads
from test_engines import _assert_same_results, _experiment, cluster, quiet_dask  # noqa: F401 - fixtures

distributed = pytest.importorskip("distributed")


def test_pinned_threads_limits_blas_and_torch_and_restores_torch() -> None:
    # threadpoolctl (the reference library for BLAS/OpenMP pools) reports what is in force inside the block
    import torch
    from threadpoolctl import threadpool_info

    before = torch.get_num_threads()
    with pinned_threads() as info:
        assert info["threads"] == 1 and info["torch"] == 1 and torch.get_num_threads() == 1
        assert all(p["num_threads"] == 1 for p in threadpool_info())
    assert torch.get_num_threads() == before


def test_the_run_pin_overrides_a_torch_thread_setting_in_the_environment(monkeypatch) -> None:
    # a user's LOGTRIAL_TORCH_THREADS must not give deep detectors more threads inside a run, on any engine
    import torch
    from logtrial.detectors.torch_train import THREADS_ENV, torch_session

    monkeypatch.setenv(THREADS_ENV, "4")
    with pinned_threads():
        with torch_session(seed=0, threads=None):
            assert torch.get_num_threads() == 1
    assert __import__("os").environ[THREADS_ENV] == "4"


def test_lof_grid_is_bit_identical_on_local_and_dask(tmp_path: Path, home: Path, cluster) -> None:  # noqa: F811
    # the local process is given 4 threads in every pool (a bigger machine); workers run single-threaded:
    # each run pins its own threads, so every figure and every score must still agree exactly
    import torch
    from threadpoolctl import threadpool_limits

    path = _experiment(tmp_path, detectors=["lof", "pca"], seeds=[1], noise=[{"name": "clean", "level": 0.0}])
    local = load_experiment(path, output=tmp_path / "local")
    dask = load_experiment(path, output=tmp_path / "dask")
    before = torch.get_num_threads()
    try:
        with threadpool_limits(limits=4):
            torch.set_num_threads(4)
            run_experiment(local, home, progress=False)
    finally:
        torch.set_num_threads(before)
    run_experiment(dask, home, progress=False, engine="dask", scheduler=cluster.scheduler_address)
    _assert_same_results(tmp_path / "local", tmp_path / "dask")
    records = RunStore(tmp_path / "local").records()
    assert len(records) == 2 and all(r["status"] == "finished" for r in records)
    assert all(r["threads"]["threads"] == 1 and r["threads"]["torch"] == 1 for r in records)
    assert np.isfinite([r["metrics"]["auroc"] for r in records]).all()
