"""The semantic vocabulary is learned from training templates only; later templates are placed by their words."""

from __future__ import annotations

import numpy as np
from logtrial.windowing.vocabulary import cbow_vectors, fit_vocabulary, group_templates, template_vectors, tokenize

SPEC = {"kind": "semantic", "k": 3, "dim": 16, "epochs": 150}
TRAIN = [
    "disk sda read error at sector <*>",
    "disk sdb read error at sector <*>",
    "disk sdc write error at sector <*>",
    "network link eth0 down",
    "network link eth1 down",
    "network link eth0 up",
    "user <*> logged in from <*>",
    "user <*> logged out",
]
LATER = [
    "disk sdd read error at sector <*> retrying",   # known words (plus one new): joins the disk group
    "network link eth2 flapping down",              # known words: joins the network group
    "kernel panic cpu halted",                      # no known word: the explicit unseen group
]


def test_later_templates_join_groups_by_known_words_or_the_unseen_group() -> None:
    templates = TRAIN + LATER
    seen = np.arange(len(TRAIN))
    mapping = fit_vocabulary(templates, seen, SPEC, seed=0)
    n_groups = int(mapping[seen].max()) + 1
    assert mapping[10] == n_groups  # "unseen": one group past the learned ones
    assert mapping[8] == mapping[0] and mapping[9] == mapping[3]
    # the groups of the seen templates are exactly k-means over vectors learned from them alone
    vectors = cbow_vectors([tokenize(t) for t in TRAIN], dim=16, epochs=150, seed=0)
    assert "retrying" not in vectors and "kernel" not in vectors
    np.testing.assert_array_equal(mapping[seen], group_templates(template_vectors(TRAIN, vectors, 16), 3, 0))


def test_templates_first_seen_after_training_do_not_change_the_learned_groups() -> None:
    # the audit's gap: the vocabulary used to be trained on every mined template, test ones included
    seen = np.arange(len(TRAIN))
    a = fit_vocabulary(TRAIN + LATER, seen, SPEC, seed=0)
    b = fit_vocabulary(TRAIN + ["completely different words here", "other unrelated text", "zz"], seen, SPEC, seed=0)
    np.testing.assert_array_equal(a[seen], b[seen])
    # the same templates, all seen: a different (transductive) vocabulary would be learned
    assert fit_vocabulary(TRAIN + LATER, np.arange(len(TRAIN) + 3), SPEC, seed=0)[10] != a[10]


def test_a_run_learns_its_vocabulary_from_the_training_windows_only(loghub_dir, tmp_path, home, monkeypatch) -> None:
    # real logs (Loghub BGL 2k): some templates are first seen after the training span; the run's
    # semantic vocabulary is learned without them, and they are mapped by their words afterwards
    import yaml
    from logtrial.running.experiment import load_experiment
    from logtrial.running.runner import Runner

    monkeypatch.setenv("LOGTRIAL_MIRROR", str(loghub_dir))
    (tmp_path / "e.yaml").write_text(yaml.safe_dump({
        "experiment": "v", "output": "out", "datasets": ["bgl-2k"], "windows": [{"kind": "time", "size": "1h"}],
        "task": {"name": "detect"}, "split": {"kind": "chronological", "fractions": [0.5, 0.2, 0.3]},
        "noise": [{"name": "clean"}], "detectors": ["rate_rule"], "seeds": [0], "threshold": {"kind": "best_f1"},
        "vocabularies": [{"kind": "semantic", "k": 8, "epochs": 40}]}))
    exp = load_experiment(tmp_path / "e.yaml")
    runner = Runner(exp, home, progress=False)
    run = exp.runs[0]
    data = runner.dataset("bgl-2k")
    prep = runner.prepared(run)
    from logtrial.windowing.windows import build_windows

    raw = build_windows(data.events, data.vocab_size, run.windows)
    seen = np.unique(raw.subset(prep.split.train).seq_values)
    later = np.setdiff1d(np.unique(raw.seq_values), seen)
    assert len(later) > 0 and prep.windows.info["vocabulary_seen_templates"] == len(seen)
    expected = fit_vocabulary(data.templates, seen, run.vocabulary, seed=0)
    np.testing.assert_array_equal(prep.windows.seq_values, expected[raw.seq_values])
    assert prep.windows.vocab_size == int(expected.max()) + 1
