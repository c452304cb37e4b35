"""Local engine: fit groups in parallel worker processes give exactly the sequential results, with visible progress."""

from __future__ import annotations

from pathlib import Path

import pytest
from logtrial.running import engines
from logtrial.running.experiment import load_experiment
from logtrial.running.runs import run_experiment
from test_engines import _assert_same_results, _experiment


def test_parallel_local_processes_give_the_sequential_results(tmp_path: Path, home: Path, capsys) -> None:
    path = _experiment(tmp_path)
    seq = load_experiment(path, output=tmp_path / "seq")
    par = load_experiment(path, output=tmp_path / "par")
    assert run_experiment(seq, home, progress=False, track=False, workers=1) == {"finished": 12, "failed": 0,
                                                                                   "skipped": 0}
    assert run_experiment(par, home, progress=True, track=False, workers=2) == {"finished": 12, "failed": 0,
                                                                                  "skipped": 0}
    _assert_same_results(seq.output, par.output)  # exact equality of records (less timings) and score tables
    err = capsys.readouterr().err
    assert "grid: 12 runs in 2 processes" in err
    assert "grid: 12/12 runs done" in err and "ETA" in err


def test_progress_prints_a_heartbeat_while_nothing_finishes(monkeypatch, capsys) -> None:
    clock = iter([0.0, 31.0, 62.0, 70.0])
    monkeypatch.setattr(engines.time, "monotonic", lambda: next(clock))
    out = list(engines._with_progress(iter([None, None, ("rec", None)]), 2, True, "2 processes"))
    assert out == [("rec", None)]
    lines = capsys.readouterr().err.splitlines()
    assert lines[0] == "grid: 2 runs in 2 processes"
    assert lines[1] == "grid: 0/2 runs done, 31s elapsed (working)"
    assert lines[2] == "grid: 0/2 runs done, 1m02s elapsed (working)"
    assert lines[3] == "grid: 1/2 runs done, 1m10s elapsed, ETA 1m10s"


def test_default_workers_is_the_usable_core_count(monkeypatch) -> None:
    monkeypatch.delenv(engines.WORKERS_ENV, raising=False)
    assert engines.default_workers() >= 1
    assert engines.make_engine("local").workers is None
    assert engines.make_engine("local", workers=3).workers == 3


@pytest.mark.parametrize("seconds, text", [(5, "5s"), (65, "1m05s"), (3725, "1h02m")])
def test_clock_format(seconds: float, text: str) -> None:
    assert engines._clock(seconds) == text


def test_mlflow_info_lines_stay_out_of_the_console(tmp_path: Path, home: Path) -> None:
    # a fresh interpreter, as a user's `logtrial run` is: mlflow configures its own logger when first imported
    import subprocess
    import sys

    path = _experiment(tmp_path, detectors=["pca"], seeds=[1], noise=[{"name": "clean", "level": 0.0}])
    proc = subprocess.run([sys.executable, "-m", "logtrial.cli", "run", str(path), "--workers", "1"],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    assert "1 finished" in proc.stdout + proc.stderr
    assert "INFO" not in proc.stderr and "INFO" not in proc.stdout, proc.stderr


def test_two_horizons_sharing_a_training_set_do_not_share_scores(tmp_path: Path, home: Path) -> None:
    # an unsupervised fit is reused across tasks only when the scored validation and test windows are the same
    import yaml

    path = _experiment(tmp_path, detectors=["pca"], seeds=[1], noise=[{"name": "clean", "level": 0.0}],
                       tasks=[{"name": "predict", "horizon": "12h"}, {"name": "predict", "horizon": "3d"}])
    doc = yaml.safe_load(path.read_text())
    doc.pop("task")
    path.write_text(yaml.safe_dump(doc))
    exp = load_experiment(path)
    assert run_experiment(exp, home, progress=False, track=False, workers=1) == {"finished": 2, "failed": 0,
                                                                                   "skipped": 0}


def test_workers_from_the_environment(monkeypatch) -> None:
    from logtrial.errors import ConfigError

    monkeypatch.setenv(engines.WORKERS_ENV, "3")
    assert engines.default_workers() == 3
    monkeypatch.setenv(engines.WORKERS_ENV, "none")
    with pytest.raises(ConfigError, match="LOGTRIAL_WORKERS: expected a whole number >= 1, got 'none'"):
        engines.default_workers()
