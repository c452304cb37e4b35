"""Alarm budgets end to end: the YAML key, the at_budget record contract, no refit, the report and the browser.

References: the direct threshold policy (logtrial.evaluation.thresholds, itself checked
against hand-made timelines) recomputed from the stored validation scores; headless
Chromium (Debian package `chromium`) rendering report.html.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import relay_registry
from logtrial.cli import main
from logtrial.errors import ConfigError
from logtrial.evaluation.thresholds import budget_policy, choose_threshold
from logtrial.running.experiment import load_experiment
from logtrial.running.store import RunStore

REGISTRY = relay_registry("relay-budget", "{nodes: 12, days: 40, seed: 5, line_rate: 2.0, failures: "
                                          "{rate_per_node_year: 15.0, lead_time_hours: [4, 48], precursor_visibility: 1.0}}")


def _doc(**over) -> dict:
    return {
        "experiment": "budget-grid", "registry": ["small.yaml"], "output": "out",
        "datasets": ["relay-budget"], "windows": [{"kind": "time", "size": "1h"}],
        "task": {"name": "predict", "horizon": "12h"},
        "noise": [{"name": "clean", "level": 0.0}, {"name": "drop-50", "level": 0.5, "drop": {"p": 0.5}}],
        "detectors": ["rate_rule", "pca", "logistic"], "seeds": [1],
        "threshold": {"kind": "best_f1"}, "budgets": [2, 5, 20],
        "scoring": {"cooldown": "2h", "bootstrap": 100}, **over,
    }


def _write(folder: Path, **over) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "small.yaml").write_text(REGISTRY)
    path = folder / "exp.yaml"
    path.write_text(yaml.safe_dump(_doc(**over), sort_keys=False))
    return path


@pytest.fixture(scope="module")
def grid(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small grid with budgets, run and reported once for the module (its own data home)."""
    import os

    folder = tmp_path_factory.mktemp("budgets")
    old = os.environ.get("LOGTRIAL_HOME")
    os.environ["LOGTRIAL_HOME"] = str(folder / "home")
    try:
        from logtrial.detectors.pca import PCADetector

        calls = {"n": 0}
        original = PCADetector._fit

        def counting(self, windows, labels):
            calls["n"] += 1
            return original(self, windows, labels)

        PCADetector._fit = counting
        try:
            exp = _write(folder)
            assert main(["run", str(exp), "--no-track"]) == 0
        finally:
            PCADetector._fit = original
        (folder / "pca_fits").write_text(str(calls["n"]))
    finally:
        if old is None:
            os.environ.pop("LOGTRIAL_HOME", None)
        else:
            os.environ["LOGTRIAL_HOME"] = old
    return folder


def test_budgets_key_is_validated(tmp_path: Path) -> None:
    for bad, msg in (([0, 5], r"budgets\[0\]: expected a positive number"), ("5", "budgets: expected a list"),
                     ([5, 5.0], "budgets: each budget once"), ([True], r"budgets\[0\]")):
        with pytest.raises(ConfigError, match=msg):
            load_experiment(_write(tmp_path, budgets=bad))
    # Without budgets run ids are those of before budgets existed; with them the budgets are part of the id.
    plain = load_experiment(_write(tmp_path, budgets=None))
    assert "budgets" not in plain.runs[0].canonical()
    assert load_experiment(_write(tmp_path)).runs[0].canonical()["budgets"] == [2.0, 5.0, 20.0]


def test_bad_budget_exits_2_naming_the_field(tmp_path: Path, capsys) -> None:
    assert main(["run", str(_write(tmp_path, budgets=[-1])), "--no-track"]) == 2
    assert "budgets[0]" in capsys.readouterr().err


def test_every_run_has_each_budget_by_the_contract(grid: Path) -> None:
    records = RunStore(grid / "out").records()
    assert len(records) == 6 and all(r["status"] == "finished" for r in records)
    for r in records:
        assert set(r["at_budget"]) == {"2", "5", "20"}
        scores = pd.read_parquet(RunStore(grid / "out").path(r["run_id"], ".scores.parquet"))
        val = scores[scores["part"] == "val"]
        for key, point in r["at_budget"].items():
            assert set(point) >= {"threshold", "metrics", "intervals", "lead_times_h", "outcomes"}
            achieved = point["threshold"]["achieved"]
            assert achieved["alarms_per_week_per_100_entities"] <= float(key) + 1e-9
            assert len(point["outcomes"]["predicted"]) == point["metrics"]["failures"]
            assert np.isfinite(point["threshold"]["value"]) or achieved["alarms"] == 0
            # (the threshold itself is recomputed from the stored validation scores in the next test)
        assert r["curve"]["points"] > 2 and "for reading" in r["curve"]["note"]
        curve = scores[scores["part"] == "curve"]
        assert len(curve) == r["curve"]["points"] and curve["curve_failures"].iloc[0] == r["metrics"]["failures"]
        assert len(val) > 0
    # Tighter budgets never reach more alarms on validation.
    for r in records:
        rates = [r["at_budget"][k]["threshold"]["achieved"]["alarms"] for k in ("2", "5", "20")]
        assert rates == sorted(rates)


