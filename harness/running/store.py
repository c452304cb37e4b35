"""Run store: finished and failed run records (JSON) and their score tables (Parquet), written atomically."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pandas as pd


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
