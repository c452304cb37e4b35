"""One adapter that puts pyod outlier models (iforest, ocsvm, lof, hbos) behind the contract, plus ECOD scored inductively."""

from __future__ import annotations

from abc import abstractmethod
from typing import Any, ClassVar, Literal

import numpy as np
import scipy.sparse as sp
from logtrial.detectors.base import Detector, DetectorParams
from logtrial.detectors.features import dense, log1p_counts
from logtrial.windowing.windows import WindowSet
from pydantic import Field

CHUNK_ROWS = 16_384


class PyodParams(DetectorParams):
    """Training-sample cap shared by all pyod models."""

    max_train: int | None = Field(None, ge=2, description="windows used for fit (seeded sample); None = all")


class IForestParams(PyodParams):
    """Isolation Forest parameters passed to pyod."""

    n_estimators: int = Field(100, ge=1)
    max_samples: int | Literal["auto"] = Field("auto")
    max_features: float = Field(1.0, gt=0.0, le=1.0)


class OCSVMParams(PyodParams):
    """One-class SVM parameters passed to pyod."""

    kernel: Literal["rbf", "linear", "poly", "sigmoid"] = "rbf"
    nu: float = Field(0.5, gt=0.0, le=1.0)
    gamma: float | Literal["auto", "scale"] = "auto"
    max_train: int | None = Field(10_000, ge=2, description="kernel fit is quadratic: sampled by default")


class LOFParams(PyodParams):
    """Local Outlier Factor parameters passed to pyod."""

    n_neighbors: int = Field(20, ge=1)
    metric: Literal["euclidean", "manhattan", "cosine"] = "euclidean"
    max_train: int | None = Field(10_000, ge=2, description="neighbour search grows with training size")


class ECODParams(PyodParams):
    """ECOD has no tuning parameters beyond the training cap."""


class HBOSParams(PyodParams):
    """Histogram-based outlier score parameters passed to pyod."""

    n_bins: int | Literal["auto"] = 10
    alpha: float = Field(0.1, gt=0.0, lt=1.0)
    tol: float = Field(0.5, gt=0.0, lt=1.0)


class PyodDetector(Detector):
    """A pyod model on log1p(counts); score = the model's own ``decision_function``.

    Features are log(1 + count) per event, dense, with no further scaling, so frequent
    events do not drown rare ones. The pyod ``contamination`` only sets pyod's own
    threshold, which the harness never uses, so it is not exposed. The seed is passed as
    ``random_state`` to models that take one. ``max_train`` caps the training windows by a
    seeded sample (quadratic models are capped by default).
    """

    reads: ClassVar[str] = "counts"
    trains_on: ClassVar[str] = "all"
    supports_state: ClassVar[bool] = False

    @abstractmethod
    def build_model(self) -> Any:
        """The unfitted pyod model for these parameters and seed."""

    @staticmethod
    def features(counts: sp.spmatrix) -> np.ndarray:
        """log(1 + count) per window and event, dense float64."""
        return dense(log1p_counts(counts), "feature matrix")

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        cap = self.params.max_train
        if cap is not None and len(windows) > cap:
            rng = np.random.default_rng(self.seed)
            windows = windows.subset(np.sort(rng.choice(len(windows), cap, replace=False)))
        self.model_ = self.build_model()
        self.model_.fit(self.features(windows.counts))
        self.n_train_ = len(windows)

    def _score(self, windows: WindowSet) -> np.ndarray:
        counts = sp.csr_matrix(windows.counts)
        parts = [
            self.model_.decision_function(self.features(counts[lo : lo + CHUNK_ROWS]))
            for lo in range(0, counts.shape[0], CHUNK_ROWS)
        ]
        return np.concatenate(parts).astype(np.float64)

    def info(self) -> dict[str, Any]:
        """Number of windows the model was fitted on."""
        return {} if self.vocab_size is None else {"train_windows": int(self.n_train_)}


class IForestDetector(PyodDetector):
    """Isolation Forest (Liu et al., ICDM 2008) through pyod."""

    name: ClassVar[str] = "iforest"
    Params: ClassVar[type[IForestParams]] = IForestParams

    def build_model(self) -> Any:
        """pyod IForest with these parameters and the seed as random_state."""
        from pyod.models.iforest import IForest

        p = self.params
        return IForest(
            n_estimators=p.n_estimators, max_samples=p.max_samples, max_features=p.max_features,
            random_state=self.seed, n_jobs=1,
        )


