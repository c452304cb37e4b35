"""Supervised references trained on reported labels: logistic regression and a decision tree."""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np
import scipy.sparse as sp
from logtrial.detectors.base import Detector, DetectorParams
from logtrial.detectors.features import dense, log1p_counts
from logtrial.windowing.windows import WindowSet
from pydantic import Field
from scipy.special import expit
from sklearn.linear_model import LogisticRegression
from sklearn.tree import DecisionTreeClassifier

CHUNK_ROWS = 16_384


def _labelled(windows: WindowSet, labels: np.ndarray) -> tuple[sp.csr_matrix, np.ndarray]:
    """log1p features and 0/1 targets of the windows whose label is not -1."""
    keep = labels >= 0
    x = log1p_counts(windows.counts)[np.flatnonzero(keep)]
    return x, (labels[keep] > 0).astype(np.int64)


class LogisticParams(DetectorParams):
    """Regularisation of the logistic-regression reference."""

    C: float = Field(1.0, gt=0.0, description="inverse L2 regularisation strength")
    max_iter: int = Field(1000, ge=10)
    balanced: bool = Field(True, description="weight classes inversely to their frequency")


class LogisticDetector(Detector):
    """Logistic regression on log(1 + count) features; score = P(positive).

    Trained on the (possibly noisy) reported labels, windows labelled -1 ignored, with
    balanced class weights by default. Scoring uses the learned coefficients directly
    (sigmoid of w.x + b), which is what scikit-learn's ``predict_proba`` computes for two
    classes, so a saved model needs no pickle.
    """

    name: ClassVar[str] = "logistic"
    reads: ClassVar[str] = "counts"
    trains_on: ClassVar[str] = "labelled"
    Params: ClassVar[type[LogisticParams]] = LogisticParams
    supports_state: ClassVar[bool] = True

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        x, y = _labelled(windows, labels)
        p = self.params
        model = LogisticRegression(
            C=p.C, max_iter=p.max_iter, class_weight="balanced" if p.balanced else None, random_state=self.seed
        )
        model.fit(x, y)
        self.coef_ = model.coef_.ravel().astype(np.float64)
        self.intercept_ = float(model.intercept_[0])

    def _score(self, windows: WindowSet) -> np.ndarray:
        return expit(log1p_counts(windows.counts) @ self.coef_ + self.intercept_)

    def _state(self) -> dict[str, Any]:
        return {"coef": self.coef_, "intercept": self.intercept_}

    def _load_state(self, state: dict[str, Any]) -> None:
        self.coef_ = np.asarray(state["coef"], dtype=np.float64)
        self.intercept_ = float(state["intercept"])


class TreeParams(DetectorParams):
    """Size limits of the decision-tree reference."""

    max_depth: int | None = Field(8, ge=1, description="deepest split; None grows until leaves are pure")
    min_samples_leaf: int = Field(1, ge=1)
    balanced: bool = Field(True, description="weight classes inversely to their frequency")


class TreeDetector(Detector):
    """CART decision tree on log(1 + count) features; score = positive share of the leaf.

    Trained with scikit-learn on the labelled windows. The fitted tree is kept as plain
    arrays (children, split feature, threshold, leaf probability) and windows are routed
    through it level by level in float32, as scikit-learn does, so saving needs no pickle.
    """

    name: ClassVar[str] = "decision_tree"
    reads: ClassVar[str] = "counts"
    trains_on: ClassVar[str] = "labelled"
    Params: ClassVar[type[TreeParams]] = TreeParams
    supports_state: ClassVar[bool] = True

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        x, y = _labelled(windows, labels)
        p = self.params
        model = DecisionTreeClassifier(
            max_depth=p.max_depth,
            min_samples_leaf=p.min_samples_leaf,
            class_weight="balanced" if p.balanced else None,
            random_state=self.seed,
        )
        model.fit(x, y)
        tree = model.tree_
        value = tree.value[:, 0, :]
        pos = int(np.flatnonzero(model.classes_ == 1)[0])
        self.left_ = tree.children_left.astype(np.int64)
        self.right_ = tree.children_right.astype(np.int64)
        self.feature_ = tree.feature.astype(np.int64)
        self.threshold_ = tree.threshold.astype(np.float64)
        self.leaf_proba_ = value[:, pos] / value.sum(axis=1)

    def _score(self, windows: WindowSet) -> np.ndarray:
        feats = log1p_counts(windows.counts)
        out = np.empty(feats.shape[0])
        for lo in range(0, feats.shape[0], CHUNK_ROWS):
            x = dense(feats[lo : lo + CHUNK_ROWS]).astype(np.float32)
            node = np.zeros(x.shape[0], dtype=np.int64)
            rows = np.arange(x.shape[0])
            active = self.left_[node] >= 0
            while active.any():
                r, nd = rows[active], node[active]
                go_left = x[r, self.feature_[nd]] <= self.threshold_[nd]
                node[active] = np.where(go_left, self.left_[nd], self.right_[nd])
                active = self.left_[node] >= 0
            out[lo : lo + CHUNK_ROWS] = self.leaf_proba_[node]
        return out

    def info(self) -> dict[str, Any]:
        """Number of nodes in the fitted tree."""
        return {} if self.vocab_size is None else {"nodes": int(len(self.left_))}

    def _state(self) -> dict[str, Any]:
        return {
            "left": self.left_, "right": self.right_, "feature": self.feature_,
            "threshold": self.threshold_, "leaf_proba": self.leaf_proba_,
        }

    def _load_state(self, state: dict[str, Any]) -> None:
        self.left_ = np.asarray(state["left"], dtype=np.int64)
        self.right_ = np.asarray(state["right"], dtype=np.int64)
        self.feature_ = np.asarray(state["feature"], dtype=np.int64)
        self.threshold_ = np.asarray(state["threshold"], dtype=np.float64)
        self.leaf_proba_ = np.asarray(state["leaf_proba"], dtype=np.float64)
