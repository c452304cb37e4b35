"""Truth labels from each registry label scheme: session label files, inline tags, incidents files."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from logtrial.data.ingest import ingest_files, read_events
from logtrial.data.registry import Entry, load_registry
from logtrial.errors import DataError
from logtrial.labels.truth import anomalous_sessions, truth_incidents

REGISTRY = load_registry()


def _entry(labels: dict) -> Entry:
    base = REGISTRY["hdfs-2k"].model_dump()
    return Entry.model_validate({**base, "name": "t", "labels": labels})


def test_csv_session_labels_in_the_hdfs_layout(tmp_path: Path) -> None:
    # Layout of the HDFS_v1 per-block label file (BlockId,Label with Normal/Anomaly), from memory.
    (tmp_path / "labels.csv").write_text("BlockId,Label\nblk_1,Normal\nblk_-2,Anomaly\nblk_3,Anomaly\n")
    e = _entry({"scheme": "sessions", "file": "labels.csv", "key": "BlockId", "label": "Label",
                "anomalous": "Anomaly"})
    assert anomalous_sessions(tmp_path / "labels.csv", e) == ["blk_-2", "blk_3"]


def test_application_list_and_id_list_parsers(tmp_path: Path) -> None:
    # Layouts of the Hadoop and OpenStack label files (headings with ids beneath; a plain id list), from memory.
    (tmp_path / "abnormal_label.txt").write_text(
        "### WordCount\nNormal:\n+ application_1_0001\nMachine down:\n+ application_1_0002\n"
        "### PageRank\nNormal:\n+ application_1_0003\nDisk full:\n+ application_1_0004\n")
    e = _entry({"scheme": "sessions", "file": "abnormal_label.txt", "parser": "application_list"})
    assert anomalous_sessions(tmp_path / "abnormal_label.txt", e) == ["application_1_0002", "application_1_0004"]
    (tmp_path / "ids.txt").write_text("544fd51c-4edc-4780-baae-ba1d80a0acfc\na7e0bd43-1f4f-4f2a-9cbd-2c1a7e0f0b8e, x\n")
    e = _entry({"scheme": "sessions", "file": "ids.txt", "parser": "id_list"})
    assert anomalous_sessions(tmp_path / "ids.txt", e)[:2] == ["544fd51c-4edc-4780-baae-ba1d80a0acfc",
                                                               "a7e0bd43-1f4f-4f2a-9cbd-2c1a7e0f0b8e"]


def test_label_file_errors_name_the_file(tmp_path: Path) -> None:
    e = _entry({"scheme": "sessions", "file": "labels.csv"})
    with pytest.raises(DataError, match=r"labels\.csv: label file of dataset 't' not found"):
        anomalous_sessions(tmp_path / "labels.csv", e)
    (tmp_path / "labels.csv").write_text("only_one_column\nblk_1\n")
    with pytest.raises(DataError, match=r"labels\.csv: line 1: expected two columns"):
        anomalous_sessions(tmp_path / "labels.csv", e)
    (tmp_path / "labels.csv").write_bytes(b"")
    with pytest.raises(DataError, match=r"labels\.csv: cannot read the session label file"):
        anomalous_sessions(tmp_path / "labels.csv", e)


def test_label_file_one_folder_down_is_found(tmp_path: Path) -> None:
    # Archives often wrap their content in one folder (the Hadoop archive does).
    (tmp_path / "Hadoop").mkdir()
    (tmp_path / "Hadoop" / "labels.csv").write_text("BlockId,Label\nblk_1,Anomaly\n")
    e = _entry({"scheme": "sessions", "file": "labels.csv"})
    assert anomalous_sessions(tmp_path / "labels.csv", e) == ["blk_1"]


def test_session_incidents_on_real_hdfs_blocks(loghub_dir: Path, tmp_path: Path) -> None:
    # Real logs (HDFS 2k sample): two blocks marked anomalous become incidents spanning their
    # first to last line; reference: a pandas groupby over the sample's structured file.
    e = REGISTRY["hdfs-2k"]
    res = ingest_files("hdfs-2k", [loghub_dir / "HDFS" / "HDFS_2k.log"], e.format, e.miner, tmp_path / "t")
    events = read_events(res.events)
    blocks = events["group"].value_counts().index[:2].tolist()
    (tmp_path / "labels.csv").write_text("BlockId,Label\n" + "".join(f"{b},Anomaly\n" for b in blocks))
    entry = _entry({"scheme": "sessions", "file": "labels.csv", "key": "BlockId", "label": "Label",
                    "anomalous": "Anomaly"})
    inc = truth_incidents(entry, events, tmp_path).set_index("group").sort_index()
    ref = pd.read_csv(loghub_dir / "HDFS" / "HDFS_2k.log_structured.csv", dtype=str)
    ref["block"] = ref["Content"].str.extract(r"(blk_-?\d+)", expand=False)
    ref["ts"] = pd.to_datetime(ref["Date"] + " " + ref["Time"], format="%y%m%d %H%M%S", utc=True)
    spans = ref[ref["block"].isin(blocks)].groupby("block")["ts"].agg(["min", "max"]).sort_index()
    assert list(inc.index) == list(spans.index)
    assert (inc["start"].to_numpy() == spans["min"].to_numpy()).all()
    assert (inc["end"].to_numpy() == spans["max"].to_numpy()).all()
    assert set(inc["kind"]) == {"failure"}
