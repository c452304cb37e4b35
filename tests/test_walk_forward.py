"""Walk-forward evaluation: config checks, every fold leak-free, and no decay with model age when nothing drifts."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import yaml
from conftest import relay_registry
from logtrial.cli import main
from logtrial.errors import ConfigError
from logtrial.running.experiment import load_experiment
from logtrial.running.runner import Runner
from logtrial.running.runs import run_experiment
from logtrial.running.store import RunStore
from logtrial.running.walk_forward import canonical_walk_forward, fold_splits, retraining_interval
from logtrial.windowing.splits import check_no_leakage
from scipy.stats import fisher_exact

# A small simulated fleet (ours, invented), drift off, with many failures so that age bins hold enough of them.
STEADY = relay_registry("relay-steady", "{nodes: 24, days: 200, seed: 11, line_rate: 2.0, "
                        "failures: {rate_per_node_year: 12.0, lead_time_hours: [6, 72]}}")
EVALUATION = {"kind": "walk_forward", "train": "42d", "validation": "14d", "test": "56d", "step": "28d",
              "window": "expanding", "age_bin": "14d"}


def _experiment(tmp_path: Path, **over) -> Path:
    (tmp_path / "steady.yaml").write_text(STEADY)
    doc = {
        "experiment": "walk-forward-steady", "registry": ["steady.yaml"], "output": "out",
        "datasets": ["relay-steady"], "windows": [{"kind": "time", "size": "6h"}],
        "task": {"name": "predict", "horizon": "24h"}, "evaluation": EVALUATION,
        "detectors": ["rate_rule", "logistic"], "seeds": [1], "threshold": {"kind": "best_f1"},
        "scoring": {"cooldown": "6h", "bootstrap": 0}, **over,
    }
    path = tmp_path / "exp.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path


@pytest.mark.parametrize(
    "raw, needle",
    [
        ({**EVALUATION, "kind": "holdout"}, "evaluation.kind: must be walk_forward"),
        ({k: v for k, v in EVALUATION.items() if k != "test"}, "evaluation.test: is required"),
        ({**EVALUATION, "window": "growing"}, "evaluation.window: must be expanding or sliding"),
        ({**EVALUATION, "age_bin": "90d"}, "evaluation.age_bin: must be positive and at most the test span"),
        ({**EVALUATION, "step": "-1d"}, "evaluation.step: must be a positive duration"),
        ({**EVALUATION, "tolerance": 2}, "evaluation.tolerance: expected a share between 0 and 1"),
        ({**EVALUATION, "folds": 3}, "evaluation.folds: unknown field"),
    ],
)
def test_bad_walk_forward_blocks_name_the_field(raw: dict, needle: str) -> None:
    with pytest.raises(ConfigError, match=needle.replace("(", r"\(").replace(")", r"\)")):
        canonical_walk_forward(raw)


def test_split_and_evaluation_together_exit_2(tmp_path: Path, home: Path, capsys) -> None:
    path = _experiment(tmp_path, split={"kind": "chronological"})
    assert main(["run", str(path)]) == 2
    assert "give `split` or `evaluation" in capsys.readouterr().err


def test_every_fold_is_leak_free_and_figures_hold_with_drift_off(tmp_path: Path, home: Path) -> None:
    exp = load_experiment(_experiment(tmp_path))
    assert run_experiment(exp, home, progress=False, track=False, workers=1)["finished"] == 2
    # every fold: training ends before validation, validation before the test span (embargo between)
    runner = Runner(exp, home, progress=False)
    run = exp.runs[0]
    base = runner.prepared(exp.runs[0].__class__(**{**run.__dict__, "split": {"kind": "chronological",
                                                                                 "fractions": [0.5, 0.2, 0.3]}}))
    folds = fold_splits(base.windows, run.split, base.horizon)
    assert len(folds) == 4
    meta = base.windows.meta
    for f in folds:
        check_no_leakage(f, base.windows)  # the harness's own guard: no window in two parts, embargo respected
        assert meta["end"].iloc[f.train].max() <= meta["start"].iloc[f.val].min()
        assert meta["end"].iloc[f.val].max() + f.embargo <= meta["start"].iloc[f.test].min()
        assert f.embargo >= base.horizon  # labels of the last training windows look no further than the test span
    records = {r["config"]["detector"]["name"]: r for r in RunStore(exp.output).records()}
    for name, rec in records.items():
        wf = rec["walk_forward"]
        assert len(wf["folds"]) == 4
        rows = wf["by_age"]["threshold"]
        assert [r["age_days"] for r in rows] == [0, 14, 28, 42]
        # With drift off nothing changes with model age: compare failures predicted by fresh models (first half
        # of the ages) with older ones (second half) by Fisher's exact test (scipy.stats.fisher_exact, one-sided).
        early = [sum(r["predicted"] for r in rows[:2]), sum(r["failures"] - r["predicted"] for r in rows[:2])]
        late = [sum(r["predicted"] for r in rows[2:]), sum(r["failures"] - r["predicted"] for r in rows[2:])]
        assert sum(early) >= 30 and sum(late) >= 30, (name, early, late)
        _, p = fisher_exact([early, late], alternative="greater")
        assert p > 0.01, (name, early, late, p)


def test_retraining_interval_needs_a_drop_beyond_tolerance_and_noise() -> None:
    def rows(*pairs):
        return [{"age_days": 14 * i, "predicted": k, "failures": n} for i, (k, n) in enumerate(pairs)]

    # fresh 80/100; from 28 days on 50/100 and 45/100: a drop of 30 points, far beyond noise
    assert retraining_interval(rows((80, 100), (78, 100), (50, 100), (45, 100)), 0.1) == 28
    assert retraining_interval(rows((80, 100), (78, 100), (50, 100), (45, 100)), 0.4) is None  # within tolerance
    # the same shares on 10 failures per bin are not beyond noise (Fisher's exact test, one-sided)
    assert retraining_interval(rows((8, 10), (8, 10), (5, 10), (4, 10)), 0.1) is None
    # bins without failures are skipped; a single bin has nothing to compare
    assert retraining_interval(rows((80, 100), (0, 0), (40, 100)), 0.1) == 28
    assert retraining_interval(rows((80, 100)), 0.1) is None


def test_readme_walk_forward_example_loads(tmp_path: Path) -> None:
    import re

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    block = next(b for b in re.findall(r"```yaml\n(.*?)```", readme, flags=re.S) if b.startswith("# Walk-forward"))
    (tmp_path / "exp.yaml").write_text(block)
    exp = load_experiment(tmp_path / "exp.yaml")
    assert len(exp.runs) == 2
    assert exp.runs[0].split["kind"] == "walk_forward" and exp.runs[0].split["age_bin"] == "7 days 00:00:00"


def test_each_fold_fits_its_semantic_vocabulary_on_its_own_training_windows(tmp_path: Path, home: Path) -> None:
    # The rule of issue 13 applied per fold: no template first seen after a fold's training span shapes its
    # vocabulary. Checked against the fold's own training windows counted with numpy.
    exp = load_experiment(_experiment(tmp_path, vocabularies=[{"kind": "semantic", "k": 4}],
                                      detectors=["rate_rule"]))
    runner = Runner(exp, home, progress=False)
    run = exp.runs[0]
    base = runner.prepared(replace(run, split={"kind": "chronological", "fractions": [0.5, 0.2, 0.3]},
                                   vocabulary={"kind": "templates"}))
    folds = fold_splits(base.windows, run.split, base.horizon)
    seen_per_fold = []
    for i, fold in enumerate(folds):
        prep = runner.prepared(replace(run, split={**run.split, "fold": i}))
        seen = len(np.unique(base.windows.subset(fold.train).seq_values))
        assert prep.windows.info["vocabulary_seen_templates"] == seen
        assert prep.split is not None and len(prep.split.train) == len(fold.train)
        seen_per_fold.append(seen)
    # expanding training windows see at least as many templates as the fold before
    assert seen_per_fold == sorted(seen_per_fold)
