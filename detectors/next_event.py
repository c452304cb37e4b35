"""Next-event LSTM (DeepLog, Du et al., CCS 2017): a window is anomalous where its events are not among the top-g predictions."""

from __future__ import annotations

from typing import Any, ClassVar, Literal

import numpy as np
import torch
from logtrial.detectors.base import Detector
from logtrial.detectors.torch_train import (
    TorchParams,
    arrays_to_weights,
    batch_slices,
    fit_sequence_model,
    histories,
    torch_session,
    unique_rows,
    weights_to_arrays,
)
from logtrial.windowing.windows import WindowSet
from pydantic import Field
from torch import nn


class NextEventParams(TorchParams):
    """History length, top-g, model sizes and training settings of the next-event LSTM."""

    history: int = Field(10, ge=1, description="events of history used to predict the next one (h)")
    top_g: int = Field(9, ge=1, description="an event among the g most likely predictions is normal (g)")
    embedding: int = Field(16, ge=1, description="event embedding size")
    hidden: int = Field(64, ge=1, description="LSTM hidden size")
    layers: int = Field(2, ge=1, description="stacked LSTM layers")
    score: Literal["share", "count"] = Field("share", description="share or number of a window's events missed")
    epochs: int = Field(20, ge=1, description="maximum passes over the distinct training pairs")
    max_train: int | None = Field(50_000, ge=2, description="training windows used (seeded sample); None = all")


class NextEventNet(nn.Module):
    """Embedding -> stacked LSTM -> linear layer over the event vocabulary (logits of the next event)."""

    def __init__(self, vocab: int, embedding: int, hidden: int, layers: int) -> None:
        super().__init__()
        self.embed = nn.Embedding(vocab + 1, embedding, padding_idx=vocab)
        self.lstm = nn.LSTM(embedding, hidden, num_layers=layers, batch_first=True)
        self.out = nn.Linear(hidden, vocab)

    def forward(self, hist: torch.Tensor) -> torch.Tensor:
        """Logits of the next event for each history row (batch x h ids)."""
        seq, _ = self.lstm(self.embed(hist))
        return self.out(seq[:, -1, :])


def weighted_ce(model: nn.Module, batch: tuple[torch.Tensor, ...]) -> torch.Tensor:
    """Cross-entropy of the next event, weighted by how often each distinct (history, next) pair occurs."""
    hist, target, weight = batch
    ce = nn.functional.cross_entropy(model(hist), target, reduction="none")
    return (ce * weight).sum() / weight.sum()


def distinct_pairs(values: np.ndarray, offsets: np.ndarray, h: int, pad: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct (history, next event) pairs of a set of windows with their counts."""
    hist, target, _ = histories(values, offsets, h, pad)
    rows, _, counts = unique_rows(np.c_[hist, target])
    return rows[:, :h], rows[:, h], counts


class NextEventLSTM(Detector):
    """DeepLog's next-event model: an LSTM predicts each event from the ``history`` events before it.

    Trained on healthy windows. Every event of a window is predicted from the events before
    it in the same window (left-padded with a padding id, so the first events are scored too);
    an event is a *miss* when it is not among the ``top_g`` most likely predictions. The
    score is the share of the window's events that are misses (``score: share``) or their
    number (``score: count``); windows without events score 0. The threshold on the score
    stays with the harness. Training pairs and scored histories are deduplicated (a pair
    occurring c times carries weight c in the loss), which leaves the objective unchanged.
    """

    name: ClassVar[str] = "next_event"
    reads: ClassVar[str] = "sequences"
    trains_on: ClassVar[str] = "healthy"
    Params: ClassVar[type[NextEventParams]] = NextEventParams
    supports_state: ClassVar[bool] = True

    def _build(self, vocab: int) -> NextEventNet:
        p = self.params
        self.n_events_ = int(vocab)
        return NextEventNet(vocab, p.embedding, p.hidden, p.layers)

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        h, vocab = self.params.history, windows.vocab_size
        fit_sequence_model(self, windows, lambda v, o: distinct_pairs(v, o, h, vocab), weighted_ce)

    def top_g_hits(self, hist: np.ndarray, target: np.ndarray) -> np.ndarray:
        """Whether each target event is among the top-g predictions for its history row."""
        p = self.params
        rows, inverse, _ = unique_rows(hist)
        g = min(p.top_g, self.n_events_)
        ranks = np.empty((len(rows), g), dtype=np.int64)
        with torch_session(self.seed, p.threads), torch.no_grad():
            for sl in batch_slices(len(rows), 4096):
                logits = self.net_(torch.from_numpy(rows[sl]))
                ranks[sl] = torch.topk(logits, g, dim=1).indices.numpy()
        return (ranks[inverse] == target[:, None]).any(axis=1)

    def predict_next(self, hist: np.ndarray) -> np.ndarray:
        """The most likely next event for each history row (batch x h ids)."""
        with torch_session(self.seed, self.params.threads), torch.no_grad():
            return self.net_(torch.from_numpy(np.asarray(hist, dtype=np.int64))).argmax(dim=1).numpy()

    def _score(self, windows: WindowSet) -> np.ndarray:
        hist, target, owner = histories(windows.seq_values, windows.seq_offsets, self.params.history, self.n_events_)
        miss = ~self.top_g_hits(hist, target) if len(target) else np.zeros(0, dtype=bool)
        misses = np.bincount(owner, weights=miss.astype(np.float64), minlength=len(windows))
        if self.params.score == "count":
            return misses
        lens = np.diff(windows.seq_offsets).astype(np.float64)
        return np.divide(misses, lens, out=np.zeros_like(misses), where=lens > 0)

    def info(self) -> dict[str, Any]:
        """Training epochs and losses."""
        return self.log_.as_dict() if hasattr(self, "log_") else {}

    def _state(self) -> dict[str, Any]:
        return {"n_events": self.n_events_, **weights_to_arrays(self.net_)}

    def _load_state(self, state: dict[str, Any]) -> None:
        self.net_ = self._build(int(state["n_events"]))
        arrays_to_weights(self.net_, state)
