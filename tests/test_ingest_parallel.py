"""Parallel, column-wise ingest gives the line-by-line result; ingest faults (caps, names, leftovers, damaged caches)."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from logtrial.cli import main
from logtrial.data.header import LineParser
from logtrial.data.header_columns import ColumnParser
from logtrial.data.ingest import clean_stale_temporaries, ingest_files, read_events
from logtrial.data.lines import byte_ranges, decode_range
from logtrial.data.masking import mask_contents
from logtrial.data.mining import DrainMiner, registry_miner
from logtrial.data.registry import LineFormat, Miner, load_registry
from logtrial.errors import ConfigError, DataError

REGISTRY = load_registry()
SAMPLES = sorted(n for n in REGISTRY if n.endswith("-2k"))
FORMAT = LineFormat.model_validate(
    {
        "regex": r"^(?P<ts>\d{4}-\d\d-\d\d \d\d:\d\d:\d\d) (?P<host>\S+) (?P<daemon>\w+)(\[(?P<pid>\d+)\])?: (?P<content>.*)$",
        "timestamp": {"fields": ["ts"], "format": "%Y-%m-%d %H:%M:%S"},
        "entity": "host",
        "group": {"pattern": r"job-\d+"},
    }
)
MINER = Miner(masks=[r"\d+"], similarity=0.5, depth=4)


def _healthy(n: int) -> list[str]:
    return [f"2026-01-05 00:{i // 60 % 60:02d}:{i % 60:02d} relay-{i % 3:02d} sweepd: sweep {i} job-{i % 5} in {i % 7} ms"
            for i in range(n)]


def _line_by_line(path: Path, fmt: LineFormat, miner_settings: Miner) -> tuple[pd.DataFrame, list]:
    """The reference: Python's re line by line over the whole file, raw contents to the miner (the sequential path)."""
    lines = decode_range(byte_ranges(path, 1 << 40)[0], fmt.encoding, False).lines
    chunk, bad = LineParser(fmt).parse(lines, 1)
    ids = registry_miner(miner_settings.model_dump()).add_many(chunk.content)
    n = len(chunk)

    def col(v):
        return list(v) if isinstance(v, list) else [v] * n

    frame = pd.DataFrame({"line": chunk.line, "ts": pd.to_datetime(chunk.ts).tz_localize("UTC"),
                          "entity": col(chunk.entity), "group": col(chunk.group), "event": ids, "tag": col(chunk.tag)})
    return frame, bad


def _texts(col: pd.Series) -> list:
    """Strings of a column, every kind of missing value as None."""
    return [v if isinstance(v, str) else None for v in col.astype(object)]


def _assert_same(path: Path, fmt: LineFormat, miner: Miner, res) -> None:
    ref, bad = _line_by_line(path, fmt, miner)
    ev = read_events(res.events)
    for c in ("line", "event"):
        assert ev[c].tolist() == ref[c].tolist(), c
    assert (ev["ts"] == ref["ts"]).all()
    for c in ("entity", "group", "tag"):
        assert _texts(ev[c]) == _texts(ref[c]), c
    q = pd.read_csv(res.quarantine, sep="\t", keep_default_na=False, dtype={"text": str})
    assert q["line"].tolist() == [b[0] for b in bad]
    assert q["reason"].tolist() == [b[1] for b in bad]


@pytest.mark.parametrize("name", SAMPLES)
def test_parallel_column_ingest_equals_line_by_line_on_real_samples(loghub_dir: Path, tmp_path: Path, name: str) -> None:
    # Real logs (Loghub 2k): small byte ranges force many ranges over two worker processes.
    e = REGISTRY[name]
    path = loghub_dir / e.system / e.logs[0]
    res = ingest_files(name, [path], e.format, e.miner, tmp_path, workers=2, range_bytes=1 << 15)
    _assert_same(path, e.format, e.miner, res)
    one = ingest_files(name, [path], e.format, e.miner, tmp_path / "one", workers=1)
    assert pq.read_table(one.events).equals(pq.read_table(res.events))
    assert one.templates.read_bytes() == res.templates.read_bytes()


