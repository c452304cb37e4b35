"""The plugin example in DEVELOPERS.md is a real third-party package: built, installed, found and scored.

Reference: the entry-point mechanism of the packaging specifications (entry points
specification, PyPA), read through the standard library's ``importlib.metadata``.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "examples" / "plugin"


def test_the_guide_shows_the_example_package_as_it_is() -> None:
    guide = (ROOT / "DEVELOPERS.md").read_text()
    module = (EXAMPLE / "my_detectors.py").read_text()
    blocks = re.findall(r"```python\n(.*?)```", guide, re.S)
    assert module in blocks, "DEVELOPERS.md's plugin module differs from examples/plugin/my_detectors.py"
    toml = (EXAMPLE / "pyproject.toml").read_text()
    assert 'max_count = "my_detectors:MaxCount"' in toml and '[project.entry-points."logtrial.detectors"]' in toml


@pytest.mark.slow
def test_the_example_plugin_installs_and_scores(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, make_windows) -> None:
    pytest.importorskip("setuptools")
    target = tmp_path / "site"
    source = tmp_path / "plugin"
    shutil.copytree(EXAMPLE, source)  # build from a copy: the checkout stays clean
    # A real build and install of the example package (no network: build isolation off, no deps).
    subprocess.run([sys.executable, "-m", "pip", "install", "-q", "--no-deps", "--no-build-isolation",
                    "--target", str(target), str(source)], check=True, capture_output=True)
    assert list(target.glob("my_detectors-*.dist-info/entry_points.txt"))
    monkeypatch.syspath_prepend(str(target))
    from logtrial.detectors.registry import available, create

    assert "max_count" in available()
    det = create("max_count", {"scale": 2.0}, seed=0)
    ws = make_windows(np.array([[1, 0, 2], [0, 0, 1], [5, 1, 0]]))
    det.fit(ws, None)
    scores = det.score(ws)
    # By hand: row maxima 2, 1, 5; mean 8/3; scale 2.
    np.testing.assert_allclose(scores, 2.0 * (np.array([2, 1, 5]) - 8 / 3))
