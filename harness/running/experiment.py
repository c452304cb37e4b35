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
from logtrial.windowing.durations import format_duration

TOP_LEVEL = {
    "experiment", "description", "output", "datasets", "windows", "tasks", "task", "split", "noise", "detectors",
    "seeds", "threshold", "scoring", "registry", "gate", "vocabulary", "vocabularies", "budgets", "tolerance", "evaluation",
}
SCORING_DEFAULTS = {"cooldown": "1h", "bootstrap": 1000, "ci_level": 0.95, "bootstrap_unit": "entity"}


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
    budgets: tuple[float, ...] = ()

    def canonical(self) -> dict:
        """The config as plain JSON-able data, keys sorted on dump (the default vocabulary is left out)."""
        out = {
            "dataset": self.dataset, "windows": self.windows, "task": self.task, "split": self.split,
            "noise": self.noise, "detector": self.detector, "seed": self.seed, "threshold": self.threshold,
            "scoring": self.scoring, "code_version": __version__,
        }
        if self.dataset_entry:
            out["dataset_entry"] = self.dataset_entry
        if self.budgets:
            out["budgets"] = list(self.budgets)
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


def did_you_mean(word: str, known: Any) -> str:
    """' Did you mean X?' for a misspelt name close to one of the known ones, else ''."""
    import difflib

    close = difflib.get_close_matches(str(word), [str(k) for k in known], n=1, cutoff=0.6)
    return f" Did you mean '{close[0]}'?" if close else ""


def _unknown_field(where: str, field_name: str, allowed: Any) -> ConfigError:
    """ConfigError for a field that is not allowed, with a suggestion when it looks misspelt."""
    allowed = sorted(allowed)
    hint = did_you_mean(field_name, allowed)
    return ConfigError(f"{where}{field_name}: unknown field (allowed: {', '.join(allowed)}).{hint}")


def _string(doc: dict, key: str, where: str, required: bool = False) -> str | None:
    """A field that must be a piece of text (a name or a path), not a list or a number."""
    value = doc.get(key)
    if value is None:
        if required:
            raise ConfigError(f"{where}: `{key}` is required")
        return None
    if not isinstance(value, str) or not value.strip():
        raise ConfigError(f"{where}: `{key}` must be a single piece of text, got {value!r}")
    return value


def _names(value: Any, key: str) -> list[str]:
    """A name or a list of names (datasets, registry files), refused when not text or repeated."""
    items = _as_list(value)
    for i, v in enumerate(items):
        if not isinstance(v, str) or not v.strip():
            raise ConfigError(f"{key}[{i}]: expected a name (text), got {v!r}")
    _no_repeats(items, key)
    return items


def _no_repeats(items: list, key: str, show: Any = None) -> None:
    """Refuse a grid axis that lists the same value twice (the runs would collapse into one)."""
    seen: dict[str, int] = {}
    for i, v in enumerate(items):
        k = json.dumps(v, sort_keys=True, default=str)
        if k in seen:
            shown = show(v) if show else v
            raise ConfigError(f"{key}[{i}]: repeats {key}[{seen[k]}] ({shown}); each grid value must be "
                              "listed once, or the runs collapse and the counts no longer add up")
        seen[k] = i


def _need(doc: dict, key: str, where: str) -> Any:
    if key not in doc or doc[key] in (None, [], {}):
        raise ConfigError(f"{where}: `{key}` is required")
    return doc[key]


def _canonical_task(raw: Any, where: str) -> dict:
    from logtrial.windowing.windows import check_task, require_unit

    if isinstance(raw, str):
        raw = {"name": raw}
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: expected a mapping like {{name: predict, horizon: 24h}}")
    unknown = sorted(set(raw) - {"name", "horizon"})
    if unknown:
        raise _unknown_field(f"{where}.", unknown[0], {"name", "horizon"})
    name = raw.get("name")
    if name == "detect" and raw.get("horizon") is not None:
        raise ConfigError(f"{where}.horizon: not used by the detect task (it scores the windows that overlap a "
                          f"failure); remove it, or use {{name: predict, horizon: {raw['horizon']}}}")
    if raw.get("horizon") is not None:
        require_unit(raw["horizon"], f"{where}.horizon")
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
        raise _unknown_field(f"{where}.", unknown[0], allowed)
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

        embargo = parse_duration(raw["embargo"], f"{where}.embargo", unit_required=True)
        if embargo < pd.Timedelta(0):
            raise ConfigError(f"{where}.embargo: must not be negative, got {raw['embargo']!r}")
        out["embargo"] = str(embargo)
    return out


