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
