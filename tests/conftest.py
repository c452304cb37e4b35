"""Shared fixtures: where the real public logs are, and an isolated data home per test."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
# Grids in tests run in the test process (one local worker): monkeypatched code and test-only plugins
# are then the ones that run, and no worker interpreters start per test. Tests of the parallel
# engine ask for workers explicitly.
os.environ.setdefault("LOGTRIAL_WORKERS", "1")
LOGHUB_DEFAULT = ROOT.parent / "shared" / "datasets" / "loghub-2k"


def loghub_path() -> Path:
    """Folder of the Loghub 2k samples: LOGTRIAL_LOGHUB_2K, else ../shared/datasets/loghub-2k."""
    return Path(os.environ.get("LOGTRIAL_LOGHUB_2K", LOGHUB_DEFAULT))


# logtrial has no default mirror folder (without one it downloads from the public
# source); the tests work offline, so they name the samples folder explicitly.
if (loghub_path() / "BGL" / "BGL_2k.log").is_file():
    os.environ.setdefault("LOGTRIAL_MIRROR", str(loghub_path()))


@pytest.fixture(scope="session")
def loghub_dir() -> Path:
    """The real Loghub 2k samples; skips (with the reason) when the folder is absent."""
    path = loghub_path()
    if not (path / "BGL" / "BGL_2k.log").is_file():
        pytest.skip(f"real Loghub 2k samples not found at {path} (set LOGTRIAL_LOGHUB_2K)")
    return path


@pytest.fixture()
def home(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A fresh LOGTRIAL_HOME for one test."""
    h = tmp_path / "home"
    monkeypatch.setenv("LOGTRIAL_HOME", str(h))
    return h


@pytest.fixture(scope="session")
def bgl_events(loghub_dir: Path):
    """The real BGL 2k sample as an event table, parsed with the bgl-2k line format of datasets.yaml.

    Event ids are the sample's own EventId column (structured CSV) mapped to 0-based ints.
    """
    import re

    import pandas as pd
    import yaml

    entry = yaml.safe_load((ROOT / "datasets.yaml").read_text())["datasets"]["bgl-2k"]["format"]
    rx = re.compile(entry["regex"])
    lines = (loghub_dir / "BGL" / "BGL_2k.log").read_text().splitlines()
    rows = [rx.match(line).groupdict() for line in lines]
    raw = pd.DataFrame(rows)
    structured = pd.read_csv(loghub_dir / "BGL" / "BGL_2k.log_structured.csv", dtype=str)
    codes, _ = pd.factorize(structured["EventId"], sort=True)
    return pd.DataFrame(
        {
            "line": pd.Series(range(1, len(raw) + 1), dtype="int64"),
            "ts": pd.to_datetime(raw["time"], format=entry["timestamp"]["format"], utc=True),
            "entity": raw["node"].astype("str"),
            "group": pd.Series([None] * len(raw), dtype="str"),
            "event": codes.astype("int32"),
            "tag": raw["label"].where(raw["label"] != entry["tag"]["normal"], "").astype("str"),
        }
    )


def windows_from_counts(counts, labels=None):
    """A WindowSet (one entity, hourly windows) whose count matrix is ``counts``; sequences follow the counts."""
    import numpy as np
    import pandas as pd
    import scipy.sparse as sp
    from logtrial.windowing.windows import WindowSet

    m = sp.csr_matrix(counts, dtype=np.int64)
    n = m.shape[0]
    lengths = np.asarray(m.sum(axis=1)).ravel().astype(np.int64)
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    coo = m.tocoo()
    order = np.lexsort((coo.col, coo.row))
    values = np.repeat(coo.col[order], coo.data[order]).astype(np.int32)
    start = pd.Timestamp("2024-01-01", tz="UTC") + pd.to_timedelta(np.arange(n), unit="h")
    meta = pd.DataFrame(
        {"id": np.arange(n, dtype=np.int64), "entity": "node-1", "start": start,
         "end": start + pd.Timedelta(hours=1), "n_events": lengths}
    )
    lab = None if labels is None else np.asarray(labels, dtype=np.int8)
    return WindowSet(meta=meta, counts=m, seq_values=values, seq_offsets=offsets, vocab_size=m.shape[1], labels=lab)


@pytest.fixture()
def make_windows():
    """Builds a WindowSet from a count matrix (and optional labels), for detector tests."""
    return windows_from_counts


def relay_registry(name: str, generator: str) -> str:
    """A registry YAML with one small simulated radar-relay fleet (ours, invented) for fast grids."""
    return f"""
datasets:
  {name}:
    system: RadarRelay (simulated, small)
    generator: {generator}
    logs: [fleet.log]
    format:
      regex: '^(?P<ts>\\d{{4}}-\\d\\d-\\d\\dT\\d\\d:\\d\\d:\\d\\d\\.\\d{{3}}Z) (?P<host>\\S+) (?P<daemon>[\\w.-]+)\\[(?P<pid>\\d+)\\]: (?P<content>.*)$'
      timestamp: {{fields: [ts], format: "%Y-%m-%dT%H:%M:%S.%fZ"}}
      entity: host
    labels: {{scheme: incidents, file: incidents.csv}}
    miner: {{kind: drain, masks: ['\\d+(?:\\.\\d+)*'], similarity: 0.5, depth: 4}}
"""