def _canonical_scoring(raw: Any, where: str) -> dict:
    from logtrial.windowing.windows import parse_duration

    raw = raw or {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: expected a mapping")
    unknown = sorted(set(raw) - set(SCORING_DEFAULTS))
    if unknown:
        raise _unknown_field(f"{where}.", unknown[0], SCORING_DEFAULTS)
    out = {**SCORING_DEFAULTS, **raw}
    cooldown = parse_duration(out["cooldown"], f"{where}.cooldown", unit_required=True)
    if cooldown < pd.Timedelta(0):
        raise ConfigError(f"{where}.cooldown: must not be negative, got {out['cooldown']!r}")
    out["cooldown"] = str(cooldown)
    if isinstance(out["bootstrap"], bool) or not isinstance(out["bootstrap"], int) or out["bootstrap"] < 0:
        raise ConfigError(f"{where}.bootstrap: expected a whole number of resamples >= 0, got {out['bootstrap']!r}")
    if isinstance(out["ci_level"], bool) or not isinstance(out["ci_level"], (int, float)) \
            or not 0 < float(out["ci_level"]) < 1:
        raise ConfigError(f"{where}.ci_level: expected a number between 0 and 1, got {out['ci_level']!r}")
    if out["bootstrap_unit"] not in ("entity", "incident"):
        raise ConfigError(f"{where}.bootstrap_unit: must be entity or incident, got {out['bootstrap_unit']!r}")
    return out


INLINE_DATASET = {"name", "file", "format", "incidents"}


def _inline_dataset(raw: dict, where: str, base: Path) -> str:
    """A dataset given in the experiment as {name, file, format, incidents}: registered in the data home; its name."""
    from logtrial.data.registry import register_local

    unknown = sorted(set(raw) - INLINE_DATASET)
    if unknown:
        raise _unknown_field(f"{where}.", unknown[0], INLINE_DATASET)
    for key in ("name", "file", "format"):
        if not isinstance(raw.get(key), str) or not raw[key].strip():
            raise ConfigError(f"{where}.{key}: required (text) for a dataset given in the experiment, got "
                              f"{raw.get(key)!r}")
    if raw.get("incidents") is not None and not isinstance(raw["incidents"], str):
        raise ConfigError(f"{where}.incidents: expected a file path, got {raw['incidents']!r}")
    incidents = base / raw["incidents"] if raw.get("incidents") else None
    register_local(raw["name"], base / raw["file"], base / raw["format"], incidents,
                   fields=(f"{where}.name", f"{where}.file", f"{where}.format", f"{where}.incidents"),
                   how="an experiment file's `datasets:`")
    return raw["name"]


# Registry fields that change what a dataset's events or truth are (not its description).
_ENTRY_FIELDS = {"sources", "logs", "format", "labels", "miner", "generator", "sessions"}


def entry_fingerprint(entry) -> str:
    """Hash of the registry fields that define a dataset's data, so that editing them changes run ids.

    Local sources (your own files, tracked by content) add their sha256: editing the file changes run ids.
    """
    from logtrial.data.acquire import local_content

    doc = entry.model_dump(mode="json", include=_ENTRY_FIELDS)
    content = local_content(entry)
    if content:
        doc["local_content"] = content
    blob = json.dumps(doc, sort_keys=True)
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


def _noise_settings(entries: list, base: Path) -> list[dict]:
    """Canonical noise settings: plain entries, `file:` entries (e.g. from fit-noise) and expanded sweeps.

    A sweep's level-0 setting is the clean one, shared by every sweep (added when absent).
    """
    from logtrial.labels.noise import expand_sweep, load_noise

    out, swept = [], False
    for i, raw in enumerate(entries):
        where = f"noise[{i}]"
        if isinstance(raw, dict) and "sweep" in raw:
            swept = True
            out += [n for n in (_canonical_noise(m, where) for m in expand_sweep(raw, where))
                    if not load_noise(n).is_clean()]
        elif isinstance(raw, dict) and "file" in raw:
            unknown = sorted(set(raw) - {"file", "name", "level"})
            if unknown:
                raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: file, name, level)")
            spec = load_noise(base / str(raw["file"]))
            overrides = {k: raw[k] for k in ("name", "level") if k in raw}
            out.append(_canonical_noise({**spec.raw, "name": spec.name, **overrides}, where))
        else:
            out.append(_canonical_noise(raw, where))
    if swept and not any(load_noise(n).is_clean() for n in out):
        out.insert(0, {"name": "clean", "level": 0.0})
    return out


