"""Shared machinery of the torch detectors: seeding, device, ragged batching, training loop, weights I/O.

Determinism: every source of randomness is seeded from the detector seed (torch's
global generator for initial weights and dropout, a NumPy generator for shuffling and
sampling), so on CPU the same config gives the same numbers. ``threads`` (parameter, else
the environment variable ``LOGTRIAL_TORCH_THREADS``, else torch's default) is applied with
``torch.set_num_threads`` for the duration of a fit or score and restored afterwards.
A progress bar is shown on an interactive terminal unless ``LOGTRIAL_PROGRESS=0``; when
the output is not a terminal, a plain line per epoch is printed at most every
``PLAIN_EVERY_S`` seconds (unless ``LOGTRIAL_PROGRESS=0``).

Budget: a fit takes at most ``max_steps`` optimisation steps (default ``STEP_BUDGET``,
2,000). On one CPU thread a step of the default density autoencoder costs a few
milliseconds and one of the sequence models some tens of milliseconds (measured with
``python bench/demo.py``), so a fit stays within a minute or two whatever the data size.
Training also stops early when the loss on the held-out ``val_share`` of the training
windows has not improved for ``patience`` epochs; the best weights are kept.
"""

from __future__ import annotations

import copy
import os
import sys
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator, Literal

import numpy as np
import torch
from logtrial.detectors.base import DetectorParams
from pydantic import Field

THREADS_ENV = "LOGTRIAL_TORCH_THREADS"
PROGRESS_ENV = "LOGTRIAL_PROGRESS"
STEP_BUDGET = 2_000
PLAIN_EVERY_S = 10.0


class TorchParams(DetectorParams):
    """Training settings shared by every torch detector (sizes live in each detector's own params)."""

    epochs: int = Field(8, ge=1, description="maximum passes over the training data")
    batch_size: int = Field(256, ge=1, description="examples per optimisation step")
    lr: float = Field(3e-3, gt=0.0, description="Adam learning rate")
    weight_decay: float = Field(0.0, ge=0.0, description="Adam L2 penalty")
    patience: int = Field(2, ge=1, description="epochs without validation improvement before stopping")
    min_batches: int = Field(50, ge=1, description="optimisation steps per epoch at least (passes repeated)")
    max_steps: int | None = Field(STEP_BUDGET, ge=1, description="optimisation steps per fit at most (the budget); None = no bound")
    val_share: float = Field(0.1, ge=0.0, lt=1.0, description="share of training windows held out for early stopping")
    max_train: int | None = Field(20_000, ge=2, description="training windows used (seeded sample); None = all")
    threads: int | None = Field(None, ge=1, description=f"torch threads; None = ${THREADS_ENV} or torch's default")
    device: Literal["auto", "cpu", "cuda"] = Field("auto", description="auto = a GPU when present, else CPU")


def choose_device(preference: str = "auto") -> torch.device:
    """The torch device for a preference: cuda when asked for or available (auto), else cpu."""
    if preference == "cuda" or (preference == "auto" and torch.cuda.is_available()):
        if not torch.cuda.is_available():
            raise RuntimeError("device 'cuda' requested but no GPU is available")
        return torch.device("cuda")
    return torch.device("cpu")


def thread_count(param: int | None) -> int | None:
    """Threads to use: the parameter, else LOGTRIAL_TORCH_THREADS, else None (torch's default)."""
    if param is not None:
        return int(param)
    raw = os.environ.get(THREADS_ENV, "").strip()
    if not raw:
        return None
    if not raw.isdigit() or int(raw) < 1:
        raise ValueError(f"environment variable {THREADS_ENV} must be a positive integer, got {raw!r}")
    return int(raw)


@contextmanager
def torch_session(seed: int, threads: int | None) -> Iterator[None]:
    """Seed torch and set its thread count for a block, restoring the previous thread count after."""
    before = torch.get_num_threads()
    n = thread_count(threads)
    if n is not None:
        torch.set_num_threads(n)
    torch.manual_seed(int(seed))
    try:
        yield
    finally:
        if n is not None:
            torch.set_num_threads(before)


def show_progress() -> bool:
    """Whether to draw progress bars: on a terminal, unless LOGTRIAL_PROGRESS=0."""
    flag = os.environ.get(PROGRESS_ENV)
    if flag is not None:
        return flag.strip() not in ("0", "false", "no", "")
    return sys.stderr.isatty()


