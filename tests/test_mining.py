"""Template miner: behaviour on small fixtures, agreement with the reference
library (drain3 0.9.11), and the published Drain accuracy on the Loghub 2k samples."""

from __future__ import annotations

import random
from pathlib import Path

import logtrial.data.mining as mining
import numpy as np
import pandas as pd
import pytest
from loghub_settings import LOGHUB_MINER_SETTINGS, PUBLISHED_DRAIN_GA
from logtrial.data.mining import DrainMiner, TemplateMiner, registry_miner
from logtrial.data.parse_score import grouping_accuracy, template_match_share

SYSTEMS = sorted(LOGHUB_MINER_SETTINGS)

# Systems whose grouping accuracy differs from the published Drain figure by
# more than 0.01, with what we found.
KNOWN_GA_GAPS = {
    # Ours 0.831 vs published 0.911. drain3 0.9.11 gives the identical partition
    # (0.831), and no similarity in 0.2-0.5, depth in 4-6 or mask order we tried
    # gets above 0.831, so the gap is not in our miner. The lost lines are both
    # merges of true events that differ only in one literal value, which Drain
    # turns into <*> ("ret:false"/"ret:true", "begin"/"end",
    # "overlap:false"/"overlap:true") and splits of one true event into several
    # groups (wake-lock lines by tag; "index:-1" vs "index:1", because the
    # number mask's \b leaves the minus sign outside the match). Likely cause,
    # not verified: the published run used the benchmark's own Drain code and/or
    # an earlier revision of this sample's ground truth.
    "Android": "published figure not reproduced; drain3 agrees with us (0.831)",
}


def _ids(lines: list[str], **settings) -> list[int]:
    """Template ids of lines under a fresh DrainMiner."""
    return DrainMiner(**settings).add_many(lines).tolist()


def _drain3_run(lines: list[str], settings: dict) -> tuple[np.ndarray, list[str], np.ndarray]:
    """Reference library: drain3 0.9.11 `add_log_message` over lines; (0-based ids, templates, sizes)."""
    from drain3 import TemplateMiner as Drain3Miner
    from drain3.masking import MaskingInstruction
    from drain3.template_miner_config import TemplateMinerConfig

    config = TemplateMinerConfig()
    config.masking_instructions = [MaskingInstruction(m, "*") for m in settings.get("masks", [])]
    config.drain_sim_th = settings.get("similarity", 0.5)
    config.drain_depth = settings.get("depth", 4)
    config.drain_max_children = settings.get("max_children", 100)
    config.drain_extra_delimiters = list(settings.get("extra_delimiters", []))
    miner = Drain3Miner(config=config)
    ids = np.array([miner.add_log_message(line)["cluster_id"] - 1 for line in lines], dtype=np.int64)
    clusters = sorted(miner.drain.clusters, key=lambda c: c.cluster_id)
    return ids, [c.get_template() for c in clusters], np.array([c.size for c in clusters])


def _contents(loghub_dir: Path, system: str) -> pd.DataFrame:
    """The structured Loghub 2k sample of a system (Content, EventId, EventTemplate)."""
    path = loghub_dir / system / f"{system}_2k.log_structured.csv"
    return pd.read_csv(path, dtype=str, keep_default_na=False)


# ---------------------------------------------------------------- small fixtures


def test_mask_matches_become_wildcards():
    miner = DrainMiner(masks=[r"blk_-?\d+"])
    assert miner.add_many(["Deleting blk_123 now", "Deleting blk_-456 now"]).tolist() == [0, 0]
    assert miner.templates() == ["Deleting <*> now"]


def test_masks_apply_one_after_another():
    # reference library: drain3 0.9.11 applies masking instructions in order
    miner = DrainMiner(masks=[r"\d+", r"a\d"])
    miner.add("a1 x")
    assert miner.templates() == ["a<*> x"]
    miner = DrainMiner(masks=[r"a\d", r"\d+"])
    miner.add("a1 x")
    assert miner.templates() == ["<*> x"]


def test_differing_token_becomes_wildcard():
    miner = DrainMiner()
    assert miner.add_many(["open file a.txt", "open file b.txt", "open file c.txt"]).tolist() == [0, 0, 0]
    assert miner.templates() == ["open file <*>"]
    assert miner.counts().tolist() == [3]