@pytest.mark.parametrize("system,name", [("HDFS", "hdfs-2k"), ("BGL", "bgl-2k")])
def test_replicated_log_in_parallel_equals_line_by_line(loghub_dir: Path, tmp_path: Path, system: str, name: str) -> None:
    # A replicated real log (fresh identifiers, as the benchmark builds it) of 30,000 lines.
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
    os.environ.setdefault("LOGTRIAL_MIRROR", str(loghub_dir))
    from ingest import build_replicated_log  # bench/ingest.py

    path = build_replicated_log(tmp_path / "big.log", 30_000, seed=3, systems=(system,))
    e = REGISTRY[name]
    res = ingest_files(name, [path], e.format, e.miner, tmp_path / "out", workers=2, range_bytes=1 << 18)
    assert res.manifest["rows"] == 30_000
    _assert_same(path, e.format, e.miner, res)


def test_non_ascii_control_characters_crlf_and_bad_lines_match_line_by_line(tmp_path: Path) -> None:
    lines = _healthy(300)
    lines[3] = "2026-01-05 00:00:03 relay-01 sweepd[42]: sweep ünïcode ٣٣ job-٣ in 4 ms"  # Arabic-Indic digits: \d in re
    lines[5] = "2026-01-05 00:00:05 relay-01 sweepd: \x1csweep 5 job-5\x1f "  # \s in re, not in RE2
    lines[7] = "garbage line 7"
    lines[9] = "2026-01-05 00:00:09 relay-01 sweepd: sweep\v9\tjob-9"
    lines[11] = "2026-13-45 00:00:09 relay-01 sweepd: bad month"
    lines[13] = "2026-01-05 00:00:13 rélay-01 démon: accented daemon (\\w in re only)"
    path = tmp_path / "a.log"
    path.write_bytes(("\r\n".join(lines) + "\r\n").encode())
    res = ingest_files("t", [path], FORMAT, MINER, tmp_path / "o", workers=2, range_bytes=4096)
    _assert_same(path, FORMAT, MINER, res)
    assert res.manifest["quarantined"] == 2


@pytest.mark.parametrize("mask", [r"\d+", r"\s+", r"\b\w+\b", r"x*", r"(?<=job-)\d", r"a{,2}", r"[^\x20]+"])
def test_bulk_masks_equal_re_sub(mask: str) -> None:
    # Reference: Python's re.sub, mask by mask, including masks RE2 cannot run or reads otherwise.
    contents = ["job-12 took 3 ms", "ünï 3٣ x", "a\x1cb  \tc", "", "xxaa aaa", "0x1F at 10.0.0.1:80"]
    rx = re.compile(mask)
    assert mask_contents(contents, [mask, r"ms"]).to_pylist() == [re.sub("ms", "<*>", rx.sub("<*>", c))
                                                                  for c in contents]


def test_column_parser_agrees_with_line_parser_on_optional_groups() -> None:
    lines = ["2026-01-05 00:00:01 h1 d[7]: job-1 x", "2026-01-05 00:00:02 h1 d: no key", "nope"]
    a, bad_a = ColumnParser(FORMAT).parse(pa.array(lines), 1)
    b, bad_b = LineParser(FORMAT).parse(lines, 1)
    assert a.content.to_pylist() == b.content and a.group.to_pylist() == b.group and bad_a == bad_b


# --------------------------------------------------------------------------- faults


def test_rejected_share_cap_stops_a_flood_of_garbage(tmp_path: Path) -> None:
    # A decompression bomb or a wrong format: mostly lines that do not match.
    path = tmp_path / "bomb.log"
    path.write_text("\n".join(_healthy(100) + ["\x00" * 50] * 20_000) + "\n")
    with pytest.raises(DataError, match=r"bomb\.log: ingest stopped: .* rejected .* cap of 50%"):
        ingest_files("t", [path], FORMAT, MINER, tmp_path / "out")
    assert not list((tmp_path / "out").rglob("quarantine.tsv"))  # nothing left behind
    # Below the cap (5 % here) ingest goes on; a stricter cap stops it.
    ok = tmp_path / "ok.log"
    ok.write_text("\n".join(_healthy(95) + ["junk"] * 5) + "\n")
    assert ingest_files("t", [ok], FORMAT, MINER, tmp_path / "o2").manifest["quarantined"] == 5
    with pytest.raises(DataError, match="more than the cap of 1%"):
        ingest_files("t", [ok], FORMAT, MINER, tmp_path / "o3", max_rejected_share=0.01)


