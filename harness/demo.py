"""Demo: the whole job on the built-in radar-relay scenario, with no download."""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

from logtrial.data.registry import REPO_ROOT

DEMO_EXPERIMENT = REPO_ROOT / "reports" / "demo" / "experiment.yaml"


def run_demo(out: Path, experiment: Path = DEMO_EXPERIMENT, track: bool = True, workers: int | None = None) -> int:
    """Simulate the fleet, ingest it, run the demo grid, write the report and print the headline table."""
    from logtrial.data.acquire import log_files
    from logtrial.data.ingest import dataset_folder, ingest_files
    from logtrial.data.parse_score import score_against_truth
    from logtrial.data.registry import get_entry, home_dir, load_registry
    from logtrial.output.report import compact, to_text, write_experiment_report
    from logtrial.running.experiment import experiment_order, load_experiment
    from logtrial.running.runs import run_experiment
    from logtrial.running.tracking import tracking_uri

    t0 = time.time()
    home = home_dir()
    exp = load_experiment(experiment, output=out)
    entry = get_entry(exp.runs[0].dataset, load_registry(exp.registry_files))
    print(f"[1/4] simulating the {entry.name} fleet (cached by scenario hash)", flush=True)
    folder = dataset_folder(entry, home, progress=True)
    files = log_files(entry, folder)
    print(f"      {files[0]}")
    print("[2/4] ingesting and checking the template miner against the generator's template ids", flush=True)
    res = ingest_files(entry.name, files, entry.format, entry.miner, home / "tables", progress=True)
    score = score_against_truth(res.events, res.templates, folder / entry.truth.file, entry.truth)
    print(f"      {res.manifest['rows']:,} events, {res.manifest['templates']} templates, "
          f"{res.manifest['quarantined']} quarantined, grouping accuracy {score['grouping_accuracy']:.4f}")
    tasks = len({json.dumps(r.task, sort_keys=True) for r in exp.runs})
    seeds = len({r.seed for r in exp.runs})
    print(f"[3/4] running {len(exp.runs)} runs: {len(experiment_order(exp)[0])} detectors x "
          f"{len(experiment_order(exp)[1])} noise levels x {tasks} horizon(s) x {seeds} seed(s)", flush=True)
    counts = run_experiment(exp, home, progress=True, track=track, workers=workers)
    print("[4/4] writing the report", flush=True)
    paths = write_experiment_report(exp)
    print()
    print(paths["decision"] + "\n\nAll figures at the threshold policy:")
    print(to_text(compact(paths["table"])))
    print(f"\n{counts['finished']} runs finished, {counts['failed']} failed, {counts['skipped']} reused from before; "
          f"{time.time() - t0:.0f} s")
    print(f"report: {paths['markdown']}  (also {paths['html'].name}, results.csv, {', '.join(paths['pictures'])})")
    if track:
        print(f"tracking: mlflow ui --backend-store-uri {tracking_uri(exp.output)}")
    return 1 if counts["failed"] else 0


def add_demo_parser(verb) -> None:
    """Register the `demo` verb on the command line."""

    def cmd(args: argparse.Namespace) -> int:
        if args.workers is not None and args.workers < 1:
            from logtrial.errors import ConfigError

            raise ConfigError(f"--workers: expected a whole number >= 1, got {args.workers}")
        return run_demo(Path(args.out), Path(args.experiment), track=not args.no_track, workers=args.workers)

    sp = verb("demo", cmd, "the whole job on the built-in radar-relay scenario, no download", "logtrial demo")
    sp.add_argument("--out", default="logtrial-out/demo", metavar="DIR", help="output folder (default: %(default)s)")
    sp.add_argument("--experiment", default=str(DEMO_EXPERIMENT), metavar="YAML",
                    help="experiment file to run (default: the committed demo grid)")
    sp.add_argument("--no-track", action="store_true", help="do not record runs in MLflow")
    sp.add_argument("--workers", type=int, metavar="N",
                    help="worker processes for the grid (default: one per core; 1 = in this process)")
