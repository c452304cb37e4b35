"""Event-rate rule: the hand-written operator baseline of new events, rare events and count spikes."""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np
import scipy.sparse as sp
from logtrial.detectors.base import Detector, DetectorParams
from logtrial.detectors.features import document_frequency
from logtrial.windowing.windows import WindowSet
from pydantic import Field


class RateRuleParams(DetectorParams):
    """Weights and limits of the event-rate rule."""

    rare_fraction: float = Field(0.01, ge=0.0, le=1.0, description="events in fewer training windows than this share are rare")
    new_weight: float = Field(10.0, ge=0.0, description="score added per distinct never-seen event in a window")
    rare_weight: float = Field(3.0, ge=0.0, description="score added per distinct rare event in a window")
    min_std: float = Field(1.0, gt=0.0, description="floor on the per-event standard deviation in z-scores")


class RateRule(Detector):
    """Score = new-event and rare-event counts, plus the largest positive count z-score.

    This is what operators write by hand (common practice): alert on a message never
    seen before, on a message that is rare in normal operation, and on a message (or the
    total volume) whose count in a window sits many standard deviations above its mean
    over the training windows. The z-score term uses per-event means and standard
    deviations (floored at ``min_std``) and the window's total count; only upward spikes
    count, so the term is ``max(0, max_e z_e, z_total)``.
    """

    name: ClassVar[str] = "rate_rule"
    reads: ClassVar[str] = "counts"
    trains_on: ClassVar[str] = "healthy"
    Params: ClassVar[type[RateRuleParams]] = RateRuleParams
    supports_state: ClassVar[bool] = True

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        x = sp.csr_matrix(windows.counts, dtype=np.float64)
        n = x.shape[0]
        self.df_fraction_ = document_frequency(x) / n
        self.mean_ = np.asarray(x.sum(axis=0)).ravel() / n
        sq = np.asarray(x.multiply(x).sum(axis=0)).ravel() / n
        self.std_ = np.sqrt(np.maximum(sq - self.mean_**2, 0.0))
        total = np.asarray(x.sum(axis=1)).ravel()
        self.total_mean_ = float(total.mean())
        self.total_std_ = float(total.std())

    def _score(self, windows: WindowSet) -> np.ndarray:
        p = self.params
        x = sp.csr_matrix(windows.counts, dtype=np.float64)
        x.eliminate_zeros()
        present = x.copy()
        present.data[:] = 1.0
        new = self.df_fraction_ == 0.0
        rare = (self.df_fraction_ > 0.0) & (self.df_fraction_ < p.rare_fraction)
        n_new = present @ new.astype(np.float64)
        n_rare = present @ rare.astype(np.float64)
        z = x.copy()
        cols = z.indices
        z.data = (z.data - self.mean_[cols]) / np.maximum(self.std_[cols], p.min_std)
        # absent events have z <= 0, so the row maximum over stored cells, clipped at 0, is exact
        z_event = np.maximum(z.max(axis=1).toarray().ravel(), 0.0) if z.nnz else np.zeros(x.shape[0])
        total = np.asarray(x.sum(axis=1)).ravel()
        z_total = (total - self.total_mean_) / max(self.total_std_, p.min_std)
        spike = np.maximum(z_event, np.maximum(z_total, 0.0))
        return p.new_weight * n_new + p.rare_weight * n_rare + spike

    def info(self) -> dict[str, Any]:
        """Number of events known and rare at fit time."""
        if self.vocab_size is None:
            return {}
        frac = self.df_fraction_
        return {
            "events_seen": int((frac > 0).sum()),
            "events_rare": int(((frac > 0) & (frac < self.params.rare_fraction)).sum()),
        }

    def _state(self) -> dict[str, Any]:
        return {
            "df_fraction": self.df_fraction_,
            "mean": self.mean_,
            "std": self.std_,
            "total_mean": self.total_mean_,
            "total_std": self.total_std_,
        }

    def _load_state(self, state: dict[str, Any]) -> None:
        self.df_fraction_ = np.asarray(state["df_fraction"], dtype=np.float64)
        self.mean_ = np.asarray(state["mean"], dtype=np.float64)
        self.std_ = np.asarray(state["std"], dtype=np.float64)
        self.total_mean_ = float(state["total_mean"])
        self.total_std_ = float(state["total_std"])
