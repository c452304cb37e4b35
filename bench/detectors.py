"""Fit and score time of every built-in detector on ~100k windows (``--quick``: ~10k).

Windows are node-hours of the built-in simulated fleet (generated and ingested into a
temporary folder); when the simulator is not importable, a seeded synthetic Poisson
count matrix of the same size is used instead, and the output says so. Training uses
the older half in time, with the harness's selection (healthy windows for detectors that
train on healthy windows, labelled ones for supervised detectors); scoring covers all
windows. Run: ``python bench/detectors.py [--quick] [--only NAME ...]``.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from logtrial.detectors.registry import BUILTINS, create  # noqa: E402
from logtrial.windowing.windows import WindowSet  # noqa: E402


def simulated_windows(nodes: int, days: float, work: Path) -> tuple[WindowSet, np.ndarray, str]:
    """Node-hour windows and predict labels (24 h horizon) of a simulated fleet."""
    from logtrial.data.ingest import ingest_files
    from logtrial.data.registry import LineFormat, Miner
    from logtrial.labels.incidents import read_incidents
    from logtrial.simulation.simulate import LINE_REGEX, RECOMMENDED_MINER, generate, load_scenario
    from logtrial.windowing.windows import label_windows, time_windows

    sim = generate(load_scenario({"seed": 7, "nodes": nodes, "days": days}), work / "sim")
    fmt = LineFormat(regex=LINE_REGEX, timestamp={"fields": ["ts"], "format": "%Y-%m-%dT%H:%M:%S.%fZ"}, entity="host")
    res = ingest_files("radar-relay", [sim.log_path], fmt, Miner(**RECOMMENDED_MINER), work / "tables")
    events = pd.read_parquet(res.events)
    ws = time_windows(events, int(res.manifest["templates"]), pd.Timedelta("1h"))
    labels = label_windows(ws, read_incidents(sim.incidents_path), "predict", pd.Timedelta("24h"))
    source = f"simulated fleet: {nodes} nodes x {days:g} days, {sim.lines:,} lines, {len(events):,} events"
    return ws, labels, source


def synthetic_windows(n: int, vocab: int = 60, seed: int = 7) -> tuple[WindowSet, np.ndarray, str]:
    """Seeded Poisson counts with a shifted minority, for when the simulator is missing."""
    import scipy.sparse as sp

    rng = np.random.default_rng(seed)
    rates = rng.gamma(0.5, 2.0, vocab)
    counts = rng.poisson(rates, size=(n, vocab))
    labels = (rng.random(n) < 0.03).astype(np.int8)
    counts[labels == 1, : vocab // 10] += rng.poisson(2.0, size=(int(labels.sum()), vocab // 10))
    m = sp.csr_matrix(counts)
    lengths = counts.sum(axis=1).astype(np.int64)
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    start = pd.Timestamp("2026-01-01", tz="UTC") + pd.to_timedelta(np.arange(n), unit="h")
    meta = pd.DataFrame({"id": np.arange(n), "entity": "synthetic", "start": start,
                         "end": start + pd.Timedelta(hours=1), "n_events": lengths})
    values = np.repeat(np.tile(np.arange(vocab, dtype=np.int32), n), counts.ravel())
    ws = WindowSet(meta=meta, counts=m, seq_values=values, seq_offsets=offsets, vocab_size=vocab)
    return ws, labels, f"SYNTHETIC Poisson count matrix ({n:,} x {vocab}); the simulator was not importable"


def bench(ws: WindowSet, labels: np.ndarray, names: list[str]) -> list[dict]:
    """Fit on the older half, score all windows; times and AUROC on the later half per detector."""
    from sklearn.metrics import roc_auc_score

    order = np.argsort(ws.meta["start"].to_numpy(), kind="stable")
    train, test = order[: len(order) // 2], order[len(order) // 2 :]
    test_ok = test[labels[test] >= 0]
    rows = []
    for name in names:
        det = create(name, {}, seed=0)
        sel = train[labels[train] == 0] if det.trains_on == "healthy" else train[labels[train] >= 0]
        fit_set = ws.subset(sel)
        t0 = time.perf_counter()
        det.fit(fit_set, labels[sel] if det.trains_on == "labelled" else None)
        t1 = time.perf_counter()
        scores = det.score(ws)
        t2 = time.perf_counter()
        y = labels[test_ok] == 1
        auroc = roc_auc_score(y, scores[test_ok]) if 0 < y.sum() < len(y) else float("nan")
        used = int(det.info().get("train_windows", len(sel)))
        rows.append({"detector": name, "train": used, "fit_s": t1 - t0, "score_s": t2 - t1,
                     "windows_per_s": len(ws) / max(t2 - t1, 1e-9), "auroc_later_half": auroc})
        print(f"  {name:15s} fit {t1 - t0:7.2f} s on {used:>7,}   score {t2 - t1:7.2f} s "
              f"({len(ws) / max(t2 - t1, 1e-9):>10,.0f} windows/s)   AUROC {auroc:.3f}", flush=True)
    return rows


def main(argv: list[str] | None = None) -> int:
    """Print fit and score times of the baselines."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="~10k windows instead of ~100k")
    ap.add_argument("--only", nargs="*", default=None, metavar="NAME", help="detectors to time (default: all built-ins)")
    ap.add_argument("--synthetic", action="store_true", help="use the synthetic count matrix even if the simulator exists")
    args = ap.parse_args(argv)
    names = args.only or sorted(BUILTINS)
    nodes, days = (12, 35.0) if args.quick else (40, 105.0)
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="logtrial-bench-") as tmp:
        try:
            if args.synthetic:
                raise ImportError("--synthetic given")
            ws, labels, source = simulated_windows(nodes, days, Path(tmp))
        except ImportError as exc:
            ws, labels, source = synthetic_windows(nodes * int(days) * 24)
            source += f" ({exc})"
    print(f"data: {source}")
    print(f"windows: {len(ws):,}, vocabulary {ws.vocab_size}, positives {(labels == 1).sum():,}, "
          f"excluded {(labels == -1).sum():,}; prepared in {time.perf_counter() - t0:.1f} s")
    bench(ws, labels, names)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
