"""Faults found under attack, each reproduced: bad configs, grid duplicates, concurrent runs, disk errors, MLflow rows.

External references named beside the checks: YAML 1.2 (mapping keys must be unique,
section 3.2.1.1), POSIX flock(2) semantics (a lock dies with its holder), errno ENOSPC/EACCES.
"""

from __future__ import annotations

import errno
import json
import os
import socket
from pathlib import Path

import pytest
import yaml
from conftest import relay_registry
from logtrial.cli import build_parser, main
from logtrial.errors import ConfigError
from logtrial.running.experiment import load_experiment
from logtrial.running.runs import RUN_LOCK, output_lock, run_experiment
from logtrial.running.store import RunStore

SMALL = relay_registry("relay-tiny", "{nodes: 6, days: 30, seed: 5, line_rate: 1.5, failures: "
                                     "{rate_per_node_year: 15.0, lead_time_hours: [4, 48], precursor_visibility: 1.0}}")


def _exp(tmp_path: Path, text: str | None = None, **over) -> Path:
    (tmp_path / "small.yaml").write_text(SMALL)
    path = tmp_path / "exp.yaml"
    if text is not None:
        path.write_text(text)
        return path
    doc = {"experiment": "faults", "registry": ["small.yaml"], "output": "out", "datasets": ["relay-tiny"],
           "windows": [{"kind": "time", "size": "1h"}], "task": {"name": "predict", "horizon": "12h"},
           "detectors": ["pca"], "seeds": [1], "scoring": {"cooldown": "2h", "bootstrap": 20}, **over}
    path.write_text(yaml.safe_dump(doc))
    return path


def _run_exit(path: Path, capsys, *extra: str) -> tuple[int, str]:
    code = main(["run", str(path), "--no-track", *extra])
    return code, capsys.readouterr().err


# ---------------------------------------------------------------- duplicate keys (YAML 1.2: keys are unique)


def test_duplicate_dataset_names_in_a_registry_are_refused(tmp_path: Path) -> None:
    from logtrial.data.registry import load_registry

    reg = tmp_path / "reg.yaml"
    reg.write_text(SMALL + SMALL.split("datasets:\n", 1)[1])
    with pytest.raises(ConfigError, match=r"reg.yaml: line \d+, column \d+: .*duplicate key 'relay-tiny'"):
        load_registry([reg])


def test_duplicate_experiment_keys_are_refused(tmp_path: Path, capsys) -> None:
    path = _exp(tmp_path, "experiment: a\ndatasets: [relay-tiny]\nwindows: [{kind: time, size: 1h}]\n"
                          "task: {name: detect}\ndetectors: [pca]\ndetectors: [rate_rule]\n")
    code, err = _run_exit(path, capsys)
    assert code == 2 and "exp.yaml: line 6" in err and "duplicate key 'detectors'" in err


def test_yaml_merge_keys_still_work_and_may_be_overridden(tmp_path: Path) -> None:
    # reference: the YAML merge key type (yaml.org/type/merge.html) as PyYAML's SafeLoader reads it.
    import yaml
    from logtrial.data.registry import read_yaml

    text = ("base: &b {stage: one, size: 2}\n"
            "same: {<<: *b}\n"
            "over: {<<: *b, size: 5}\n")
    path = tmp_path / "m.yaml"
    path.write_text(text)
    assert read_yaml(path) == yaml.safe_load(text)
    assert read_yaml(path)["over"] == {"stage": "one", "size": 5}
    path.write_text(text + "again: {<<: *b, size: 5, size: 6}\n")
    with pytest.raises(ConfigError, match=r"line 4.*duplicate key 'size'"):
        read_yaml(path)


# ---------------------------------------------------------------- data paths confined to the dataset folder


@pytest.mark.parametrize("field, value", [("labels", "{scheme: incidents, file: /etc/passwd}"),
                                          ("labels", "{scheme: incidents, file: ../../etc/passwd}"),
                                          ("truth", "{file: /etc/passwd}"),
                                          ("truth", "{file: x.npy, templates: ../t.csv}")])
def test_data_paths_outside_the_dataset_folder_are_refused(tmp_path: Path, field: str, value: str) -> None:
    from logtrial.data.registry import load_registry

    reg = tmp_path / "reg.yaml"
    body = SMALL.replace("    labels: {scheme: incidents, file: incidents.csv}\n", "")
    reg.write_text(body + f"    {field}: {value}\n")
    pattern = rf"dataset 'relay-tiny': {field}\.(file|templates): .*inside the dataset folder"
    with pytest.raises(ConfigError, match=pattern):
        load_registry([reg])


# ---------------------------------------------------------------- wrong types and values: exit 2 naming the field


