"""Noise sweeps in the experiment YAML: expansion into named settings, validation, fit reuse, tolerance report."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import relay_registry
from logtrial.cli import main
from logtrial.errors import ConfigError
from logtrial.labels.incidents import make_incidents
from logtrial.labels.noise import expand_sweep, load_noise, replay
from logtrial.running.experiment import experiment_order, load_experiment

SMALL_REGISTRY = relay_registry("relay-small", "{nodes: 10, days: 45, seed: 11, line_rate: 2.0, failures: {rate_per_node_year: 12.0, lead_time_hours: [4, 72], precursor_visibility: 1.0}}")


def _doc(**over) -> dict:
    return {"experiment": "sweep", "registry": ["small.yaml"], "output": "out", "datasets": ["relay-small"],
            "windows": [{"kind": "time", "size": "1h"}], "task": {"name": "predict", "horizon": "12h"},
            "noise": [{"sweep": "drop", "values": [0.3, 0.6]}], "detectors": ["pca", "logistic"], "seeds": [1, 2],
            "threshold": {"kind": "max_alarms", "k": 0.5}, "scoring": {"cooldown": "2h", "bootstrap": 20}, **over}


def _write(tmp_path: Path, doc: dict) -> Path:
    (tmp_path / "small.yaml").write_text(SMALL_REGISTRY)
    path = tmp_path / "exp.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path


def test_each_kind_expands_to_named_levels_with_its_axis() -> None:
    got = expand_sweep({"sweep": "delay", "values": ["6h", "1d"], "dist": "uniform"})
    assert [g["name"] for g in got] == ["delay=6h", "delay=24h"] and [g["level"] for g in got] == [6.0, 24.0]
    # The level of a delay sweep is the mean: a uniform delay from 0 to twice the level.
    assert load_noise(got[1]).delay.high == pd.Timedelta(hours=48) and load_noise(got[1]).axis == "delay"
    got = expand_sweep({"sweep": "drop", "range": [0.1, 0.5, 0.2], "base": {"delay": "2h"}})
    assert [g["level"] for g in got] == [0.1, 0.3, 0.5]
    assert all(load_noise(g).delay.value == pd.Timedelta(hours=2) for g in got)  # base held fixed
    assert [load_noise(g).drop.p for g in got] == [0.1, 0.3, 0.5]
    assert load_noise(expand_sweep({"sweep": "decoys", "values": [0.5]})[0]).decoys == 0.5
    assert load_noise(expand_sweep({"sweep": "spurious", "values": [2]})[0]).spurious.per_day == 2.0
    assert load_noise(expand_sweep({"sweep": "end_jitter", "values": ["3h"]})[0]).end_jitter.scale == pd.Timedelta(hours=3)
    joint = expand_sweep({"sweep": "joint", "values": [0.5], "at": {"drop": 0.4, "delay": "10h", "spurious": 2}})[0]
    spec = load_noise(joint)
    assert (spec.drop.p, spec.delay.mean, spec.spurious.per_day) == (0.2, pd.Timedelta(hours=5), 1.0)


def test_exponential_delay_sweep_has_the_stated_mean() -> None:
    # Mean of the replayed delays against the level, checked with scipy's exponential fit (reference library).
    from scipy import stats

    n = 4000
    start = np.arange(n, dtype=np.int64) * 3_600_000_000_000
    inc = make_incidents(np.arange(n), np.full(n, "a", dtype=object), start, start + 10**12, np.full(n, "failure", dtype=object))
    spec = expand_sweep({"sweep": "delay", "values": ["12h"]})[0]
    rep = replay(inc, spec, seed=3)
    d = (rep["start"] - inc["start"]).dt.total_seconds().to_numpy() / 3600
    _, scale = stats.expon.fit(d, floc=0)
    assert abs(scale - 12) < 4 * 12 / np.sqrt(n)


@pytest.mark.parametrize("entry, needle", [
    ({"sweep": "noise", "values": [1]}, "noise[0].sweep: unknown noise kind"),
    ({"sweep": "drop"}, "exactly one of `values"),
    ({"sweep": "drop", "values": [0.2, 1.5]}, "noise[0].values[1]: a drop level is a share"),
    ({"sweep": "drop", "range": [0.5, 0.1, 0.1]}, "noise[0].range: expected start <= stop"),
    ({"sweep": "delay", "values": ["soon"]}, "noise[0].values[0]: expected a duration"),
    ({"sweep": "delay", "values": ["1h"], "dist": "empirical"}, "noise[0].dist"),
    ({"sweep": "joint", "values": [0.5]}, "noise[0].at: a joint sweep needs"),
    ({"sweep": "drop", "values": [0.2], "base": {"drop": 0.1}}, "noise[0].base.drop"),
    ({"sweep": "drop", "values": [0.2], "colour": 1}, "noise[0].colour: unknown field"),
])
def test_bad_sweeps_name_the_field(tmp_path: Path, entry: dict, needle: str) -> None:
    with pytest.raises(ConfigError, match=r".*" + __import__("re").escape(needle)):
        load_experiment(_write(tmp_path, _doc(noise=[entry])))


def test_grid_adds_one_shared_clean_setting_and_drops_zero_levels(tmp_path: Path) -> None:
    exp = load_experiment(_write(tmp_path, _doc(noise=[{"sweep": "drop", "values": [0, 0.3]},
                                                      {"sweep": "decoys", "values": [0.0, 0.5]}])))
    assert experiment_order(exp)[1] == ["clean", "drop=0.3", "decoys=0.5"]
    assert len(exp.runs) == 3 * 2 * 2


def test_file_entry_reads_a_fitted_noise_file(tmp_path: Path) -> None:
    (tmp_path / "fitted.yaml").write_text(yaml.safe_dump({"noise": {"name": "ours", "drop": {"p": 0.2}},
                                                          "fit": {"audit": "a.csv"}}))
    exp = load_experiment(_write(tmp_path, _doc(noise=[{"name": "clean"}, {"file": "fitted.yaml"}])))
    assert experiment_order(exp)[1] == ["clean", "ours"]
    assert exp.runs[-1].noise["drop"] == {"p": 0.2}
    with pytest.raises(ConfigError, match="noise\\[1\\].path: unknown field"):
        load_experiment(_write(tmp_path, _doc(noise=[{"name": "clean"}, {"file": "fitted.yaml", "path": 1}])))


def test_swept_grid_reuses_fits_and_reports_tolerance(tmp_path: Path, home: Path) -> None:
    path = _write(tmp_path, _doc(noise=[{"sweep": "drop", "values": [0.2, 0.4]},
                                        {"sweep": "joint", "values": [1.0], "at": {"drop": 0.5, "delay": "6h"}}],
                                 tolerance={"drop": 0.1, "resamples": 200}))
    assert main(["run", str(path), "--no-track"]) == 0
    from logtrial.running.store import RunStore

    records = RunStore(tmp_path / "out").records()
    pca = [r for r in records if r["config"]["detector"]["name"] == "pca"]
    # PCA reads no labels: only the first noise setting of each seed fits it, the others reuse that fit.
    assert sum(not r["timing"]["reused_fit"] for r in pca) == 2 and len(pca) == 8
    assert main(["report", str(path)]) == 0
    out = tmp_path / "out"
    md = (out / "report.md").read_text()
    assert "## Label-noise tolerance" in md and "noise_heatmap.png" in md and "noise_curves.png" in md
    assert (out / "noise_heatmap.png").stat().st_size > 1000
    table = pd.read_csv(out / "tolerance.csv")
    assert set(table["noise"]) == {"drop", "joint"} and set(table["detector"]) == {"pca", "logistic"}
    # PCA's threshold ignores labels (alarm budget) and its fit is reused: it tolerates every level.
    assert table.loc[table["detector"] == "pca", "tolerated_censored"].all()
    assert "detectors trained on labels (logistic)" in md


def test_readme_sweep_example_loads(tmp_path: Path) -> None:
    import re

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    block = next(b for b in re.findall(r"```yaml\n(.*?)```", readme, flags=re.S) if "sweep:" in b)
    (tmp_path / "noise.yaml").write_text(yaml.safe_dump({"noise": {"name": "ours", "drop": {"p": 0.2}}}))
    exp = load_experiment(_write(tmp_path, {**_doc(), **yaml.safe_load(block)}))
    names = experiment_order(exp)[1]
    assert names[0] == "clean" and "late-drop=0.5" in names and "drop=0.5" in names and names[-1] == "ours"
    axes = {r.noise.get("axis") for r in exp.runs}
    assert {"drop", "drop:late-drop", "decoys", "delay", "end_jitter", "spurious", "joint"} <= axes
    assert experiment_order(exp)[1].count("decoys=0.5") == 1 and len(names) == 1 + 3 + 4 + 3 + 2 + 2 + 1 + 2 + 1