class OCSVMDetector(PyodDetector):
    """One-class SVM (Schoelkopf et al., 2001) through pyod."""

    name: ClassVar[str] = "ocsvm"
    Params: ClassVar[type[OCSVMParams]] = OCSVMParams

    def build_model(self) -> Any:
        """pyod OCSVM with these parameters (deterministic; takes no seed)."""
        from pyod.models.ocsvm import OCSVM

        p = self.params
        return OCSVM(kernel=p.kernel, nu=p.nu, gamma=p.gamma)


class LOFDetector(PyodDetector):
    """Local Outlier Factor (Breunig et al., SIGMOD 2000) through pyod, novelty mode."""

    name: ClassVar[str] = "lof"
    Params: ClassVar[type[LOFParams]] = LOFParams

    def build_model(self) -> Any:
        """pyod LOF in novelty mode with these parameters."""
        from pyod.models.lof import LOF

        p = self.params
        return LOF(n_neighbors=p.n_neighbors, metric=p.metric, novelty=True, n_jobs=1)


class ECODDetector(PyodDetector):
    """ECOD, empirical-CDF outlier detection (Li et al., TKDE 2022), against training-only distributions.

    Per event feature, the left and right tail probabilities of a window's value are read
    from the empirical CDF of the *training* windows with the scored window added,
    ``(#{train <= x} + 1) / (n + 1)`` and ``(#{train >= x} + 1) / (n + 1)`` (never zero). The
    score is the paper's: ``max(O_left, O_right, O_auto)`` where each is the sum over features
    of ``-log`` tail probabilities and ``O_auto`` takes the left tail where the training
    skewness is negative, else the right. Unlike pyod's ECOD, which rebuilds the CDFs from the
    training windows plus the whole batch being scored, a window's score never depends on
    the other windows scored with it.
    """

    name: ClassVar[str] = "ecod"
    Params: ClassVar[type[ECODParams]] = ECODParams

    def build_model(self) -> Any:
        """Unused: ECOD is computed here in numpy (pyod's version scores transductively)."""
        return None

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        cap = self.params.max_train
        if cap is not None and len(windows) > cap:
            rng = np.random.default_rng(self.seed)
            windows = windows.subset(np.sort(rng.choice(len(windows), cap, replace=False)))
        x = self.features(windows.counts)
        self.sorted_ = np.sort(x, axis=0)
        self.left_skew_ = ecod_skewness(x) < 0
        self.n_train_ = len(windows)

    def _score(self, windows: WindowSet) -> np.ndarray:
        counts = sp.csr_matrix(windows.counts)
        parts = [self._tails(self.features(counts[lo : lo + CHUNK_ROWS])) for lo in range(0, counts.shape[0], CHUNK_ROWS)]
        return np.concatenate(parts).astype(np.float64)

    def _tails(self, x: np.ndarray) -> np.ndarray:
        """Paper score of each row of a feature block against the training columns."""
        n = self.sorted_.shape[0]
        le = np.empty(x.shape, dtype=np.float64)
        ge = np.empty(x.shape, dtype=np.float64)
        for j in range(x.shape[1]):  # one sorted search per feature (vectorised over windows)
            col = self.sorted_[:, j]
            le[:, j] = np.searchsorted(col, x[:, j], side="right")
            ge[:, j] = n - np.searchsorted(col, x[:, j], side="left")
        u_left = -np.log((le + 1.0) / (n + 1.0))
        u_right = -np.log((ge + 1.0) / (n + 1.0))
        o_left, o_right = u_left.sum(axis=1), u_right.sum(axis=1)
        o_auto = np.where(self.left_skew_[None, :], u_left, u_right).sum(axis=1)
        return np.maximum(np.maximum(o_left, o_right), o_auto)


def ecod_skewness(x: np.ndarray) -> np.ndarray:
    """Sample skewness of each column (population moments; 0 for a constant column)."""
    centred = x - x.mean(axis=0)
    m2 = (centred**2).mean(axis=0)
    m3 = (centred**3).mean(axis=0)
    return np.divide(m3, m2**1.5, out=np.zeros_like(m3), where=m2 > 1e-300)


class HBOSDetector(PyodDetector):
    """Histogram-based outlier score (Goldstein & Dengel, 2012) through pyod."""

    name: ClassVar[str] = "hbos"
    Params: ClassVar[type[HBOSParams]] = HBOSParams

    def build_model(self) -> Any:
        """pyod HBOS with these parameters."""
        from pyod.models.hbos import HBOS

        p = self.params
        return HBOS(n_bins=p.n_bins, alpha=p.alpha, tol=p.tol)


PYOD_DETECTORS: tuple[type[PyodDetector], ...] = (
    IForestDetector, OCSVMDetector, LOFDetector, ECODDetector, HBOSDetector,
)
