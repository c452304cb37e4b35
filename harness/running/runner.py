"""Runner: executes one run config end to end, sharing datasets, windows and fitted models between runs.

A run goes through named steps: the dataset's events and truth, the prepared windows
and split, the reported labels (noise replay), the training windows, the fit and the
scores, the threshold chosen on validation, the test evaluation, and the record.
"""

from __future__ import annotations

import hashlib
import json
import time
import traceback
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Iterable

import numpy as np
import pandas as pd
from logtrial.data.acquire import log_files
from logtrial.data.ingest import TEXT_COLUMNS, dataset_folder, ingest_files, read_events
from logtrial.data.registry import SessionEntry, get_entry, load_registry
from logtrial.detectors.base import Detector
from logtrial.detectors.registry import create
from logtrial.errors import DataError
from logtrial.evaluation.curves import CURVE_NOTE, operating_curve
from logtrial.evaluation.run_figures import evaluate_run, window_metrics_safe
from logtrial.evaluation.thresholds import ThresholdChoice, budget_key, budget_policy, choose_threshold, load_policy
from logtrial.labels.incidents import incidents_from_sessions
from logtrial.labels.noise import load_noise, replay
from logtrial.labels.truth import truth_incidents
from logtrial.running.experiment import Experiment, RunConfig, describe_failure
from logtrial.running.threads import pinned_threads
from logtrial.running.walk_forward import combine_folds, figures_by_age, fold_splits, is_walk_forward, policies
from logtrial.windowing.sessions import load_entry_sessions, session_events
from logtrial.windowing.splits import check_no_leakage, chronological_split, random_split
from logtrial.windowing.vocabulary import fit_vocabulary, remap_windows
from logtrial.windowing.windows import WindowSet, build_windows, label_windows, window_events

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


