"""The installed layout: one top-level import name, stage sub-packages, and no import cycles.

Checked with the standard library only (``ast`` for imports, Tarjan's strongly connected
components for cycles, ``importlib.metadata`` for what the distribution installs).
"""

from __future__ import annotations

import ast
import importlib.metadata as md
import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
# Folders as the build maps them to import names (pyproject.toml, tool.setuptools.package-dir).
ROOTS = {"logtrial": ROOT / "harness", "logtrial.detectors": ROOT / "detectors"}
STAGES = ("data", "simulation", "labels", "windowing", "evaluation", "running", "output")


def _modules() -> dict[str, Path]:
    """Every module of the package by dotted name (packages by their own name)."""
    out: dict[str, Path] = {}
    for prefix, folder in ROOTS.items():
        for path in folder.rglob("*.py"):
            rel = path.relative_to(folder).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            out[".".join([prefix, *parts])] = path
    return out


def _imports(path: Path, name: str, known: set[str]) -> set[str]:
    """Package modules this file imports anywhere (module level, functions, TYPE_CHECKING blocks)."""
    is_pkg = path.name == "__init__.py"
    base = name if is_pkg else name.rpartition(".")[0]
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            mod = node.module or ""
            if node.level:
                anchor = base.split(".")[: len(base.split(".")) - (node.level - 1)]
                mod = ".".join([*anchor, mod] if mod else anchor)
            targets = [f"{mod}.{a.name}" if f"{mod}.{a.name}" in known else mod for a in node.names]
        else:
            continue
        for t in targets:
            while t and t not in known:  # `import a.b.c` names module a.b.c, or its nearest known parent
                t = t.rpartition(".")[0]
            if t and t != name:
                found.add(t)
    return found


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan, iterative)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    out: list[list[str]] = []
    counter = 0
    for start in sorted(graph):
        if start in index:
            continue
        work = [(start, iter(sorted(graph[start])))]
        index[start] = low[start] = counter
        counter += 1
        stack.append(start)
        on.add(start)
        while work:
            node, it = work[-1]
            nxt = next(it, None)
            if nxt is not None:
                if nxt not in index:
                    index[nxt] = low[nxt] = counter
                    counter += 1
                    stack.append(nxt)
                    on.add(nxt)
                    work.append((nxt, iter(sorted(graph.get(nxt, ())))))
                elif nxt in on:
                    low[node] = min(low[node], index[nxt])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                comp = []
                while True:
                    w = stack.pop()
                    on.discard(w)
                    comp.append(w)
                    if w == node:
                        break
                if len(comp) > 1:
                    out.append(sorted(comp))
    return out


def _graph() -> dict[str, set[str]]:
    mods = _modules()
    known = set(mods)
    parents = {m.rpartition(".")[0] for m in known}
    graph = {}
    for name, path in mods.items():
        # Importing a sub-module runs its package's __init__; that edge is implied, not a dependency.
        graph[name] = {t for t in _imports(path, name, known) if not (t in parents and name.startswith(t + "."))}
    return graph


def test_the_cycle_finder_finds_a_planted_cycle() -> None:
    # reference: a hand-made graph with one 3-cycle and a tail (Tarjan, SIAM J. Comput. 1972).
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a", "d"}, "d": set()}
    assert _cycles(graph) == [["a", "b", "c"]]


def test_no_import_cycles_in_the_package() -> None:
    graph = _graph()
    assert len(graph) > 40
    assert _cycles(graph) == []


def test_each_stage_is_a_sub_package_with_its_modules() -> None:
    mods = _modules()
    for stage in STAGES:
        assert f"logtrial.{stage}" in mods, stage
    for expected in ("logtrial.data.ingest", "logtrial.labels.noise", "logtrial.windowing.windows",
                     "logtrial.evaluation.thresholds", "logtrial.running.runner", "logtrial.output.gate",
                     "logtrial.simulation.simulate", "logtrial.cli", "logtrial.demo", "logtrial.detectors.base"):
        assert expected in mods, expected
    # Nothing is left flat at the top except the command line, the demo and the shared error types.
    top = {m for m in mods if m.count(".") == 1 and not m.startswith("logtrial.detectors")}
    assert top == {"logtrial.cli", "logtrial.demo", "logtrial.errors", *(f"logtrial.{s}" for s in STAGES)}


def test_outside_the_checkout_only_logtrial_is_importable(tmp_path: Path) -> None:
    # Run from a folder that is not the checkout, so only installed names can be found.
    code = ("import importlib.util as u, logtrial, logtrial.detectors.registry as r; "
            "print(u.find_spec('harness') is None, u.find_spec('detectors') is None, "
            "logtrial.__file__, logtrial.detectors.__file__, sorted(r.BUILTINS)[:1])")
    out = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True,
                         env={k: v for k, v in os.environ.items() if k != "PYTHONPATH"}, check=True).stdout.split()
    assert out[:2] == ["True", "True"], out
    assert Path(out[2]).parent == ROOTS["logtrial"]
    assert Path(out[3]).parent == ROOTS["logtrial.detectors"]
    assert md.entry_points(group="console_scripts", name="logtrial")
    assert next(iter(md.entry_points(group="console_scripts", name="logtrial"))).value == "logtrial.cli:main"


@pytest.mark.slow
def test_the_built_wheel_holds_one_top_level_package(tmp_path: Path) -> None:
    # reference: the wheel format (PEP 427): every installed file is listed in the archive.
    pytest.importorskip("setuptools")
    subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "--no-build-isolation", "-w",
                    str(tmp_path), str(ROOT)], check=True, capture_output=True)
    wheel = next(tmp_path.glob("logtrial-*.whl"))
    with zipfile.ZipFile(wheel) as zf:
        names = zf.namelist()
    tops = {n.split("/")[0] for n in names if not n.split("/")[0].endswith(".dist-info")}
    assert tops == {"logtrial"}, tops
    assert "logtrial/detectors/base.py" in names and "logtrial/running/runner.py" in names
    assert "logtrial/data/ingest.py" in names
