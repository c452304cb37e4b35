"""Truth labels: turn a dataset's label scheme (inline tags, session file, incidents file) into incidents."""

from __future__ import annotations

import re
from pathlib import Path

import pandas as pd
from logtrial.data.registry import Entry
from logtrial.errors import DataError
from logtrial.labels.incidents import empty_incidents, incidents_from_sessions, incidents_from_tags, read_incidents


def anomalous_sessions(path: Path, entry: Entry) -> list[str]:
    """Session keys marked anomalous in a label file, per the entry's label parser."""
    lab = entry.labels
    if not path.is_file():
        # Archives often wrap their content in one folder: accept a single match below.
        found = sorted(path.parent.rglob(path.name)) if path.parent.is_dir() else []
        if len(found) != 1:
            raise DataError(f"{path}: label file of dataset '{entry.name}' not found (labels.file)")
        path = found[0]
    if lab.parser == "csv":
        try:
            df = pd.read_csv(path, dtype=str, keep_default_na=False)
        except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
            raise DataError(f"{path}: cannot read the session label file ({exc}); "
                            "expected a CSV with a session key and a label column") from None
        if (lab.key is None or lab.label is None) and len(df.columns) < 2:
            raise DataError(f"{path}: line 1: expected two columns (session key, label), found {list(df.columns)}")
        key, col = lab.key or df.columns[0], lab.label or df.columns[1]
        for c in (key, col):
            if c not in df.columns:
                raise DataError(f"{path}: line 1: expected a column {c!r}, found {list(df.columns)}")
        anomalous = lab.anomalous or "Anomaly"
        return df.loc[df[col] == anomalous, key].tolist()
    text = path.read_text(encoding="utf-8", errors="replace")
    if lab.parser == "application_list":
        # A text file listing application ids under headings; every id under a heading
        # other than "Normal" counts as anomalous.
        found: list[str] = []
        normal = False
        for line in text.splitlines():
            if line.strip().endswith(":"):
                normal = line.strip().lower().startswith("normal")
            elif not normal:
                found += re.findall(r"application_\d+_\d+", line)
        return found
    return [tok for tok in re.split(r"[\s,]+", text) if tok]


def truth_incidents(entry: Entry, events: pd.DataFrame, folder: Path) -> pd.DataFrame:
    """The ground-truth incident table of a dataset, from its registry label scheme."""
    lab = entry.labels
    if lab.scheme == "inline":
        return incidents_from_tags(events, pd.Timedelta(lab.gap),
                                   set(lab.failure_tags) if lab.failure_tags is not None else None,
                                   lab.tag_kinds or None)
    if lab.scheme == "sessions":
        return incidents_from_sessions(events, anomalous_sessions(folder / lab.file, entry))
    if lab.scheme == "incidents":
        return read_incidents(folder / lab.file)
    return empty_incidents()
