"""Two-stage composition: rank averaging, combination rules, member selection, and fewer false alarms with decoys."""

from __future__ import annotations

import importlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import windows_from_counts
from logtrial.detectors.registry import create, load
from logtrial.detectors.two_stage import ecdf_rank
from logtrial.errors import ConfigError
from scipy.stats import percentileofscore


def _data(seed: int = 0, n: int = 400) -> tuple[np.ndarray, np.ndarray]:
    """Poisson counts; 10% anomalies of which half are failures (event 5 up) and half decoys (event 7 up)."""
    rng = np.random.default_rng(seed)
    counts = rng.poisson(rng.uniform(0.5, 4.0, 10), size=(n, 10))
    labels = np.zeros(n, dtype=np.int8)
    fail = rng.choice(n, n // 20, replace=False)
    rest = np.setdiff1d(np.arange(n), fail)
    decoy = rng.choice(rest, n // 20, replace=False)
    counts[fail, 5] += 8
    counts[decoy, 7] += 8
    labels[fail] = 1
    return counts, labels


def test_ecdf_rank_matches_scipy_percentile_of_score() -> None:
    # reference library: scipy.stats.percentileofscore(kind="mean") / 100 is the mid-rank ECDF
    rng = np.random.default_rng(1)
    ref = np.sort(rng.integers(0, 20, 200).astype(float))
    probe = np.r_[rng.uniform(-5, 25, 50), ref[:10]]
    expected = np.array([percentileofscore(ref, v, kind="mean") / 100 for v in probe])
    np.testing.assert_allclose(ecdf_rank(ref, probe), expected, atol=1e-12)


def test_stage_ranks_are_member_rank_averages_and_combine_rules() -> None:
    counts, labels = _data()
    ws = windows_from_counts(counts)
    params = {"stage1": [{"name": "pca"}, {"name": "hbos"}], "stage2": [{"name": "logistic"}], "gate_quantile": 0.8}
    det = create("two_stage", params, seed=4).fit(ws, labels)
    stages = det.stage_scores(ws)
    # stage one by hand: each member fitted on the healthy windows, ranked against its scores on all labelled ones
    healthy = ws.subset(labels == 0)
    by_hand = []
    for i, name in enumerate(("pca", "hbos")):
        member = create(name, {}, seed=4 + 100 + i).fit(healthy)
        ref = member.score(ws)
        # the mid-rank ECDF (checked against scipy above), with near-equal scores counted as ties
        by_hand.append(ecdf_rank(np.sort(ref), ref))
    np.testing.assert_allclose(stages["stage1"], np.mean(by_hand, axis=0), atol=1e-12)
    assert stages["flagged"].mean() == pytest.approx(0.2, abs=0.02)
    r1, r2, flagged = stages["stage1"], stages["stage2"], stages["flagged"]
    gated = det.score(ws)
    np.testing.assert_allclose(gated, np.where(flagged, 1 + r2, r1 * r2))
    assert gated[flagged].min() >= 1.0 > gated[~flagged].max()
    for mode, expected in (("product", r1 * r2), ("stage2_only", r2), ("stage1_only", r1)):
        other = create("two_stage", {**params, "combine": mode}, seed=4).fit(ws, labels)
        np.testing.assert_allclose(other.score(ws), expected)


def test_unsupervised_stage_two_member_learns_the_failing_windows() -> None:
    # documented rule: an unsupervised stage-two member is fitted on windows labelled 1, score negated
    counts, labels = _data(2)
    ws = windows_from_counts(counts)
    det = create("two_stage", {"stage2": [{"name": "pca", "params": {"n_components": 2}}], "combine": "stage2_only"},
                 seed=0).fit(ws, labels)
    scores = det.score(ws)
    decoy = (counts[:, 7] >= 8) & (labels == 0)
    assert scores[labels == 1].mean() > scores[decoy].mean()
    assert scores[labels == 1].mean() > scores[labels == 0].mean()


def test_members_are_validated_with_their_field() -> None:
    with pytest.raises(ConfigError, match=r"field 'params.stage1.0'.*unknown detector 'nope'"):
        create("two_stage", {"stage1": [{"name": "nope"}]}, seed=0, source="exp.yaml")
    with pytest.raises(ConfigError, match=r"field 'params.stage2.0'.*params.variance"):
        create("two_stage", {"stage2": [{"name": "pca", "params": {"variance": 2}}]}, seed=0)
    with pytest.raises(ConfigError, match=r"field 'params.combine'"):
        create("two_stage", {"combine": "sum"}, seed=0)
    for composite in ("two_stage", "two_stage_supervised"):
        with pytest.raises(ConfigError, match=rf"cannot itself be a composite \({composite}\)"):
            create("two_stage", {"stage1": [{"name": composite}]}, seed=0)
    # member params are stored in full, so equivalent configs hash alike
    a = create("two_stage", {"stage1": [{"name": "pca"}]}, seed=0).params.model_dump(mode="json")
    b = create("two_stage", {"stage1": [{"name": "pca", "params": {"variance": 0.95}}]}, seed=0).params.model_dump(mode="json")
    assert a == b


def test_save_and_load_with_a_deep_member(tmp_path: Path) -> None:
    counts, labels = _data(3)
    ws = windows_from_counts(counts)
    params = {"stage1": [{"name": "density_ae", "params": {"epochs": 3, "threads": 1}}, {"name": "pca"}],
              "stage2": [{"name": "logistic"}]}
    det = create("two_stage", params, seed=1).fit(ws, labels)
    det.save(tmp_path / "m")
    again = load(tmp_path / "m")
    np.testing.assert_array_equal(again.score(ws), det.score(ws))
    with pytest.raises(Exception, match="does not support save/load"):
        create("two_stage", {"stage1": [{"name": "hbos"}], "stage2": [{"name": "logistic"}]},
               seed=1).fit(ws, labels).save(tmp_path / "n")


# small sizes for the deep members, so that the published form fits in seconds
SMALL_SEQ = {"name": "seq_ae", "params": {"epochs": 2, "embedding": 4, "hidden": 8, "latent": 4, "chunk": 16,
                                          "max_steps": 40, "threads": 1}}
SMALL_DENSITY = {"name": "density_ae", "params": {"epochs": 2, "hidden": [8, 4], "max_steps": 40, "threads": 1}}


def test_published_form_is_the_default_and_the_supervised_variant_is_separate() -> None:
    published = create("two_stage", {}, seed=0).params
    assert [m.name for m in published.stage1] == ["seq_ae", "density_ae"]
    assert [m.name for m in published.stage2] == ["seq_ae", "density_ae"]
    supervised = create("two_stage_supervised", {}, seed=0).params
    assert [m.name for m in supervised.stage1] == ["pca", "density_ae"]
    assert [m.name for m in supervised.stage2] == ["logistic"]


def test_sequence_members_in_both_stages_and_ablations_fit_only_their_stage() -> None:
    counts, labels = _data(5, n=300)
    ws = windows_from_counts(counts)
    params = {"stage1": [SMALL_SEQ, SMALL_DENSITY], "stage2": [SMALL_SEQ, SMALL_DENSITY]}
    det = create("two_stage", params, seed=2).fit(ws, labels)
    assert [(s, m.name, m.trains_on) for s, _, m in det.members_] == [
        (1, "seq_ae", "healthy"), (1, "density_ae", "healthy"), (2, "seq_ae", "healthy"), (2, "density_ae", "healthy")]
    # stage two learns the failing windows: its members' scores are negated reconstruction errors
    assert det.signs_ == [1.0, 1.0, -1.0, -1.0]
    stages = det.stage_scores(ws)
    for mode, stage in (("stage1_only", 1), ("stage2_only", 2)):
        ablation = create("two_stage", {**params, "combine": mode}, seed=2).fit(ws, labels)
        assert {s for s, _, _ in ablation.members_} == {stage}  # the other stage is not fitted at all
        # the same members with the same seeds: the ablation scores are the full composition's stage ranks
        np.testing.assert_allclose(ablation.score(ws), stages[f"stage{stage}"])
        # ... and its members are the very fits of the full composition (shared within the process)
        assert ablation.members_[0][2] is next(m for s, _, m in det.members_ if s == stage)
    # sharing fits changes no number: fitted afresh with the caches emptied, the scores are identical
    import logtrial.detectors.two_stage as ts

    ts._MEMBER_CACHE.clear()
    ts._SCORE_CACHE.clear()
    again = create("two_stage", params, seed=2).fit(ws, labels)
    assert again.members_[0][2] is not det.members_[0][2]
    np.testing.assert_array_equal(again.score(ws), det.score(ws))


def test_composition_section_says_when_alarms_equal_a_members(tmp_path: Path) -> None:
    from logtrial.output.compositions import composition_section
    from logtrial.running.store import RunStore

    store = RunStore(tmp_path)
    base = {"dataset": "d", "windows": {"kind": "time"}, "task": {"name": "predict"}, "noise": {"name": "clean"},
            "seed": 1}
    two = {"name": "two_stage_supervised", "params": {"stage1": [{"name": "pca"}], "stage2": [{"name": "logistic"}],
                                                      "combine": "gated"}}
    runs = {"a": (two, [0.1, 2.0, 0.3]), "b": ({"name": "logistic", "params": {}}, [0.2, 0.9, 0.1]),
            "c": ({"name": "pca", "params": {}}, [0.9, 0.9, 0.1])}
    records = []
    for rid, (det, scores) in runs.items():
        rec = {"run_id": rid, "status": "finished", "config": {**base, "detector": det}, "threshold": {"value": 0.5}}
        store.write_scores(rid, pd.DataFrame({"window": [0, 1, 2], "part": "test", "score": scores, "label": 0}))
        records.append(rec)
    text = "\n".join(composition_section(records, store))
    assert "`two_stage_supervised` raises exactly the alarms of `logistic` in all 1 runs" in text
    assert "`two_stage_supervised` raises alarms of its own: they differ from those of `pca` in every run" in text


# ----- the simulated scenario with decoys --------------------------------------------------------

DECOY_SCENARIO = {
    "seed": 3, "nodes": 16, "days": 60,
    "failures": {"rate_per_node_year": 10.0, "lead_time_hours": [6, 48]},
    "anomalies": {"decoy_similarity": 0.7},
}


@pytest.fixture(scope="module")
def decoy_fleet(tmp_path_factory: pytest.TempPathFactory):
    """Node-hour windows, truth incidents, predict-24h labels and a chronological split of a fleet with decoys."""
    try:
        sim_mod = importlib.import_module("logtrial.simulation.simulate")
        reg = importlib.import_module("logtrial.data.registry")
        from logtrial.data.ingest import ingest_files
        from logtrial.labels.incidents import read_incidents
        from logtrial.windowing.splits import chronological_split
        from logtrial.windowing.windows import label_windows, time_windows
    except ImportError as exc:
        pytest.skip(f"simulated-scenario checks need the simulator and ingest ({exc})")
    out = tmp_path_factory.mktemp("decoys")
    sim = sim_mod.generate(sim_mod.load_scenario(DECOY_SCENARIO), out / "sim")
    fmt = reg.LineFormat(regex=sim_mod.LINE_REGEX, timestamp={"fields": ["ts"], "format": "%Y-%m-%dT%H:%M:%S.%fZ"},
                         entity="host")
    res = ingest_files("radar-relay", [sim.log_path], fmt, reg.Miner(**sim_mod.RECOMMENDED_MINER), out / "tables",
                       progress=False)
    ws = time_windows(pd.read_parquet(res.events), int(res.manifest["templates"]), pd.Timedelta("1h"))
    incidents = read_incidents(sim.incidents_path)
    horizon = pd.Timedelta("24h")
    labels = label_windows(ws, incidents, "predict", horizon)
    split = chronological_split(ws, (0.5, 0.2, 0.3), None, horizon)
    return ws, incidents, labels, split, horizon


def _false_alarms_per_predicted(name: str, params: dict, seed: int, fleet) -> float:
    """The harness's identical rules: best-F1 threshold on validation, incident metrics on test."""
    from logtrial.evaluation.alarms import incident_metrics
    from logtrial.evaluation.thresholds import choose_threshold

    ws, incidents, labels, split, horizon = fleet
    det = create(name, params, seed=seed)
    rows = split.train
    if det.trains_on == "healthy":
        rows = rows[labels[rows] == 0]
    elif det.trains_on == "labelled":
        rows = rows[labels[rows] >= 0]
    det.fit(ws.subset(rows), labels[rows] if det.trains_on == "labelled" else None)
    cooldown = pd.Timedelta("2h")
    val_scores = det.score(ws.subset(split.val))
    choice = choose_threshold({"kind": "best_f1"}, val_scores, labels[split.val], ws.meta.iloc[split.val], cooldown)
    report = incident_metrics(ws.meta.iloc[split.test].reset_index(drop=True), det.score(ws.subset(split.test)),
                              choice.threshold, incidents, horizon, cooldown)
    summary = report.summary()
    assert summary["failures"] >= 10 and summary["predicted"] >= 5
    return float(summary["false_alarms_per_predicted_failure"])


@pytest.mark.parametrize("stage1", ["pca", "density_ae"])
def test_two_stage_has_fewer_false_alarms_per_predicted_failure_than_its_stage_one(stage1: str, decoy_fleet) -> None:
    # direction asserted (the check); decoys are maintenance, power dips and roll-outs whose lines
    # resemble precursors (decoy_similarity 0.7). Measured FA/pred with seeds 1 and 2:
    # pca 3.0 / 3.0 vs two-stage 0.56 / 0.56; density_ae 1.3 / 1.9 vs two-stage 0.44 / 1.0.
    member = {"name": stage1, "params": {"threads": 1}} if stage1 == "density_ae" else {"name": stage1}
    for seed in (1, 2):
        alone = _false_alarms_per_predicted(stage1, dict(member.get("params", {})), seed, decoy_fleet)
        two = _false_alarms_per_predicted("two_stage_supervised", {"stage1": [member], "stage2": [{"name": "logistic"}]},
                                          seed, decoy_fleet)
        assert two < alone, (seed, two, alone)
