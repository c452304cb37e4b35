"""Benchmark the fleet simulator: lines per second and peak resident memory for a target line count.

Usage:
    python bench/simulate.py                 # 10 million lines (default fleet size, raised line rate)
    python bench/simulate.py --lines 3000000
    python bench/simulate.py --quick         # 1 million lines
"""

from __future__ import annotations

import argparse
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from logtrial.simulation.simulate import generate, load_scenario  # noqa: E402


def peak_rss_mb() -> float:
    """Peak resident set size of this process so far, in MiB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main(argv: list[str] | None = None) -> int:
    """Run one generation of about --lines lines and print throughput and memory."""
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--lines", type=int, default=10_000_000, help="target number of lines (default 10,000,000)")
    ap.add_argument("--quick", action="store_true", help="1 million lines")
    ap.add_argument("--nodes", type=int, default=40)
    ap.add_argument("--days", type=float, default=120.0)
    ap.add_argument("--out", type=Path, default=None, help="keep the output here (default: a temporary folder)")
    args = ap.parse_args(argv)
    target = 1_000_000 if args.quick else args.lines
    health_per_hour = 1.0  # default period of 60 minutes
    line_rate = max(target / (args.nodes * args.days * 24.0) - health_per_hour, 0.0)
    sc = load_scenario({"nodes": args.nodes, "days": args.days, "line_rate": line_rate})

    out = args.out or Path(tempfile.mkdtemp(prefix="logtrial-bench-"))
    rss_before = peak_rss_mb()
    t = time.perf_counter()
    res = generate(sc, out)
    elapsed = time.perf_counter() - t
    size_mb = res.log_path.stat().st_size / 2**20
    print(f"scenario: {sc.nodes} nodes x {sc.days:g} days, line_rate {line_rate:.2f}/node-hour")
    print(f"lines: {res.lines:,} ({size_mb:,.0f} MiB) in {elapsed:.1f} s")
    print(f"throughput: {res.lines / elapsed:,.0f} lines/s, {size_mb / elapsed:.1f} MiB/s")
    print(f"peak RSS: {peak_rss_mb():.0f} MiB (before generation {rss_before:.0f} MiB); "
          f"ratio peak RSS / log size: {peak_rss_mb() / max(size_mb, 1e-9):.2f}")
    if args.out is None:
        shutil.rmtree(out, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