@dataclass
class Fit:
    """A fitted detector's validation and test scores, its info and timings (zero when reused)."""

    val_scores: np.ndarray
    test_scores: np.ndarray
    info: dict
    fit_s: float
    score_s: float
    reused: bool


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
        self._fits: dict[str, tuple[np.ndarray, np.ndarray, dict]] = {}
        self._last_scores: dict[str, pd.DataFrame] = {}

    # ----- shared inputs ------------------------------------------------------------------
    def dataset(self, name: str) -> DatasetData:
        """Events and truth incidents of a dataset (ingested or reused from the cache)."""
        if name not in self._datasets:
            entry = get_entry(name, load_registry(self.exp.registry_files))
            if isinstance(entry, SessionEntry):  # preprocessed sessions: no log lines to ingest
                self._datasets[name] = session_dataset(entry)
                return self._datasets[name]
            folder = dataset_folder(entry, self.home, self.mirror, progress=self.progress)
            files = log_files(entry, folder)
            res = ingest_files(entry.name, files, entry.format, entry.miner, self.home / "tables",
                               progress=self.progress)
            events = read_events(res.events, categories=TEXT_COLUMNS)
            truth = truth_incidents(entry, events, folder)
            # the rest of the run only builds windows: keep what they read (session keys only for session windows)
            sessions = any(r.dataset == name and r.windows.get("kind") == "session" for r in self.exp.runs)
            events = window_events(events, keep_group=sessions)
            templates = pd.read_csv(res.templates, keep_default_na=False)["template"].astype(str).tolist()
            self._datasets[name] = DatasetData(name, events, int(res.manifest["templates"]), truth,
                                               res.manifest["key"], templates)
        return self._datasets[name]

    def walk_forward_base(self, run: RunConfig) -> Prepared:
        """The windows (in template ids) all folds of a walk-forward run share; each fold fits its own vocabulary."""
        return self.prepared(replace(run, split={"kind": "chronological", "fractions": [0.5, 0.2, 0.3]},
                                     vocabulary={"kind": "templates"}))

    def prepared(self, run: RunConfig) -> Prepared:
        """Windows (in the run's vocabulary), truth labels and the split for a run's dataset, windowing, task and split."""
        # A random split draws with the run's seed, so it is shared only between runs with that seed.
        seed = run.seed if run.split["kind"] == "random" else None
        key = json.dumps([run.dataset, run.windows, run.task, run.split, seed, run.vocabulary], sort_keys=True)
        if key not in self._prepared and is_walk_forward(run.split):
            # One fold of a walk-forward evaluation: the shared windows (in template ids), this fold's split,
            # and a vocabulary fitted on this fold's training windows only.
            base = self.walk_forward_base(run)
            fold = fold_splits(base.windows, run.split, base.horizon)[run.split["fold"]]
            ws = self.in_vocabulary(run, base.windows, fold.train)
            self._prepared[key] = Prepared(ws, fold, base.truth_labels, base.horizon)
        if key not in self._prepared:
            data = self.dataset(run.dataset)
            ws = build_windows(data.events, data.vocab_size, run.windows)
            if len(ws) == 0:
                raise DataError(f"dataset '{run.dataset}': no windows for {run.windows}")
            horizon = pd.Timedelta(run.task["horizon"]) if "horizon" in run.task else None
            truth_labels = label_windows(ws, data.truth, run.task["name"], horizon)
            if run.split["kind"] == "random":
                split = random_split(ws, tuple(run.split["fractions"]), seed=run.seed)
            else:
                split = chronological_split(ws, tuple(run.split["fractions"]), run.split.get("embargo"), horizon)
            ws = self.in_vocabulary(run, ws, split.train)
            self._prepared[key] = Prepared(ws, split, truth_labels, horizon)
        return self._prepared[key]

    def in_vocabulary(self, run: RunConfig, ws: WindowSet, train: np.ndarray) -> WindowSet:
        """The windows in the run's vocabulary, a semantic one fitted on the templates of ``train`` only."""
        if run.vocabulary.get("kind", "templates") == "templates":
            return ws
        # The vocabulary belongs to the dataset and training span, not to a run: a fixed seed.
        # Window times (hence the split) do not change.
        seen = np.unique(ws.subset(train).seq_values)
        out = remap_windows(ws, fit_vocabulary(self.dataset(run.dataset).templates, seen, run.vocabulary, seed=0))
        out.info["vocabulary_seen_templates"] = int(len(seen))
        return out

    # ----- one run, step by step -----------------------------------------------------------
    def execute(self, run: RunConfig) -> dict:
        """Run one config end to end, its numeric libraries pinned to one thread, and return its record."""
        if is_walk_forward(run.split) and "fold" not in run.split:
            return self.execute_folds(run)  # each fold is executed (and pinned) on its own
        with pinned_threads() as threads:
            record = self._execute(run)
        record["threads"] = threads
        return record

    def _execute(self, run: RunConfig) -> dict:
        """The steps of one run: data, windows, reported labels, fit, thresholds, evaluation, record."""
        t0 = time.time()
        data = self.dataset(run.dataset)
        prep = self.prepared(run)
        if run.split["kind"] != "random":
            check_no_leakage(prep.split, prep.windows)
        reported, rep_labels = self.reported_labels(run, data, prep)
        det = create(run.detector["name"], run.detector["params"], seed=run.seed)
        train = training_windows(det, prep.split.train, rep_labels)
        fit = self.fit_and_score(run, data, prep, det, train, rep_labels)
        val_labels = rep_labels[prep.split.val]
        choice = self.choose_threshold(run, prep, fit.val_scores, val_labels)
        report = self.evaluate(run, data, prep, fit.test_scores, choice.threshold)
        # Also score the test windows against the reported (noisy) labels, to show how noise distorts scores.
        as_reported = window_metrics_safe(rep_labels[prep.split.test], fit.test_scores, choice.threshold)
        at_budget = self.evaluate_budgets(run, data, prep, fit, val_labels)
        curve = self.curve(run, data, prep, fit.test_scores)
        self._last_scores[run.run_id] = pd.concat([score_table(prep, fit, val_labels), curve_rows(curve)],
                                                  ignore_index=True)
        record = {
            "run_id": run.run_id,
            "status": "finished",
            "config": run.canonical(),
            "experiment": self.exp.name,
            "dataset_key": data.table_key,
            "windows": {"count": len(prep.windows), **prep.split.sizes(), "trained_on": int(len(train))},
            "incidents": {"true": int(len(data.truth)), "reported": int(len(reported)),
                          "reported_failures": int((reported["kind"] == "failure").sum())},
            "threshold": {"value": float(choice.threshold), **choice.as_dict()},
            "metrics": report["metrics"],
            "intervals": report["intervals"],
            "lead_times_h": report["lead_times_h"],
            "outcomes": report["outcomes"],
            "interval_notes": report.get("interval_notes", {}),
            "at_budget": at_budget,
            "curve": {"points": int(len(curve)), "failures": int(curve.attrs["failures"]), "note": CURVE_NOTE},
            "metrics_vs_reported_labels": as_reported,
            "detector_info": fit.info,
            "warnings": list(prep.split.warnings),
            "timing": {"fit_s": round(fit.fit_s, 3), "score_s": round(fit.score_s, 3),
                       "total_s": round(time.time() - t0, 3), "reused_fit": fit.reused},
            "result_version": RESULT_VERSION,
        }
        if is_walk_forward(run.split):
            record["walk_forward_fold"] = self.by_age(run, data, prep, fit.test_scores, record)
        return record

    def execute_folds(self, run: RunConfig) -> dict:
        """A walk-forward run: every fold as its own run (own fit, threshold, test span), combined into one record."""
        prep = self.walk_forward_base(run)
        n = len(fold_splits(prep.windows, run.split, prep.horizon))
        folds = [replace(run, split={**run.split, "fold": i}) for i in range(n)]
        records = [self.execute(f) for f in folds]
        scores = [self._last_scores.pop(f.run_id) for f in folds]
        self._last_scores[run.run_id] = scores[-1]
        out = combine_folds(records, run.split)
        out.update(run_id=run.run_id, config=run.canonical())
        return out

    def by_age(self, run: RunConfig, data: DatasetData, prep: Prepared, test_scores: np.ndarray, record: dict) -> dict:
        """One fold's test figures per model-age bin, at the chosen threshold and at each alarm budget."""
        meta, split = prep.windows.meta, prep.split
        lo, hi = split.ranges["test"]
        count_from = lo + prep.horizon if prep.horizon is not None and lo + prep.horizon < hi else lo
        test_meta = meta.iloc[split.test].reset_index(drop=True)
        return {
            "ranges": {k: [str(a), str(b)] for k, (a, b) in split.ranges.items()},
            "by_age": {name: figures_by_age(test_meta, test_scores, value, data.truth, prep.horizon,
                                            pd.Timedelta(run.scoring["cooldown"]), (lo, hi), count_from,
                                            pd.Timedelta(run.split["age_bin"]))
                       for name, value in policies(record).items()},
        }

    def reported_labels(self, run: RunConfig, data: DatasetData, prep: Prepared) -> tuple[pd.DataFrame, np.ndarray]:
        """The incidents as the run's noise would have reported them, and the window labels they give."""
        meta = prep.windows.meta
        span = (meta["start"].min(), meta["end"].max())
        entities = sorted(meta["entity"].astype(str).unique())
        reported = replay(data.truth, load_noise(run.noise), seed=run.seed, span=span, entities=entities)
        return reported, label_windows(prep.windows, reported, run.task["name"], prep.horizon)

    def fit_and_score(self, run: RunConfig, data: DatasetData, prep: Prepared, det: Detector,
                      train: np.ndarray, rep_labels: np.ndarray) -> Fit:
        """Fit the detector on the training windows and score validation and test (or reuse an equal fit)."""
        ws, split = prep.windows, prep.split
        reads_labels = det.trains_on == "labelled"
        fit_key = json.dumps(
            [data.table_key, run.vocabulary, run.windows, run.task if reads_labels else None, run.split, run.detector,
             run.seed, _digest(train), _digest(rep_labels[train]) if reads_labels else None,
             # the scored windows too: two tasks can share a training set but not their embargoed val/test parts
             _digest(split.val), _digest(split.test)],
            sort_keys=True,
        )
        if fit_key in self._fits:
            val_scores, test_scores, info = self._fits[fit_key]
            return Fit(val_scores, test_scores, info, 0.0, 0.0, True)
        t_fit = time.time()
        det.fit(ws.subset(train), rep_labels[train] if reads_labels else None)
        fit_s = time.time() - t_fit
        t_score = time.time()
        val_scores = det.score(ws.subset(split.val)) if len(split.val) else np.zeros(0)
        test_scores = det.score(ws.subset(split.test))
        score_s = time.time() - t_score
        info = det.info()
        self._fits[fit_key] = (val_scores, test_scores, info)
        return Fit(val_scores, test_scores, info, fit_s, score_s, False)

    def choose_threshold(self, run: RunConfig, prep: Prepared, val_scores: np.ndarray,
                         val_labels: np.ndarray) -> ThresholdChoice:
        """The experiment's threshold policy applied on the validation windows with their reported labels."""
        meta = prep.windows.meta
        cooldown = pd.Timedelta(run.scoring["cooldown"])
        return choose_threshold(load_policy(run.threshold), val_scores, val_labels, meta.iloc[prep.split.val], cooldown)

    def evaluate_budgets(self, run: RunConfig, data: DatasetData, prep: Prepared, fit: Fit,
                         val_labels: np.ndarray) -> dict:
        """Each alarm budget's threshold (chosen on validation) and its test figures, reusing the scores."""
        out = {}
        meta = prep.windows.meta.iloc[prep.split.val]
        for b in run.budgets:
            choice = choose_threshold(budget_policy(b), fit.val_scores, val_labels, meta,
                                      pd.Timedelta(run.scoring["cooldown"]))
            rep = self.evaluate(run, data, prep, fit.test_scores, choice.threshold)
            out[budget_key(b)] = {"threshold": {"value": float(choice.threshold), **choice.as_dict()}, **rep}
        return out

    def curve(self, run: RunConfig, data: DatasetData, prep: Prepared, test_scores: np.ndarray) -> pd.DataFrame:
        """The test-side operating curve (for reading; headline points use validation-chosen thresholds)."""
        lo, hi = self.test_span(prep)
        return operating_curve(prep.windows.meta.iloc[prep.split.test].reset_index(drop=True), test_scores,
                               data.truth, prep.horizon, pd.Timedelta(run.scoring["cooldown"]), span=(lo, hi))

    @staticmethod
    def test_span(prep: Prepared) -> tuple[pd.Timestamp, pd.Timestamp]:
        """Where test failures are counted: from the test start plus the horizon to the test end."""
        meta, split = prep.windows.meta, prep.split
        if "test" in split.ranges:
            lo, hi = split.ranges["test"]
        else:  # a random split has no time range: the test windows' own span
            lo, hi = meta["start"].iloc[split.test].min(), meta["end"].iloc[split.test].max()
        # Count only failures whose whole horizon lies in the test span, so that no failure's
        # warning time is cut short by the split boundary (alarms still match every incident).
        count_from = lo + prep.horizon if prep.horizon is not None and lo + prep.horizon < hi else lo
        return count_from, hi

    def evaluate(self, run: RunConfig, data: DatasetData, prep: Prepared, test_scores: np.ndarray,
                 threshold: float) -> dict:
        """Window and incident figures of the test windows against the true incidents."""
        meta, split = prep.windows.meta, prep.split
        count_from, hi = self.test_span(prep)
        return evaluate_run(
            meta=meta.iloc[split.test].reset_index(drop=True), scores=test_scores,
            labels=prep.truth_labels[split.test], threshold=threshold, incidents=data.truth, horizon=prep.horizon,
            cooldown=pd.Timedelta(run.scoring["cooldown"]), span=(count_from, hi),
            bootstrap=run.scoring["bootstrap"], ci_level=run.scoring["ci_level"],
            unit=run.scoring["bootstrap_unit"], seed=run.seed,
        )

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


