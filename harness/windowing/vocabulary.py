"""Event vocabularies: template ids as mined, or semantic groups of templates (word2vec CBOW + k-means).

The semantic vocabulary embeds every token of the template texts with a continuous
bag-of-words word2vec model (Mikolov et al., 2013; full softmax, trained here in torch on
the templates themselves), averages each template's token vectors, and groups the
templates into ``k`` clusters with k-means (scikit-learn). Experiments can then compare
detectors on the mined template ids against the coarser semantic groups.

In a run the vocabulary is fitted on the templates seen in the training windows only
(``fit_vocabulary``): templates first seen later are placed in the group whose centre is
nearest to the mean of their *known* word vectors (words never seen in training are
ignored), and in an explicit extra "unseen" group when none of their words is known.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp
import torch
from logtrial.errors import ConfigError, DataError
from logtrial.windowing.windows import WindowSet
from sklearn.cluster import KMeans

TOKEN = re.compile(r"[a-z][a-z0-9_]*")
WILDCARD = re.compile(r"<\*>")
KINDS = ("templates", "semantic")


@dataclass(frozen=True)
class SemanticSpec:
    """Settings of the semantic vocabulary: groups, embedding size, context window, training length."""

    k: int
    dim: int = 32
    window: int = 3
    epochs: int = 300
    lr: float = 0.05


def tokenize(template: str) -> list[str]:
    """Lower-case word tokens of a template; wildcards and numbers are dropped."""
    return TOKEN.findall(WILDCARD.sub(" ", template.lower()))


def _contexts(sentences: list[list[int]], window: int, pad: int) -> tuple[np.ndarray, np.ndarray]:
    """CBOW examples of a tokenised corpus: context ids (examples x 2*window, ``pad`` outside) and targets."""
    lens = np.array([len(s) for s in sentences], dtype=np.int64)
    flat = np.array([t for s in sentences for t in s], dtype=np.int64)
    offsets = np.r_[0, np.cumsum(lens)]
    owner = np.repeat(np.arange(len(lens)), lens)
    pos = np.arange(len(flat), dtype=np.int64)
    shifts = np.r_[np.arange(-window, 0), np.arange(1, window + 1)]
    ctx_pos = pos[:, None] + shifts[None, :]
    inside = (ctx_pos >= offsets[owner][:, None]) & (ctx_pos < offsets[owner + 1][:, None])
    ctx = np.where(inside, flat[np.where(inside, ctx_pos, 0)] if len(flat) else 0, pad)
    has_context = inside.any(axis=1)
    return ctx[has_context], flat[has_context]


class _CBOW(torch.nn.Module):
    """Input embeddings averaged over the context, then a full softmax over the token vocabulary."""

    def __init__(self, n_tokens: int, dim: int) -> None:
        super().__init__()
        self.emb = torch.nn.Embedding(n_tokens + 1, dim, padding_idx=n_tokens)
        self.out = torch.nn.Linear(dim, n_tokens)
        torch.nn.init.uniform_(self.emb.weight, -0.5 / dim, 0.5 / dim)
        with torch.no_grad():
            self.emb.weight[n_tokens].zero_()

    def forward(self, ctx: torch.Tensor) -> torch.Tensor:
        """Logits of the centre token for each context row."""
        mask = (ctx != self.emb.padding_idx).float()
        mean = (self.emb(ctx) * mask[..., None]).sum(1) / mask.sum(1, keepdim=True).clamp(min=1.0)
        return self.out(mean)


def cbow_vectors(sentences: list[list[str]], dim: int = 32, window: int = 3, epochs: int = 300, lr: float = 0.05,
                 seed: int = 0) -> dict[str, np.ndarray]:
    """Word2vec CBOW token vectors learned from tokenised sentences (seeded, full-batch Adam)."""
    tokens = sorted({t for s in sentences for t in s})
    if not tokens:
        return {}
    index = {t: i for i, t in enumerate(tokens)}
    ids = [[index[t] for t in s] for s in sentences]
    ctx, target = _contexts(ids, window, len(tokens))
    gen_state = torch.random.get_rng_state()
    torch.manual_seed(int(seed))
    try:
        model = _CBOW(len(tokens), dim)
        if len(target):
            opt = torch.optim.Adam(model.parameters(), lr=lr)
            x, y = torch.from_numpy(ctx), torch.from_numpy(target)
            for _ in range(epochs):
                loss = torch.nn.functional.cross_entropy(model(x), y)
                opt.zero_grad(set_to_none=True)
                loss.backward()
                opt.step()
        weights = model.emb.weight.detach().numpy()[: len(tokens)].astype(np.float64)
    finally:
        torch.random.set_rng_state(gen_state)
    return {t: weights[i] for t, i in index.items()}


def template_vectors(templates: list[str], vectors: dict[str, np.ndarray], dim: int) -> np.ndarray:
    """Mean token vector of each template (zeros for a template without known tokens)."""
    out = np.zeros((len(templates), dim), dtype=np.float64)
    for i, tpl in enumerate(templates):
        known = [vectors[t] for t in tokenize(tpl) if t in vectors]
        if known:
            out[i] = np.mean(known, axis=0)
    return out


def group_templates(vectors: np.ndarray, k: int, seed: int) -> np.ndarray:
    """k-means groups of template vectors (unit-normalised), numbered by first appearance."""
    n = len(vectors)
    if n == 0:
        return np.zeros(0, dtype=np.int32)
    norms = np.linalg.norm(vectors, axis=1, keepdims=True)
    unit = np.divide(vectors, norms, out=np.zeros_like(vectors), where=norms > 0)
    distinct = len(np.unique(np.round(unit, 12), axis=0))
    k_eff = max(1, min(k, distinct))
    raw = KMeans(n_clusters=k_eff, random_state=seed, n_init=10).fit_predict(unit)
    _, first = np.unique(raw, return_index=True)
    order = np.argsort(np.argsort(first))
    return order[raw].astype(np.int32)


def semantic_vocabulary(templates: list[str], k: int, seed: int, dim: int = 32, window: int = 3, epochs: int = 300,
                        lr: float = 0.05) -> np.ndarray:
    """Group id (int32, 0..k-1 at most) of every template id, from CBOW token vectors and k-means."""
    if k < 1:
        raise ConfigError(f"vocabulary.k: must be a positive number of groups, got {k!r}")
    sentences = [tokenize(t) for t in templates]
    vectors = cbow_vectors(sentences, dim=dim, window=window, epochs=epochs, lr=lr, seed=seed)
    return group_templates(template_vectors(templates, vectors, dim), k, seed)


def load_vocabulary_spec(spec: Any, where: str = "vocabulary") -> SemanticSpec | None:
    """Validate a vocabulary spec: 'templates' (None returned) or {kind: semantic, k, dim, window, epochs, lr}."""
    if spec is None or spec == "templates":
        return None
    if not isinstance(spec, dict):
        raise ConfigError(f"{where}: expected 'templates' or a mapping like {{kind: semantic, k: 16}}, got {spec!r}")
    kind = spec.get("kind", "templates")
    if kind not in KINDS:
        raise ConfigError(f"{where}.kind: must be one of {list(KINDS)}, got {kind!r}")
    allowed = {"kind"} if kind == "templates" else {"kind", "k", "dim", "window", "epochs", "lr"}
    unknown = sorted(set(spec) - allowed)
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: {sorted(allowed)})")
    if kind == "templates":
        return None
    if "k" not in spec:
        raise ConfigError(f"{where}.k: required for the semantic vocabulary (number of groups)")
    values: dict[str, Any] = {}
    for name in ("k", "dim", "window", "epochs"):
        if name in spec:
            v = spec[name]
            if isinstance(v, bool) or not isinstance(v, int) or v < 1:
                raise ConfigError(f"{where}.{name}: expected a positive whole number, got {v!r}")
            values[name] = v
    if "lr" in spec:
        v = spec["lr"]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not v > 0:
            raise ConfigError(f"{where}.lr: expected a positive number, got {v!r}")
        values["lr"] = float(v)
    return SemanticSpec(**values)


def remap_windows(windows: WindowSet, mapping: np.ndarray) -> WindowSet:
    """The same windows with every event id replaced by its group (counts summed per group)."""
    mapping = np.asarray(mapping, dtype=np.int64)
    if len(mapping) != windows.vocab_size:
        raise ConfigError(f"vocabulary: mapping covers {len(mapping)} event ids, windows have {windows.vocab_size}")
    n_groups = int(mapping.max()) + 1 if len(mapping) else 0
    onehot = sp.csr_matrix((np.ones(len(mapping), dtype=np.int64), (np.arange(len(mapping)), mapping)),
                           shape=(len(mapping), n_groups))
    counts = sp.csr_matrix(windows.counts @ onehot)
    counts.sort_indices()
    return WindowSet(
        meta=windows.meta.copy(), counts=counts.astype(windows.counts.dtype),
        seq_values=mapping[windows.seq_values].astype(windows.seq_values.dtype), seq_offsets=windows.seq_offsets.copy(),
        vocab_size=n_groups, labels=None if windows.labels is None else windows.labels.copy(), info=dict(windows.info),
    )


def fit_vocabulary(templates: list[str], seen: np.ndarray, spec: Any, seed: int) -> np.ndarray:
    """Group of every template id, learned from the ``seen`` (training) templates only.

    Word vectors and k-means groups come from the seen templates; every other template goes
    to the group with the nearest centre (cosine) by the mean of its known word vectors, or
    to the group after the learned ones, "unseen", when it has no known word (the vocabulary
    grows by that one group only when some template falls into it).
    """
    parsed = load_vocabulary_spec(spec)
    if parsed is None:
        raise ConfigError("vocabulary: fit_vocabulary needs a semantic vocabulary spec")
    seen = np.unique(np.asarray(seen, dtype=np.int64))
    if len(seen) and (seen.min() < 0 or seen.max() >= len(templates)):
        raise DataError(f"vocabulary: seen template ids span {seen.min()}..{seen.max()}, {len(templates)} templates given")
    train_texts = [templates[i] for i in seen]
    vectors = cbow_vectors([tokenize(t) for t in train_texts], dim=parsed.dim, window=parsed.window,
                           epochs=parsed.epochs, lr=parsed.lr, seed=seed)
    all_vec = template_vectors(templates, vectors, parsed.dim)
    norms = np.linalg.norm(all_vec, axis=1, keepdims=True)
    unit = np.divide(all_vec, norms, out=np.zeros_like(all_vec), where=norms > 0)
    groups = group_templates(all_vec[seen], parsed.k, seed) if len(seen) else np.zeros(0, np.int32)
    n_groups = int(groups.max()) + 1 if len(groups) else 0
    centres = np.zeros((n_groups, parsed.dim))
    np.add.at(centres, groups, unit[seen])
    c_norm = np.linalg.norm(centres, axis=1, keepdims=True)
    centres = np.divide(centres, c_norm, out=np.zeros_like(centres), where=c_norm > 0)
    mapping = np.full(len(templates), n_groups, dtype=np.int32)  # the unseen group
    mapping[seen] = groups
    later = np.setdiff1d(np.arange(len(templates)), seen)
    known = later[norms[later, 0] > 0] if n_groups else later[:0]
    if len(known):
        mapping[known] = np.argmax(unit[known] @ centres.T, axis=1).astype(np.int32)
    return mapping
