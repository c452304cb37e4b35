"""Runs: execute an experiment grid under identical rules, resumably, recording every run."""

from __future__ import annotations

import hashlib
import json
import os
import sys
import time
import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import pandas as pd

from harness.errors import ConfigError, DataError
from harness.experiment import Experiment, RunConfig, describe_failure

RESULT_VERSION = 1


@dataclass
class DatasetData:
    """What every run on one dataset shares: events, vocabulary, truth, identity."""

    name: str
    events: pd.DataFrame
    vocab_size: int
    truth: pd.DataFrame
    table_key: str
    templates: list[str]


@dataclass
class Prepared:
    """Windows, truth labels and split shared by the runs of one (dataset, windows, task, split)."""

    windows: object
    split: object
    truth_labels: np.ndarray
    horizon: pd.Timedelta | None


class RunStore:
    """Finished and failed runs as one JSON file each under ``<output>/runs`` (written by atomic rename)."""

    def __init__(self, output: Path):
        self.folder = Path(output) / "runs"
        self.folder.mkdir(parents=True, exist_ok=True)

    def path(self, run_id: str, suffix: str = ".json") -> Path:
        """File of a run's record (or of its scores, with another suffix)."""
        return self.folder / f"{run_id}{suffix}"

    def finished(self, run_id: str) -> bool:
        """True when the run has a finished record."""
        p = self.path(run_id)
        if not p.is_file():
            return False
        try:
            return json.loads(p.read_text()).get("status") == "finished"
        except json.JSONDecodeError:
            return False

    def write(self, record: dict) -> None:
        """Record a run atomically."""
        p = self.path(record["run_id"])
        tmp = p.with_suffix(".json.tmp")
        tmp.write_text(json.dumps(record, indent=1, sort_keys=True, default=_json_default))
        os.replace(tmp, p)

    def write_scores(self, run_id: str, frame: pd.DataFrame) -> None:
        """Store a run's validation and test scores (Parquet, atomic)."""
        p = self.path(run_id, ".scores.parquet")
        tmp = p.with_suffix(".tmp")
        frame.to_parquet(tmp, index=False)
        os.replace(tmp, p)

    def records(self) -> list[dict]:
        """All run records."""
        out = []
        for p in sorted(self.folder.glob("*.json")):
            try:
                out.append(json.loads(p.read_text()))
            except json.JSONDecodeError:
                continue
        return out


def _json_default(o):
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return float(o)
    if isinstance(o, (pd.Timedelta, pd.Timestamp)):
        return str(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"not JSON-serialisable: {type(o).__name__}")


def _digest(*arrays: np.ndarray) -> str:
    h = hashlib.sha256()
    for a in arrays:
        h.update(np.ascontiguousarray(a).tobytes())
    return h.hexdigest()[:16]