def session_dataset(entry: SessionEntry) -> DatasetData:
    """A session-file dataset as an event table (sessions in a seeded order), its truth and identity."""
    sessions, vocab, key = load_entry_sessions(entry)
    events = session_events(sessions, entry.sessions.order_seed)
    truth = incidents_from_sessions(events, sessions.keys[sessions.labels == 1])
    return DatasetData(entry.name, events, vocab, truth, key, [f"event {i + entry.sessions.first_id}" for i in range(vocab)])


def training_windows(det: Detector, train: np.ndarray, rep_labels: np.ndarray) -> np.ndarray:
    """The train-split windows a detector learns from: all, the reported-healthy ones, or the labelled ones."""
    if det.trains_on == "healthy":
        train = train[rep_labels[train] == 0]
    elif det.trains_on == "labelled":
        train = train[rep_labels[train] >= 0]
    if len(train) == 0:
        raise DataError(f"no training windows left for '{det.name}' ({det.trains_on} windows of the train split)")
    return train


def score_table(prep: Prepared, fit: Fit, val_labels: np.ndarray) -> pd.DataFrame:
    """A run's validation and test scores with their labels (reported on validation, true on test)."""
    split = prep.split
    return pd.DataFrame({
        "window": np.r_[split.val, split.test].astype(np.int64),
        "part": np.r_[np.full(len(split.val), "val"), np.full(len(split.test), "test")],
        "score": np.r_[fit.val_scores, fit.test_scores].astype(np.float64),
        "label": np.r_[val_labels, prep.truth_labels[split.test]].astype(np.int8),
    })


