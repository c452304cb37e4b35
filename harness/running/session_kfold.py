"""Session k-fold protocol: detectors on labelled sessions, false positives estimated by k-fold over normal sessions.

For preprocessed session data (normal and abnormal sessions, no time), where the published
evaluation trains on normal sessions and reports false positives among normal sessions and
false negatives among abnormal ones. For every seed the normal sessions are cut into ``folds``
seeded folds; each detector is fitted on the other folds, and a session is *flagged* by the
detector's decision rule (``above``: score above a value, e.g. 0 = any missed event for the
next-event model or any broken invariant; ``q_statistic``: the PCA detector's Q-statistic
threshold). The held-out fold gives the false positives, and every abnormal session is scored
by every fold's model (recall = the mean over folds). A protocol file (YAML):

    experiment: hdfs-sessions
    output: results
    dataset: hdfs-sessions                     # a registry session-file entry, or
    # files: {normal: normal.txt, abnormal: abnormal.txt, first_id: 1}   (relative to the file)
    folds: 5
    seeds: [0, 1]
    detectors:
      - {name: next_event, params: {history: 10, top_g: 9}, decision: {kind: above, value: 0}}
      - {name: pca, decision: {kind: q_statistic}}
    published: {next_event: {fp: 833, normal: 553366, fn: 619, abnormal: 16838}}
    tolerance: {recall: 0.03, fpr: 0.01}
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from logtrial.data.registry import SessionEntry, get_entry, load_registry, read_yaml
from logtrial.detectors.registry import create
from logtrial.errors import ConfigError
from logtrial.running.threads import pinned_threads
from logtrial.windowing.sessions import Sessions, load_entry_sessions, normal_and_abnormal, windows_from_sequences
from logtrial.windowing.windows import WindowSet

DECISIONS = ("above", "q_statistic")
FIELDS = {"experiment", "description", "output", "dataset", "files", "registry", "folds", "seeds", "detectors",
          "published", "tolerance", "gaps"}


@dataclass
class DetectorSpec:
    """One detector of the protocol: registry name, params, label in tables and its decision rule."""

    name: str
    params: dict
    label: str
    decision: dict
    variants: list[tuple[str, dict]] = field(default_factory=list)


@dataclass
class Protocol:
    """A validated session k-fold protocol."""

    name: str
    output: Path
    folds: int
    seeds: list[int]
    detectors: list[DetectorSpec]
    dataset: str | None = None
    files: dict | None = None
    base: Path = Path(".")
    registry: list[Path] = field(default_factory=list)
    published: dict = field(default_factory=dict)
    tolerance: dict = field(default_factory=dict)


def _detector(raw: Any, where: str) -> DetectorSpec:
    if isinstance(raw, str):
        raw = {"name": raw}
    if not isinstance(raw, dict) or "name" not in raw:
        raise ConfigError(f"{where}: expected a detector name or {{name, params, label, decision}}")
    unknown = sorted(set(raw) - {"name", "params", "label", "decision", "variants"})
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: decision, label, name, params, variants)")
    params = raw.get("params") or {}
    create(raw["name"], params, seed=0, source=where)  # validates name and params
    variants = []
    for i, v in enumerate(raw.get("variants") or []):
        # score-time settings applied to the same fitted model (e.g. a stricter end-event rule)
        if not isinstance(v, dict) or set(v) != {"label", "params"} or not isinstance(v["params"], dict):
            raise ConfigError(f"{where}.variants[{i}]: expected {{label: NAME, params: {{...}}}}")
        create(raw["name"], {**params, **v["params"]}, seed=0, source=f"{where}.variants[{i}]")
        variants.append((str(v["label"]), dict(v["params"])))
    # default rules: the Q-statistic for PCA, any anomalous event (score above 0) for the others
    decision = raw.get("decision") or ({"kind": "q_statistic"} if raw["name"] == "pca" else {"kind": "above", "value": 0})
    if not isinstance(decision, dict) or decision.get("kind") not in DECISIONS:
        raise ConfigError(f"{where}.decision.kind: must be one of {list(DECISIONS)}, got {decision!r}")
    if decision["kind"] == "above":
        value = decision.get("value", 0)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where}.decision.value: expected a number, got {value!r}")
        decision = {"kind": "above", "value": float(value)}
    elif raw["name"] != "pca":
        raise ConfigError(f"{where}.decision: q_statistic is the PCA detector's threshold, not {raw['name']!r}'s")
    return DetectorSpec(raw["name"], dict(params), str(raw.get("label", raw["name"])), decision, variants)


def load_protocol(path: str | Path, output: Path | None = None) -> Protocol:
    """Read and validate a session k-fold protocol file; ConfigError names the file and field."""
    path = Path(path)
    doc = read_yaml(path)
    if not isinstance(doc, dict):
        raise ConfigError(f"{path}: expected a mapping with experiment, dataset or files, detectors")
    unknown = sorted(set(doc) - FIELDS)
    if unknown:
        raise ConfigError(f"{path}: {unknown[0]}: unknown field (allowed: {sorted(FIELDS)})")
    if ("dataset" in doc) == ("files" in doc):
        raise ConfigError(f"{path}: give exactly one of `dataset` (a registry session-file entry) or `files`")
    folds = doc.get("folds", 5)
    if isinstance(folds, bool) or not isinstance(folds, int) or folds < 2:
        raise ConfigError(f"{path}: folds: expected a whole number >= 2, got {folds!r}")
    seeds = doc.get("seeds", [0])
    if not isinstance(seeds, list) or not seeds or not all(isinstance(s, int) and not isinstance(s, bool) for s in seeds):
        raise ConfigError(f"{path}: seeds: expected a list of whole numbers, got {seeds!r}")
    raw_dets = doc.get("detectors")
    if not isinstance(raw_dets, list) or not raw_dets:
        raise ConfigError(f"{path}: detectors: expected a non-empty list")
    dets = [_detector(d, f"{path}: detectors[{i}]") for i, d in enumerate(raw_dets)]
    labels = [d.label for d in dets] + [label for d in dets for label, _ in d.variants]
    if len(set(labels)) != len(labels):
        raise ConfigError(f"{path}: detectors: labels must be unique, got {labels}")
    files = doc.get("files")
    if files is not None and (not isinstance(files, dict) or not {"normal", "abnormal"} <= set(files)):
        raise ConfigError(f"{path}: files: expected {{normal: FILE, abnormal: FILE, first_id: 1}}")
    out = output or path.parent / str(doc.get("output", "results"))
    return Protocol(str(doc.get("experiment", path.stem)), Path(out), folds, list(seeds), dets, doc.get("dataset"),
                    files, path.parent, [path.parent / r for r in doc.get("registry", [])],
                    doc.get("published") or {}, doc.get("tolerance") or {})


def protocol_sessions(proto: Protocol) -> tuple[Sessions, int]:
    """The protocol's sessions and vocabulary size (from the registry entry or the files)."""
    if proto.dataset is not None:
        entry = get_entry(proto.dataset, load_registry(proto.registry))
        if not isinstance(entry, SessionEntry):
            raise ConfigError(f"dataset '{proto.dataset}': not a session-file dataset (needs a `sessions:` block)")
        sessions, vocab, _ = load_entry_sessions(entry)
        return sessions, vocab
    f = proto.files or {}
    first = int(f.get("first_id", 1))
    sessions = normal_and_abnormal(proto.base / f["normal"], proto.base / f["abnormal"], first)
    vocab = int(f.get("vocab_size") or (int(sessions.values.max()) + 1 if len(sessions.values) else 1))
    return sessions, vocab