def test_budget_threshold_equals_direct_policy(grid: Path) -> None:
    from logtrial.running.experiment import load_experiment as load

    exp = load(grid / "exp.yaml")
    rec = RunStore(grid / "out").records()[0]
    import os

    from logtrial.running.runner import Runner

    os.environ["LOGTRIAL_HOME"] = str(grid / "home")
    try:
        runner = Runner(exp, grid / "home", progress=False)
        run = next(r for r in exp.runs if r.run_id == rec["run_id"])
        prep = runner.prepared(run)
        scores = pd.read_parquet(RunStore(grid / "out").path(rec["run_id"], ".scores.parquet"))
        val = scores[scores["part"] == "val"]
        meta = prep.windows.meta.iloc[val["window"].to_numpy()]
        for key in ("2", "5", "20"):
            ch = choose_threshold(budget_policy(float(key)), val["score"].to_numpy(), val["label"].to_numpy(),
                                  meta, pd.Timedelta("2h"))
            assert ch.threshold == rec["at_budget"][key]["threshold"]["value"]
    finally:
        os.environ.pop("LOGTRIAL_HOME", None)


def test_extra_budgets_do_not_refit(grid: Path) -> None:
    # PCA trains on all windows: one fit serves both noise levels and all three budgets.
    assert int((grid / "pca_fits").read_text()) == 1


def test_report_puts_the_decision_first_everywhere(grid: Path, capsys, monkeypatch) -> None:
    monkeypatch.setenv("LOGTRIAL_HOME", str(grid / "home"))
    assert main(["report", str(grid / "exp.yaml")]) == 0
    out = capsys.readouterr().out
    assert out.startswith("DECISION")
    assert out.index("DECISION") < out.index("All figures at the threshold policy")
    for b in ("2", "5", "20"):
        assert f"{b} alarms/week/100" in out
    assert "pick " in out and "McNemar" in out and "WARNING" in out  # fewer than 20 test failures here
    md = (grid / "out" / "report.md").read_text()
    assert md.index("## Decision") < md.index("## All figures")
    assert "smallest detectable difference at 80 % power" in md and "How the ranking moves with label noise" in md
    assert "for reading" in md
    csv = pd.read_csv(grid / "out" / "results.csv")
    assert set(csv["windows"]) == {"kind=time size=1h step=1h"} and set(csv["task"]) == {"horizon=12h name=predict"}
    assert {"b2_recall_predicted", "b20_alarms_per_week_per_100_entities"} <= set(csv.columns)
    # Shares of failures carry a Wilson interval that does not collapse to a point.
    assert (csv["recall_predicted_high"] > csv["recall_predicted_low"]).all()
    for name in ("operating_curves.png", "budget_dots.png", "lead_times.png", "pr_curves.png"):
        assert (grid / "out" / name).stat().st_size > 10_000


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium not installed (Debian: apt-get install chromium)")
def test_html_report_renders_in_a_real_browser(grid: Path, tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setenv("LOGTRIAL_HOME", str(grid / "home"))
    assert main(["report", str(grid / "exp.yaml")]) == 0
    page = grid / "out" / "report.html"
    # A probe script appended to a copy of the page reports what the browser actually laid out.
    probe = """<script>
window.addEventListener('load', () => {
  const imgs = [...document.images];
  const blank = imgs.filter(im => {
    if (!im.complete || im.naturalWidth < 50) return true;
    const c = document.createElement('canvas'); c.width = im.naturalWidth; c.height = im.naturalHeight;
    const x = c.getContext('2d'); x.drawImage(im, 0, 0);
    const d = x.getImageData(0, 0, c.width, c.height).data; let dark = 0;
    for (let i = 0; i < d.length; i += 4 * 97) if (d[i] + d[i+1] + d[i+2] < 600) dark++;
    return dark < 20;
  }).map(im => im.alt);
  const t = document.querySelector('table.decision');
  const r = { images: imgs.length, blank: blank, decisionRows: t ? t.tBodies[0].rows.length : 0,
              decisionFirst: !!t && t.compareDocumentPosition(document.querySelector('img')) === 4,
              errors: window.__errors || [] };
  document.body.innerHTML = '<pre id="probe">' + JSON.stringify(r) + '</pre>';
});
</script>"""
    errors = "<script>window.__errors=[];window.addEventListener('error',e=>window.__errors.push(String(e.message)));" \
             "const _e=console.error;console.error=(...a)=>{window.__errors.push(a.join(' '));_e(...a)};</script>"
    html = page.read_text()
    copy = tmp_path / "probe.html"
    copy.write_text(html.replace("<head>", "<head>" + errors, 1).replace("</body>", probe + "</body>", 1))
    res = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--allow-file-access-from-files",
                          "--virtual-time-budget=5000", "--dump-dom", copy.as_uri()],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr[-2000:]
    start = res.stdout.index('<pre id="probe">') + len('<pre id="probe">')
    found = json.loads(res.stdout[start:res.stdout.index("</pre>", start)].replace("&quot;", '"'))
    assert found["errors"] == []
    assert found["images"] == 4 and found["blank"] == []
    assert found["decisionRows"] >= 3 and found["decisionFirst"]
    # And the untouched page logs nothing on the console.
    res = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--enable-logging=stderr", "--v=0",
                          "--dump-dom", page.as_uri()], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0
    assert "CONSOLE" not in res.stderr and "Uncaught" not in res.stderr
    assert "Decision: which detector at which alarm budget" in res.stdout
