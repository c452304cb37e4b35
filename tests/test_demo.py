"""`logtrial demo`, the README's first command: the whole job on the built-in scenario."""

from __future__ import annotations

from pathlib import Path

import yaml
from logtrial.cli import main
from logtrial.demo import DEMO_EXPERIMENT


def test_demo_runs_the_whole_job_on_a_smaller_grid(tmp_path: Path, home: Path, capsys) -> None:
    # The committed demo grid (18 detectors x 3 noise levels x 2 horizons) takes minutes; the
    # same pipeline on two of its detectors, one noise level and one horizon, on a smaller fleet
    # of the same kind, shows every stage works.
    doc = yaml.safe_load(DEMO_EXPERIMENT.read_text())
    doc.update(detectors=["rate_rule", "pca"], noise=doc["noise"][:1], seeds=doc["seeds"][:1], tasks=doc["tasks"][:1])
    fleet = yaml.safe_load((DEMO_EXPERIMENT.parent / doc["registry"][0]).read_text())
    entry = fleet["datasets"][doc["datasets"][0]]
    entry["generator"].update(nodes=12, days=60)
    (tmp_path / "fleet.yaml").write_text(yaml.safe_dump(fleet))
    doc["registry"] = ["fleet.yaml"]
    exp = tmp_path / "demo.yaml"
    exp.write_text(yaml.safe_dump(doc))
    out = tmp_path / "out"
    assert main(["demo", "--experiment", str(exp), "--out", str(out), "--no-track"]) == 0
    text = capsys.readouterr().out
    for stage in ("[1/4]", "[2/4]", "[3/4]", "[4/4]"):
        assert stage in text
    assert "grouping accuracy 1.0000" in text and "0 quarantined" in text
    assert "rate_rule" in text and "pca" in text and "2 runs finished, 0 failed" in text
    assert "DECISION" in text and "2 alarms/week/100" in text  # the decision section is printed
    assert text.index("DECISION") < text.index("All figures at the threshold policy")
    for name in ("report.md", "report.html", "results.csv", "operating_curves.png", "budget_dots.png",
                 "lead_times.png", "pr_curves.png"):
        assert (out / name).is_file(), name


def test_demo_refuses_a_bad_worker_count(tmp_path: Path, home: Path, capsys) -> None:
    assert main(["demo", "--workers", "0", "--out", str(tmp_path / "out")]) == 2
    assert "--workers: expected a whole number >= 1, got 0" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()