def _canonical_detector(raw: Any, where: str) -> dict:
    from logtrial.detectors.registry import create

    if isinstance(raw, str):
        raw = {"name": raw}
    if not isinstance(raw, dict) or "name" not in raw:
        raise ConfigError(f"{where}: expected a detector name or {{name: ..., params: {{...}}}}")
    unknown = sorted(set(raw) - {"name", "params", "label"})
    if unknown:
        raise _unknown_field(f"{where}.", unknown[0], {"name", "params", "label"})
    try:
        params = create(str(raw["name"]), raw.get("params") or {}, seed=0, source=where).params.model_dump(mode="json")
    except LogtrialError as exc:
        from logtrial.detectors.registry import available

        hint = "" if str(raw["name"]) in available() else did_you_mean(str(raw["name"]), available())
        raise ConfigError(f"{exc}{hint}") from None
    out = {"name": str(raw["name"]), "params": params}
    if raw.get("label"):
        out["label"] = str(raw["label"])
    return out


def _canonical_budgets(raw: Any) -> tuple[float, ...]:
    """Alarm budgets (alarms per week per 100 entities): distinct positive numbers, sorted."""
    if raw is None:
        return ()
    if not isinstance(raw, list):
        raise ConfigError(f"budgets: expected a list of alarms per week per 100 entities, e.g. [2, 5, 20], got {raw!r}")
    for i, b in enumerate(raw):
        if isinstance(b, bool) or not isinstance(b, (int, float)) or not b > 0 or b != b or b == float("inf"):
            raise ConfigError(f"budgets[{i}]: expected a positive number of alarms per week per 100 entities, got {b!r}")
    if len(set(map(float, raw))) != len(raw):
        raise ConfigError(f"budgets: each budget once, got {raw!r}")
    return tuple(sorted(float(b) for b in raw))


def load_experiment(source: str | Path | dict, output: str | Path | None = None,
                    registry: list[Path] | None = None) -> Experiment:
    """Validate an experiment file (or dict) and expand its grid into run configs (plus extra registry files)."""
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
        raise ConfigError(f"{origin}: `{unknown[0]}`: unknown field (allowed: {', '.join(sorted(TOP_LEVEL))})."
                          f"{did_you_mean(unknown[0], TOP_LEVEL)}")
    try:
        return _expand(doc, origin, path, output, [Path(p) for p in registry or []])
    except ConfigError as exc:
        msg = str(exc)
        raise ConfigError(msg if msg.startswith(origin) else f"{origin}: {msg}") from None