class Runner:
    """Executes run configs, sharing datasets, windows and fitted models between runs where valid."""

    def __init__(self, experiment: Experiment, home: Path, progress: bool = True, mirror: Path | None = None):
        self.exp = experiment
        self.home = home
        self.mirror = mirror
        self.progress = progress
        self._datasets: dict[str, DatasetData] = {}
        self._prepared: dict[str, Prepared] = {}
        self._vocabularies: dict[str, tuple[pd.DataFrame, int]] = {}
        self._fits: dict[str, tuple[np.ndarray, np.ndarray, dict]] = {}
        self._last_scores: dict[str, pd.DataFrame] = {}

    # ----- shared inputs ------------------------------------------------------------------
    def dataset(self, name: str) -> DatasetData:
        """Events and truth incidents of a dataset (ingested or reused from the cache)."""
        if name not in self._datasets:
            from harness.acquire import log_files
            from harness.ingest import dataset_folder, ingest_files, read_events
            from harness.labels import truth_incidents
            from harness.registry import get_entry, load_registry

            entry = get_entry(name, load_registry(self.exp.registry_files))
            folder = dataset_folder(entry, self.home, self.mirror, progress=self.progress)
            files = log_files(entry, folder)
            res = ingest_files(entry.name, files, entry.format, entry.miner, self.home / "tables",
                               progress=self.progress)
            events = read_events(res.events)
            truth = truth_incidents(entry, events, folder)
            templates = pd.read_csv(res.templates, keep_default_na=False)["template"].astype(str).tolist()
            self._datasets[name] = DatasetData(name, events, int(res.manifest["templates"]), truth,
                                               res.manifest["key"], templates)
        return self._datasets[name]

    def events_for(self, run: RunConfig) -> tuple[pd.DataFrame, int]:
        """The dataset's events in the run's vocabulary (template ids, or semantic groups) and its size."""
        data = self.dataset(run.dataset)
        if run.vocabulary.get("kind", "templates") == "templates":
            return data.events, data.vocab_size
        key = json.dumps([run.dataset, run.vocabulary], sort_keys=True)
        if key not in self._vocabularies:
            from harness.vocabulary import apply_vocabulary

            # The vocabulary belongs to the dataset, not to a run: a fixed seed.
            self._vocabularies[key] = apply_vocabulary(data.events, data.templates, run.vocabulary, seed=0)
        return self._vocabularies[key]

    def prepared(self, run: RunConfig) -> Prepared:
        """Windows, truth labels and the split for a run's dataset, windowing, task and split."""
        from harness.splits import chronological_split, random_split
        from harness.windows import build_windows, label_windows

        # A random split draws with the run's seed, so it is shared only between runs with that seed.
        seed = run.seed if run.split["kind"] == "random" else None
        key = json.dumps([run.dataset, run.windows, run.task, run.split, seed], sort_keys=True)
        if key not in self._prepared:
            data = self.dataset(run.dataset)
            events, vocab_size = self.events_for(run)
            ws = build_windows(events, vocab_size, run.windows)
            if len(ws) == 0:
                raise DataError(f"dataset '{run.dataset}': no windows for {run.windows}")
            horizon = pd.Timedelta(run.task["horizon"]) if "horizon" in run.task else None
            truth_labels = label_windows(ws, data.truth, run.task["name"], horizon)
            if run.split["kind"] == "random":
                split = random_split(ws, tuple(run.split["fractions"]), seed=run.seed)
            else:
                split = chronological_split(ws, tuple(run.split["fractions"]), run.split.get("embargo"), horizon)
            self._prepared[key] = Prepared(ws, split, truth_labels, horizon)
        return self._prepared[key]

    # ----- one run ------------------------------------------------------------------------
    def execute(self, run: RunConfig) -> dict:
        """Run one config end to end and return its record (not yet stored)."""
        from detectors.registry import create
        from harness.metrics import evaluate_run
        from harness.noise import load_noise, replay
        from harness.splits import check_no_leakage
        from harness.thresholds import choose_threshold, load_policy
        from harness.windows import label_windows

        t0 = time.time()
        data = self.dataset(run.dataset)
        prep = self.prepared(run)
        ws, split = prep.windows, prep.split
        if run.split["kind"] != "random":
            check_no_leakage(split, ws)
        meta = ws.meta
        span = (meta["start"].min(), meta["end"].max())
        entities = sorted(meta["entity"].astype(str).unique())
        reported = replay(data.truth, load_noise(run.noise), seed=run.seed, span=span, entities=entities)
        rep_labels = label_windows(ws, reported, run.task["name"], prep.horizon)

        det = create(run.detector["name"], run.detector["params"], seed=run.seed)
        train = split.train
        if det.trains_on == "healthy":
            train = train[rep_labels[train] == 0]
        elif det.trains_on == "labelled":
            train = train[rep_labels[train] >= 0]
        if len(train) == 0:
            raise DataError(f"no training windows left for '{det.name}' ({det.trains_on} windows of the train split)")
        reads_labels = det.trains_on == "labelled"
        fit_key = json.dumps(
            [data.table_key, run.vocabulary, run.windows, run.task if reads_labels else None, run.split, run.detector, run.seed,
             _digest(train), _digest(rep_labels[train]) if reads_labels else None],
            sort_keys=True,
        )
        reused = fit_key in self._fits
        if reused:
            val_scores, test_scores, det_info = self._fits[fit_key]
            fit_s = score_s = 0.0
        else:
            t_fit = time.time()
            det.fit(ws.subset(train), rep_labels[train] if reads_labels else None)
            fit_s = time.time() - t_fit
            t_score = time.time()
            val_scores = det.score(ws.subset(split.val)) if len(split.val) else np.zeros(0)
            test_scores = det.score(ws.subset(split.test))
            score_s = time.time() - t_score
            det_info = det.info()
            self._fits[fit_key] = (val_scores, test_scores, det_info)

        policy = load_policy(run.threshold)
        val_labels = rep_labels[split.val]
        cooldown = pd.Timedelta(run.scoring["cooldown"])
        choice = choose_threshold(policy, val_scores, val_labels, meta.iloc[split.val], cooldown)
        test_truth = prep.truth_labels[split.test]
        if "test" in split.ranges:
            lo, hi = split.ranges["test"]
        else:  # a random split has no time range: the test windows' own span
            lo, hi = meta["start"].iloc[split.test].min(), meta["end"].iloc[split.test].max()
        # Count only failures whose whole horizon lies in the test span, so that no failure's
        # warning time is cut short by the split boundary (alarms still match every incident).
        count_from = lo + prep.horizon if prep.horizon is not None and lo + prep.horizon < hi else lo
        report = evaluate_run(
            meta=meta.iloc[split.test].reset_index(drop=True), scores=test_scores, labels=test_truth,
            threshold=choice.threshold, incidents=data.truth, horizon=prep.horizon, cooldown=cooldown,
            span=(count_from, hi), bootstrap=run.scoring["bootstrap"], ci_level=run.scoring["ci_level"],
            unit=run.scoring["bootstrap_unit"], seed=run.seed,
        )
        # Also score the test windows against the reported (noisy) labels, to show how noise distorts scores.
        rep_test = rep_labels[split.test]
        from harness.metrics import window_metrics_safe

        as_reported = window_metrics_safe(rep_test, test_scores, choice.threshold)
        self._last_scores[run.run_id] = (pd.DataFrame({
            "window": np.r_[split.val, split.test].astype(np.int64),
            "part": np.r_[np.full(len(split.val), "val"), np.full(len(split.test), "test")],
            "score": np.r_[val_scores, test_scores].astype(np.float64),
            "label": np.r_[val_labels, test_truth].astype(np.int8),
        }))
        return {
            "run_id": run.run_id,
            "status": "finished",
            "config": run.canonical(),
            "experiment": self.exp.name,
            "dataset_key": data.table_key,
            "windows": {"count": len(ws), **split.sizes(), "trained_on": int(len(train))},
            "incidents": {"true": int(len(data.truth)), "reported": int(len(reported)),
                          "reported_failures": int((reported["kind"] == "failure").sum())},
            "threshold": {"value": float(choice.threshold), **choice.as_dict()},
            "metrics": report["metrics"],
            "intervals": report["intervals"],
            "lead_times_h": report["lead_times_h"],
            "metrics_vs_reported_labels": as_reported,
            "detector_info": det_info,
            "warnings": list(split.warnings),
            "timing": {"fit_s": round(fit_s, 3), "score_s": round(score_s, 3), "total_s": round(time.time() - t0, 3),
                       "reused_fit": reused},
            "result_version": RESULT_VERSION,
        }


    def safe_execute(self, run: RunConfig) -> dict:
        """Run one config; a failure becomes a `failed` record with its traceback instead of an exception."""
        try:
            return self.execute(run)
        except Exception as exc:  # noqa: BLE001 - a failing run is recorded and the grid goes on
            return {
                "run_id": run.run_id, "status": "failed", "config": run.canonical(), "experiment": self.exp.name,
                "error": describe_failure(exc), "traceback": traceback.format_exc(),
            }

    def execute_group(self, runs: list[RunConfig]) -> list[tuple[dict, pd.DataFrame | None]]:
        """Run several configs in order (sharing data and fits); records with their scores, store untouched."""
        out = []
        for run in runs:
            record = self.safe_execute(run)
            out.append((record, self._last_scores.pop(run.run_id, None)))
        return out


