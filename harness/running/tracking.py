"""Tracking: record every run in MLflow (a local SQLite store inside the experiment's output folder)."""

from __future__ import annotations

import json
import logging
import math
import os
import tempfile
import warnings
from pathlib import Path

TRACKING_DB = "mlflow.db"


def tracking_uri(output: Path) -> str:
    """The MLflow tracking URI of an experiment's output folder."""
    return f"sqlite:///{(Path(output) / TRACKING_DB).resolve()}"


def _flatten(prefix: str, value, out: dict) -> None:
    if isinstance(value, dict):
        for k, v in value.items():
            _flatten(f"{prefix}.{k}" if prefix else str(k), v, out)
    else:
        out[prefix] = value


class Tracker:
    """Logs run records to MLflow exactly once per config hash."""

    def __init__(self, output: Path, experiment_name: str):
        os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
        logging.getLogger("mlflow").setLevel(logging.ERROR)
        logging.getLogger("alembic").setLevel(logging.ERROR)
        import mlflow
        from mlflow.tracking import MlflowClient

        # mlflow sets its own logger to INFO when first imported: quiet it again after the import
        logging.getLogger("mlflow").setLevel(logging.ERROR)
        Path(output).mkdir(parents=True, exist_ok=True)
        self.uri = tracking_uri(output)
        self.artifacts = (Path(output) / "mlruns").resolve().as_uri()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            self.client = MlflowClient(tracking_uri=self.uri)
            exp = self.client.get_experiment_by_name(experiment_name)
            self.experiment_id = exp.experiment_id if exp else self.client.create_experiment(
                experiment_name, artifact_location=self.artifacts)
        self._mlflow = mlflow

    def existing(self, run_id: str) -> list[str]:
        """MLflow run ids already recorded for a config hash."""
        found = self.client.search_runs([self.experiment_id], filter_string=f"tags.config_hash = '{run_id}'")
        return [r.info.run_id for r in found]

    def reconcile(self, store, run_ids: list[str]) -> tuple[int, int]:
        """After an interruption: close and remove rows left RUNNING, and log finished runs MLflow missed.

        Returns (rows closed, records added). The run store is the record of what ran; MLflow follows it.
        """
        from mlflow.entities import ViewType

        stale = self.client.search_runs([self.experiment_id], filter_string="attributes.status = 'RUNNING'",
                                        run_view_type=ViewType.ALL, max_results=50_000)
        for r in stale:
            self.client.set_terminated(r.info.run_id, status="KILLED")
            if r.info.lifecycle_stage != "deleted":
                self.client.delete_run(r.info.run_id)
        present = {r.data.tags.get("config_hash") for r in self.client.search_runs(
            [self.experiment_id], run_view_type=ViewType.ACTIVE_ONLY, max_results=50_000)}
        added = 0
        for run_id in run_ids:
            if run_id not in present and store.finished(run_id):
                self.log(json.loads(store.path(run_id).read_text()), store)
                added += 1
        return len(stale), added

    def log(self, record: dict, store) -> None:
        """Record one run (params, metrics, config hash tag, artifacts) unless already recorded."""
        from mlflow.entities import Metric, Param, RunTag

        for old in self.existing(record["run_id"]):
            # A finished record replaces an earlier failed (or interrupted) attempt of the same config.
            if self.client.get_run(old).info.status == "RUNNING":
                self.client.set_terminated(old, status="KILLED")
            self.client.delete_run(old)
        cfg = record["config"]
        name = f"{cfg['detector'].get('label') or cfg['detector']['name']} | {cfg['noise'].get('name', 'clean')} | seed {cfg['seed']}"
        run = self.client.create_run(self.experiment_id, run_name=name, tags={"config_hash": record["run_id"]})
        rid = run.info.run_id
        flat: dict = {}
        _flatten("", {k: v for k, v in cfg.items()}, flat)
        params = [Param(k[:250], json.dumps(v) if not isinstance(v, str) else v[:6000]) for k, v in sorted(flat.items())]
        tags = [RunTag("status", record["status"]), RunTag("dataset", cfg["dataset"]),
                RunTag("detector", cfg["detector"]["name"]), RunTag("noise", cfg["noise"].get("name", "clean"))]
        metrics = []
        if record["status"] == "finished":
            vals: dict = {}
            _flatten("", record["metrics"], vals)
            for k, (lo, hi) in (record.get("intervals") or {}).items():
                vals[f"ci.{k}.low"], vals[f"ci.{k}.high"] = lo, hi
            vals["threshold"] = record["threshold"]["value"]
            for k, v in vals.items():
                if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(float(v)):
                    metrics.append(Metric(k.replace("[", "_").replace("]", ""), float(v), 0, 0))
        else:
            tags.append(RunTag("error", record.get("error", "")[:4000]))
        self.client.log_batch(rid, metrics=metrics, params=params, tags=tags)
        with tempfile.TemporaryDirectory() as tmp:
            rec = Path(tmp) / "record.json"
            rec.write_text(json.dumps(record, indent=1, sort_keys=True, default=str))
            self.client.log_artifact(rid, str(rec))
            scores = store.path(record["run_id"], ".scores.parquet")
            if scores.is_file():
                self.client.log_artifact(rid, str(scores))
        self.client.set_terminated(rid, status="FINISHED" if record["status"] == "finished" else "FAILED")