def _expand(doc: dict, origin: str, path: Path | None, output: str | Path | None,
            extra_registry: list[Path] | None = None) -> Experiment:
    from logtrial.data.registry import get_entry, load_registry
    from logtrial.evaluation.thresholds import load_policy

    name = _string(doc, "experiment", origin, required=True)
    _string(doc, "description", origin)
    _string(doc, "output", origin)
    base = path.parent if path else Path.cwd()
    registry_files = [base / p for p in _names(doc.get("registry") or [], "registry")] + list(extra_registry or [])
    datasets = _names([_inline_dataset(d, f"datasets[{i}]", base) if isinstance(d, dict) else d
                       for i, d in enumerate(_as_list(_need(doc, "datasets", origin)))], "datasets")
    registry = load_registry(registry_files)
    fingerprints = {}
    for i, d in enumerate(datasets):
        try:
            fingerprints[d] = entry_fingerprint(get_entry(d, registry))
        except ConfigError as exc:
            raise ConfigError(f"datasets[{i}]: {exc}") from None
    from logtrial.windowing.windows import load_window_spec, require_unit

    raw_windows = _as_list(_need(doc, "windows", origin))
    for i, w in enumerate(raw_windows):
        if isinstance(w, dict) and w.get("kind") == "time":
            for key in ("size", "step"):
                if w.get(key) is not None:
                    require_unit(w[key], f"windows[{i}].{key}")
    windows = [load_window_spec(w, f"windows[{i}]").as_dict() for i, w in enumerate(raw_windows)]
    _no_repeats(windows, "windows", window_label)
    if "task" in doc and "tasks" in doc:
        raise ConfigError("give `task` or `tasks`, not both")
    tasks = [_canonical_task(t, f"tasks[{i}]") for i, t in enumerate(_as_list(doc.get("tasks", doc.get("task"))))
             if t is not None]
    if not tasks:
        raise ConfigError("`task` is required (e.g. {name: predict, horizon: 24h})")
    _no_repeats(tasks, "tasks", lambda t: " ".join(f"{k}={format_duration(v) if k == 'horizon' else v}"
                                                   for k, v in t.items()))
    for t in tasks:
        for w in windows:
            if "horizon" in t and "size" in w and pd.Timedelta(t["horizon"]) < pd.Timedelta(w["size"]):
                raise ConfigError(f"task.horizon must be at least the window size ({format_duration(w['size'])}), "
                                  f"got {format_duration(t['horizon'])}")
    if doc.get("evaluation") is not None:  # walk-forward folds take the place of the single split
        from logtrial.running.walk_forward import canonical_walk_forward

        if doc.get("split") is not None:
            raise ConfigError("give `split` or `evaluation: {kind: walk_forward, ...}`, not both")
        split = canonical_walk_forward(doc["evaluation"], "evaluation")
    else:
        split = _canonical_split(doc.get("split"), "split")
    noises = _noise_settings(_as_list(doc.get("noise") or [None]), base)
    names = [n["name"] for n in noises]
    if len(set(names)) != len(names):
        raise ConfigError(f"noise: level names must be unique, got {names}")
    dets = [_canonical_detector(d, f"detectors[{i}]") for i, d in enumerate(_as_list(_need(doc, "detectors", origin)))]
    _no_repeats(dets, "detectors", lambda d: d["name"])
    labels = [d.get("label") or d["name"] for d in dets]
    if len(set(labels)) != len(labels):
        raise ConfigError(f"detectors: give repeated detectors distinct `label`s, got {labels}")
    seeds = _as_list(doc.get("seeds", [0]))
    if not all(isinstance(s, int) and not isinstance(s, bool) for s in seeds):
        raise ConfigError(f"seeds: expected whole numbers, got {seeds!r}")
    _no_repeats(seeds, "seeds")
    try:
        policy = load_policy(doc.get("threshold") or {"kind": "best_f1"})
    except ConfigError as exc:
        raise ConfigError(f"threshold: {exc}") from None
    threshold = policy.as_dict()
    budgets = _canonical_budgets(doc.get("budgets"))
    scoring = _canonical_scoring(doc.get("scoring"), "scoring")
    from logtrial.output.gate import gate_settings

    gate_settings(doc.get("gate"))
    from logtrial.output.tolerance import tolerance_settings

    tolerance_settings(doc.get("tolerance"))
    if "vocabulary" in doc and "vocabularies" in doc:
        raise ConfigError("give `vocabulary` or `vocabularies`, not both")
    vocabs = [_canonical_vocabulary(v, f"vocabularies[{i}]") for i, v in
              enumerate(_as_list(doc.get("vocabularies", doc.get("vocabulary", "templates"))))]
    _no_repeats(vocabs, "vocabularies", vocabulary_label)
    runs = [
        RunConfig(dataset=d, windows=w, task=t, split=split, noise=n, detector=det, seed=int(s),
                  threshold=threshold, scoring=scoring, vocabulary=v, dataset_entry=fingerprints[d],
                  budgets=budgets)
        for d, v, w, t, n, det, s in itertools.product(datasets, vocabs, windows, tasks, noises, dets, seeds)
    ]
    out = Path(output) if output else Path(doc.get("output") or (base / f"{name}-out"))
    if not out.is_absolute() and output is None and doc.get("output"):
        out = base / out
    return Experiment(name=name, path=path, output=out, runs=runs, raw=doc, registry_files=registry_files)


def window_label(windows: dict) -> str:
    """Short text of a window spec: 'time 1h', 'time 1h step 15min', 'count 50', 'session'."""
    kind = windows.get("kind", "?")
    if kind == "time":
        size, step = format_duration(windows["size"]), format_duration(windows.get("step", windows["size"]))
        return f"time {size}" + ("" if step == size else f" step {step}")
    if kind == "count":
        n, step = windows.get("n"), windows.get("step", windows.get("n"))
        return f"count {n}" + ("" if step == n else f" step {step}")
    return str(kind)


def experiment_order(exp: Experiment) -> tuple[list[str], list[str]]:
    """Detector labels and noise names in the order the experiment file lists them."""
    dets = list(dict.fromkeys(r.detector_label for r in exp.runs))
    noises = list(dict.fromkeys(r.noise_name for r in exp.runs))
    return dets, noises


def describe_failure(exc: BaseException) -> str:
    """One line for a failed run: the error type and message."""
    kind = "error" if isinstance(exc, LogtrialError) else type(exc).__name__
    return f"{kind}: {exc}"
