"""Runs: execute (or resume) an experiment grid on an engine, recording every run once."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Callable

from logtrial.running.engines import make_engine
from logtrial.running.experiment import Experiment, RunConfig
from logtrial.running.runner import fit_groups
from logtrial.running.store import RunStore


def run_experiment(
    experiment: Experiment,
    home: Path | str,
    *,
    progress: bool = True,
    mirror: Path | None = None,
    track: bool = True,
    only: Callable[[RunConfig], bool] | None = None,
    on_finish: Callable[[dict], None] | None = None,
    engine: str = "local",
    scheduler: str | None = None,
    workers: int | None = None,
) -> dict:
    """Run (or resume) every config of the grid; failed runs are recorded and the rest continue."""
    from logtrial.running.tracking import Tracker

    store = RunStore(experiment.output)
    todo = [r for r in experiment.runs if (only is None or only(r))]
    pending = [r for r in todo if not store.finished(r.run_id)]
    done_before = len(todo) - len(pending)
    _say(progress, f"{experiment.name}: {len(todo)} runs, {done_before} already finished, {len(pending)} to run")
    tracker = Tracker(experiment.output, experiment.name) if track else None
    counts = {"finished": 0, "failed": 0, "skipped": done_before}
    results = make_engine(engine, scheduler=scheduler, workers=workers).results(
        experiment, fit_groups(pending), home, mirror=mirror, progress=progress)
    by_id = {r.run_id: r for r in pending}
    for i, (record, scores) in enumerate(results, 1):
        run = by_id[record["run_id"]]
        if store.finished(run.run_id):
            continue  # a retried unit of work may deliver a run twice: record it once
        if scores is not None:
            store.write_scores(run.run_id, scores)
        label = f"[{i}/{len(pending)}] {run.dataset} {run.detector_label} noise={run.noise_name} seed={run.seed}"
        if tracker is not None:
            tracker.log(record, store)
        store.write(record)
        counts[record["status"]] += 1
        if on_finish is not None:
            on_finish(record)
        if record["status"] == "finished":
            m = record["metrics"]
            caught = "recall_predicted" if run.task["name"] == "predict" else "recall_detected_or_predicted"
            per = ("false_alarms_per_predicted_failure" if run.task["name"] == "predict"
                   else "false_alarms_per_caught_failure")
            _say(progress, f"{label}: AUPRC {m.get('auprc', float('nan')):.3f}  "
                           f"failures {'predicted' if caught == 'recall_predicted' else 'caught'} "
                           f"{m.get(caught, float('nan')):.2f}  "
                           f"false alarms per failure {m.get(per, float('nan')):.1f}  "
                           f"({record['timing']['total_s']:.1f}s{', reused fit' if record['timing']['reused_fit'] else ''})")
        else:
            _say(progress, f"{label}: FAILED: {record['error']}")
    return counts


def _say(progress: bool, msg: str) -> None:
    if progress:
        print(msg, file=sys.stderr, flush=True)