def test_quarantine_size_cap_and_cli_options(tmp_path: Path, home: Path, capsys) -> None:
    path = tmp_path / "noisy.log"
    path.write_text("\n".join(_healthy(2000) + ["x" * 400] * 600) + "\n")
    with pytest.raises(DataError, match=r"quarantine file passed 0 MiB"):
        ingest_files("t", [path], FORMAT, MINER, tmp_path / "out", max_quarantine_bytes=100_000)
    fmt = tmp_path / "fmt.yaml"
    fmt.write_text("regex: '^(?P<ts>\\S+ \\S+) (?P<host>\\S+) (?P<daemon>\\w+): (?P<content>.*)$'\n"
                   "timestamp: {fields: [ts], format: '%Y-%m-%d %H:%M:%S'}\nentity: host\n")
    assert main(["ingest", "--file", str(path), "--format", str(fmt), "--max-quarantine-mb", "0.1"]) == 1
    assert "raise --max-quarantine-mb" in capsys.readouterr().err
    assert main(["ingest", "--file", str(path), "--format", str(fmt), "--max-rejected-share", "0.1"]) == 1
    assert main(["ingest", "--file", str(path), "--format", str(fmt), "--workers", "2"]) == 0
    assert main(["ingest", "--file", str(path), "--format", str(fmt), "--max-rejected-share", "1.5"]) == 2


@pytest.mark.parametrize("name", ["../escape", "/tmp/abs", "a/../../b", "..", "a/b", ".hidden"])
def test_dataset_name_cannot_leave_the_data_home(tmp_path: Path, home: Path, name: str, capsys) -> None:
    log = tmp_path / "my.log"
    log.write_text("\n".join(_healthy(5)) + "\n")
    fmt = tmp_path / "fmt.yaml"
    fmt.write_text("regex: '^(?P<content>.*)$'\n")
    before = {p for p in tmp_path.rglob("*")}
    code = main(["ingest", name, "--file", str(log), "--format", str(fmt)])
    assert code == 2 and "dataset name" in capsys.readouterr().err
    assert {p for p in tmp_path.rglob("*")} == before  # nothing written anywhere
    with pytest.raises(ConfigError, match="must not hold a path"):
        ingest_files(name, [log], FORMAT, MINER, home / "tables")


def test_a_killed_ingest_leaves_nothing_after_the_next_start(tmp_path: Path) -> None:
    log = tmp_path / "a.log"
    log.write_text("\n".join(_healthy(20)) + "\n")
    out = tmp_path / "out"
    # A real ingest killed half-way (SIGKILL: no clean-up of its own).
    big = tmp_path / "big.log"
    big.write_text("\n".join(_healthy(3000)) * 100 + "\n")
    code = ("import sys, os, signal, threading; from pathlib import Path;"
            "from logtrial.data.ingest import ingest_files; from logtrial.data.registry import LineFormat, Miner;"
            f"fmt = LineFormat.model_validate({FORMAT.model_dump(mode='json')!r});"
            "threading.Timer(1.5, lambda: os.kill(os.getpid(), signal.SIGKILL)).start();"
            f"ingest_files('t', [Path({str(big)!r})], fmt, Miner(masks=[r'\\d+']), Path({str(out)!r}), workers=1,"
            " range_bytes=1 << 16)")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert proc.returncode == -9, proc.stderr
    left = [p for p in out.glob("*/.*.tmp-*")]
    assert left, "the killed ingest should have left its temporary folder"
    # A temporary folder of a process that still runs is kept.
    alive = out / "t" / ".0000000000000000.tmp-alive"
    alive.mkdir()
    (alive / "owner.json").write_text(json.dumps({"pid": os.getpid(), "host": os.uname().nodename}))
    ingest_files("t", [log], FORMAT, MINER, out)
    assert not [p for p in left if p.exists()]
    assert alive.exists()
    assert clean_stale_temporaries(out) == []