def curve_rows(curve: pd.DataFrame) -> pd.DataFrame:
    """Operating-curve points as rows of the score table (part "curve", the threshold in ``score``)."""
    return pd.DataFrame({
        "window": np.full(len(curve), -1, dtype=np.int64), "part": "curve",
        "score": curve["threshold"].to_numpy(np.float64), "label": np.full(len(curve), -1, dtype=np.int8),
        "curve_alarms_per_week_per_100": curve["alarms_per_week_per_100_entities"].to_numpy(np.float64),
        "curve_caught": curve["caught"].to_numpy(np.int64),
        "curve_failures": np.full(len(curve), int(curve.attrs["failures"]), dtype=np.int64),
        "curve_lead_median_h": curve["lead_time_median_h"].to_numpy(np.float64),
    })


def fit_groups(runs: Iterable[RunConfig]) -> list[list[RunConfig]]:
    """Runs that can share windows and fitted models, grouped; groups are independent units of work."""
    groups: dict[str, list[RunConfig]] = {}
    for r in _ordered(runs):
        # A composition and its ablations (same detector, other `combine`) share fitted members: one group.
        family = {"name": r.detector["name"],
                  "params": {k: v for k, v in r.detector["params"].items() if k != "combine"}}
        key = json.dumps([r.dataset, r.vocabulary, r.windows, r.task, r.split, family, r.seed], sort_keys=True)
        groups.setdefault(key, []).append(r)
    return list(groups.values())


def _ordered(runs: Iterable[RunConfig]) -> list[RunConfig]:
    """Runs grouped so that ones sharing data and fitted models follow each other."""
    return sorted(runs, key=lambda r: (r.dataset, r.vocabulary_label, json.dumps(r.windows, sort_keys=True),
                                       json.dumps(r.task),
                                       r.detector_label, r.seed, r.noise_name))
