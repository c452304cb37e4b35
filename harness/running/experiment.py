"""Experiment files: validate the YAML grid and expand it into canonical, hashed run configs."""

from __future__ import annotations

import hashlib
import itertools
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd
from logtrial import __version__
from logtrial.data.registry import read_yaml
from logtrial.errors import ConfigError, LogtrialError

TOP_LEVEL = {
    "experiment", "description", "output", "datasets", "windows", "tasks", "task", "split", "noise", "detectors",
    "seeds", "threshold", "scoring", "registry", "gate", "vocabulary", "vocabularies", "evaluation",
}
SCORING_DEFAULTS = {"cooldown": "1h", "bootstrap": 200, "ci_level": 0.95, "bootstrap_unit": "entity"}


@dataclass(frozen=True)
class RunConfig:
    """One cell of the grid: everything a run's result depends on, in canonical form."""

    dataset: str
    windows: dict
    task: dict
    split: dict
    noise: dict
    detector: dict
    seed: int
    threshold: dict
    scoring: dict
    vocabulary: dict = field(default_factory=lambda: {"kind": "templates"})
    dataset_entry: str = ""

    def canonical(self) -> dict:
        """The config as plain JSON-able data, keys sorted on dump (the default vocabulary is left out)."""
        out = {
            "dataset": self.dataset, "windows": self.windows, "task": self.task, "split": self.split,
            "noise": self.noise, "detector": self.detector, "seed": self.seed, "threshold": self.threshold,
            "scoring": self.scoring, "code_version": __version__,
        }
        if self.dataset_entry:
            out["dataset_entry"] = self.dataset_entry
        if self.vocabulary.get("kind", "templates") != "templates":
            out["vocabulary"] = self.vocabulary
        return out

    @property
    def vocabulary_label(self) -> str:
        """Short name of the event vocabulary."""
        return vocabulary_label(self.vocabulary)

    @property
    def run_id(self) -> str:
        """Hash of the canonical config: the run's identity."""
        blob = json.dumps(self.canonical(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(blob.encode()).hexdigest()[:20]

    @property
    def noise_name(self) -> str:
        """Short name of the noise level."""
        return str(self.noise.get("name", "clean"))

    @property
    def detector_label(self) -> str:
        """Detector name with its label (if the experiment gave one)."""
        return str(self.detector.get("label") or self.detector["name"])


@dataclass
class Experiment:
    """A validated experiment file."""

    name: str
    path: Path | None
    output: Path
    runs: list[RunConfig]
    raw: dict
    registry_files: list[Path] = field(default_factory=list)


def _as_list(value: Any) -> list:
    return value if isinstance(value, list) else [value]


def _need(doc: dict, key: str, where: str) -> Any:
    if key not in doc or doc[key] in (None, [], {}):
        raise ConfigError(f"{where}: `{key}` is required")
    return doc[key]


def _canonical_task(raw: Any, where: str) -> dict:
    from logtrial.windowing.windows import check_task

    if isinstance(raw, str):
        raw = {"name": raw}
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: expected a mapping like {{name: predict, horizon: 24h}}")
    unknown = sorted(set(raw) - {"name", "horizon"})
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: name, horizon)")
    name = raw.get("name")
    try:
        horizon = check_task(name, raw.get("horizon"))
    except ConfigError as exc:
        raise ConfigError(str(exc).replace("task.", f"{where}.", 1)) from None
    out = {"name": name}
    if horizon is not None:
        out["horizon"] = str(horizon)
    return out


def _canonical_split(raw: Any, where: str) -> dict:
    raw = raw or {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: expected a mapping")
    allowed = {"kind", "fractions", "embargo"}
    unknown = sorted(set(raw) - allowed)
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: {sorted(allowed)})")
    kind = raw.get("kind", "chronological")
    if kind not in ("chronological", "random"):
        raise ConfigError(f"{where}.kind: must be chronological or random, got {kind!r}")
    fractions = raw.get("fractions", [0.5, 0.2, 0.3])
    if not (isinstance(fractions, list) and len(fractions) == 3 and all(isinstance(f, (int, float)) for f in fractions)
            and abs(sum(fractions) - 1) < 1e-9 and min(fractions) > 0):
        raise ConfigError(f"{where}.fractions: expected three positive numbers (train, validation, test) "
                          f"summing to 1, got {fractions!r}; validation picks the threshold, so it cannot be empty")
    out: dict = {"kind": kind, "fractions": [float(f) for f in fractions]}
    if raw.get("embargo") is not None:
        from logtrial.windowing.windows import parse_duration

        out["embargo"] = str(parse_duration(raw["embargo"], f"{where}.embargo"))
    return out


def _canonical_scoring(raw: Any, where: str) -> dict:
    from logtrial.windowing.windows import parse_duration

    raw = raw or {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: expected a mapping")
    unknown = sorted(set(raw) - set(SCORING_DEFAULTS))
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: {sorted(SCORING_DEFAULTS)})")
    out = {**SCORING_DEFAULTS, **raw}
    out["cooldown"] = str(parse_duration(out["cooldown"], f"{where}.cooldown"))
    if not isinstance(out["bootstrap"], int) or out["bootstrap"] < 0:
        raise ConfigError(f"{where}.bootstrap: expected a whole number of resamples >= 0, got {out['bootstrap']!r}")
    if not 0 < float(out["ci_level"]) < 1:
        raise ConfigError(f"{where}.ci_level: expected a number between 0 and 1, got {out['ci_level']!r}")
    if out["bootstrap_unit"] not in ("entity", "incident"):
        raise ConfigError(f"{where}.bootstrap_unit: must be entity or incident, got {out['bootstrap_unit']!r}")
    return out


# Registry fields that change what a dataset's events or truth are (not its description).
_ENTRY_FIELDS = {"sources", "logs", "format", "labels", "miner", "generator"}


def entry_fingerprint(entry) -> str:
    """Hash of the registry fields that define a dataset's data, so that editing them changes run ids."""
    blob = json.dumps(entry.model_dump(mode="json", include=_ENTRY_FIELDS), sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def vocabulary_label(spec: dict | None) -> str:
    """'templates', or 'semantic k=16' and the like."""
    if not spec or spec.get("kind", "templates") == "templates":
        return "templates"
    return " ".join([spec["kind"]] + [f"{k}={v}" for k, v in sorted(spec.items()) if k != "kind"])


def _canonical_vocabulary(raw: Any, where: str) -> dict:
    from logtrial.windowing.vocabulary import load_vocabulary_spec

    load_vocabulary_spec(raw, where)
    if raw is None or raw == "templates" or (isinstance(raw, dict) and raw.get("kind", "templates") == "templates"):
        return {"kind": "templates"}
    return dict(raw)


def _canonical_noise(raw: Any, where: str) -> dict:
    from logtrial.labels.noise import load_noise

    if raw is None or raw == "clean":
        raw = {"name": "clean"}
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: expected a mapping like {{name: drop-30, drop: {{p: 0.3}}}}")
    try:
        spec = load_noise(raw)
    except ConfigError as exc:
        raise ConfigError(f"{where}: {exc}") from None
    return {**raw, "name": spec.name, **({"level": spec.level} if spec.level is not None else {})}


def _canonical_detector(raw: Any, where: str) -> dict:
    from logtrial.detectors.registry import create

    if isinstance(raw, str):
        raw = {"name": raw}
    if not isinstance(raw, dict) or "name" not in raw:
        raise ConfigError(f"{where}: expected a detector name or {{name: ..., params: {{...}}}}")
    unknown = sorted(set(raw) - {"name", "params", "label"})
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: name, params, label)")
    try:
        params = create(str(raw["name"]), raw.get("params") or {}, seed=0, source=where).params.model_dump(mode="json")
    except LogtrialError as exc:
        raise ConfigError(str(exc)) from None
    out = {"name": str(raw["name"]), "params": params}
    if raw.get("label"):
        out["label"] = str(raw["label"])
    return out


def load_experiment(source: str | Path | dict, output: str | Path | None = None) -> Experiment:
    """Validate an experiment file (or dict) and expand its grid into run configs."""
    path = None
    if isinstance(source, (str, Path)):
        path = Path(source)
        doc = read_yaml(path)
        origin = str(path)
    else:
        doc, origin = source, "experiment"
    if not isinstance(doc, dict):
        raise ConfigError(f"{origin}: expected a mapping with `experiment`, `datasets`, `detectors`, ...")
    unknown = sorted(set(doc) - TOP_LEVEL)
    if unknown:
        raise ConfigError(f"{origin}: `{unknown[0]}`: unknown field (allowed: {sorted(TOP_LEVEL)})")
    try:
        return _expand(doc, origin, path, output)
    except ConfigError as exc:
        msg = str(exc)
        raise ConfigError(msg if msg.startswith(origin) else f"{origin}: {msg}") from None


def _expand(doc: dict, origin: str, path: Path | None, output: str | Path | None) -> Experiment:
    from logtrial.data.registry import get_entry, load_registry
    from logtrial.evaluation.thresholds import load_policy

    name = str(_need(doc, "experiment", origin))
    base = path.parent if path else Path.cwd()
    registry_files = [base / p for p in _as_list(doc.get("registry") or [])]
    registry = load_registry(registry_files)
    datasets = [str(d) for d in _as_list(_need(doc, "datasets", origin))]
    fingerprints = {}
    for i, d in enumerate(datasets):
        try:
            fingerprints[d] = entry_fingerprint(get_entry(d, registry))
        except ConfigError as exc:
            raise ConfigError(f"datasets[{i}]: {exc}") from None
    from logtrial.windowing.windows import load_window_spec

    windows = [load_window_spec(w, f"windows[{i}]").as_dict() for i, w in
               enumerate(_as_list(_need(doc, "windows", origin)))]
    if "task" in doc and "tasks" in doc:
        raise ConfigError("give `task` or `tasks`, not both")
    tasks = [_canonical_task(t, f"tasks[{i}]") for i, t in enumerate(_as_list(doc.get("tasks", doc.get("task"))))
             if t is not None]
    if not tasks:
        raise ConfigError("`task` is required (e.g. {name: predict, horizon: 24h})")
    for t in tasks:
        for w in windows:
            if "horizon" in t and "size" in w and pd.Timedelta(t["horizon"]) < pd.Timedelta(w["size"]):
                raise ConfigError(f"task.horizon must be at least the window size ({w['size']}), got {t['horizon']}")
    if doc.get("evaluation") is not None:  # walk-forward folds take the place of the single split
        from logtrial.running.walk_forward import canonical_walk_forward

        if doc.get("split") is not None:
            raise ConfigError("give `split` or `evaluation: {kind: walk_forward, ...}`, not both")
        split = canonical_walk_forward(doc["evaluation"], "evaluation")
    else:
        split = _canonical_split(doc.get("split"), "split")
    noises = [_canonical_noise(n, f"noise[{i}]") for i, n in enumerate(_as_list(doc.get("noise") or [None]))]
    names = [n["name"] for n in noises]
    if len(set(names)) != len(names):
        raise ConfigError(f"noise: level names must be unique, got {names}")
    dets = [_canonical_detector(d, f"detectors[{i}]") for i, d in enumerate(_as_list(_need(doc, "detectors", origin)))]
    labels = [d.get("label") or d["name"] for d in dets]
    if len(set(labels)) != len(labels):
        raise ConfigError(f"detectors: give repeated detectors distinct `label`s, got {labels}")
    seeds = _as_list(doc.get("seeds", [0]))
    if not all(isinstance(s, int) and not isinstance(s, bool) for s in seeds):
        raise ConfigError(f"seeds: expected whole numbers, got {seeds!r}")
    try:
        policy = load_policy(doc.get("threshold") or {"kind": "best_f1"})
    except ConfigError as exc:
        raise ConfigError(f"threshold: {exc}") from None
    threshold = policy.as_dict()
    scoring = _canonical_scoring(doc.get("scoring"), "scoring")
    from logtrial.output.gate import gate_settings

    gate_settings(doc.get("gate"))
    if "vocabulary" in doc and "vocabularies" in doc:
        raise ConfigError("give `vocabulary` or `vocabularies`, not both")
    vocabs = [_canonical_vocabulary(v, f"vocabularies[{i}]") for i, v in
              enumerate(_as_list(doc.get("vocabularies", doc.get("vocabulary", "templates"))))]
    runs = [
        RunConfig(dataset=d, windows=w, task=t, split=split, noise=n, detector=det, seed=int(s),
                  threshold=threshold, scoring=scoring, vocabulary=v, dataset_entry=fingerprints[d])
        for d, v, w, t, n, det, s in itertools.product(datasets, vocabs, windows, tasks, noises, dets, seeds)
    ]
    out = Path(output) if output else Path(doc.get("output") or (base / f"{name}-out"))
    if not out.is_absolute() and output is None and doc.get("output"):
        out = base / out
    return Experiment(name=name, path=path, output=out, runs=runs, raw=doc, registry_files=registry_files)


def experiment_order(exp: Experiment) -> tuple[list[str], list[str]]:
    """Detector labels and noise names in the order the experiment file lists them."""
    dets = list(dict.fromkeys(r.detector_label for r in exp.runs))
    noises = list(dict.fromkeys(r.noise_name for r in exp.runs))
    return dets, noises


def describe_failure(exc: BaseException) -> str:
    """One line for a failed run: the error type and message."""
    kind = "error" if isinstance(exc, LogtrialError) else type(exc).__name__
    return f"{kind}: {exc}"