def flagged(det, spec: DetectorSpec, scores: np.ndarray) -> np.ndarray:
    """Which sessions the detector's decision rule flags."""
    if spec.decision["kind"] == "q_statistic":
        return scores > det.q_threshold()
    return scores > spec.decision["value"]


def run_protocol(proto: Protocol, progress: bool = True) -> pd.DataFrame:
    """One row per (detector, seed, fold): false positives on the held-out normal fold, abnormal sessions flagged."""
    sessions, vocab = protocol_sessions(proto)
    ws = windows_from_sequences((sessions.values, sessions.offsets), vocab, keys=sessions.keys, labels=sessions.labels)
    normal, abnormal = np.flatnonzero(sessions.labels == 0), np.flatnonzero(sessions.labels == 1)
    abn_ws = ws.subset(abnormal)
    rows = []
    for seed in proto.seeds:
        folds = np.array_split(np.random.default_rng(seed).permutation(normal), proto.folds)
        for f, held in enumerate(folds):
            train = np.sort(np.concatenate([x for j, x in enumerate(folds) if j != f]))
            held_ws, train_ws = ws.subset(np.sort(held)), ws.subset(train)
            for spec in proto.detectors:
                for r in _one(spec, seed, f, train_ws, held_ws, abn_ws):
                    rows.append(r)
                    if progress:
                        print(f"  {r['detector']} seed {seed} fold {f + 1}/{proto.folds}: FP {r['fp']}/{r['normal']}, "
                              f"flagged {r['tp']}/{r['abnormal']} abnormal ({r['cpu_s']:.1f} s CPU)", flush=True)
    return pd.DataFrame(rows)


