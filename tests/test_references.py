"""Committed reference experiments regenerate to exactly the committed numbers."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from logtrial.output.report import load_results
from logtrial.running.experiment import load_experiment
from logtrial.running.runs import run_experiment
from logtrial.running.store import RunStore

ROOT = Path(__file__).resolve().parents[1]


def _regenerate(name: str, tmp_path: Path, home: Path, detectors: set[str] | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    exp_path = ROOT / "reports" / name / "experiment.yaml"
    committed = pd.read_csv(ROOT / "reports" / name / "results" / "results.csv")
    exp = load_experiment(exp_path, output=tmp_path / name)
    only = (lambda r: r.detector_label in detectors) if detectors else None
    counts = run_experiment(exp, home, progress=False, track=False, only=only)
    assert counts["failed"] == 0
    fresh_path = tmp_path / f"{name}.csv"
    load_results(RunStore(exp.output).records()).to_csv(fresh_path, index=False, float_format="%.6g")
    fresh = pd.read_csv(fresh_path)
    if detectors:
        committed = committed[committed["detector"].isin(detectors)]
    key = ["run_id"]
    return (committed.sort_values(key).reset_index(drop=True),
            fresh.sort_values(key).reset_index(drop=True)[committed.columns])


def test_bgl_2k_reference_regenerates_exactly(loghub_dir: Path, tmp_path: Path, home: Path, monkeypatch) -> None:
    # Real logs (Loghub BGL 2k sample); the committed table is the reference.
    monkeypatch.setenv("LOGTRIAL_MIRROR", str(loghub_dir))
    committed, fresh = _regenerate("bgl-2k", tmp_path, home)
    assert len(fresh) == len(committed) == 22
    pd.testing.assert_frame_equal(fresh, committed, check_exact=True, check_dtype=False)


def test_demo_reference_regenerates_exactly_for_two_detectors(tmp_path: Path, home: Path) -> None:
    # The full demo grid takes minutes; two detectors (one trained on healthy windows, one
    # on reported labels) over every noise level and seed cover the label-dependent paths.
    committed, fresh = _regenerate("demo", tmp_path, home, {"rate_rule", "logistic"})
    assert len(fresh) == len(committed) > 0
    pd.testing.assert_frame_equal(fresh, committed, check_exact=True, check_dtype=False)


@pytest.mark.parametrize("name", ["demo", "bgl-2k"])
def test_reference_experiments_are_committed_with_results(name: str) -> None:
    for name in (name,):
        folder = ROOT / "reports" / name
        assert (folder / "experiment.yaml").is_file()
        for f in ("results.csv", "summary.csv", "report.md", "report.html", "operating_curves.png", "budget_dots.png"):
            assert (folder / "results" / f).is_file(), f"{name}: {f} missing"
        exp = load_experiment(folder / "experiment.yaml")
        table = pd.read_csv(folder / "results" / "results.csv")
        assert set(table["run_id"]) == {r.run_id for r in exp.runs}, f"{name}: committed results are stale"
        # The decision section comes first and names, per budget, the best detector.
        report = (folder / "results" / "report.md").read_text()
        assert report.index("## Decision") < report.index("## All figures")
        for b in exp.runs[0].budgets:
            assert f"{b:g} alarms/week/100" in report

