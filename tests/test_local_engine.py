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


def test_default_workers_is_the_usable_core_count() -> None:
    assert engines.default_workers() >= 1
    assert engines.make_engine("local").workers is None
    assert engines.make_engine("local", workers=3).workers == 3


@pytest.mark.parametrize("seconds, text", [(5, "5s"), (65, "1m05s"), (3725, "1h02m")])
def test_clock_format(seconds: float, text: str) -> None:
    assert engines._clock(seconds) == text
