"""LogClustering (Lin et al., ICSE 2016): distance to the nearest cluster of training windows."""

from __future__ import annotations

from typing import Any, ClassVar, Literal

import numpy as np
import scipy.sparse as sp
from logtrial.detectors.base import Detector, DetectorParams
from logtrial.detectors.features import dense, idf_weights, l2_normalise_rows, scale_columns
from logtrial.windowing.windows import WindowSet
from pydantic import Field
from scipy.cluster.hierarchy import fcluster, linkage

CHUNK_ROWS = 8192


class ClusteringParams(DetectorParams):
    """Clustering threshold, linkage and training sample size of LogClustering."""

    distance_threshold: float = Field(0.5, gt=0.0, le=2.0, description="cosine distance at which clusters stop merging")
    linkage: Literal["average", "complete", "single"] = Field("complete", description="agglomerative linkage")
    max_train: int = Field(4000, ge=2, le=20_000, description="distinct training vectors clustered (seeded sample)")


class LogClustering(Detector):
    """Offline LogClustering: idf-weighted, L2-normalised count vectors clustered agglomeratively.

    Training windows are weighted by idf = log(N / df) (events unseen in training get
    log N, as rare as an event seen once), normalised to unit length, de-duplicated and,
    beyond ``max_train`` distinct vectors, sampled with a seed in proportion to their
    multiplicity. Agglomerative clustering with cosine distance (``linkage``, from memory
    the paper merges by maximum distance, i.e. complete linkage) is cut at
    ``distance_threshold``; each cluster is represented by its centroid. The score is the
    cosine distance to the nearest centroid. The published method also grows clusters
    online while checking new windows; this is the offline form: clusters are fixed at fit.
    """

    name: ClassVar[str] = "log_clustering"
    reads: ClassVar[str] = "counts"
    trains_on: ClassVar[str] = "healthy"
    Params: ClassVar[type[ClusteringParams]] = ClusteringParams
    supports_state: ClassVar[bool] = True

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        p = self.params
        counts = sp.csr_matrix(windows.counts)
        self.idf_ = idf_weights(counts)
        uniq, inverse = _unique_rows(counts)
        mult = np.bincount(inverse).astype(np.float64)
        if uniq.shape[0] > p.max_train:
            rng = np.random.default_rng(self.seed)
            pick = np.sort(rng.choice(uniq.shape[0], p.max_train, replace=False, p=mult / mult.sum()))
            uniq, mult = uniq[pick], mult[pick]
        vecs = dense(l2_normalise_rows(scale_columns(uniq, self.idf_)), "training vectors")
        # all-zero vectors have no cosine distance: they form their own cluster with a zero centroid
        zero = ~vecs.any(axis=1)
        nonzero = np.flatnonzero(~zero)
        assign = np.zeros(vecs.shape[0], dtype=np.int64)
        if len(nonzero) > 1:
            tree = linkage(vecs[nonzero], method=p.linkage, metric="cosine")
            assign[nonzero] = fcluster(tree, t=p.distance_threshold, criterion="distance").astype(np.int64) - 1
        k = int(assign[nonzero].max()) + 1 if len(nonzero) else 0
        if zero.any():
            assign[zero] = k
            k += 1
        sums = np.zeros((k, vecs.shape[1]))
        np.add.at(sums, assign, vecs * mult[:, None])
        sizes = np.bincount(assign, weights=mult, minlength=k)
        self.centroids_ = sums / sizes[:, None]
        self.cluster_sizes_ = sizes

    def _score(self, windows: WindowSet) -> np.ndarray:
        x = l2_normalise_rows(scale_columns(windows.counts, self.idf_))
        norms = np.linalg.norm(self.centroids_, axis=1)
        unit = np.divide(self.centroids_, norms[:, None], out=np.zeros_like(self.centroids_), where=norms[:, None] > 0)
        has_zero_centroid = bool((norms == 0).any())
        row_norm = np.sqrt(np.asarray(x.multiply(x).sum(axis=1)).ravel())
        out = np.empty(x.shape[0])
        for lo in range(0, x.shape[0], CHUNK_ROWS):
            sim = np.asarray(x[lo : lo + CHUNK_ROWS] @ unit.T)
            out[lo : lo + CHUNK_ROWS] = 1.0 - sim.max(axis=1)
        empty = row_norm == 0
        out[empty] = 0.0 if has_zero_centroid else 1.0
        return np.clip(out, 0.0, 2.0)

    def info(self) -> dict[str, Any]:
        """Number of clusters formed at fit."""
        if self.vocab_size is None:
            return {}
        return {"clusters": int(self.centroids_.shape[0])}

    def _state(self) -> dict[str, Any]:
        return {"idf": self.idf_, "centroids": self.centroids_, "cluster_sizes": self.cluster_sizes_}

    def _load_state(self, state: dict[str, Any]) -> None:
        self.idf_ = np.asarray(state["idf"], dtype=np.float64)
        self.centroids_ = np.asarray(state["centroids"], dtype=np.float64)
        self.cluster_sizes_ = np.asarray(state["cluster_sizes"], dtype=np.float64)


def _unique_rows(counts: sp.csr_matrix) -> tuple[sp.csr_matrix, np.ndarray]:
    """Distinct rows of a sparse count matrix and, per input row, the index of its distinct row."""
    arr = dense(counts, "training count matrix")
    uniq, inverse = np.unique(arr, axis=0, return_inverse=True)
    return sp.csr_matrix(uniq), inverse.ravel()
