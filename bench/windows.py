"""Benchmark: windows per second for fixed, sliding and session windows on 1M and 5M synthetic events.

Usage: python bench/windows.py [--quick] [--sizes 1000000 5000000] [--seed 0]

Prints one line per (events, kind): seconds, windows built, windows/s, events/s,
and the process's peak resident memory so far (resource.getrusage).
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from logtrial.windowing.windows import count_windows, session_windows, time_windows  # noqa: E402

VOCAB = 300


def synthetic_events(n: int, seed: int, n_entities: int = 200, days: int = 30) -> pd.DataFrame:
    """n events on n_entities over `days`, in file order (roughly, not strictly, time-sorted), with sessions."""
    rng = np.random.default_rng(seed)
    offs = np.sort(rng.integers(0, days * 86_400 * 10**6, n))
    offs = offs + rng.integers(0, 5 * 10**6, n)  # small disorder, as in merged logs
    return pd.DataFrame(
        {
            "line": np.arange(1, n + 1, dtype=np.int64),
            "ts": pd.Timestamp("2024-01-01", tz="UTC") + pd.to_timedelta(offs, unit="us"),
            "entity": pd.array(rng.choice([f"node-{i:03d}" for i in range(n_entities)], n), dtype="str"),
            "group": pd.array((rng.integers(0, max(1, n // 20), n)).astype(str), dtype="str"),
            "event": rng.integers(0, VOCAB, n).astype(np.int32),
            "tag": pd.array(np.full(n, ""), dtype="str"),
        }
    )


def peak_rss_mib() -> float:
    """Peak resident set size of this process in MiB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print figures."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="200k events only (a few seconds)")
    ap.add_argument("--sizes", type=int, nargs="+", default=[1_000_000, 5_000_000])
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    sizes = [200_000] if args.quick else args.sizes
    kinds = {
        "fixed 1h": lambda ev: time_windows(ev, VOCAB, pd.Timedelta("1h")),
        "sliding 1h/15min": lambda ev: time_windows(ev, VOCAB, pd.Timedelta("1h"), pd.Timedelta("15min")),
        "session": lambda ev: session_windows(ev, VOCAB),
        "count 100/50": lambda ev: count_windows(ev, VOCAB, 100, 50),
    }
    print(f"{'events':>10} {'kind':<18} {'seconds':>8} {'windows':>10} {'windows/s':>12} {'events/s':>12} {'peak RSS MiB':>13}")
    for n in sizes:
        ev = synthetic_events(n, args.seed)
        for name, build in kinds.items():
            t = time.perf_counter()
            ws = build(ev)
            dt = time.perf_counter() - t
            print(
                f"{n:>10} {name:<18} {dt:>8.2f} {len(ws):>10} {len(ws) / dt:>12.0f} {n / dt:>12.0f} {peak_rss_mib():>13.0f}",
                flush=True,
            )
            del ws
        del ev
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