@pytest.mark.parametrize("damage", ["truncate", "garbage", "rows", "delete"])
def test_damaged_cached_table_is_rebuilt(tmp_path: Path, damage: str, capsys) -> None:
    log = tmp_path / "a.log"
    log.write_text("\n".join(_healthy(500)) + "\n")
    first = ingest_files("t", [log], FORMAT, MINER, tmp_path / "out")
    events = first.events
    good = events.read_bytes()
    if damage == "truncate":
        events.write_bytes(good[: len(good) // 2])
    elif damage == "garbage":
        events.write_bytes(b"\x00" * len(good))
    elif damage == "rows":
        pq.write_table(pq.read_table(events).slice(0, 100), events)
    else:
        events.unlink()
    again = ingest_files("t", [log], FORMAT, MINER, tmp_path / "out")
    assert not again.cached and "damaged" in capsys.readouterr().err
    assert pq.read_metadata(again.events).num_rows == 500
    assert ingest_files("t", [log], FORMAT, MINER, tmp_path / "out").cached


def test_drain_on_masked_contents_equals_drain_on_raw() -> None:
    # The worker masks, the miner gets masked text: same ids as masking inside the miner.
    e = REGISTRY["hdfs-2k"].miner.model_dump()
    rng = np.random.default_rng(0)
    contents = [f"Receiving block blk_{rng.integers(1e9)} src: /10.0.{i % 7}.{i % 5}:50010 size {i}" for i in range(3000)]
    raw = registry_miner(e).add_many(contents)
    miner = registry_miner(e)
    assert isinstance(miner, DrainMiner)
    masked = miner.add_many_masked(mask_contents(contents, miner.mask_patterns()).to_pylist())
    assert np.array_equal(raw, masked)


# --------------------------------------------------------------------------- distributed two-pass ingest


@pytest.mark.parametrize("name", ["hdfs-2k", "openstack-2k"])
def test_dask_two_pass_ingest_keeps_grouping_accuracy(loghub_dir: Path, tmp_path: Path, name: str) -> None:
    # External reference: the Loghub 2k ground-truth templates; grouping accuracy as defined by
    # Zhu et al. (ICSE-SEIP 2019). Two-pass mining may differ from sequential Drain by < 0.01.
    from logtrial.data.parse_score import score_against_truth

    e = REGISTRY[name]
    path = loghub_dir / e.system / e.logs[0]
    seq = ingest_files(name, [path], e.format, e.miner, tmp_path / "seq", workers=1)
    two = ingest_files(name, [path], e.format, e.miner, tmp_path / "dask", workers=2, range_bytes=1 << 14,
                       engine="dask")
    assert two.folder.name != seq.folder.name and two.manifest["engine"]["kind"] == "dask"
    a, b = read_events(seq.events), read_events(two.events)
    assert a.drop(columns="event").equals(b.drop(columns="event"))
    tpl = pd.read_csv(two.templates)
    assert tpl["count"].sum() == len(b) and np.array_equal(np.bincount(b["event"], minlength=len(tpl)), tpl["count"])
    truth = loghub_dir / e.system / e.truth.file
    acc_seq = score_against_truth(seq.events, seq.templates, truth, e.truth)["grouping_accuracy"]
    acc_two = score_against_truth(two.events, two.templates, truth, e.truth)["grouping_accuracy"]
    assert acc_seq - acc_two < 0.01


def test_cli_engine_dask_and_scheduler_only_with_it(tmp_path: Path, home: Path, capsys) -> None:
    log = tmp_path / "my.log"
    log.write_text("\n".join(_healthy(3000)) + "\n")
    fmt = tmp_path / "fmt.yaml"
    fmt.write_text("regex: '^(?P<ts>\\S+ \\S+) (?P<host>\\S+) (?P<daemon>\\w+): (?P<content>.*)$'\n"
                   "timestamp: {fields: [ts], format: '%Y-%m-%d %H:%M:%S'}\nentity: host\nminer: {masks: ['\\d+']}\n")
    assert main(["ingest", "--file", str(log), "--format", str(fmt), "--engine", "dask", "--workers", "1"]) == 0
    assert "rows 3,000 of 3,000 lines" in capsys.readouterr().out
    assert main(["ingest", "--file", str(log), "--format", str(fmt), "--scheduler", "tcp://127.0.0.1:1"]) == 2
    assert "only used with --engine dask" in capsys.readouterr().err
