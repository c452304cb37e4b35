"""Sessions from files: the validated WindowSet constructor, session-file datasets, the k-fold command."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
import yaml
from logtrial.cli import main
from logtrial.data.registry import SessionEntry, load_registry, parse_entry
from logtrial.errors import ConfigError, DataError
from logtrial.windowing.sessions import (
    normal_and_abnormal,
    read_labelled_sessions,
    read_sequence_file,
    session_events,
    windows_from_sequences,
)
from logtrial.windowing.windows import session_windows

ROOT = Path(__file__).resolve().parents[1]
HDFS_DEFAULT = ROOT.parent / "shared" / "datasets" / "hdfs-sessions"


def hdfs_path() -> Path:
    """Folder of the HDFS sessions: LOGTRIAL_HDFS_SESSIONS, else ../shared/datasets/hdfs-sessions."""
    return Path(os.environ.get("LOGTRIAL_HDFS_SESSIONS", HDFS_DEFAULT))


SEQS = [[3, 1, 1, 0], [2], [], [0, 3, 3]]


def test_sequences_keep_their_order_and_counts_come_from_a_copy() -> None:
    values = np.array([3, 1, 1, 0, 2, 0, 3, 3])
    offsets = np.array([0, 4, 5, 5, 8])
    ws = windows_from_sequences((values, offsets), 4, keys=["a", "b", "c", "d"], labels=[0, 1, 0, 1])
    np.testing.assert_array_equal(values, [3, 1, 1, 0, 2, 0, 3, 3])  # the caller's array is untouched
    for i, seq in enumerate(SEQS):
        np.testing.assert_array_equal(ws.sequence(i), seq)  # order kept (counts used to sort them)
        np.testing.assert_array_equal(ws.counts[i].toarray().ravel(), np.bincount(seq, minlength=4))
    assert list(ws.meta["group"]) == ["a", "b", "c", "d"] and list(ws.meta["n_events"]) == [4, 1, 0, 3]
    assert ws.info["kind"] == "session" and list(ws.labels) == [0, 1, 0, 1]
    again = windows_from_sequences(SEQS, 4)
    np.testing.assert_array_equal(again.seq_values, ws.seq_values)
    assert (again.counts != ws.counts).nnz == 0


def test_sessions_through_an_event_table_give_the_same_windows() -> None:
    # the table layout (seeded order, synthetic times) and the session windows builder agree with the constructor
    from logtrial.windowing.sessions import Sessions

    vals = np.array([3, 1, 1, 0, 2, 0, 3, 3])
    offs = np.array([0, 4, 5, 8])
    s = Sessions(vals[[0, 1, 2, 3, 4, 5, 6, 7]], offs, np.array(["k0", "k1", "k2"]), np.array([0, 1, 0], np.int8))
    built = session_windows(session_events(s, order_seed=3), 4)
    direct = windows_from_sequences((vals, offs), 4, keys=["k0", "k1", "k2"])
    for i, key in enumerate(built.meta["group"]):
        j = int(key[1:])
        np.testing.assert_array_equal(built.sequence(i), direct.sequence(j))


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (([[0, 5]], 4), r"session 0 \(0-based\), event 1: id 5 outside 0\.\.3"),
        (([[0, -1]], 4), r"id -1 outside"),
        (([[0.5]], 4), r"whole numbers"),
        (((np.array([1, 2]), np.array([0, 3])), 4), r"offsets end at 3 but 2 event ids"),
        (((np.array([1, 2]), np.array([1, 2])), 4), r"offsets must start at 0"),
        (([[1]], 0), r"vocab_size must be a positive"),
    ],
)
def test_bad_sequences_are_refused_with_the_place(args, needle: str) -> None:
    with pytest.raises(DataError, match=needle):
        windows_from_sequences(*args)
    with pytest.raises(DataError, match="keys must be unique"):
        windows_from_sequences([[1], [2]], 4, keys=["x", "x"])


def test_session_files_are_read_with_line_numbers_in_errors(tmp_path: Path) -> None:
    good = tmp_path / "n.txt"
    good.write_text("5 22 5\n22 5\n")
    values, offsets = read_sequence_file(good)
    np.testing.assert_array_equal(values, [4, 21, 4, 21, 4])
    np.testing.assert_array_equal(offsets, [0, 3, 5])
    bad = tmp_path / "b.txt"
    bad.write_text("5 22\n5 x 3\n")
    with pytest.raises(DataError, match=r"b\.txt: line 2: expected whole-number event ids.*'x'"):
        read_sequence_file(bad)
    bad.write_text("5 22\n\n3\n")
    with pytest.raises(DataError, match=r"b\.txt: line 2: empty line"):
        read_sequence_file(bad)
    bad.write_text("5 0\n")
    with pytest.raises(DataError, match=r"line 1: event id 0 below the first id 1"):
        read_sequence_file(bad)
    with pytest.raises(DataError, match="session file not found"):
        read_sequence_file(tmp_path / "missing.txt")


def test_labelled_csv_layout(tmp_path: Path) -> None:
    f = tmp_path / "s.csv"
    f.write_text("id,events,label\nb1,1 2 2,Normal\nb2,2 1,Anomaly\n")
    s = read_labelled_sessions(f, "events", "label", "Anomaly", key="id")
    assert list(s.keys) == ["b1", "b2"] and list(s.labels) == [0, 1]
    np.testing.assert_array_equal(s.values, [0, 1, 1, 1, 0])
    with pytest.raises(DataError, match=r"s\.csv: line 1: expected a column 'seq'"):
        read_labelled_sessions(f, "seq", "label", "Anomaly")


def test_registry_session_entries_are_validated() -> None:
    e = parse_entry("mine", {"system": "X", "sessions": {"folder": ".", "file": "s.csv", "anomalous": "Anomaly"}}, "r.yaml")
    assert isinstance(e, SessionEntry) and e.sessions.first_id == 1
    with pytest.raises(ConfigError, match=r"r\.yaml: dataset 'mine': sessions: give either `normal` and `abnormal`"):
        parse_entry("mine", {"system": "X", "sessions": {"folder": ".", "normal": "n.txt"}}, "r.yaml")
    with pytest.raises(ConfigError, match=r"sessions\.colour: unknown field"):
        parse_entry("mine", {"system": "X", "sessions": {"folder": ".", "file": "s", "colour": 1}}, "r.yaml")
    assert isinstance(load_registry()["hdfs-sessions"], SessionEntry)


def _tiny_files(folder: Path) -> None:
    rng = np.random.default_rng(0)
    normal = [" ".join(map(str, [1, 2] + [3] * int(rng.integers(2, 5)) + [4])) for _ in range(60)]
    abnormal = [" ".join(map(str, [1, 2, 5] + [3] * int(rng.integers(1, 3)))) for _ in range(20)]
    (folder / "normal.txt").write_text("\n".join(normal) + "\n")
    (folder / "abnormal.txt").write_text("\n".join(abnormal) + "\n")


def test_a_session_file_dataset_runs_in_an_experiment(tmp_path: Path, home: Path) -> None:
    from logtrial.running.experiment import load_experiment
    from logtrial.running.runs import run_experiment
    from logtrial.running.store import RunStore

    _tiny_files(tmp_path)
    (tmp_path / "reg.yaml").write_text(yaml.safe_dump({"datasets": {"tiny-sessions": {
        "system": "Tiny", "sessions": {"folder": str(tmp_path), "normal": "normal.txt", "abnormal": "abnormal.txt"}}}}))
    (tmp_path / "exp.yaml").write_text(yaml.safe_dump({
        "experiment": "tiny", "registry": ["reg.yaml"], "output": "out", "datasets": ["tiny-sessions"],
        "windows": [{"kind": "session"}], "task": {"name": "detect"},
        "split": {"kind": "chronological", "fractions": [0.5, 0.2, 0.3]}, "noise": [{"name": "clean"}],
        "detectors": ["invariants", "pca"], "seeds": [0], "threshold": {"kind": "best_f1"},
        "scoring": {"cooldown": "1s", "bootstrap": 10}}))
    exp = load_experiment(tmp_path / "exp.yaml")
    counts = run_experiment(exp, home, progress=False, track=False)
    recs = RunStore(exp.output).records()
    assert counts["finished"] == 2, [r.get("error") for r in recs]
    # the abnormal sessions hold an event no normal one has: both detectors find them all
    assert all(r["metrics"]["recall"] == 1.0 for r in recs)


def test_sessions_command_on_user_files_and_its_errors(tmp_path: Path, capsys) -> None:
    _tiny_files(tmp_path)
    out = tmp_path / "res"
    rc = main(["sessions", "--normal", str(tmp_path / "normal.txt"), "--abnormal", str(tmp_path / "abnormal.txt"),
               "--detectors", "pca,invariants", "--folds", "3", "--out", str(out), "--quiet"])
    assert rc == 0
    import pandas as pd

    summary = pd.read_csv(out / "summary.csv")
    assert list(summary["detector"]) == ["pca", "invariants"] and (summary["recall"] == 1.0).all()
    assert len(pd.read_csv(out / "results.csv")) == 6
    assert main(["sessions", "--normal", str(tmp_path / "missing.txt"), "--abnormal", str(tmp_path / "abnormal.txt"),
                 "--out", str(out)]) == 1
    assert "missing.txt: session file not found" in capsys.readouterr().err
    assert main(["sessions", "--normal", "a", "--abnormal", "b", "--folds", "1"]) == 2
    assert main(["sessions", "--normal", "a"]) == 2
    assert main(["sessions", "--normal", "a", "--abnormal", "b", "--detectors", "lstm"]) == 2


def test_hdfs_sessions_are_registered_and_read() -> None:
    # real data: the published preprocessed HDFS sessions (see the folder's README for the counts)
    folder = hdfs_path()
    if not (folder / "normal.txt").is_file():
        pytest.skip(f"HDFS sessions not found at {folder} (set LOGTRIAL_HDFS_SESSIONS)")
    s = normal_and_abnormal(folder / "normal.txt", folder / "abnormal.txt")
    assert (s.labels == 0).sum() == 4855 and (s.labels == 1).sum() == 8419
    assert s.values.min() == 0 and s.values.max() <= 27  # ids 1..28 in the files


def test_readme_session_examples_run_as_written(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import re
    import shlex

    readme = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```(\w*)\n(.*?)```", readme, flags=re.S)
    command = next(b for lang, b in blocks if not lang and b.startswith("logtrial sessions --normal")).strip()
    entry = next(b for lang, b in blocks if lang == "yaml" and "my-sessions:" in b)
    _tiny_files(tmp_path)
    monkeypatch.chdir(tmp_path)
    # as written, except the LSTM (minutes on a shared CPU; its own tests cover it): later flags win in argparse
    argv = shlex.split(command)[1:] + ["--quiet", "--detectors", "pca,invariants"]
    assert main(argv) == 0 and (tmp_path / "my-sessions" / "summary.csv").is_file()
    doc = yaml.safe_load(entry.replace("/data/my-sessions", str(tmp_path)))
    parsed = parse_entry("my-sessions", doc["datasets"]["my-sessions"], "README.md")
    assert isinstance(parsed, SessionEntry) and parsed.sessions.resolve("my-sessions") == tmp_path


def test_end_event_flags_sessions_that_stop_early() -> None:
    # DeepLog's top-g rule (Du et al., CCS 2017) sees nothing wrong in a prefix of a normal path; with the
    # end-of-session event (on by default for session windows) stopping where no normal session stops is a miss
    from logtrial.detectors.registry import create

    normal = [[0, 1, 2, 3, 4]] * 60 + [[0, 1, 2, 3, 4, 4]] * 20
    train = windows_from_sequences(normal, 5)
    test = windows_from_sequences([[0, 1, 2, 3, 4], [0, 1, 2], [0, 1, 2, 3]], 5)
    params = {"history": 3, "top_g": 1, "hidden": 16, "embedding": 8, "layers": 1, "epochs": 60, "lr": 0.02,
              "score": "count", "threads": 1}
    with_end = create("next_event", params, seed=0).fit(train)
    assert with_end.info()["end_event"] is True
    np.testing.assert_array_equal(with_end.score(test) > 0, [False, True, True])
    without = create("next_event", {**params, "end_event": False}, seed=0).fit(train)
    assert not (without.score(test) > 0).any()


def test_protocol_variants_are_validated(tmp_path: Path) -> None:
    from logtrial.running.session_kfold import load_protocol

    f = tmp_path / "p.yaml"
    f.write_text(yaml.safe_dump({"files": {"normal": "n", "abnormal": "a"}, "detectors": [
        {"name": "next_event", "variants": [{"label": "strict", "params": {"end_top_g": 0}}]}]}))
    with pytest.raises(ConfigError, match=r"detectors\[0\]\.variants\[0\].*end_top_g"):
        load_protocol(f)
    f.write_text(yaml.safe_dump({"files": {"normal": "n", "abnormal": "a"}, "folds": 1, "detectors": ["pca"]}))
    with pytest.raises(ConfigError, match=r"p\.yaml: folds: expected a whole number >= 2"):
        load_protocol(f)
