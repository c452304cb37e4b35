"""PCA detector (Xu et al., SOSP 2009): squared prediction error outside the principal subspace."""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np
from logtrial.detectors.base import Detector, DetectorParams
from logtrial.detectors.features import dense, idf_weights, scale_columns
from logtrial.windowing.windows import WindowSet
from pydantic import Field
from scipy.stats import norm

CHUNK_ROWS = 16_384


class PCAParams(DetectorParams):
    """Subspace size and weighting of the PCA detector."""

    variance: float = Field(0.95, gt=0.0, lt=1.0, description="share of variance the principal subspace covers")
    n_components: int | None = Field(None, ge=1, description="fixed subspace size; overrides variance when set")
    idf: bool = Field(True, description="weight events by log(N / df) before centring")
    alpha: float = Field(0.001, gt=0.0, lt=1.0, description="significance level of the reported Q-statistic threshold")
    max_vocab: int = Field(5000, ge=1, description="refuse vocabularies larger than this (dense covariance)")


def q_statistic(residual_eigenvalues: np.ndarray, alpha: float) -> float:
    """Jackson & Mudholkar (1979) Q_alpha threshold for the squared prediction error."""
    lam = np.asarray(residual_eigenvalues, dtype=np.float64)
    lam = lam[lam > 0]
    if lam.size == 0:
        return 0.0
    phi1, phi2, phi3 = (float(np.sum(lam**i)) for i in (1, 2, 3))
    h0 = 1.0 - 2.0 * phi1 * phi3 / (3.0 * phi2**2)
    c_alpha = float(norm.ppf(1.0 - alpha))
    base = c_alpha * np.sqrt(2.0 * phi2 * h0**2) / phi1 + 1.0 + phi2 * h0 * (h0 - 1.0) / phi1**2
    if h0 == 0.0 or base <= 0.0:
        return float("nan")
    return float(phi1 * base ** (1.0 / h0))


class PCADetector(Detector):
    """Xu et al. (SOSP 2009) PCA detector on window count vectors.

    Counts are weighted by idf = log(N / df) (the paper's TF-IDF-style weighting; an
    event unseen in training gets log N, as rare as an event seen once, so it lands in
    the residual subspace) and centred by the training column means. The principal (normal) subspace is spanned by
    the top-k eigenvectors of the training covariance, with k the smallest number whose
    cumulative explained variance exceeds ``variance``. The score is the squared
    prediction error SPE = ||(I - P P^T) y||^2. The Q-statistic threshold of Jackson &
    Mudholkar is reported in ``info()`` as a reference point; the harness never uses it.
    """

    name: ClassVar[str] = "pca"
    reads: ClassVar[str] = "counts"
    trains_on: ClassVar[str] = "all"
    Params: ClassVar[type[PCAParams]] = PCAParams
    supports_state: ClassVar[bool] = True

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        p = self.params
        if windows.vocab_size > p.max_vocab:
            raise self.error(f"vocabulary size {windows.vocab_size} exceeds max_vocab={p.max_vocab}")
        self.idf_ = idf_weights(windows.counts) if p.idf else np.ones(windows.vocab_size)
        weighted = scale_columns(windows.counts, self.idf_)
        n = weighted.shape[0]
        if n < 2:
            raise self.error("needs at least 2 training windows")
        self.mean_ = np.asarray(weighted.mean(axis=0)).ravel()
        cov = np.zeros((windows.vocab_size, windows.vocab_size))
        for lo in range(0, n, CHUNK_ROWS):
            y = dense(weighted[lo : lo + CHUNK_ROWS], "weighted count matrix") - self.mean_
            cov += y.T @ y
        cov /= n - 1
        eig, vec = np.linalg.eigh(cov)
        order = np.argsort(eig)[::-1]
        eig = np.maximum(eig[order], 0.0)
        vt = vec[:, order].T
        total = eig.sum()
        if p.n_components is not None:
            k = min(p.n_components, len(eig))
        elif total <= 0:
            k = 0
        else:
            ratio = np.cumsum(eig) / total
            k = int(np.searchsorted(ratio, p.variance, side="right") + 1)
            k = min(k, len(eig))
        self.components_ = vt[:k].copy()
        self.residual_eigenvalues_ = eig[k:].copy()
        self.explained_ = eig[:k]

    def _score(self, windows: WindowSet) -> np.ndarray:
        out = np.empty(len(windows), dtype=np.float64)
        weighted = scale_columns(windows.counts, self.idf_)
        for lo in range(0, len(windows), CHUNK_ROWS):
            y = dense(weighted[lo : lo + CHUNK_ROWS]) - self.mean_
            r = y - (y @ self.components_.T) @ self.components_
            out[lo : lo + CHUNK_ROWS] = np.einsum("ij,ij->i", r, r)
        return out

    @property
    def n_components_(self) -> int:
        """Dimension of the principal (normal) subspace."""
        return int(self.components_.shape[0])

    def q_threshold(self, alpha: float | None = None) -> float:
        """Q-statistic SPE threshold at significance alpha (reference only; never applied)."""
        return q_statistic(self.residual_eigenvalues_, self.params.alpha if alpha is None else alpha)

    def info(self) -> dict[str, Any]:
        """Subspace size and the Q-statistic reference threshold."""
        if self.vocab_size is None:
            return {}
        q = self.q_threshold()
        return {
            "n_components": self.n_components_,
            "q_alpha": self.params.alpha,
            "q_threshold": q if np.isfinite(q) else None,
        }

    def _state(self) -> dict[str, Any]:
        return {
            "idf": self.idf_,
            "mean": self.mean_,
            "components": self.components_,
            "residual_eigenvalues": self.residual_eigenvalues_,
            "explained": self.explained_,
        }

    def _load_state(self, state: dict[str, Any]) -> None:
        self.idf_ = np.asarray(state["idf"], dtype=np.float64)
        self.mean_ = np.asarray(state["mean"], dtype=np.float64)
        self.components_ = np.asarray(state["components"], dtype=np.float64)
        self.residual_eigenvalues_ = np.asarray(state["residual_eigenvalues"], dtype=np.float64)
        self.explained_ = np.asarray(state["explained"], dtype=np.float64)
