"""Event vocabularies: CBOW word2vec + k-means template groups, checked against gensim and scikit-learn."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from logtrial.errors import ConfigError
from logtrial.windowing.vocabulary import (
    cbow_vectors,
    group_templates,
    load_vocabulary_spec,
    remap_windows,
    semantic_vocabulary,
    template_vectors,
    tokenize,
)
from logtrial.windowing.windows import time_windows
from scipy.stats import spearmanr
from sklearn.metrics import adjusted_rand_score

# A constructed vocabulary: four topics with words of their own, templates drawing five topic
# words each (with wildcards between) plus two generic words shared by every topic.
TOPICS = {
    "disk": "sector platter spindle raid volume inode journal fsck".split(),
    "net": "packet uplink gateway route latency socket carrier dns".split(),
    "memory": "heap page swap allocator leak resident oom slab".split(),
    "thermal": "fan temperature heatsink airflow rpm thermostat cooling vent".split(),
}
SHARED = "error warning node failed retry".split()


def constructed_vocabulary(seed: int = 0) -> tuple[list[str], np.ndarray]:
    """Templates and the topic each was drawn from."""
    rng = np.random.default_rng(seed)
    templates, topic = [], []
    for ti, words in enumerate(TOPICS.values()):
        for _ in range(6):
            w = rng.choice(words, size=5, replace=False)
            body = " ".join(f"{x} <*>" if i % 2 else x for i, x in enumerate(w))
            a, b = rng.choice(SHARED, size=2, replace=False)
            templates.append(f"{a} {body} {b}")
            topic.append(ti)
    return templates, np.array(topic)


def test_tokenize_drops_wildcards_and_numbers() -> None:
    # common practice for log templates: wildcards and numbers carry no meaning
    assert tokenize("disk<*> write latency p<*>=<*>ms above threshold 20ms") == [
        "disk", "write", "latency", "p", "ms", "above", "threshold", "ms"
    ]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_semantic_groups_recover_topics_like_gensim(seed: int) -> None:
    # reference library: gensim's Word2Vec in CBOW mode (sg=0) on the same corpus, grouped with the
    # same scikit-learn k-means; both must recover the constructed topics (adjusted Rand index 1,
    # scikit-learn). Measured: ARI 1.0 for both, Spearman 0.32-0.36 between the two models' pairwise
    # cosine similarities of topic words.
    gensim = pytest.importorskip("gensim", reason="gensim (test extra) is the word2vec reference")
    templates, topic = constructed_vocabulary()
    ours = semantic_vocabulary(templates, 4, seed=seed)
    assert adjusted_rand_score(topic, ours) == 1.0
    sentences = [tokenize(t) for t in templates]
    model = gensim.models.Word2Vec(sentences, vector_size=32, window=3, min_count=1, sg=0, epochs=300, seed=seed,
                                   workers=1, sample=0)
    ref_vectors = {w: model.wv[w] for w in model.wv.index_to_key}
    ref_groups = group_templates(template_vectors(templates, ref_vectors, 32), 4, seed)
    assert adjusted_rand_score(topic, ref_groups) == 1.0
    assert adjusted_rand_score(ref_groups, ours) == 1.0
    # token level: same-topic words are closer than other-topic words in both models, and the
    # two models order word pairs alike
    mine = cbow_vectors(sentences, seed=seed)
    words = [w for ws in TOPICS.values() for w in ws if w in mine]
    owner = np.array([ti for ti, ws in enumerate(TOPICS.values()) for w in ws if w in mine])

    def cosines(vectors: dict) -> np.ndarray:
        x = np.array([vectors[w] for w in words], dtype=np.float64)
        x /= np.linalg.norm(x, axis=1, keepdims=True)
        return x @ x.T

    iu = np.triu_indices(len(words), 1)
    same = (owner[:, None] == owner[None, :])[iu]
    a, b = cosines(mine)[iu], cosines(ref_vectors)[iu]
    assert a[same].mean() > a[~same].mean() and b[same].mean() > b[~same].mean()
    assert spearmanr(a, b).statistic > 0.2


def test_grouping_is_seeded_and_numbered_by_first_appearance() -> None:
    templates, _ = constructed_vocabulary(5)
    a = semantic_vocabulary(templates, 4, seed=7)
    np.testing.assert_array_equal(a, semantic_vocabulary(templates, 4, seed=7))
    _, first = np.unique(a, return_index=True)
    assert list(a[np.sort(first)]) == list(range(len(first)))
    # more groups than distinct templates: each distinct template is its own group
    assert len(np.unique(semantic_vocabulary(templates[:3], 10, seed=1))) == 3


def _events(n_templates: int, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = 600
    ts = pd.Timestamp("2024-03-01", tz="UTC") + pd.to_timedelta(np.sort(rng.integers(0, 6 * 3600, n)), unit="s")
    return pd.DataFrame({
        "line": np.arange(1, n + 1, dtype=np.int64), "ts": ts,
        "entity": pd.array(rng.choice(["n1", "n2"], n), dtype="str"),
        "group": pd.Series([None] * n, dtype="str"),
        "event": rng.integers(0, n_templates, n).astype(np.int32), "tag": pd.array([""] * n, dtype="str"),
    })


def test_remapped_windows_equal_windows_of_remapped_events() -> None:
    templates, topic = constructed_vocabulary()
    events = _events(len(templates))
    mapping = semantic_vocabulary(templates, 4, seed=1)
    grouped = events.assign(event=mapping[events["event"].to_numpy()].astype(np.int32))
    # reference: pandas groupby of the per-template counts through the mapping
    per_template = events["event"].value_counts()
    expected = per_template.groupby(mapping[per_template.index.to_numpy()]).sum().sort_index()
    np.testing.assert_array_equal(grouped["event"].value_counts().sort_index().to_numpy(), expected.to_numpy())
    # remapping built windows equals building windows from the remapped events
    ws = time_windows(events, len(templates), pd.Timedelta("1h"))
    a = remap_windows(ws, mapping)
    b = time_windows(grouped, 4, pd.Timedelta("1h"))
    assert a.vocab_size == b.vocab_size == 4
    np.testing.assert_array_equal(a.counts.toarray(), b.counts.toarray())
    np.testing.assert_array_equal(a.seq_values, b.seq_values)
    np.testing.assert_array_equal(np.asarray(a.counts.sum(axis=0)).ravel(), expected.to_numpy())


@pytest.mark.parametrize(
    ("spec", "field"),
    [
        ({"kind": "words"}, "vocabulary.kind"),
        ({"kind": "semantic"}, "vocabulary.k"),
        ({"kind": "semantic", "k": 0}, "vocabulary.k"),
        ({"kind": "semantic", "k": 4, "dims": 8}, "vocabulary.dims"),
        ({"kind": "semantic", "k": 4, "lr": -1}, "vocabulary.lr"),
        (["semantic"], "vocabulary"),
    ],
)
def test_bad_specs_name_the_field(spec, field: str) -> None:
    with pytest.raises(ConfigError, match=rf"^{field}"):
        load_vocabulary_spec(spec)


def test_semantic_groups_of_real_templates(loghub_dir) -> None:
    # real public logs: the HDFS 2k sample's ground-truth templates (Loghub, Zhu et al., ISSRE 2023);
    # block-movement templates ("Receiving block", "Received block", "PacketResponder ... terminating")
    # share words, so "Receiving block" and "Received block" land in one group
    path = loghub_dir / "HDFS" / "HDFS_2k.log_templates.csv"
    if not path.is_file():
        pytest.skip(f"{path} not present")
    templates = pd.read_csv(path)["EventTemplate"].astype(str).tolist()
    groups = semantic_vocabulary(templates, 4, seed=0)
    assert len(np.unique(groups)) == 4
    receiving = [i for i, t in enumerate(templates) if t.startswith("Receiving block")]
    received = [i for i, t in enumerate(templates) if t.startswith("Received block")]
    assert receiving and received
    assert groups[receiving[0]] == groups[received[0]]
