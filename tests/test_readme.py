"""The README's two set-up commands stay true: CI runs the README's test command verbatim."""

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _code_blocks(text: str) -> list[str]:
    return [b.strip() for b in re.findall(r"```\n(.*?)```", text, flags=re.S)]


def test_ci_runs_the_readme_test_command() -> None:
    readme = (ROOT / "README.md").read_text()
    blocks = _code_blocks(readme)
    test_cmd = next(b for b in blocks if "pytest" in b)
    ci = (ROOT / ".ci" / "run").read_text().splitlines()
    assert test_cmd in ci, f"README test command {test_cmd!r} not found verbatim in .ci/run"


def test_readme_first_command_runs_the_demo() -> None:
    readme = (ROOT / "README.md").read_text()
    first = _code_blocks(readme)[0]
    assert first.endswith("logtrial demo")
    assert "torch==2.13.0" in first


def _yaml_blocks(text: str) -> list[str]:
    return re.findall(r"```yaml\n(.*?)```", text, flags=re.S)


def test_readme_examples_are_valid(tmp_path: Path) -> None:
    # The format-file and experiment-file examples in the README load as written.
    from logtrial.data.registry import format_from_file, miner_from_file
    from logtrial.running.experiment import load_experiment

    blocks = _yaml_blocks((ROOT / "README.md").read_text())
    fmt = next(b for b in blocks if b.startswith("regex:") or b.startswith("# app-format.yaml\nregex:"))
    exp = next(b for b in blocks if b.startswith("experiment:"))
    (tmp_path / "fmt.yaml").write_text(fmt)
    assert "content" in format_from_file(tmp_path / "fmt.yaml").compiled().groupindex
    assert miner_from_file(tmp_path / "fmt.yaml").masks == [r"\d+(?:\.\d+)*"]
    (tmp_path / "exp.yaml").write_text(exp)
    loaded = load_experiment(tmp_path / "exp.yaml")
    assert len(loaded.runs) == 1 * 2 * 1 * 1 * 2 * 6 * 2  # datasets x vocabularies x windows x task x noise x detectors x seeds
