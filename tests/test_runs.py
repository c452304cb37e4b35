"""Experiment runs: validation, resume, determinism, failure isolation, tracking, reports, noise effect."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest
from conftest import relay_registry
from logtrial.cli import main
from logtrial.errors import ConfigError
from logtrial.running.experiment import load_experiment
from logtrial.running.runs import run_experiment
from logtrial.running.store import RunStore

# A small simulated fleet (ours, invented) so that a whole grid runs in seconds.
SMALL_REGISTRY = relay_registry("relay-small", "{nodes: 10, days: 45, seed: 11, line_rate: 2.0, failures: {rate_per_node_year: 12.0, lead_time_hours: [4, 72], precursor_visibility: 1.0}}")


def _experiment(tmp_path: Path, **over) -> Path:
    (tmp_path / "small.yaml").write_text(SMALL_REGISTRY)
    doc = {
        "experiment": "small-grid",
        "registry": ["small.yaml"],
        "output": "out",
        "datasets": ["relay-small"],
        "windows": [{"kind": "time", "size": "1h"}],
        "task": {"name": "predict", "horizon": "12h"},
        "split": {"kind": "chronological", "fractions": [0.5, 0.2, 0.3]},
        "noise": [{"name": "clean", "level": 0.0}, {"name": "drop-60", "level": 0.6, "drop": {"p": 0.6}}],
        "detectors": ["pca", "rate_rule", "logistic"],
        "seeds": [1],
        "threshold": {"kind": "best_f1"},
        "scoring": {"cooldown": "2h", "bootstrap": 50},
        **over,
    }
    path = tmp_path / "exp.yaml"
    import yaml

    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path


def test_grid_runs_tracks_and_reports(tmp_path: Path, home: Path) -> None:
    exp = load_experiment(_experiment(tmp_path))
    assert len(exp.runs) == 6 and len({r.run_id for r in exp.runs}) == 6
    counts = run_experiment(exp, home, progress=False)
    assert counts == {"finished": 6, "failed": 0, "skipped": 0}
    records = RunStore(exp.output).records()
    assert all(r["status"] == "finished" for r in records)
    # Fitted models are reused where only labels the detector does not read changed:
    # PCA trains on all windows, so its second noise level reuses the first fit.
    pca = sorted((r for r in records if r["config"]["detector"]["name"] == "pca"),
                 key=lambda r: r["config"]["noise"]["name"])
    assert [r["timing"]["reused_fit"] for r in pca] == [False, True]
    assert all(0 <= r["metrics"]["auroc"] <= 1 for r in records)
    # MLflow (reference library) holds exactly one run per config hash, tagged with it.
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=f"sqlite:///{exp.output / 'mlflow.db'}")
    mexp = client.get_experiment_by_name("small-grid")
    runs = client.search_runs([mexp.experiment_id])
    assert sorted(r.data.tags["config_hash"] for r in runs) == sorted(r.run_id for r in exp.runs)
    assert all("auprc" in r.data.metrics for r in runs)
    # Report files.
    assert main(["report", str(exp.path)]) == 0
    html = (exp.output / "report.html").read_text()
    assert "data:image/png;base64," in html and "<script" not in html and 'src="http' not in html
    md = (exp.output / "report.md").read_text()
    for det in ("pca", "rate_rule", "logistic"):
        assert f"| {det} |" in md
    table = pd.read_csv(exp.output / "results.csv")
    assert len(table) == 6 and {"auprc", "recall_predicted", "false_alarms_per_predicted_failure"} <= set(table)


def test_resume_after_a_crash_runs_each_config_once(tmp_path: Path, home: Path) -> None:
    exp = load_experiment(_experiment(tmp_path))
    seen: list[str] = []

    class Crash(Exception):
        pass

    def crash_after_two(record: dict) -> None:
        seen.append(record["run_id"])
        if len(seen) == 2:
            raise Crash("simulated crash mid-grid")

    with pytest.raises(Crash):
        run_experiment(exp, home, progress=False, on_finish=crash_after_two)
    assert len(RunStore(exp.output).records()) == 2
    counts = run_experiment(exp, home, progress=False, on_finish=lambda r: seen.append(r["run_id"]))
    assert counts == {"finished": 4, "failed": 0, "skipped": 2}
    assert sorted(seen) == sorted(r.run_id for r in exp.runs)  # each config executed exactly once
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=f"sqlite:///{exp.output / 'mlflow.db'}")
    runs = client.search_runs([client.get_experiment_by_name("small-grid").experiment_id])
    hashes = [r.data.tags["config_hash"] for r in runs]
    assert sorted(hashes) == sorted(set(hashes)) and len(hashes) == 6


def test_same_experiment_twice_gives_identical_results(tmp_path: Path, home: Path) -> None:
    exp1 = load_experiment(_experiment(tmp_path), output=tmp_path / "a")
    exp2 = load_experiment(_experiment(tmp_path), output=tmp_path / "b")
    run_experiment(exp1, home, progress=False, track=False)
    run_experiment(exp2, home, progress=False, track=False)
    from logtrial.output.report import write_report

    t1 = write_report(exp1.output, "a")["table"]
    t2 = write_report(exp2.output, "b")["table"]
    pd.testing.assert_frame_equal(t1, t2)
    r1 = pd.read_csv(exp1.output / "results.csv")
    r2 = pd.read_csv(exp2.output / "results.csv")
    pd.testing.assert_frame_equal(r1, r2)


def test_a_failing_run_is_recorded_and_the_rest_continue(tmp_path: Path, home: Path, monkeypatch) -> None:
    exp = load_experiment(_experiment(tmp_path, detectors=["pca", "rate_rule"], noise=[{"name": "clean"}]))
    from logtrial.detectors.pca import PCADetector

    def boom(self, windows, labels):
        raise RuntimeError("deliberate failure inside fit")

    monkeypatch.setattr(PCADetector, "_fit", boom)
    # in this process (one worker), where the patched fit is the one that runs
    counts = run_experiment(exp, home, progress=False, track=False, workers=1)
    assert counts["failed"] == 1 and counts["finished"] == 1
    failed = [r for r in RunStore(exp.output).records() if r["status"] == "failed"][0]
    assert "deliberate failure inside fit" in failed["error"] and "Traceback" in failed["traceback"]
    assert "pca" in failed["error"]


def test_noise_has_an_effect_on_healthy_trained_detectors(tmp_path: Path, home: Path) -> None:
    # More unreported failures leak into the "healthy" training data and into validation
    # labels: the rate rule (trained on healthy windows) must predict fewer failures or
    # raise more false alarms per predicted failure (direction asserted, seeds fixed).
    noise = [{"name": "clean", "level": 0.0}, {"name": "drop-70", "level": 0.7, "drop": {"p": 0.7},
                                               "delay": {"dist": "uniform", "high": "2d"}}]
    exp = load_experiment(_experiment(tmp_path, detectors=["rate_rule", "log_clustering"], noise=noise,
                                      seeds=[1, 2]))
    run_experiment(exp, home, progress=False, track=False)
    rows = pd.DataFrame([{"det": r["config"]["detector"]["name"], "noise": r["config"]["noise"]["name"],
                          "recall": r["metrics"]["recall_predicted"],
                          "fa": r["metrics"]["false_alarms_per_predicted_failure"]}
                         for r in RunStore(exp.output).records()])
    mean = rows.groupby(["det", "noise"]).mean()
    worse = 0
    for det in ("rate_rule", "log_clustering"):
        clean, noisy = mean.loc[(det, "clean")], mean.loc[(det, "drop-70")]
        if noisy["recall"] < clean["recall"] - 0.02 or noisy["fa"] > clean["fa"] * 1.05:
            worse += 1
    assert worse >= 1, mean


@pytest.mark.parametrize(
    "change, needle",
    [
        ({"detectors": ["pca", "no_such_detector"]}, "unknown detector 'no_such_detector'"),
        ({"datasets": ["no-such-dataset"]}, "unknown dataset 'no-such-dataset'"),
        ({"noise": [{"name": "bad", "drop": {"p": 1.5}}]}, "noise.drop.p: must be between 0 and 1"),
        ({"windows": [{"kind": "time", "size": "0h"}]}, "windows[0].size: must be positive"),
        ({"task": {"name": "predict", "horizon": "30min"}}, "horizon must be at least the window size"),
        ({"threshold": {"kind": "best_accuracy"}}, "threshold"),
        ({"colour": "blue"}, "`colour`: unknown field"),
    ],
)
def test_bad_experiment_file_exit_2_and_nothing_recorded(tmp_path: Path, home: Path, capsys, change, needle) -> None:
    path = _experiment(tmp_path, **change)
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert "exp.yaml" in err and needle in err
    assert not (tmp_path / "out").exists()


def test_run_ids_are_stable_and_change_with_the_config(tmp_path: Path) -> None:
    a = load_experiment(_experiment(tmp_path))
    b = load_experiment(_experiment(tmp_path))
    assert [r.run_id for r in a.runs] == [r.run_id for r in b.runs]
    c = load_experiment(_experiment(tmp_path, scoring={"cooldown": "3h", "bootstrap": 50}))
    assert not {r.run_id for r in a.runs} & {r.run_id for r in c.runs}
    rec = json.dumps(a.runs[0].canonical(), sort_keys=True)
    assert "relay-small" in rec and "code_version" in rec


def test_random_split_runs_and_warns_in_the_record(tmp_path: Path, home: Path) -> None:
    exp = load_experiment(_experiment(tmp_path, split={"kind": "random", "fractions": [0.5, 0.2, 0.3]},
                                      detectors=["pca"], noise=[{"name": "clean"}]))
    counts = run_experiment(exp, home, progress=False, track=False)
    assert counts["finished"] == 1
    rec = RunStore(exp.output).records()[0]
    assert rec["warnings"] and "random" in rec["warnings"][0].lower()


def test_semantic_vocabulary_is_a_grid_axis(tmp_path: Path, home: Path) -> None:
    exp = load_experiment(_experiment(tmp_path, detectors=["pca"], noise=[{"name": "clean"}],
                                      vocabularies=["templates", {"kind": "semantic", "k": 6, "epochs": 50}]))
    assert len(exp.runs) == 2 and len({r.run_id for r in exp.runs}) == 2
    # The default vocabulary leaves run ids as they were before vocabularies existed.
    plain = load_experiment(_experiment(tmp_path, detectors=["pca"], noise=[{"name": "clean"}]))
    assert plain.runs[0].run_id in {r.run_id for r in exp.runs}
    run_experiment(exp, home, progress=False, track=False)
    recs = {r["config"].get("vocabulary", {}).get("kind", "templates"): r for r in RunStore(exp.output).records()}
    assert recs["templates"]["status"] == recs["semantic"]["status"] == "finished"
    from logtrial.output.report import write_report

    table = write_report(exp.output, "vocab")["table"]
    assert set(table["vocabulary"]) == {"templates", "semantic epochs=50 k=6"}


def test_bad_vocabulary_names_the_field(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"vocabularies\[1\]\.k"):
        load_experiment(_experiment(tmp_path, vocabularies=["templates", {"kind": "semantic"}]))