def test_similarity_below_threshold_starts_new_template():
    # 2 of 3 tokens equal: 0.667 >= 0.6 merges, < 0.7 does not
    lines = ["open file a.txt", "open file b.txt"]
    assert _ids(lines, similarity=0.6) == [0, 0]
    assert _ids(lines, similarity=0.7) == [0, 1]


def test_wildcards_do_not_count_as_similar():
    # template "<*> <*> <*> x" (from masks) matches a line of the same shape on 1 of 4 tokens only,
    # so every such line starts a new template, as in the reference library
    assert _ids(["1 2 3 x"] * 3, masks=[r"\d+"]) == [0, 1, 2]


def test_depth_sets_how_many_leading_tokens_route():
    first_differs = ["alpha x y z", "beta x y z"]
    assert _ids(first_differs, depth=4) == [0, 1]
    assert _ids(first_differs, depth=3) == [0, 0]
    second_differs = ["a p x y", "a q x y"]
    assert _ids(second_differs, depth=4) == [0, 0]
    assert _ids(second_differs, depth=5) == [0, 1]


def test_tokens_with_digits_share_the_wildcard_branch():
    assert _ids(["7 items left ok", "8 items left ok"]) == [0, 0]
    assert _ids(["seven items left ok", "eight items left ok"]) == [0, 1]


def test_max_children_sends_overflow_to_wildcard_branch():
    lines = ["alpha x y", "beta x y", "gamma x y"]
    assert _ids(lines, max_children=100) == [0, 1, 2]
    miner = DrainMiner(max_children=2)
    assert miner.add_many(lines).tolist() == [0, 1, 1]
    assert miner.templates() == ["alpha x y", "<*> x y"]


def test_token_count_separates_templates():
    assert _ids(["a b", "a b c", "a b"]) == [0, 1, 0]


def test_empty_and_blank_contents_share_one_template():
    miner = DrainMiner()
    assert miner.add_many(["", "   ", "a"]).tolist() == [0, 0, 1]
    assert miner.templates() == ["", "a"]


def test_extra_delimiters_split_tokens():
    miner = DrainMiner(extra_delimiters=["="])
    assert miner.add_many(["key=1", "key=2"]).tolist() == [0, 0]
    assert miner.templates() == ["key <*>"]


def test_extra_delimiters_apply_after_trimming():
    # reference library: drain3 0.9.11 strips the content before replacing delimiters
    pytest.importorskip("drain3", reason="drain3 (reference library) not installed")
    lines = [" xa b", "xa b", " x c"]
    settings = {"extra_delimiters": [" x"]}
    assert _ids(lines, **settings) == _drain3_run(lines, settings)[0].tolist()


def test_repeated_content_follows_a_growing_tree():
    # "foo b c d" first joins the template under the <*> branch; once a "foo" branch
    # exists it is routed there and starts a new template (a plain per-content cache
    # would keep answering 0)
    lines = ["5 b c d", "foo b c d", "foo b c d", "foo x y z", "foo b c d"]
    assert _ids(lines) == [0, 0, 0, 1, 2]


def test_add_and_add_many_agree():
    lines = ["open file a", "open file b", "close file a", "7 items", "8 items", "open file a"]
    one_by_one = DrainMiner()
    assert [one_by_one.add(line) for line in lines] == _ids(lines)
    assert one_by_one.counts().tolist() == np.bincount(_ids(lines)).tolist()


def test_invalid_settings_are_refused():
    with pytest.raises(ValueError, match="depth"):
        DrainMiner(depth=2)
    with pytest.raises(ValueError, match="max_children"):
        DrainMiner(max_children=0)
    with pytest.raises(ValueError, match="invalid mask"):
        DrainMiner(masks=["("])


def test_registry_miner_builds_and_round_trips():
    settings = {"kind": "drain", "masks": [r"\d+"], "similarity": 0.4, "depth": 5, "max_children": 10}
    miner = registry_miner(settings)
    assert isinstance(miner, TemplateMiner)
    assert registry_miner(miner.settings()).settings() == miner.settings()
    assert {k: miner.settings()[k] for k in settings} == settings


def test_registry_miner_names_unknown_kind_and_setting():
    with pytest.raises(ValueError, match=r"'spell'.*drain"):
        registry_miner({"kind": "spell"})
    with pytest.raises(ValueError, match="simliarity"):
        registry_miner({"kind": "drain", "simliarity": 0.5})


