"""Time of `logtrial demo`: wall and CPU time per stage, time per detector, and the share taken by deep fits.

Runs the committed demo grid (or ``--quick``: its first noise level and first horizon) in a
temporary output folder with the default local engine (one worker process per core, one
numeric thread each) and prints, from the same process:

- wall time of each stage (simulate, ingest, grid, report) and the CPU seconds of this
  process plus its worker processes (on a shared machine the CPU seconds are the figure to
  compare; wall time holds only when the cores are idle);
- per detector: runs, fit and score seconds summed over its runs (as the workers measured
  them), and its share of all fit + score time;
- the share of fit + score time taken by the deep detectors (torch models and compositions
  holding them).

Run: ``python bench/demo.py [--quick] [--workers N] [--keep DIR]``. The goal is a demo within
10 minutes of wall time on 2 idle cores.
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd
import yaml

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

DEEP = {"next_event", "seq_ae", "density_ae", "two_stage", "two_stage_supervised"}


def cpu_seconds() -> float:
    """CPU seconds (user + system) of this process and its finished children."""
    me = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def main() -> int:
    """Run the demo grid once and print the timing breakdown."""
    from logtrial.data.acquire import log_files
    from logtrial.data.ingest import dataset_folder, ingest_files
    from logtrial.data.registry import get_entry, home_dir, load_registry
    from logtrial.demo import DEMO_EXPERIMENT
    from logtrial.output.report import write_report
    from logtrial.running.experiment import experiment_order, load_experiment
    from logtrial.running.runs import run_experiment
    from logtrial.running.store import RunStore

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="first noise level and first horizon only")
    ap.add_argument("--workers", type=int, default=None, help="worker processes (default: one per core)")
    ap.add_argument("--keep", metavar="DIR", help="output folder to keep (default: a temporary one)")
    args = ap.parse_args()

    doc = yaml.safe_load(DEMO_EXPERIMENT.read_text())
    if args.quick:
        doc["noise"] = doc["noise"][:1]
        doc["tasks"] = doc["tasks"][:1]
    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="logtrial-bench-demo-"))
    work.mkdir(parents=True, exist_ok=True)
    doc["registry"] = [str(DEMO_EXPERIMENT.parent / r) for r in doc.get("registry", [])]
    path = work / "experiment.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    exp = load_experiment(path, output=work / "out")
    home = home_dir()
    stages: dict[str, tuple[float, float]] = {}

    def timed(name: str, fn):
        w0, c0 = time.perf_counter(), cpu_seconds()
        out = fn()
        stages[name] = (time.perf_counter() - w0, cpu_seconds() - c0)
        return out

    entry = get_entry(exp.runs[0].dataset, load_registry(exp.registry_files))
    folder = timed("simulate", lambda: dataset_folder(entry, home, progress=False))
    files = log_files(entry, folder)
    timed("ingest", lambda: ingest_files(entry.name, files, entry.format, entry.miner, home / "tables",
                                         progress=False))
    counts = timed("grid", lambda: run_experiment(exp, home, progress=True, track=False, workers=args.workers))
    timed("report", lambda: write_report(exp.output, exp.name, *experiment_order(exp)))

    print(f"\ndemo grid: {len(exp.runs)} runs ({counts}); output in {work}")
    print("stage       wall s     CPU s   (simulate/ingest are cached by content: 0 s when already built)")
    for name, (w, c) in stages.items():
        print(f"{name:<10} {w:>7.1f} {c:>9.1f}")
    total_w = sum(w for w, _ in stages.values())
    total_c = sum(c for _, c in stages.values())
    print(f"{'total':<10} {total_w:>7.1f} {total_c:>9.1f}")
    rows = []
    for r in RunStore(exp.output).records():
        if r.get("status") != "finished":
            continue
        det = r["config"]["detector"]
        rows.append({"detector": det.get("label") or det["name"], "deep": det["name"] in DEEP,
                     "fit_s": r["timing"]["fit_s"], "score_s": r["timing"]["score_s"], "total_s": r["timing"]["total_s"]})
    df = pd.DataFrame(rows)
    per = df.groupby("detector", sort=False).agg(runs=("fit_s", "size"), fit_s=("fit_s", "sum"),
                                                  score_s=("score_s", "sum"), run_s=("total_s", "sum"),
                                                  deep=("deep", "first"))
    per["share"] = (per["fit_s"] + per["score_s"]) / (per["fit_s"] + per["score_s"]).sum()
    print("\nper detector (seconds summed over its runs, measured inside the workers)")
    print(per.sort_values("run_s", ascending=False).to_string(float_format=lambda v: f"{v:.2f}"))
    deep_share = per.loc[per["deep"], ["fit_s", "score_s"]].to_numpy().sum() / (per["fit_s"] + per["score_s"]).sum()
    print(f"\ndeep detectors' share of fit + score time: {deep_share:.1%}")
    print(f"wall time of the grid vs the 10-minute goal: {stages['grid'][0] / 600:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
