"""Noise tolerance from run records: tolerated level, crossover, budget accessor, intervals, sentences, settings."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from logtrial.errors import ConfigError
from logtrial.output.tolerance import (
    at_budget,
    noise_sentences,
    resample_curves,
    run_rows,
    tolerance_section,
    tolerance_settings,
    tolerance_table,
)

# logistic (trained on labels) loses share as drop grows; pca (reads no labels) stays at 0.5.
LOGISTIC = {0.0: 0.80, 0.25: 0.76, 0.5: 0.60, 0.75: 0.30}


def _record(det: str, level: float, seed: int, share: float, failures: int = 400, budgets: dict | None = None) -> dict:
    noise = {"name": "clean", "level": 0.0} if level == 0 else {"name": f"drop={level}", "level": level,
                                                                "axis": "drop", "drop": {"p": level}}
    rec = {"run_id": f"{det}-{level}-{seed}", "status": "finished",
           "config": {"noise": noise, "detector": {"name": det, "params": {}}, "seed": seed},
           "metrics": {"recall_predicted": share, "failures": failures}}
    if budgets:
        rec["at_budget"] = {k: {"metrics": {"recall_predicted": v, "failures": failures}} for k, v in budgets.items()}
    return rec


def _records(budgets: bool = False) -> list[dict]:
    out = []
    for seed in (1, 2, 3):
        for level, share in LOGISTIC.items():
            # At the budget of 5 the figures are the threshold's minus 0.2: the accessor must pick them.
            out.append(_record("logistic", level, seed, share, budgets={"5": share - 0.2} if budgets else None))
            out.append(_record("pca", level, seed, 0.5, budgets={"5": 0.3} if budgets else None))
    return out


def test_tolerated_and_crossover_levels_on_known_curves() -> None:
    settings = tolerance_settings({"drop": 0.1, "resamples": 400})
    table = tolerance_table(resample_curves(run_rows(_records(), settings), settings), settings).set_index("detector")
    lg, pca = table.loc["logistic"], table.loc["pca"]
    # Loss 0.04 at 0.25 (within 0.1), 0.20 at 0.5: tolerated up to 0.25; 0.60 >= 0.5 > 0.30: falls below at 0.75.
    assert (lg["tolerated"], lg["crossover"]) == (0.25, 0.75)
    assert lg["tolerated_low"] <= 0.25 <= lg["tolerated_high"] and lg["crossover_low"] <= 0.75 <= lg["crossover_high"]
    assert pca["tolerated"] == 0.75 and pca["tolerated_censored"] and np.isnan(pca.get("crossover", np.nan))


def test_interval_widens_with_fewer_failures() -> None:
    # 400 failures per run pin the levels; 10 failures per run leave them uncertain.
    settings = tolerance_settings({"drop": 0.1, "resamples": 400})
    few = [{**r, "metrics": {**r["metrics"], "failures": 10}} for r in _records()]
    wide = tolerance_table(resample_curves(run_rows(few, settings), settings), settings).set_index("detector")
    tight = tolerance_table(resample_curves(run_rows(_records(), settings), settings), settings).set_index("detector")
    span = lambda t: t.loc["logistic", "crossover_high"] - t.loc["logistic", "crossover_low"]  # noqa: E731
    assert span(wide) > span(tight)


def test_budget_figures_are_read_when_present_and_the_threshold_otherwise() -> None:
    rec = _records(budgets=True)[0]
    assert at_budget(rec, "5")["recall_predicted"] == pytest.approx(0.6)
    assert at_budget(rec, "20")["recall_predicted"] == pytest.approx(0.8)  # budget absent: the threshold's
    assert at_budget(_records()[0], "5")["recall_predicted"] == pytest.approx(0.8)  # no budgets at all
    rows = run_rows(_records(budgets=True), tolerance_settings({"budget": 5}))
    assert rows.loc[(rows["detector"] == "pca"), "value"].eq(0.3).all()
    # Without a stated budget, the smallest budget the records carry is used.
    assert run_rows(_records(budgets=True), tolerance_settings(None))["value"].max() == pytest.approx(0.6)


def test_sentences_name_the_noise_each_family_is_sensitive_to(tmp_path: Path) -> None:
    said = noise_sentences(_records(), {"drop": 0.1, "resamples": 200})
    assert any(s.startswith("The detectors trained on labels (logistic) are sensitive to drop") for s in said)
    assert any("read no labels (pca) are not measurably sensitive" in s for s in said)
    section = tolerance_section(_records(), tmp_path, {"resamples": 200})
    assert "## Label-noise tolerance" in section.markdown and set(section.pngs) == {"noise_heatmap.png",
                                                                                     "noise_curves.png"}
    assert (tmp_path / "tolerance.csv").is_file()
    assert tolerance_section([r for r in _records() if "axis" not in r["config"]["noise"]], tmp_path).markdown == []


@pytest.mark.parametrize("raw, needle", [
    ({"metric": "auprc"}, "tolerance.metric"),
    ({"drop": 1.5}, "tolerance.drop"),
    ({"budget": -1}, "tolerance.budget"),
    ({"resamples": 10}, "tolerance.resamples"),
    ({"width": 3}, "tolerance.width: unknown field"),
    ("loose", "tolerance: expected a mapping"),
])
def test_bad_tolerance_settings_name_the_field(raw: object, needle: str) -> None:
    with pytest.raises(ConfigError, match=needle):
        tolerance_settings(raw)


def test_resampled_shares_have_the_binomial_spread() -> None:
    # One seed, 50 failures at a share of 0.4: the resampled clean shares have the mean and variance of
    # Binomial(50, 0.4) / 50 (scipy.stats.binom, reference library).
    from scipy.stats import binom

    recs = [_record("pca", 0.0, 1, 0.4, failures=50), _record("pca", 0.5, 1, 0.4, failures=50)]
    settings = tolerance_settings({"resamples": 20000})
    res = resample_curves(run_rows(recs, settings), settings).resampled[("pca", "drop")][:, 0]
    assert abs(res.mean() - binom.mean(50, 0.4) / 50) < 0.003
    assert abs(res.var() - binom.var(50, 0.4) / 2500) < 0.0005


def test_bad_tolerance_in_an_experiment_file_exits_2(tmp_path: Path, capsys) -> None:
    import yaml
    from logtrial.cli import main

    doc = {"experiment": "t", "datasets": ["radar-relay"], "windows": [{"kind": "time", "size": "1h"}],
           "task": {"name": "detect"}, "detectors": ["pca"], "noise": [{"sweep": "drop", "values": [0.5]}],
           "tolerance": {"drop": 2}}
    (tmp_path / "e.yaml").write_text(yaml.safe_dump(doc))
    assert main(["run", str(tmp_path / "e.yaml")]) == 2
    assert "tolerance.drop" in capsys.readouterr().err


def test_each_dataset_is_compared_only_within_itself(tmp_path: Path) -> None:
    recs = []
    for name, shift in (("fleet-a", 0.0), ("fleet-b", -0.4)):
        for r in _records():
            r = {**r, "config": {**r["config"], "dataset": name},
                 "metrics": {**r["metrics"], "recall_predicted": max(0.0, r["metrics"]["recall_predicted"] + shift)}}
            recs.append(r)
    section = tolerance_section(recs, tmp_path, {"resamples": 200})
    assert set(section.pngs) == {"noise_heatmap_1.png", "noise_curves_1.png", "noise_heatmap_2.png",
                                 "noise_curves_2.png"}
    said = noise_sentences(recs, {"resamples": 200})
    assert any(s.startswith("fleet-a: ") for s in said) and any(s.startswith("fleet-b: ") for s in said)