@pytest.mark.parametrize("over, needle", [
    ({"scoring": {"cooldown": "-1h"}}, "scoring.cooldown: must not be negative"),
    ({"output": [1, 2]}, "`output` must be a single piece of text"),
    ({"experiment": ["a", "b"]}, "`experiment` must be a single piece of text"),
    ({"datasets": [["relay-tiny"]]}, "datasets[0]: expected a name"),
    ({"seeds": [1, 1]}, "seeds[1]: repeats seeds[0]"),
    ({"datasets": ["relay-tiny", "relay-tiny"]}, "datasets[1]: repeats datasets[0]"),
    ({"windows": [{"kind": "time", "size": "1h"}, {"kind": "time", "size": "60min"}]},
     "windows[1]: repeats windows[0] (time 1h)"),
    ({"detectors": ["pca", "pca"]}, "detectors[1]: repeats detectors[0]"),
    ({"task": {"name": "detect", "horizon": "24h"}}, "tasks[0].horizon: not used by the detect task"),
    ({"windows": [{"kind": "time", "size": 60}]}, "windows[0].size: 60 has no unit"),
    ({"windows": [{"kind": "time", "size": "60"}]}, "windows[0].size: '60' has no unit"),
    ({"task": {"name": "predict", "horizon": 3600}}, "tasks[0].horizon: 3600 has no unit"),
    ({"scoring": {"cooldown": 7200}}, "scoring.cooldown: 7200 has no unit"),
    ({"evaluation": {"kind": "walk_forward", "train": 56, "validation": "14d", "test": "56d", "step": "28d"}},
     "evaluation.train: 56 has no unit"),
    ({"evaluation": {"kind": "walk_forward", "train": "56d", "validation": "14d", "test": "56d", "step": "28d",
                     "age_bin": "7"}}, "evaluation.age_bin: '7' has no unit"),
    ({"detectors": ["pcaa"]}, "Did you mean 'pca'?"),
    ({"datasets": ["relay-tiyn"]}, "Did you mean: relay-tiny?"),
    ({"detector": ["pca"]}, "Did you mean 'detectors'?"),
    ({"scoring": {"cooldwn": "1h"}}, "Did you mean 'cooldown'?"),
    ({"task": {"name": "predict", "horizon": "30min"}}, "at least the window size (1h), got 30min"),
])
def test_bad_experiment_values_exit_2_naming_the_field(tmp_path: Path, capsys, over: dict, needle: str) -> None:
    code, err = _run_exit(_exp(tmp_path, **over), capsys)
    assert code == 2, err
    assert "exp.yaml" in err and needle in err and "Traceback" not in err
    assert "0 days" not in err  # durations are echoed as written, not as pandas reprs


def test_count_windows_keep_plain_numbers(tmp_path: Path) -> None:
    exp = load_experiment(_exp(tmp_path, windows=[{"kind": "count", "n": 50, "step": 25}]))
    assert exp.runs[0].windows["n"] == 50


# ---------------------------------------------------------------- one run per output (flock(2) + pid/host)


def test_second_run_on_the_same_output_is_refused_naming_the_holder(tmp_path: Path, home: Path, capsys) -> None:
    path = _exp(tmp_path)
    with output_lock(tmp_path / "out", progress=False):
        code, err = _run_exit(path, capsys)
    assert code == 1 and "Traceback" not in err
    assert f"pid {os.getpid()} on host {socket.gethostname()}" in err and "another `logtrial run`" in err
    assert not list((tmp_path / "out" / "runs").glob("*.json"))


