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
    end_event: bool | None = Field(
        None, description="predict an end-of-window event after the last one (None = on for session windows)"
    )
    end_top_g: int | None = Field(
        None, ge=1, description="top-g for the end event only (None = top_g); a stricter end rule, not the published one"
    )
    epochs: int = Field(200, ge=1, description="safety cap on epochs; training stops when validation loss stops improving")
    patience: int = Field(3, ge=1, description="epochs without validation improvement before stopping")
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


def with_end_event(values: np.ndarray, offsets: np.ndarray, end_id: int) -> tuple[np.ndarray, np.ndarray]:
    """Ragged sequences with ``end_id`` appended to every window (empty windows get it too)."""
    offsets = np.asarray(offsets, dtype=np.int64)
    n = len(offsets) - 1
    new_offsets = offsets - offsets[0] + np.arange(n + 1, dtype=np.int64)
    out = np.full(int(new_offsets[-1]), end_id, dtype=np.int64)
    keep = np.ones(len(out), dtype=bool)
    keep[new_offsets[1:] - 1] = False
    out[keep] = np.asarray(values, dtype=np.int64)[offsets[0] : offsets[-1]]
    return out, new_offsets


def distinct_pairs(values: np.ndarray, offsets: np.ndarray, h: int, pad: int,
                   end_id: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct (history, next event) pairs of a set of windows with their counts (end event appended if given)."""
    if end_id is not None:
        values, offsets = with_end_event(values, offsets, end_id)
    hist, target, _ = histories(values, offsets, h, pad)
    rows, _, counts = unique_rows(np.c_[hist, target])
    return rows[:, :h], rows[:, h], counts


class NextEventLSTM(Detector):
    """DeepLog's next-event model: an LSTM predicts each event from the ``history`` events before it.

    Trained on healthy windows. Every event of a window is predicted from the events before
    it in the same window (left-padded with a padding id, so the first events are scored too);
    an event is a *miss* when it is not among the ``top_g`` most likely predictions. With
    ``end_event`` (default on for session windows, off otherwise) an extra end-of-window event
    is predicted after the last one, so a session that stops where healthy sessions never stop
    is a miss too. The score is the share of the predicted events that are misses
    (``score: share``) or their number (``score: count``); windows without events score 0
    (without ``end_event``). Training stops when the loss on held-out training windows stops
    improving for ``patience`` epochs; ``epochs`` is only a safety cap. The threshold on the score
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
        p = self.params
        self.end_event_ = bool(p.end_event if p.end_event is not None else windows.info.get("kind") == "session")
        h, vocab = p.history, windows.vocab_size
        end_id = vocab if self.end_event_ else None
        pad = vocab + 1 if self.end_event_ else vocab
        # the network's output classes are the events, plus the end event when it is on
        fit_sequence_model(self, _Widened(windows, pad), lambda v, o: distinct_pairs(v, o, h, pad, end_id), weighted_ce)

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
        top = ranks[inverse]
        hits = (top == target[:, None]).any(axis=1)
        if getattr(self, "end_event_", False) and p.end_top_g is not None:
            is_end = target == self.n_events_ - 1
            g_end = min(p.end_top_g, g)
            hits[is_end] = (top[is_end, :g_end] == target[is_end, None]).any(axis=1) if g_end < g else hits[is_end]
        return hits

    def predict_next(self, hist: np.ndarray) -> np.ndarray:
        """The most likely next event for each history row (batch x h ids)."""
        with torch_session(self.seed, self.params.threads), torch.no_grad():
            return self.net_(torch.from_numpy(np.asarray(hist, dtype=np.int64))).argmax(dim=1).numpy()

    def _score(self, windows: WindowSet) -> np.ndarray:
        values, offsets = windows.seq_values, windows.seq_offsets
        if self.end_event_:
            values, offsets = with_end_event(values, offsets, self.n_events_ - 1)
        hist, target, owner = histories(values, offsets, self.params.history, self.n_events_)
        miss = ~self.top_g_hits(hist, target) if len(target) else np.zeros(0, dtype=bool)
        misses = np.bincount(owner, weights=miss.astype(np.float64), minlength=len(windows))
        if self.params.score == "count":
            return misses
        lens = np.diff(offsets).astype(np.float64)
        return np.divide(misses, lens, out=np.zeros_like(misses), where=lens > 0)

    def info(self) -> dict[str, Any]:
        """Training epochs and losses, and whether the end event was used."""
        if not hasattr(self, "log_"):
            return {}
        return {**self.log_.as_dict(), "end_event": self.end_event_, "epoch_cap": self.params.epochs,
                "stopped_early": self.log_.epochs_run < self.params.epochs}

    def _state(self) -> dict[str, Any]:
        return {"n_events": self.n_events_, "end_event": bool(self.end_event_), **weights_to_arrays(self.net_)}

    def _load_state(self, state: dict[str, Any]) -> None:
        self.end_event_ = bool(state.get("end_event", False))
        self.net_ = self._build(int(state["n_events"]))
        arrays_to_weights(self.net_, state)


class _Widened:
    """A window set seen with a larger id space (the end event takes one more output class).

    ``fit_sequence_model`` builds the network from ``vocab_size`` and reads sequences
    through ``subset``; everything else is the wrapped window set's.
    """

    def __init__(self, windows: WindowSet, vocab_size: int) -> None:
        self._ws = windows
        self.vocab_size = vocab_size

    def __len__(self) -> int:
        return len(self._ws)

    def subset(self, index: np.ndarray) -> WindowSet:
        """The wrapped windows at the given positions."""
        return self._ws.subset(index)