def plain_progress() -> bool:
    """Whether to print plain per-epoch lines: output is not a terminal and LOGTRIAL_PROGRESS is not 0."""
    flag = os.environ.get(PROGRESS_ENV)
    if flag is not None and flag.strip() in ("0", "false", "no", ""):
        return False
    return not show_progress()


# ----- ragged sequences -> dense batches ---------------------------------------------------


def sample_windows(n: int, cap: int | None, rng: np.random.Generator) -> np.ndarray:
    """Sorted positions of at most ``cap`` windows out of ``n`` (seeded sample; all when cap is None)."""
    if cap is None or n <= cap:
        return np.arange(n, dtype=np.int64)
    return np.sort(rng.choice(n, size=cap, replace=False)).astype(np.int64)


def ragged_chunks(values: np.ndarray, offsets: np.ndarray, length: int, pad: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every window's sequence cut into consecutive chunks of at most ``length`` events.

    Returns the padded chunk matrix (chunks x length, int64, ``pad`` after the end),
    the chunk lengths, and the window each chunk belongs to. Empty windows have no chunk.
    """
    offsets = np.asarray(offsets, dtype=np.int64)
    lens = np.diff(offsets)
    n_chunks = -(-lens // length)
    owner = np.repeat(np.arange(len(lens), dtype=np.int64), n_chunks)
    first_chunk = np.repeat(np.cumsum(n_chunks) - n_chunks, n_chunks)
    j = np.arange(len(owner), dtype=np.int64) - first_chunk
    start = offsets[owner] + j * length
    chunk_len = np.minimum(length, offsets[owner + 1] - start)
    pos = start[:, None] + np.arange(length, dtype=np.int64)[None, :]
    valid = np.arange(length)[None, :] < chunk_len[:, None]
    vals = np.asarray(values, dtype=np.int64)
    mat = np.where(valid, vals[np.where(valid, pos, 0)] if len(vals) else 0, pad)
    return mat.astype(np.int64), chunk_len.astype(np.int64), owner


def histories(values: np.ndarray, offsets: np.ndarray, h: int, pad: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For every event, the ``h`` events before it in its window (left-padded with ``pad``).

    Returns the history matrix (events x h, int64), the event itself (the target), and
    the window each event belongs to.
    """
    offsets = np.asarray(offsets, dtype=np.int64)
    vals = np.asarray(values, dtype=np.int64)
    lens = np.diff(offsets)
    owner = np.repeat(np.arange(len(lens), dtype=np.int64), lens)
    m = int(offsets[-1] - offsets[0])
    pos = offsets[0] + np.arange(m, dtype=np.int64)
    hist_pos = pos[:, None] - np.arange(h, 0, -1, dtype=np.int64)[None, :]
    inside = hist_pos >= offsets[owner][:, None]
    hist = np.where(inside, vals[np.where(inside, hist_pos, 0)] if len(vals) else 0, pad)
    return hist.astype(np.int64), vals[pos], owner


def unique_rows(mat: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct rows of an int64 matrix, the index of each row's distinct row, and the row counts."""
    mat = np.ascontiguousarray(mat, dtype=np.int64)
    if mat.shape[0] == 0:
        return mat, np.zeros(0, np.int64), np.zeros(0, np.int64)
    view = mat.view(np.dtype((np.void, mat.dtype.itemsize * mat.shape[1]))).ravel()
    _, first, inverse, counts = np.unique(view, return_index=True, return_inverse=True, return_counts=True)
    return mat[first], inverse.ravel().astype(np.int64), counts.astype(np.int64)


# ----- the training loop ---------------------------------------------------------------------

LossFn = Callable[[torch.nn.Module, tuple[torch.Tensor, ...]], torch.Tensor]


@dataclass
class TrainLog:
    """What a fit did: epochs run, best epoch, per-epoch train and validation losses, examples seen."""

    epochs_run: int = 0
    best_epoch: int = 0
    train_loss: list[float] = field(default_factory=list)
    val_loss: list[float] = field(default_factory=list)
    examples: int = 0
    steps: int = 0
    budget_hit: bool = False

    def as_dict(self) -> dict:
        """Plain form for detector info."""
        return {
            "epochs_run": self.epochs_run, "best_epoch": self.best_epoch, "examples": self.examples,
            "steps": self.steps, "budget_hit": self.budget_hit,
            "train_loss": [round(v, 6) for v in self.train_loss], "val_loss": [round(v, 6) for v in self.val_loss],
        }


def batch_slices(n: int, batch_size: int) -> list[slice]:
    """Consecutive slices covering 0..n in steps of ``batch_size``."""
    return [slice(lo, min(lo + batch_size, n)) for lo in range(0, n, batch_size)]


def evaluate_loss(model: torch.nn.Module, loss_fn: LossFn, data: tuple[torch.Tensor, ...], batch_size: int,
                  weight: torch.Tensor | None = None) -> float:
    """Mean loss over a data set, batches weighted by their size (or by the summed example weights)."""
    n = int(data[0].shape[0])
    if n == 0:
        return float("nan")
    model.eval()
    total, mass = 0.0, 0.0
    with torch.no_grad():
        for sl in batch_slices(n, batch_size):
            batch = tuple(t[sl] for t in data)
            w = float(weight[sl].sum()) if weight is not None else float(sl.stop - sl.start)
            total += float(loss_fn(model, batch)) * w
            mass += w
    return total / mass if mass > 0 else float("nan")


def train(
    model: torch.nn.Module,
    loss_fn: LossFn,
    train_data: tuple[torch.Tensor, ...],
    val_data: tuple[torch.Tensor, ...] | None,
    params: TorchParams,
    seed: int,
    what: str = "training",
    weight_index: int | None = None,
) -> TrainLog:
    """Minibatch Adam on ``loss_fn`` with seeded shuffling, early stopping on validation loss, best weights kept.

    ``loss_fn(model, batch)`` returns the mean loss of a batch (a tuple of tensors sliced
    along their first axis). Without validation data the last epoch's weights are kept.
    ``weight_index`` names the tensor of per-example weights, used to average validation
    losses across batches. An epoch is one shuffled pass over the examples, repeated until it
    holds at least ``min_batches`` steps (small deduplicated sets still get enough updates).
    Training ends after ``max_steps`` steps in all (the budget), even within an epoch.
    """
    rng = np.random.default_rng(seed)
    opt = torch.optim.Adam(model.parameters(), lr=params.lr, weight_decay=params.weight_decay)
    n = int(train_data[0].shape[0])
    per_pass = len(batch_slices(n, params.batch_size))
    passes = max(1, -(-params.min_batches // max(per_pass, 1)))
    log = TrainLog()
    best = float("inf")
    best_state = None
    stale = 0
    bar = None
    if show_progress():
        from tqdm import tqdm

        bar = tqdm(total=params.epochs, desc=what, unit="epoch", leave=False, file=sys.stderr)
    plain = plain_progress()
    started = last_line = time.monotonic()
    budget = params.max_steps if params.max_steps is not None else float("inf")
    total_steps = 0
    val_weight = None if (val_data is None or weight_index is None) else val_data[weight_index]
    try:
        for epoch in range(params.epochs):
            model.train()
            running, steps = 0.0, 0
            for _ in range(passes):
                perm = torch.from_numpy(rng.permutation(n))
                for sl in batch_slices(n, params.batch_size):
                    if total_steps >= budget:
                        break
                    batch = tuple(t[perm[sl]] for t in train_data)
                    loss = loss_fn(model, batch)
                    opt.zero_grad(set_to_none=True)
                    loss.backward()
                    opt.step()
                    running += float(loss.detach())
                    steps += 1
                    total_steps += 1
                    log.examples += int(sl.stop - sl.start)
            log.steps = total_steps
            log.epochs_run = epoch + 1
            log.train_loss.append(running / max(steps, 1))
            if val_data is not None and int(val_data[0].shape[0]) > 0:
                v = evaluate_loss(model, loss_fn, val_data, max(params.batch_size, 1024), val_weight)
                log.val_loss.append(v)
                if v < best:
                    best, stale, log.best_epoch = v, 0, epoch + 1
                    best_state = copy.deepcopy(model.state_dict())
                else:
                    stale += 1
            else:
                log.best_epoch = epoch + 1
            if bar is not None:
                bar.update(1)
                bar.set_postfix(loss=f"{log.train_loss[-1]:.4f}", val=f"{log.val_loss[-1]:.4f}" if log.val_loss else "-")
            now = time.monotonic()
            if plain and now - last_line >= PLAIN_EVERY_S:
                last_line = now
                done = max(epoch + 1, 1)
                left = min(params.epochs - done, max(0.0, (budget - total_steps) / max(steps, 1)))
                print(f"  {what}: epoch {done}/{params.epochs}, {total_steps} steps, loss {log.train_loss[-1]:.4g}"
                      f"{f', val {log.val_loss[-1]:.4g}' if log.val_loss else ''}, "
                      f"about {left * (now - started) / done:.0f}s left at most", file=sys.stderr, flush=True)
            if best_state is not None and stale >= params.patience:
                break
            if total_steps >= budget:
                log.budget_hit = True
                break
    finally:
        if bar is not None:
            bar.close()
    if best_state is not None:
        model.load_state_dict(best_state)
    model.eval()
    return log


def split_windows(n: int, val_share: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Seeded split of window positions into training and early-stopping validation parts."""
    n_val = int(round(n * val_share)) if n >= 10 else 0
    perm = rng.permutation(n)
    return np.sort(perm[n_val:]), np.sort(perm[:n_val])


# ----- weights: arrays for the pickle-free detector state, and torch files ------------------


def weights_to_arrays(model: torch.nn.Module, prefix: str = "w.") -> dict[str, np.ndarray]:
    """The model's state dict as NumPy arrays under prefixed keys (for ``Detector._state``)."""
    return {prefix + k: v.detach().cpu().numpy().copy() for k, v in model.state_dict().items()}


def arrays_to_weights(model: torch.nn.Module, state: dict, prefix: str = "w.") -> None:
    """Load prefixed NumPy arrays (from ``weights_to_arrays``) into the model, strictly."""
    sd = {k[len(prefix):]: torch.from_numpy(np.array(v)) for k, v in state.items() if k.startswith(prefix)}
    model.load_state_dict(sd, strict=True)
    model.eval()


def save_weights(model: torch.nn.Module, path: str | Path) -> Path:
    """Write the model's tensors to a torch file (write, then rename)."""
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".part")
    torch.save({k: v.detach().cpu() for k, v in model.state_dict().items()}, tmp)
    tmp.replace(out)
    return out


def load_weights(model: torch.nn.Module, path: str | Path) -> None:
    """Read tensors written by ``save_weights`` with ``torch.load(weights_only=True)`` into the model."""
    sd = torch.load(Path(path), map_location="cpu", weights_only=True)
    model.load_state_dict(sd, strict=True)
    model.eval()


def fit_sequence_model(
    detector,
    windows,
    encode: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, ...]],
    loss_fn: LossFn,
) -> None:
    """Fit ``detector.net_`` on training examples encoded from the windows' ragged sequences.

    Shared by the sequence detectors: a seeded sample of at most ``max_train`` windows is
    split into fit and validation windows, ``encode(values, offsets)`` turns each part into
    distinct examples whose last array holds their counts (the loss weights), and the
    model trains with early stopping on the validation part. Sets ``net_`` and ``log_``.
    """
    p = detector.params
    rng = np.random.default_rng(detector.seed)
    keep = sample_windows(len(windows), p.max_train, rng)
    ws = windows.subset(keep) if len(keep) < len(windows) else windows
    fit_idx, val_idx = split_windows(len(ws), p.val_share, rng)
    with torch_session(detector.seed, p.threads):
        device = choose_device(p.device)
        detector.net_ = detector._build(windows.vocab_size).to(device)
        parts = []
        for idx in (fit_idx, val_idx):
            sub = ws.subset(idx)
            *arrays, counts = encode(sub.seq_values, sub.seq_offsets)
            parts.append(tuple(torch.from_numpy(a).to(device) for a in (*arrays, counts.astype(np.float32))))
        if parts[0][0].shape[0] == 0:
            raise detector.error("training windows hold no events")
        val = parts[1] if len(val_idx) and parts[1][0].shape[0] else None
        detector.log_ = train(detector.net_, loss_fn, parts[0], val, p, detector.seed, what=detector.name,
                              weight_index=len(parts[0]) - 1)
        detector.net_.cpu()
