"""Density autoencoder: a stacked fully connected autoencoder over each window's event-frequency vector."""

from __future__ import annotations

from typing import Any, ClassVar, Literal

import numpy as np
import scipy.sparse as sp
import torch
from logtrial.detectors.base import Detector
from logtrial.detectors.features import dense, idf_weights
from logtrial.detectors.torch_train import (
    TorchParams,
    TrainLog,
    arrays_to_weights,
    batch_slices,
    choose_device,
    sample_windows,
    split_windows,
    torch_session,
    train,
    weights_to_arrays,
)
from logtrial.windowing.windows import WindowSet
from pydantic import Field, PositiveInt
from torch import nn

CHUNK_ROWS = 16_384


class DensityAutoencoderParams(TorchParams):
    """Layer sizes, loss, event weights, sum penalty and training settings of the density autoencoder."""

    hidden: tuple[PositiveInt, ...] = Field((32, 8), min_length=1, description="encoder layer sizes; the decoder mirrors them")
    loss: Literal["mse", "log_cosh"] = Field("mse", description="per-event reconstruction loss")
    weights: Literal["none", "idf"] = Field("none", description="per-event loss weights; idf lifts rare events")
    sum_penalty: float = Field(0.0, ge=0.0, description="weight of (sum of reconstructed frequencies - 1)^2 in training")
    epochs: int = Field(30, ge=1)
    batch_size: int = Field(64, ge=1)
    patience: int = Field(3, ge=1)
    max_train: int | None = Field(50_000, ge=2, description="training windows used (seeded sample); None = all")


def frequencies(counts: sp.spmatrix) -> np.ndarray:
    """Each window's event counts divided by its number of events (float32, all-zero rows stay zero)."""
    x = dense(counts, "count matrix")
    total = x.sum(axis=1, keepdims=True)
    return np.divide(x, total, out=np.zeros_like(x), where=total > 0).astype(np.float32)


class DensityNet(nn.Module):
    """Fully connected encoder (ReLU) down to the last hidden size and a mirrored decoder with a linear output."""

    def __init__(self, vocab: int, hidden: tuple[int, ...]) -> None:
        super().__init__()
        sizes = [vocab, *hidden]
        enc: list[nn.Module] = []
        for a, b in zip(sizes[:-1], sizes[1:]):
            enc += [nn.Linear(a, b), nn.ReLU()]
        dec: list[nn.Module] = []
        back = sizes[::-1]
        for i, (a, b) in enumerate(zip(back[:-1], back[1:])):
            dec.append(nn.Linear(a, b))
            if i < len(back) - 2:
                dec.append(nn.ReLU())
        self.encoder = nn.Sequential(*enc)
        self.decoder = nn.Sequential(*dec)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Reconstructed frequency vectors."""
        return self.decoder(self.encoder(x))


def per_event_loss(recon: torch.Tensor, x: torch.Tensor, kind: str) -> torch.Tensor:
    """Element-wise reconstruction loss: squared error or log(cosh(error))."""
    err = recon - x
    if kind == "mse":
        return err * err
    # log(cosh(e)) = |e| + log1p(exp(-2|e|)) - log 2, stable for large errors
    a = err.abs()
    return a + torch.log1p(torch.exp(-2.0 * a)) - float(np.log(2.0))


class DensityAutoencoder(Detector):
    """Stacked fully connected autoencoder over event-frequency vectors; score = weighted reconstruction loss.

    Trained on healthy windows. Input: each window's counts divided by its number of events
    (frequencies summing to one). Loss per window: the mean over events of
    ``w_e * loss(recon_e - x_e)`` with ``loss`` squared error (``mse``) or log-cosh, and
    ``w_e`` 1 (``weights: none``) or the training idf log(N / df_e) scaled to mean 1
    (``weights: idf``; an unseen event gets log N) so rare events are not drowned by
    frequent ones. ``sum_penalty`` adds ``lambda * (sum(recon) - sum(x))^2`` in training only,
    keeping reconstructed frequencies summing to one. The score is the window's loss
    without the penalty.
    """

    name: ClassVar[str] = "density_ae"
    reads: ClassVar[str] = "counts"
    trains_on: ClassVar[str] = "healthy"
    Params: ClassVar[type[DensityAutoencoderParams]] = DensityAutoencoderParams
    supports_state: ClassVar[bool] = True

    def _loss_fn(self, model: nn.Module, batch: tuple[torch.Tensor, ...]) -> torch.Tensor:
        (x,) = batch
        recon = model(x)
        loss = (per_event_loss(recon, x, self.params.loss) * self.weight_t_).mean()
        if self.params.sum_penalty > 0:
            gap = recon.sum(dim=1) - x.sum(dim=1)
            loss = loss + self.params.sum_penalty * (gap * gap).mean()
        return loss

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        p = self.params
        rng = np.random.default_rng(self.seed)
        keep = sample_windows(len(windows), p.max_train, rng)
        counts = windows.counts[keep]
        if p.weights == "idf":
            w = idf_weights(counts)
            w = w / w.mean() if w.mean() > 0 else np.ones_like(w)
        else:
            w = np.ones(windows.vocab_size)
        self.event_weight_ = w.astype(np.float32)
        x = frequencies(counts)
        fit_idx, val_idx = split_windows(len(x), p.val_share, rng)
        with torch_session(self.seed, p.threads):
            device = choose_device(p.device)
            self.net_ = DensityNet(windows.vocab_size, p.hidden).to(device)
            self.weight_t_ = torch.from_numpy(self.event_weight_).to(device)
            train_data = (torch.from_numpy(x[fit_idx]).to(device),)
            val_data = (torch.from_numpy(x[val_idx]).to(device),) if len(val_idx) else None
            self.log_: TrainLog = train(self.net_, self._loss_fn, train_data, val_data, p, self.seed, what="density_ae")
            self.net_.cpu()
            self.weight_t_ = self.weight_t_.cpu()

    def _score(self, windows: WindowSet) -> np.ndarray:
        out = np.empty(len(windows), dtype=np.float64)
        with torch_session(self.seed, self.params.threads), torch.no_grad():
            for lo in range(0, len(windows), CHUNK_ROWS):
                x = torch.from_numpy(frequencies(windows.counts[lo : lo + CHUNK_ROWS]))
                for sl in batch_slices(x.shape[0], 4096):
                    xb = x[sl]
                    loss = per_event_loss(self.net_(xb), xb, self.params.loss) * self.weight_t_
                    out[lo + sl.start : lo + sl.stop] = loss.mean(dim=1).double().numpy()
        return out

    def info(self) -> dict[str, Any]:
        """Training epochs and losses."""
        return self.log_.as_dict() if hasattr(self, "log_") else {}

    def _state(self) -> dict[str, Any]:
        return {"event_weight": self.event_weight_, "n_events": int(len(self.event_weight_)),
                **weights_to_arrays(self.net_)}

    def _load_state(self, state: dict[str, Any]) -> None:
        self.event_weight_ = np.asarray(state["event_weight"], dtype=np.float32)
        self.weight_t_ = torch.from_numpy(self.event_weight_)
        self.net_ = DensityNet(int(state["n_events"]), self.params.hidden)
        arrays_to_weights(self.net_, state)