def _one(spec: DetectorSpec, seed: int, fold: int, train_ws: WindowSet, held_ws: WindowSet,
         abn_ws: WindowSet) -> list[dict]:
    """Fit once; the figures of the detector and of each score-time variant of it."""
    out = []
    c0 = time.process_time()
    with pinned_threads():
        det = create(spec.name, spec.params, seed=seed).fit(train_ws)
        info = det.info()
        base = det.params
        for label, over in [(spec.label, {})] + spec.variants:
            det.params = base.model_copy(update=over)
            fp = int(flagged(det, spec, det.score(held_ws)).sum())
            tp = int(flagged(det, spec, det.score(abn_ws)).sum())
            out.append({"detector": label, "seed": seed, "fold": fold, "fp": fp, "normal": len(held_ws), "tp": tp,
                        "abnormal": len(abn_ws), "cpu_s": round(time.process_time() - c0, 2),
                        "epochs_run": info.get("epochs_run"), "stopped_early": info.get("stopped_early")})
            c0 = time.process_time()
        det.params = base
    return out


def summarise(rows: pd.DataFrame, published: dict) -> pd.DataFrame:
    """Per detector: FPR over the held-out normal sessions and recall, mean and range over seeds, and published figures."""
    per_seed = rows.groupby(["detector", "seed"], sort=False).agg(
        fp=("fp", "sum"), normal=("normal", "sum"), tp=("tp", "mean"), abnormal=("abnormal", "first"),
        cpu_s=("cpu_s", "sum"))
    per_seed["fpr"] = per_seed["fp"] / per_seed["normal"]
    per_seed["recall"] = per_seed["tp"] / per_seed["abnormal"]
    out = per_seed.groupby(level="detector", sort=False).agg(
        recall=("recall", "mean"), recall_min=("recall", "min"), recall_max=("recall", "max"),
        fpr=("fpr", "mean"), fpr_min=("fpr", "min"), fpr_max=("fpr", "max"), cpu_s=("cpu_s", "sum"),
        seeds=("recall", "size")).reset_index()
    pub = [published_figures(published.get(d)) for d in out["detector"]]
    out["published_recall"] = [p["recall"] if p else np.nan for p in pub]
    out["published_fpr"] = [p["fpr"] if p else np.nan for p in pub]
    return out


def published_figures(raw: dict | None) -> dict | None:
    """Recall and FPR from published counts {fp, normal, fn, abnormal}."""
    if not raw:
        return None
    return {"recall": 1.0 - raw["fn"] / raw["abnormal"], "fpr": raw["fp"] / raw["normal"]}


def write_outputs(proto: Protocol, rows: pd.DataFrame, wall_s: float) -> pd.DataFrame:
    """results.csv (per fold), summary.csv, summary.json and report.md in the protocol's output folder."""
    out = proto.output
    out.mkdir(parents=True, exist_ok=True)
    summary = summarise(rows, proto.published)
    rows.to_csv(out / "results.csv", index=False)
    summary.to_csv(out / "summary.csv", index=False, float_format="%.6g")
    meta = {"experiment": proto.name, "folds": proto.folds, "seeds": proto.seeds, "cpu_s": round(float(rows["cpu_s"].sum()), 1),
            "wall_s": round(wall_s, 1), "threads_per_run": 1}
    (out / "summary.json").write_text(json.dumps({**meta, "summary": json.loads(summary.to_json(orient="records"))},
                                                 indent=1))
    lines = [f"# {proto.name}: session k-fold results", "",
             f"{proto.folds}-fold over the normal sessions, seeds {proto.seeds}; every abnormal session scored by every "
             f"fold's model. CPU time of the detectors: {meta['cpu_s']} s (one thread per run).", "",
             "| detector | recall (mean) | recall range over seeds | FPR (mean) | FPR range | published recall | published FPR |",
             "|---|---|---|---|---|---|---|"]
    for r in summary.itertuples():
        pr = "-" if np.isnan(r.published_recall) else f"{r.published_recall:.3f}"
        pf = "-" if np.isnan(r.published_fpr) else f"{r.published_fpr:.4f}"
        lines.append(f"| {r.detector} | {r.recall:.3f} | {r.recall_min:.3f}-{r.recall_max:.3f} | {r.fpr:.4f} | "
                     f"{r.fpr_min:.4f}-{r.fpr_max:.4f} | {pr} | {pf} |")
    (out / "report.md").write_text("\n".join(lines) + "\n")
    return summary
