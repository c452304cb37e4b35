"""Demo: the whole job on the built-in radar-relay scenario, with no download."""

from __future__ import annotations

import argparse
import time
from pathlib import Path


def run_demo(out: Path, seed: int = 7, quick: bool = False) -> int:
    """Simulate the fleet, ingest it and score the template miner against the generator's truth."""
    from harness.ingest import ingest_files
    from harness.parse_score import grouping_accuracy
    from harness.registry import get_entry, load_registry
    from harness.simulate import generate, load_scenario

    t0 = time.time()
    entry = get_entry("radar-relay", load_registry())
    scenario = load_scenario({**(entry.generator or {}), "seed": seed, **({"nodes": 8, "days": 20} if quick else {})})
    out.mkdir(parents=True, exist_ok=True)
    print(f"[1/3] simulating {scenario.nodes} relay nodes over {scenario.days} days -> {out / 'sim'}")
    sim = generate(scenario, out / "sim", progress=True)
    print(f"[2/3] ingesting {sim.log}")
    res = ingest_files("radar-relay", [sim.log], entry.format, entry.miner, out / "tables", progress=True)
    print(f"      {res.manifest['rows']:,} events, {res.manifest['templates']} templates, "
          f"{res.manifest['quarantined']} quarantined")
    print("[3/3] scoring the template miner against the generator's own template ids")
    import pandas as pd

    events = pd.read_parquet(res.events, columns=["line", "event"])
    truth = sim.line_templates()
    ga = grouping_accuracy(truth[events["line"].to_numpy() - 1], events["event"].to_numpy())
    print(f"      grouping accuracy {ga:.4f}")
    print(f"done in {time.time() - t0:.0f} s; outputs under {out}")
    return 0


def add_demo_parser(verb) -> None:
    """Register the `demo` verb on the command line."""

    def cmd(args: argparse.Namespace) -> int:
        return run_demo(Path(args.out), seed=args.seed, quick=args.quick)

    sp = verb("demo", cmd, "the whole job on the built-in radar-relay scenario, no download", "logtrial demo")
    sp.add_argument("--out", default="logtrial-out/demo", metavar="DIR", help="output folder (default: %(default)s)")
    sp.add_argument("--seed", type=int, default=7)
    sp.add_argument("--quick", action="store_true", help="a small fleet, for a first look in seconds")