def fit_groups(runs: Iterable[RunConfig]) -> list[list[RunConfig]]:
    """Runs that can share windows and fitted models, grouped; groups are independent units of work."""
    groups: dict[str, list[RunConfig]] = {}
    for r in _ordered(runs):
        key = json.dumps([r.dataset, r.vocabulary, r.windows, r.task, r.split, r.detector, r.seed], sort_keys=True)
        groups.setdefault(key, []).append(r)
    return list(groups.values())


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
    from harness.tracking import Tracker

    store = RunStore(experiment.output)
    todo = [r for r in experiment.runs if (only is None or only(r))]
    pending = [r for r in todo if not store.finished(r.run_id)]
    done_before = len(todo) - len(pending)
    _say(progress, f"{experiment.name}: {len(todo)} runs, {done_before} already finished, {len(pending)} to run")
    tracker = Tracker(experiment.output, experiment.name) if track else None
    counts = {"finished": 0, "failed": 0, "skipped": done_before}
    if engine == "dask":
        from harness.engines import dask_results

        results = dask_results(experiment, fit_groups(pending), home, mirror=mirror, scheduler=scheduler,
                               workers=workers, progress=progress)
    elif engine == "local":
        runner = Runner(experiment, home, progress=progress, mirror=mirror)
        results = ((rec, scores) for group in fit_groups(pending) for rec, scores in runner.execute_group(group))
    else:
        raise ConfigError(f"engine: must be local or dask, got {engine!r}")
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


def _ordered(runs: Iterable[RunConfig]) -> list[RunConfig]:
    """Runs grouped so that ones sharing data and fitted models follow each other."""
    return sorted(runs, key=lambda r: (r.dataset, r.vocabulary_label, json.dumps(r.windows, sort_keys=True),
                                       json.dumps(r.task),
                                       r.detector_label, r.seed, r.noise_name))


def _say(progress: bool, msg: str) -> None:
    if progress:
        print(msg, file=sys.stderr, flush=True)