def test_stale_lock_of_a_killed_run_is_taken_over(tmp_path: Path, home: Path, capsys) -> None:
    path = _exp(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    dead = 2**22 + 12345  # above the default pid_max: no such process
    (out / RUN_LOCK).write_text(json.dumps({"pid": dead, "host": socket.gethostname(), "started": "earlier"}))
    code, err = _run_exit(path, capsys)
    assert code == 0, err
    assert f"taking over a stale run lock (pid {dead}" in err
    assert (out / RUN_LOCK).read_text() == ""  # released at the end


# ---------------------------------------------------------------- disk and permission errors


def test_disk_full_mid_grid_records_a_failed_run_and_goes_on(tmp_path: Path, home: Path, monkeypatch, capsys) -> None:
    path = _exp(tmp_path, detectors=["pca", "rate_rule"])
    real = RunStore.write_scores
    calls = []

    def full_once(self, run_id, frame):
        calls.append(run_id)
        if len(calls) == 1:
            raise OSError(errno.ENOSPC, "No space left on device", str(self.path(run_id, ".scores.parquet")))
        return real(self, run_id, frame)

    monkeypatch.setattr(RunStore, "write_scores", full_once)
    code, err = _run_exit(path, capsys)
    assert code == 1 and "Traceback" not in err
    recs = {r["run_id"]: r for r in RunStore(tmp_path / "out").records()}
    assert len(recs) == 2
    assert recs[calls[0]]["status"] == "failed" and "No space left on device" in recs[calls[0]]["error"]
    assert recs[calls[1]]["status"] == "finished"
    # The next run retries the failed one only.
    monkeypatch.setattr(RunStore, "write_scores", real)
    assert main(["run", str(path), "--no-track"]) == 0


def test_unwritable_output_is_one_line_exit_1(tmp_path: Path, home: Path, monkeypatch, capsys) -> None:
    path = _exp(tmp_path)
    real = Path.mkdir

    def denied(self, *a, **k):
        if self.name == "out":
            raise PermissionError(errno.EACCES, "Permission denied", str(self))
        return real(self, *a, **k)

    monkeypatch.setattr(Path, "mkdir", denied)
    code, err = _run_exit(path, capsys)
    assert code == 1
    assert err.strip().count("\n") == 0 and "Permission denied" in err and "permissions" in err


# ---------------------------------------------------------------- MLflow rows after a kill


def test_running_mlflow_rows_are_closed_on_resume(tmp_path: Path, home: Path) -> None:
    from logtrial.running.tracking import Tracker
    from mlflow.entities import ViewType

    exp = load_experiment(_exp(tmp_path, detectors=["pca", "rate_rule"]))
    run_experiment(exp, home, progress=False, track=True)
    tracker = Tracker(exp.output, exp.name)
    # A kill between the MLflow write and the run-store write: a row left RUNNING, and (for a
    # finished run) its closed row missing.
    victim = exp.runs[0].run_id
    for old in tracker.existing(victim):
        tracker.client.delete_run(old)
    tracker.client.create_run(tracker.experiment_id, tags={"config_hash": victim})
    run_experiment(exp, home, progress=False, track=True)
    rows = tracker.client.search_runs([tracker.experiment_id], run_view_type=ViewType.ALL)
    assert not [r for r in rows if r.info.status == "RUNNING"]
    active = [r for r in rows if r.info.lifecycle_stage == "active"]
    assert sorted(r.data.tags["config_hash"] for r in active) == sorted(r.run_id for r in exp.runs)
    assert all(r.info.status == "FINISHED" for r in active)


# ---------------------------------------------------------------- smaller gaps


def test_every_cli_option_has_help() -> None:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    missing = [f"{verb} {a.dest}" for verb, sp in sub.choices.items() for a in sp._actions
               if a.dest != "help" and not a.help]
    assert not missing, missing


def test_report_has_no_mlflow_hint_when_tracking_was_off(tmp_path: Path, home: Path, capsys) -> None:
    path = _exp(tmp_path)
    assert main(["run", str(path), "--no-track"]) == 0
    capsys.readouterr()
    assert main(["report", str(path)]) == 0
    out = capsys.readouterr().out
    assert "mlflow ui" not in out
    results = (tmp_path / "out" / "results.csv").read_text()
    assert "size=1h step=1h" in results and "horizon=12h" in results and "0 days" not in results


def test_gate_takes_registry_and_removes_its_temporary_run(tmp_path: Path, home: Path, monkeypatch, capsys) -> None:
    import tempfile

    (tmp_path / "small.yaml").write_text(SMALL)
    path = tmp_path / "exp.yaml"
    # No `registry:` in the file: the dataset comes from --registry.
    path.write_text(yaml.safe_dump({"experiment": "g", "output": "out", "datasets": ["relay-tiny"],
                                    "windows": [{"kind": "time", "size": "1h"}],
                                    "task": {"name": "predict", "horizon": "12h"}, "detectors": ["pca"],
                                    "seeds": [1], "scoring": {"bootstrap": 20}}))
    reg = str(tmp_path / "small.yaml")
    assert main(["run", str(path), "--no-track", "--registry", reg]) == 0
    assert main(["report", str(path), "--registry", reg]) == 0
    temp_root = tmp_path / "tmp"
    temp_root.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(temp_root))
    assert main(["gate", str(path), "--registry", reg, "--mirror", str(tmp_path), "--quiet"]) == 0
    assert "PASS" in capsys.readouterr().out
    assert not list(temp_root.glob("logtrial-gate-*"))


def test_misspelt_registry_field_gets_a_suggestion(tmp_path: Path) -> None:
    from logtrial.data.registry import load_registry

    reg = tmp_path / "reg.yaml"
    reg.write_text(SMALL.replace("    logs: [fleet.log]", "    logz: [fleet.log]"))
    with pytest.raises(ConfigError, match=r"logz: unknown field \(did you mean `logs`\?\)"):
        load_registry([reg])


def test_unitless_label_gap_is_refused(tmp_path: Path) -> None:
    # pandas reads '60' as 60 nanoseconds: the registry refuses it instead.
    from logtrial.data.registry import load_registry

    reg = tmp_path / "reg.yaml"
    reg.write_text(SMALL.replace("labels: {scheme: incidents, file: incidents.csv}",
                                 "labels: {scheme: inline, gap: '60'}"))
    with pytest.raises(ConfigError, match=r"labels.gap: '60' has no unit"):
        load_registry([reg])
