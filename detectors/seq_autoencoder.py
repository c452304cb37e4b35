"""Sequence autoencoder: a window's event sequence is encoded to a latent state and decoded back; score = reconstruction loss."""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np
import torch
from logtrial.detectors.base import Detector
from logtrial.detectors.torch_train import (
    TorchParams,
    arrays_to_weights,
    batch_slices,
    fit_sequence_model,
    ragged_chunks,
    torch_session,
    unique_rows,
    weights_to_arrays,
)
from logtrial.windowing.windows import WindowSet
from pydantic import Field
from torch import nn
from torch.nn.utils.rnn import pack_padded_sequence


class SeqAutoencoderParams(TorchParams):
    """Chunk length, model sizes and training settings of the sequence autoencoder."""

    chunk: int = Field(64, ge=2, description="sequences are cut into consecutive chunks of at most this many events")
    embedding: int = Field(16, ge=1, description="event embedding size")
    hidden: int = Field(32, ge=1, description="LSTM hidden size (per direction in the encoder)")
    latent: int = Field(16, ge=1, description="size of the latent state between encoder and decoder")
    epochs: int = Field(10, ge=1, description="maximum epochs over the distinct training chunks")
    min_batches: int = Field(10, ge=1, description="optimisation steps per epoch at least (passes repeated)")
    max_train: int | None = Field(50_000, ge=2, description="training windows used (seeded sample); None = all")


class SeqAutoencoderNet(nn.Module):
    """Event embedding -> bidirectional LSTM -> LSTM -> latent -> LSTM decoder with teacher forcing -> event logits."""

    def __init__(self, vocab: int, embedding: int, hidden: int, latent: int) -> None:
        super().__init__()
        self.vocab = vocab
        self.pad, self.bos = vocab, vocab + 1
        self.embed = nn.Embedding(vocab + 2, embedding, padding_idx=vocab)
        self.bi = nn.LSTM(embedding, hidden, batch_first=True, bidirectional=True)
        self.top = nn.LSTM(2 * hidden, hidden, batch_first=True)
        self.to_latent = nn.Linear(hidden, latent)
        self.from_latent = nn.Linear(latent, 2 * hidden)
        self.decoder = nn.LSTM(embedding, hidden, batch_first=True)
        self.out = nn.Linear(hidden, vocab)
        self.hidden = hidden

    def encode(self, seq: torch.Tensor, lengths: torch.Tensor) -> torch.Tensor:
        """Latent state of each padded sequence (batch x length ids, true lengths)."""
        packed = pack_padded_sequence(self.embed(seq), lengths.cpu(), batch_first=True, enforce_sorted=False)
        mid, _ = self.bi(packed)
        _, (h, _) = self.top(mid)
        return torch.tanh(self.to_latent(h[-1]))

    def forward(self, seq: torch.Tensor, lengths: torch.Tensor) -> torch.Tensor:
        """Logits of every position, decoding from the latent state with the true previous event as input."""
        z = self.encode(seq, lengths)
        h0, c0 = torch.tanh(self.from_latent(z)).split(self.hidden, dim=1)
        prev = torch.cat([torch.full_like(seq[:, :1], self.bos), seq[:, :-1]], dim=1)
        dec, _ = self.decoder(self.embed(prev), (h0.unsqueeze(0).contiguous(), c0.unsqueeze(0).contiguous()))
        return self.out(dec)

    def token_loss(self, seq: torch.Tensor, lengths: torch.Tensor) -> torch.Tensor:
        """Cross-entropy of every real (non-padding) position; padding positions are 0."""
        logits = self(seq, lengths)
        target = seq.masked_fill(seq == self.pad, 0)
        ce = nn.functional.cross_entropy(logits.reshape(-1, self.vocab), target.reshape(-1), reduction="none")
        mask = torch.arange(seq.shape[1], device=seq.device)[None, :] < lengths[:, None]
        return ce.reshape(seq.shape) * mask


