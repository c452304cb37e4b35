"""Training speed of the deep detectors: the shared training loop vs a bare PyTorch loop, same model and batches.

For each deep model the training tensors are prepared exactly as the detector prepares
them (distinct next-event pairs, distinct sequence chunks, frequency vectors); then the
same freshly seeded model is trained for the same number of epochs twice in this process,
once with ``logtrial.detectors.torch_train.train`` and once with a bare loop (shuffle, slice,
forward, backward, step), and the ratio of training windows per second is printed
(target >= 0.9: the harness adds no meaningful overhead). The whole ``Detector.fit`` rate
is printed too. ``--demo`` also times ``logtrial demo`` (the demo grid with the deep
detectors) in a temporary folder.

Run: ``python bench/deep.py [--quick] [--epochs N] [--threads N] [--demo]``.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path
from typing import Callable

import numpy as np
import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from logtrial.detectors.density_autoencoder import DensityNet, frequencies  # noqa: E402
from logtrial.detectors.next_event import NextEventNet, distinct_pairs, weighted_ce  # noqa: E402
from logtrial.detectors.registry import create  # noqa: E402
from logtrial.detectors.seq_autoencoder import SeqAutoencoderNet, distinct_chunks, weighted_reconstruction  # noqa: E402
from logtrial.detectors.torch_train import batch_slices, torch_session, train  # noqa: E402
from logtrial.windowing.windows import WindowSet  # noqa: E402

from bench.detectors import simulated_windows  # noqa: E402


def _mse(model: torch.nn.Module, batch: tuple[torch.Tensor, ...]) -> torch.Tensor:
    (x,) = batch
    return ((model(x) - x) ** 2).mean()


def setups(ws: WindowSet) -> dict[str, tuple[Callable[[], torch.nn.Module], Callable, tuple[torch.Tensor, ...]]]:
    """Per deep model: a model factory, its loss and the training tensors, as the detector builds them."""
    v = ws.vocab_size
    ne = create("next_event", {}, seed=0).params
    sa = create("seq_ae", {}, seed=0).params
    da = create("density_ae", {}, seed=0).params
    h, y, c = distinct_pairs(ws.seq_values, ws.seq_offsets, ne.history, v)
    rows, lens, counts = distinct_chunks(ws.seq_values, ws.seq_offsets, sa.chunk, v)
    x = frequencies(ws.counts)
    return {
        "next_event": (lambda: NextEventNet(v, ne.embedding, ne.hidden, ne.layers), weighted_ce,
                       (torch.from_numpy(h), torch.from_numpy(y), torch.from_numpy(c.astype(np.float32)))),
        "seq_ae": (lambda: SeqAutoencoderNet(v, sa.embedding, sa.hidden, sa.latent), weighted_reconstruction,
                   (torch.from_numpy(rows), torch.from_numpy(lens), torch.from_numpy(counts.astype(np.float32)))),
        "density_ae": (lambda: DensityNet(v, da.hidden), _mse, (torch.from_numpy(x),)),
    }


def bare_loop(model: torch.nn.Module, loss_fn: Callable, data: tuple[torch.Tensor, ...], epochs: int,
              batch_size: int, lr: float, passes: int, seed: int) -> None:
    """The plain PyTorch loop: seeded shuffle, slice, forward, backward, Adam step."""
    rng = np.random.default_rng(seed)
    opt = torch.optim.Adam(model.parameters(), lr=lr)
    n = int(data[0].shape[0])
    model.train()
    for _ in range(epochs):
        for _ in range(passes):
            perm = torch.from_numpy(rng.permutation(n))
            for sl in batch_slices(n, batch_size):
                loss = loss_fn(model, tuple(t[perm[sl]] for t in data))
                opt.zero_grad(set_to_none=True)
                loss.backward()
                opt.step()


def main() -> int:
    """Print windows per second of each deep model under the harness loop and a bare loop, and their ratio."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a smaller fleet (~10k windows)")
    ap.add_argument("--epochs", type=int, default=3)
    ap.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's default)")
    ap.add_argument("--demo", action="store_true", help="also time `logtrial demo` with the deep detectors")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        nodes, days = (12, 40) if args.quick else (40, 60)
        ws, labels, source = simulated_windows(nodes, days, Path(tmp))
        order = np.argsort(ws.meta["start"].to_numpy(), kind="stable")
        train_rows = order[: len(order) // 2]
        train_ws = ws.subset(train_rows[labels[train_rows] == 0])
        print(f"{source}; {len(train_ws):,} healthy training windows, torch threads "
              f"{args.threads or torch.get_num_threads()}")
        print(f"{'model':<12}{'examples':>10}{'harness w/s':>14}{'bare w/s':>12}{'ratio':>8}{'fit() w/s':>12}")
        for name, (factory, loss_fn, data) in setups(train_ws).items():
            params = create(name, {"epochs": args.epochs, "val_share": 0.0}, seed=0).params
            n = int(data[0].shape[0])
            passes = max(1, -(-params.min_batches // len(batch_slices(n, params.batch_size))))
            rates = {}
            for mode in ("bare", "harness", "bare2", "harness2"):  # interleaved, best of two each
                with torch_session(0, args.threads):
                    model = factory()
                    t0 = time.perf_counter()
                    if mode.startswith("harness"):
                        train(model, loss_fn, data, None, params, 0)
                    else:
                        bare_loop(model, loss_fn, data, args.epochs, params.batch_size, params.lr, passes, 0)
                    rate = len(train_ws) * args.epochs / (time.perf_counter() - t0)
                key = mode.rstrip("2")
                rates[key] = max(rates.get(key, 0.0), rate)
            det = create(name, {"epochs": args.epochs, "threads": args.threads}, seed=0)
            t0 = time.perf_counter()
            det.fit(train_ws)
            fit_rate = len(train_ws) * det.info()["epochs_run"] / (time.perf_counter() - t0)
            print(f"{name:<12}{n:>10,}{rates['harness']:>14,.0f}{rates['bare']:>12,.0f}"
                  f"{rates['harness'] / rates['bare']:>8.2f}{fit_rate:>12,.0f}")
    if args.demo:
        from logtrial.demo import run_demo

        with tempfile.TemporaryDirectory() as out:
            t0 = time.perf_counter()
            code = run_demo(Path(out) / "demo", track=False)
            print(f"logtrial demo (with deep detectors): {time.perf_counter() - t0:.0f} s, exit {code}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
