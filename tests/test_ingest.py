"""Ingest: real logs split as their published structured files, quarantine, encodings, cache."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from logtrial.cli import main
from logtrial.data.ingest import ingest_files, read_events
from logtrial.data.registry import LineFormat, Miner, load_registry
from logtrial.errors import DataError

REGISTRY = load_registry()
SAMPLES = sorted(n for n in REGISTRY if n.endswith("-2k"))

FORMAT = LineFormat.model_validate(
    {
        "regex": r"^(?P<ts>\d{4}-\d\d-\d\d \d\d:\d\d:\d\d) (?P<host>\S+) (?P<daemon>\w+): (?P<content>.*)$",
        "timestamp": {"fields": ["ts"], "format": "%Y-%m-%d %H:%M:%S"},
        "entity": "host",
    }
)
MINER = Miner(masks=[r"\d+"], similarity=0.5, depth=4)


def _sample(loghub_dir: Path, name: str) -> Path:
    e = REGISTRY[name]
    return loghub_dir / e.system / e.logs[0]


def _write(path: Path, lines: list[str]) -> Path:
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _healthy_lines(n: int) -> list[str]:
    return [f"2026-01-05 00:{i // 60 % 60:02d}:{i % 60:02d} relay-{i % 3:02d} sweepd: sweep {i} stored in {i % 7} ms"
            for i in range(n)]


@pytest.mark.parametrize("name", SAMPLES)
def test_content_field_matches_the_published_structured_file(loghub_dir: Path, tmp_path: Path, name: str) -> None:
    # External reference: the collection's own `<System>_2k.log_structured.csv` (real logs),
    # whose Content column is the message part of each line.
    e = REGISTRY[name]
    res = ingest_files(name, [_sample(loghub_dir, name)], e.format, e.miner, tmp_path)
    assert res.manifest["rows"] == 2000 and res.manifest["quarantined"] == 0
    truth = pd.read_csv(loghub_dir / e.system / e.truth.file, dtype=str, keep_default_na=False)
    rx = e.format.compiled()
    lines = _sample(loghub_dir, name).read_text(encoding="utf-8", errors="replace").splitlines()
    ours = [rx.match(s)["content"].strip() for s in lines]
    assert ours == [c.strip() for c in truth["Content"]]
    events = read_events(res.events)
    assert events["line"].tolist() == list(range(1, 2001))
    assert events["ts"].notna().all()


def test_bgl_sample_events_tags_and_time_order(loghub_dir: Path, tmp_path: Path) -> None:
    # Real logs: BGL_2k has 2,000 lines, 143 of them alerts. Counting the first token of
    # the real file gives 12 alert categories (the figure "9" sometimes quoted does not
    # match the file: APPCHILD, APPOUT, APPREAD, APPRES, APPSEV, APPTO, KERNDTLB,
    # KERNMNTF, KERNREC, KERNRTSP, KERNSTOR, KERNTERM).
    e = REGISTRY["bgl-2k"]
    res = ingest_files("bgl-2k", [_sample(loghub_dir, "bgl-2k")], e.format, e.miner, tmp_path)
    ev = read_events(res.events)
    assert len(ev) == 2000
    alerts = ev[ev["tag"] != ""]
    assert len(alerts) == 143
    assert alerts["tag"].nunique() == 12
    raw_first_tokens = [s.split(" ", 1)[0] for s in _sample(loghub_dir, "bgl-2k").read_text().splitlines()]
    assert (ev["tag"].replace("", "-").tolist()) == raw_first_tokens
    # Timestamps are monotone within each node, as in the source file.
    assert ev.groupby("entity")["ts"].apply(lambda s: s.is_monotonic_increasing).all()
    assert str(ev["ts"].dt.tz) == "UTC"
    assert ev["ts"].iloc[0] == pd.Timestamp("2005-06-03 15:42:50.675872", tz="UTC")


def test_hdfs_sample_session_key_is_the_block_id(loghub_dir: Path, tmp_path: Path) -> None:
    # Real logs: every HDFS line names a block; the group is the first block id in the message.
    e = REGISTRY["hdfs-2k"]
    res = ingest_files("hdfs-2k", [_sample(loghub_dir, "hdfs-2k")], e.format, e.miner, tmp_path)
    ev = read_events(res.events)
    assert ev["group"].notna().all()
    assert ev["group"].str.match(r"^blk_-?\d+$").all()
    assert ev["group"].iloc[0] == "blk_38865049064139660"


def test_malformed_lines_are_quarantined_and_counted(tmp_path: Path) -> None:
    lines = _healthy_lines(400)
    bad_at = set(range(7, 400, 20))  # 20 of 400 lines = 5 %
    for i in bad_at:
        lines[i] = f"garbage line {i} without a header"
    res = ingest_files("t", [_write(tmp_path / "a.log", lines)], FORMAT, MINER, tmp_path / "out")
    assert res.manifest["quarantined"] == 20
    assert res.manifest["rows"] == 380
    q = pd.read_csv(res.quarantine, sep="\t")
    assert sorted(q["line"]) == sorted(i + 1 for i in bad_at)
    assert q["reason"].str.contains("does not match the format").all()
    ev = read_events(res.events)
    assert set(ev["line"]) == set(range(1, 401)) - {i + 1 for i in bad_at}


def test_unparseable_timestamp_is_quarantined_with_the_value(tmp_path: Path) -> None:
    lines = _healthy_lines(10)
    lines[3] = "2026-13-45 00:00:03 relay-00 sweepd: sweep 3 stored in 3 ms"
    res = ingest_files("t", [_write(tmp_path / "a.log", lines)], FORMAT, MINER, tmp_path / "out")
    q = pd.read_csv(res.quarantine, sep="\t")
    assert q["line"].tolist() == [4]
    assert "2026-13-45 00:00:03" in q["reason"].iloc[0] and "%Y-%m-%d" in q["reason"].iloc[0]


def test_invalid_utf8_is_replaced_and_counted_or_refused_when_strict(tmp_path: Path) -> None:
    lines = _healthy_lines(5)
    path = tmp_path / "a.log"
    blob = ("\n".join(lines[:2]) + "\n").encode() + b"2026-01-05 00:00:02 relay-02 sweepd: sweep \xff\xfe bad\n"
    blob += ("\n".join(lines[3:]) + "\n").encode()
    path.write_bytes(blob)
    res = ingest_files("t", [path], FORMAT, MINER, tmp_path / "out")
    assert res.manifest["rows"] == 5
    assert res.manifest["bad_encoding_lines"] == 1
    assert res.manifest["first_bad_encoding_lines"] == ["a.log:3"]
    with pytest.raises(DataError, match=r"a\.log: line 3: .*not valid utf-8"):
        ingest_files("t", [path], FORMAT, MINER, tmp_path / "strict", strict=True)
    assert not any((tmp_path / "strict").rglob("events.parquet"))
    # A cached table built with replacements is not handed to a strict ingest either.
    with pytest.raises(DataError, match=r"not valid utf-8 \(first: a\.log:3\)"):
        ingest_files("t", [path], FORMAT, MINER, tmp_path / "out", strict=True)


def test_empty_file_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "empty.log"
    path.write_bytes(b"")
    with pytest.raises(DataError, match=r"empty\.log: file is empty"):
        ingest_files("t", [path], FORMAT, MINER, tmp_path / "out")


def test_file_with_no_matching_line_is_refused_and_leaves_nothing(tmp_path: Path) -> None:
    path = _write(tmp_path / "x.log", ["not a log line", "neither is this"])
    with pytest.raises(DataError, match=r"x\.log: no line matched the format"):
        ingest_files("t", [path], FORMAT, MINER, tmp_path / "out")
    assert not any((tmp_path / "out").rglob("manifest.json"))
    assert not [p for p in (tmp_path / "out").rglob("*") if p.is_dir() and ".tmp-" in p.name]


class _CountingMiner:
    """Wraps a real miner and counts the lines it is asked to mine."""

    def __init__(self) -> None:
        from logtrial.data.mining import registry_miner

        self.inner = registry_miner(MINER.model_dump())
        self.mined = 0

    def add_many(self, contents):
        self.mined += len(contents)
        return self.inner.add_many(contents)

    def __getattr__(self, name):
        return getattr(self.inner, name)


def test_cache_reuses_table_and_mask_change_invalidates(tmp_path: Path) -> None:
    log = _write(tmp_path / "a.log", _healthy_lines(300))
    first = _CountingMiner()
    r1 = ingest_files("t", [log], FORMAT, MINER, tmp_path / "out", miner=first)
    assert first.mined == 300 and not r1.cached
    second = _CountingMiner()
    r2 = ingest_files("t", [log], FORMAT, MINER, tmp_path / "out", miner=second)
    assert second.mined == 0 and r2.cached and r2.folder == r1.folder
    assert json.loads((r2.folder / "manifest.json").read_text())["mined_lines"] == 300
    changed = Miner(masks=[r"\d+", r"relay-\d+"], similarity=0.5, depth=4)
    third = _CountingMiner()
    r3 = ingest_files("t", [log], FORMAT, changed, tmp_path / "out", miner=third)
    assert third.mined == 300 and not r3.cached and r3.folder != r1.folder
    # Changing the input bytes invalidates too.
    _write(log, _healthy_lines(301))
    r4 = ingest_files("t", [log], FORMAT, MINER, tmp_path / "out")
    assert not r4.cached and r4.manifest["rows"] == 301


def test_templates_dictionary_counts_add_up(tmp_path: Path) -> None:
    res = ingest_files("t", [_write(tmp_path / "a.log", _healthy_lines(120))], FORMAT, MINER, tmp_path / "o")
    tpl = pd.read_csv(res.templates)
    ev = read_events(res.events)
    assert tpl["count"].sum() == len(ev)
    assert np.array_equal(np.bincount(ev["event"], minlength=len(tpl)), tpl["count"].to_numpy())
    assert tpl["template"].iloc[0] == "sweep <*> stored in <*> ms"


def test_cli_ingest_user_file_with_format(tmp_path: Path, home: Path, capsys) -> None:
    log = _write(tmp_path / "my.log", _healthy_lines(50) + ["oops"])
    fmt = tmp_path / "fmt.yaml"
    fmt.write_text(
        "regex: '^(?P<ts>\\d{4}-\\d\\d-\\d\\d \\d\\d:\\d\\d:\\d\\d) (?P<host>\\S+) (?P<daemon>\\w+): (?P<content>.*)$'\n"
        "timestamp: {fields: [ts], format: '%Y-%m-%d %H:%M:%S'}\nentity: host\nminer: {masks: ['\\d+']}\n"
    )
    assert main(["ingest", "--file", str(log), "--format", str(fmt)]) == 0
    out = capsys.readouterr().out
    assert "rows 50 of 51 lines" in out and "quarantined 1" in out


def test_cli_format_without_content_group_is_refused(tmp_path: Path, home: Path, capsys) -> None:
    log = _write(tmp_path / "my.log", _healthy_lines(5))
    fmt = tmp_path / "fmt.yaml"
    fmt.write_text("regex: '^(?P<ts>\\S+ \\S+) (?P<msg>.*)$'\n")
    assert main(["ingest", "--file", str(log), "--format", str(fmt)]) == 2
    err = capsys.readouterr().err
    assert "fmt.yaml" in err and "named group `content`" in err


def test_cli_bad_yaml_names_file_and_line(tmp_path: Path, home: Path, capsys) -> None:
    log = _write(tmp_path / "my.log", _healthy_lines(5))
    fmt = tmp_path / "fmt.yaml"
    fmt.write_text("regex: '^(?P<content>.*)$'\ntimestamp: {fields: [ts\n")
    assert main(["ingest", "--file", str(log), "--format", str(fmt)]) == 2
    err = capsys.readouterr().err
    assert "fmt.yaml" in err and "line 3" in err and "invalid YAML" in err


def test_cli_empty_file_exit_code(tmp_path: Path, home: Path, capsys) -> None:
    log = tmp_path / "empty.log"
    log.write_bytes(b"")
    fmt = tmp_path / "fmt.yaml"
    fmt.write_text("regex: '^(?P<content>.*)$'\n")
    assert main(["ingest", "--file", str(log), "--format", str(fmt)]) == 1
    assert "empty.log: file is empty" in capsys.readouterr().err


def test_cli_fetch_ingest_parse_score_on_real_sample(loghub_dir: Path, home: Path, capsys) -> None:
    # External reference: published Drain grouping accuracy on BGL_2k is 0.963 (Zhu et al.,
    # ICSE-SEIP 2019, accuracy table), with the benchmark's settings from the registry.
    assert main(["fetch", "bgl-2k", "--mirror", str(loghub_dir)]) == 0
    assert main(["ingest", "bgl-2k", "--mirror", str(loghub_dir)]) == 0
    assert main(["parse-score", "bgl-2k", "--mirror", str(loghub_dir)]) == 0
    out = capsys.readouterr().out
    assert "fetched and verified" in out and "built event table" in out
    header = [ln for ln in out.splitlines() if ln.startswith("dataset ")][-1].split()
    row = [ln for ln in out.splitlines() if ln.startswith("bgl-2k ")][-1].split()
    ga = float(row[header.index("grouping_accuracy")])
    assert row[header.index("unscored_lines")] == "0"
    assert abs(ga - 0.963) <= 0.01
    assert main(["datasets"]) == 0
    listing = capsys.readouterr().out
    assert [ln for ln in listing.splitlines() if ln.startswith("bgl-2k ")][0].rstrip().endswith("fetched")


@pytest.mark.parametrize("pattern", ["%Y-%m-%d-%H.%M.%S.%f", "%Y-%m-%d %H:%M:%S,%f", "%Y%m%d-%H:%M:%S:%f"])
def test_fraction_split_parse_equals_pandas_full_pattern(pattern: str) -> None:
    # Reference library: pandas.to_datetime with the whole pattern, on valid, short,
    # missing and malformed fractions.
    from logtrial.data.ingest import _strptime

    rng = np.random.default_rng(3)
    base = pd.Timestamp("2005-06-03") + pd.to_timedelta(rng.integers(0, 10**9, 300), unit="s")
    sep = pattern[pattern.index("%S") + 2]
    values = []
    for i, t in enumerate(base):
        head = t.strftime(pattern[: pattern.index("%S") + 2])
        frac = str(rng.integers(0, 10**6)).zfill(6)[: 1 + i % 6]
        values.append(head + sep + frac if i % 17 else head)
    values += ["garbage", head + sep + "12x", head + sep]
    arr = np.asarray(values, dtype=object)
    ours = _strptime(arr, pattern)
    ref = pd.DatetimeIndex(pd.to_datetime(arr, format=pattern, errors="coerce"))
    assert ours.equals(ref)


def test_bom_changing_offsets_and_clock_changes(tmp_path: Path) -> None:
    # A UTF-8 byte-order mark is not part of the first line.
    bom = tmp_path / "bom.log"
    bom.write_bytes(b"\xef\xbb\xbf" + ("\n".join(_healthy_lines(3)) + "\n").encode())
    assert ingest_files("t", [bom], FORMAT, MINER, tmp_path / "o1").manifest["quarantined"] == 0
    # ISO 8601 offsets that change at a clock change become UTC (reference: pandas utc=True).
    zoned = LineFormat.model_validate({"regex": r"^(?P<ts>\S+) (?P<host>\S+) (?P<content>.*)$",
                                       "timestamp": {"fields": ["ts"], "format": "%Y-%m-%dT%H:%M:%S%z"},
                                       "entity": "host"})
    z = _write(tmp_path / "z.log", ["2023-10-29T02:30:00+0200 n1 a 1", "2023-10-29T02:10:00+0100 n1 a 2"])
    ev = read_events(ingest_files("z", [z], zoned, MINER, tmp_path / "o2").events)
    assert ev["ts"].tolist() == [pd.Timestamp("2023-10-29 00:30", tz="UTC"), pd.Timestamp("2023-10-29 01:10", tz="UTC")]
    # Local wall-clock times across the autumn change: the repeated hour is inferred from order.
    local = LineFormat.model_validate({"regex": r"^(?P<ts>\S+ \S+) (?P<host>\S+) (?P<content>.*)$",
                                       "timestamp": {"fields": ["ts"], "format": "%Y-%m-%d %H:%M:%S",
                                                     "tz": "Europe/Berlin"}, "entity": "host"})
    d = _write(tmp_path / "d.log", ["2023-10-29 02:30:00 n1 a 1", "2023-10-29 02:10:00 n1 a 2",
                                    "2023-10-29 02:40:00 n1 a 3"])
    ev = read_events(ingest_files("d", [d], local, MINER, tmp_path / "o3").events)
    assert ev["ts"].is_monotonic_increasing and len(ev) == 3


def test_path_session_key_is_relative_to_the_dataset_folder(tmp_path: Path) -> None:
    fmt = LineFormat.model_validate({**FORMAT.model_dump(), "group": {"path": r"(job-\d+)"}})
    root = tmp_path / "job-9" / "data"
    files = []
    for job in ("job-17", "job-18"):
        (root / job).mkdir(parents=True)
        files.append(_write(root / job / "a.log", _healthy_lines(4)))
    ev = read_events(ingest_files("p", files, fmt, MINER, tmp_path / "out").events)
    assert sorted(ev["group"].unique()) == ["job-17", "job-18"]


def test_one_empty_file_of_several_is_skipped(tmp_path: Path) -> None:
    a = _write(tmp_path / "a.log", _healthy_lines(5))
    b = tmp_path / "b.log"
    b.write_bytes(b"")
    res = ingest_files("t", [a, b], FORMAT, MINER, tmp_path / "out")
    assert res.manifest["rows"] == 5 and res.manifest["empty_files"] == ["b.log"]


def test_quarantine_names_the_file_and_its_own_line(tmp_path: Path) -> None:
    a = _write(tmp_path / "a.log", _healthy_lines(4))
    lines = _healthy_lines(4)
    lines[2] = "broken line"
    b = _write(tmp_path / "b.log", lines)
    res = ingest_files("t", [a, b], FORMAT, MINER, tmp_path / "out")
    q = pd.read_csv(res.quarantine, sep="\t")
    assert q[["line", "file", "file_line"]].values.tolist() == [[7, "b.log", 3]]
