"""`logtrial demo`, the README's first command: the whole job on the built-in scenario."""

from __future__ import annotations

from pathlib import Path

import yaml
from logtrial.cli import main
from logtrial.demo import DEMO_EXPERIMENT


def test_demo_runs_the_whole_job_on_a_smaller_grid(tmp_path: Path, home: Path, capsys) -> None:
    # The committed demo grid (15 detectors x 3 noise levels x 2 seeds) takes minutes; the
    # same pipeline on two of its detectors, one noise level and one seed shows every stage works.
    doc = yaml.safe_load(DEMO_EXPERIMENT.read_text())
    doc.update(detectors=["rate_rule", "pca"], noise=doc["noise"][:1], seeds=doc["seeds"][:1])
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
