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