def test_grouping_accuracy_counts_exactly_recovered_groups():
    # definition of Zhu et al., ICSE-SEIP 2019: a line counts when its predicted group
    # holds exactly the lines of its true group
    assert grouping_accuracy(["A", "A", "B", "B", "C"], [1, 1, 2, 2, 2]) == pytest.approx(0.4)
    assert grouping_accuracy(["A", "A", "B"], [5, 5, 9]) == 1.0


def test_template_match_share_needs_group_and_text():
    truth = {"E1": "open <*>", "E2": "close  <*>"}
    lines_truth = ["E1", "E1", "E2"]
    assert template_match_share(truth, ["open <*>", "close <*>"], lines_truth, [0, 0, 1]) == 1.0
    assert template_match_share(truth, ["open <*>", "close x"], lines_truth, [0, 0, 1]) == 0.5
    assert template_match_share(truth, ["<*> <*>"], lines_truth, [0, 0, 0]) == 0.0


# ------------------------------------------------- reference library: drain3 0.9.11


@pytest.mark.parametrize("table_from", [2, 32])
def test_random_lines_match_reference_library(monkeypatch, table_from):
    # reference library: drain3 0.9.11. Small vocabularies with digits, masks and
    # repeats exercise routing, overflow, generalisation and our caches.
    pytest.importorskip("drain3", reason="drain3 (reference library) not installed")
    monkeypatch.setattr(mining, "_TABLE_FROM", table_from)
    for seed in range(120):
        rng = random.Random(seed)
        words = rng.sample(["a", "b", "c", "x1", "7", "<*>", "k9", "zz", "q", "k=9"], rng.randint(3, 7))
        pool = [" ".join(rng.choice(words) for _ in range(rng.randint(0, 6))) for _ in range(rng.randint(5, 30))]
        lines = [rng.choice(pool) for _ in range(rng.randint(50, 300))]
        settings = {
            "masks": rng.choice([[], [r"\d+"], [r"k\d", r"\d"], [r"x1|7"]]),
            "similarity": rng.choice([0.2, 0.4, 0.5, 0.6, 0.75, 1.0]),
            "depth": rng.randint(3, 6),
            "max_children": rng.randint(1, 5),
            "extra_delimiters": rng.choice([[], ["="]]),
        }
        ref_ids, ref_templates, ref_sizes = _drain3_run(lines, settings)
        miner = DrainMiner(**settings)
        ours = miner.add_many(lines[: len(lines) // 2]).tolist() + [miner.add(x) for x in lines[len(lines) // 2:]]
        assert ours == ref_ids.tolist(), (seed, settings)
        assert miner.templates() == ref_templates, (seed, settings)
        assert miner.counts().tolist() == ref_sizes.tolist(), (seed, settings)


@pytest.mark.parametrize("system", SYSTEMS)
def test_loghub_sample_matches_reference_library(loghub_dir, system):
    # reference library: drain3 0.9.11, same masks / similarity / depth. All 16
    # samples give identical ids (hence partitions), templates and sizes, so no
    # difference needs explaining.
    pytest.importorskip("drain3", reason="drain3 (reference library) not installed")
    lines = _contents(loghub_dir, system)["Content"].tolist()
    settings = LOGHUB_MINER_SETTINGS[system]
    ref_ids, ref_templates, ref_sizes = _drain3_run(lines, settings)
    miner = DrainMiner(**settings)
    assert np.array_equal(miner.add_many(lines), ref_ids)
    assert miner.templates() == ref_templates
    assert miner.counts().tolist() == ref_sizes.tolist()


# ------------------------------------------------------------- published figure


def test_loghub_grouping_accuracy_matches_published_drain(loghub_dir):
    # Zhu et al., "Tools and Benchmarks for Automated Log Parsing", ICSE-SEIP 2019,
    # accuracy table, Drain row; settings from memory (shared datasets README).
    ours = {}
    for system in SYSTEMS:
        frame = _contents(loghub_dir, system)
        ids = DrainMiner(**LOGHUB_MINER_SETTINGS[system]).add_many(frame["Content"].tolist())
        ours[system] = grouping_accuracy(frame["EventId"].tolist(), ids)
    differ = {s for s in SYSTEMS if abs(ours[s] - PUBLISHED_DRAIN_GA[s]) > 0.01}
    assert len(SYSTEMS) - len(differ) >= 14, ours
    assert differ <= set(KNOWN_GA_GAPS), {s: (ours[s], PUBLISHED_DRAIN_GA[s]) for s in differ}