def weighted_reconstruction(model: nn.Module, batch: tuple[torch.Tensor, ...]) -> torch.Tensor:
    """Mean per-event reconstruction loss, each distinct chunk weighted by how often it occurs."""
    seq, lengths, weight = batch
    seq = seq[:, : int(lengths.max())]
    per_chunk = model.token_loss(seq, lengths).sum(dim=1)
    return (per_chunk * weight).sum() / (lengths.to(weight.dtype) * weight).sum()


def distinct_chunks(values: np.ndarray, offsets: np.ndarray, length: int, pad: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct padded chunks of a set of windows, their lengths and counts."""
    mat, lens, _ = ragged_chunks(values, offsets, length, pad)
    rows, row_len, _, counts = distinct_with_lengths(mat, lens)
    return rows, row_len, counts


def distinct_with_lengths(mat: np.ndarray, lens: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Distinct padded rows, the length of each, each input row's distinct row, and the counts."""
    rows, inverse, counts = unique_rows(mat)
    row_len = np.zeros(len(rows), dtype=np.int64)
    row_len[inverse] = lens
    return rows, row_len, inverse, counts


class SequenceAutoencoder(Detector):
    """LSTM sequence autoencoder over a window's event sequence; score = reconstruction loss.

    Trained on healthy windows. Each window's sequence is cut into consecutive chunks of
    at most ``chunk`` events. Encoder: event embedding -> bidirectional LSTM -> LSTM,
    whose last state is mapped to a latent vector; decoder: an LSTM started from the latent
    vector, fed the true previous event at each step (teacher forcing), predicts every
    event. The score is the mean cross-entropy per event over all of a window's chunks
    (0 for a window without events). Distinct chunks are trained and scored once, each
    weighted by its count, which leaves the objective unchanged.
    """

    name: ClassVar[str] = "seq_ae"
    reads: ClassVar[str] = "sequences"
    trains_on: ClassVar[str] = "healthy"
    Params: ClassVar[type[SeqAutoencoderParams]] = SeqAutoencoderParams
    supports_state: ClassVar[bool] = True

    def _build(self, vocab: int) -> SeqAutoencoderNet:
        p = self.params
        self.n_events_ = int(vocab)
        return SeqAutoencoderNet(vocab, p.embedding, p.hidden, p.latent)

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        chunk, vocab = self.params.chunk, windows.vocab_size
        fit_sequence_model(self, windows, lambda v, o: distinct_chunks(v, o, chunk, vocab), weighted_reconstruction)

    def chunk_losses(self, mat: np.ndarray, lens: np.ndarray) -> np.ndarray:
        """Summed per-event reconstruction loss of each padded chunk."""
        rows, row_len, inverse, _ = distinct_with_lengths(mat, lens)
        out = np.empty(len(rows), dtype=np.float64)
        with torch_session(self.seed, self.params.threads), torch.no_grad():
            for sl in batch_slices(len(rows), 2048):
                lens = torch.from_numpy(row_len[sl])
                seq = torch.from_numpy(rows[sl])[:, : int(lens.max())]
                out[sl] = self.net_.token_loss(seq, lens).sum(dim=1).double().numpy()
        return out[inverse]

    def _score(self, windows: WindowSet) -> np.ndarray:
        mat, lens, owner = ragged_chunks(windows.seq_values, windows.seq_offsets, self.params.chunk, self.n_events_)
        if len(owner) == 0:
            return np.zeros(len(windows))
        total = np.bincount(owner, weights=self.chunk_losses(mat, lens), minlength=len(windows))
        n = np.diff(windows.seq_offsets).astype(np.float64)
        return np.divide(total, n, out=np.zeros_like(total), where=n > 0)

    def info(self) -> dict[str, Any]:
        """Training epochs and losses."""
        return self.log_.as_dict() if hasattr(self, "log_") else {}

    def _state(self) -> dict[str, Any]:
        return {"n_events": self.n_events_, **weights_to_arrays(self.net_)}

    def _load_state(self, state: dict[str, Any]) -> None:
        self.net_ = self._build(int(state["n_events"]))
        arrays_to_weights(self.net_, state)
