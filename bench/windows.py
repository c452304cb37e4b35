"""Benchmark: windowing speed and memory for fixed, sliding, session and count windows on 1M and 5M events.

Usage: python bench/windows.py [--quick] [--sizes 1000000 5000000] [--seed 0]

The synthetic event table is generated once and written to Parquet; each (events,
kind, table) is then measured in a fresh process that reads the table with
``read_events`` (``lean``: as a run reads it, text columns as categoricals, then
reduced by ``window_events`` to what the run keeps after labelling; ``full``: every
column as text), resets the kernel's peak-RSS mark (Linux
``/proc/self/clear_refs``) and builds the windows. ``load peak`` is the peak while
reading; ``peak`` the peak while windowing (libraries and event table included);
``growth`` that peak minus the resident set just before. Times are CPU seconds of the
child (steadier than wall time on a shared machine). Target: peak <= 600 MiB for
5M-event sliding windows.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

VOCAB = 300
KINDS = ("fixed 1h", "sliding 1h/15min", "session", "count 100/50")


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


_CHILD = r"""
import json, resource, sys, time
import pandas as pd
import gc
import pyarrow as pa
from logtrial.data.ingest import TEXT_COLUMNS, read_events
from logtrial.windowing.windows import window_events
from logtrial.windowing.windows import count_windows, session_windows, time_windows

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1]) / 1024  # kB -> MiB
    return float("nan")

path, kind, vocab, lean = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4] == "lean"
# lean: only the columns windowing reads (as a windowing step would load them); else the whole table
ev = read_events(path, categories=TEXT_COLUMNS if lean else ())
if lean:
    ev = window_events(ev, keep_group=kind == "session")
    gc.collect()
    pa.default_memory_pool().release_unused()
build = {
    "fixed 1h": lambda: time_windows(ev, vocab, pd.Timedelta("1h")),
    "sliding 1h/15min": lambda: time_windows(ev, vocab, pd.Timedelta("1h"), pd.Timedelta("15min")),
    "session": lambda: session_windows(ev, vocab),
    "count 100/50": lambda: count_windows(ev, vocab, 100, 50),
}[kind]
load_peak = status("VmHWM")
before = status("VmRSS")
try:
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")  # reset the peak mark (VmHWM) to the current resident set
    reset = True
except OSError:
    reset = False
t = time.process_time()
ws = build()
seconds = time.process_time() - t
peak = status("VmHWM")
print(json.dumps({"seconds": seconds, "windows": len(ws), "before": before, "peak": peak, "reset": reset,
                  "load_peak": load_peak,
                  "pairs": int(ws.seq_offsets[-1])}))
"""


def measure(path: Path, kind: str, table: str) -> dict:
    """Window the table at `path` (``table``: "lean" or "full" columns) in a fresh process; return its figures."""
    out = subprocess.run([sys.executable, "-c", _CHILD, str(path), kind, str(VOCAB), table], check=True,
                         capture_output=True, text=True, cwd=ROOT, env={"OMP_NUM_THREADS": "1",
                                                                        **__import__("os").environ})
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print figures."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="200k events only (a few seconds)")
    ap.add_argument("--sizes", type=int, nargs="+", default=[1_000_000, 5_000_000])
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--kinds", nargs="+", default=list(KINDS), choices=KINDS, metavar="KIND")
    ap.add_argument("--tables", nargs="+", default=["lean", "full"], choices=["lean", "full"],
                    help="lean: load only the columns windowing reads; full: the whole event table")
    args = ap.parse_args(argv)
    sizes = [200_000] if args.quick else args.sizes
    print(f"{'events':>10} {'kind':<18} {'table':<5} {'CPU s':>7} {'windows':>10} {'pairs':>11} {'events/s':>11} "
          f"{'load peak':>9} {'before':>7} {'peak':>7} {'growth':>7}  (MiB)")
    with tempfile.TemporaryDirectory(prefix="logtrial-bench-windows-") as tmp:
        for n in sizes:
            path = Path(tmp) / f"events-{n}.parquet"
            synthetic_events(n, args.seed).to_parquet(path)
            for kind in args.kinds:
                for table in args.tables:
                    r = measure(path, kind, table)
                    note = "" if r["reset"] else "  (peak not reset: includes reading the table)"
                    target = ""
                    if n == 5_000_000 and kind == "sliding 1h/15min":
                        target = f"  target peak <= 600: {'met' if r['peak'] <= 600 else 'NOT met'}"
                    print(f"{n:>10} {kind:<18} {table:<5} {r['seconds']:>7.2f} {r['windows']:>10} {r['pairs']:>11} "
                          f"{n / r['seconds']:>11.0f} {r['load_peak']:>9.0f} {r['before']:>7.0f} {r['peak']:>7.0f} "
                          f"{r['peak'] - r['before']:>7.0f}{note}{target}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
