"""Gate: an unchanged detector passes, a degraded one fails naming the metric, a missing reference is clear."""

from __future__ import annotations

import os
from importlib.metadata import EntryPoint
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from logtrial.cli import main
from logtrial.detectors.rate_rule import RateRule
from logtrial.output.gate import compare
from test_runs import SMALL_REGISTRY

DEGRADE_ENV = "LOGTRIAL_TEST_DEGRADE"


class NoisyRate(RateRule):
    """A test plugin: the rate rule with seeded noise added to its scores when asked to degrade."""

    name = "noisy_rate"

    def _score(self, windows):
        scores = super()._score(windows)
        level = float(os.environ.get(DEGRADE_ENV, "0"))
        if level:
            rng = np.random.default_rng(self.seed)
            scores = scores + rng.normal(0.0, level * (scores.std() + 1e-9), size=len(scores))
        return scores


@pytest.fixture()
def plugin(monkeypatch: pytest.MonkeyPatch) -> None:
    """Install NoisyRate through the real entry-point path."""
    import logtrial.detectors.catalogue as cat

    ep = EntryPoint(name="noisy_rate", value="test_gate:NoisyRate", group=cat.ENTRY_POINT_GROUP)
    monkeypatch.setattr(cat, "entry_points", lambda group: [ep] if group == cat.ENTRY_POINT_GROUP else [])


def _experiment(tmp_path: Path) -> Path:
    (tmp_path / "small.yaml").write_text(SMALL_REGISTRY)
    doc = {
        "experiment": "gate-grid", "registry": ["small.yaml"], "output": "reference",
        "datasets": ["relay-small"], "windows": [{"kind": "time", "size": "1h"}],
        "task": {"name": "predict", "horizon": "12h"},
        "noise": [{"name": "clean", "level": 0.0}], "detectors": ["noisy_rate", "pca"], "seeds": [1],
        "threshold": {"kind": "best_f1"}, "scoring": {"cooldown": "2h", "bootstrap": 100},
        "gate": {"metrics": ["auprc", "auroc", "recall_predicted"], "tolerance": 0.02},
    }
    path = tmp_path / "exp.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path


def test_unchanged_passes_and_degraded_fails(tmp_path: Path, home: Path, plugin, monkeypatch, capsys) -> None:
    exp = _experiment(tmp_path)
    assert main(["run", str(exp), "--no-track"]) == 0
    assert main(["report", str(exp)]) == 0
    capsys.readouterr()
    assert main(["gate", str(exp), "--quiet", "--out", str(tmp_path / "fresh1")]) == 0
    out = capsys.readouterr().out
    assert "PASS" in out and "(no figure moved)" in out
    monkeypatch.setenv(DEGRADE_ENV, "3.0")
    assert main(["gate", str(exp), "--quiet", "--out", str(tmp_path / "fresh2")]) == 1
    out = capsys.readouterr().out
    assert "FAIL" in out and "noisy_rate" in out and "REGRESSION" in out
    assert "auroc" in out and "drop of" in out
    # The untouched detector is not blamed.
    bad = [ln for ln in out.splitlines() if "REGRESSION" in ln]
    assert bad and all(ln.startswith("noisy_rate") for ln in bad)
    # Reading an existing fresh folder gives the same verdict without re-running.
    assert main(["gate", str(exp), "--fresh", str(tmp_path / "fresh2")]) == 1


def test_missing_reference_is_a_clear_error(tmp_path: Path, home: Path, plugin, capsys) -> None:
    exp = _experiment(tmp_path)
    assert main(["gate", str(exp), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "reference" in err and "results.csv not found" in err and "logtrial run" in err


def _frame(values: dict, low: dict | None = None, high: dict | None = None) -> pd.DataFrame:
    row = {"dataset": "d", "windows": "kind=time size=0 days 01:00:00", "task": "name=predict horizon=12h",
           "noise": "clean", "detector": "x", "seed": 0, **values}
    for k, v in (low or {}).items():
        row[f"{k}_low"] = v
    for k, v in (high or {}).items():
        row[f"{k}_high"] = v
    return pd.DataFrame([row])


def test_allowed_drop_is_the_larger_of_tolerance_and_reference_interval() -> None:
    ref = _frame({"recall_predicted": 0.80}, low={"recall_predicted": 0.60}, high={"recall_predicted": 0.95})
    # 0.65 is inside the reference interval (worse end 0.60): not a regression.
    ok = compare(ref, _frame({"recall_predicted": 0.65}), ["recall_predicted"], tolerance=0.02)
    assert ok.passed
    bad = compare(ref, _frame({"recall_predicted": 0.55}), ["recall_predicted"], tolerance=0.02)
    assert not bad.passed and bad.table["note"].iloc[0].startswith("drop of 0.25")
    # Without an interval only the absolute tolerance applies.
    ref2 = _frame({"auprc": 0.50})
    assert compare(ref2, _frame({"auprc": 0.485}), ["auprc"], tolerance=0.02).passed
    assert not compare(ref2, _frame({"auprc": 0.47}), ["auprc"], tolerance=0.02).passed
    # Lower is better for false alarms: a rise beyond the interval's worse end fails.
    ref3 = _frame({"false_alarms_per_predicted_failure": 4.0}, low={"false_alarms_per_predicted_failure": 3.0},
                  high={"false_alarms_per_predicted_failure": 6.0})
    assert compare(ref3, _frame({"false_alarms_per_predicted_failure": 5.9}),
                   ["false_alarms_per_predicted_failure"]).passed
    assert not compare(ref3, _frame({"false_alarms_per_predicted_failure": 6.5}),
                       ["false_alarms_per_predicted_failure"]).passed
    # A configuration that disappeared from the fresh run is a regression.
    gone = compare(ref2, _frame({"auprc": 0.5}).assign(detector="y"), ["auprc"])
    assert not gone.passed and "missing" in gone.table["note"].iloc[0]
