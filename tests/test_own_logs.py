"""Your own logs end to end: the README's steps verbatim, and the one-step local dataset behind them.

External check: the simulated fleet's incidents file is the truth the generator itself
wrote; the event table's row count is checked against the raw file's line count (wc -l).
"""

from __future__ import annotations

import json
import os
import re
import shlex
from pathlib import Path

import pytest
from logtrial.cli import main

ROOT = Path(__file__).resolve().parents[1]


def _own_logs_section() -> str:
    text = (ROOT / "README.md").read_text()
    start = text.index("### Your own logs, end to end")
    return text[start:text.index("\n### ", start + 10)]


def _blocks(text: str, lang: str) -> list[str]:
    """Bodies of the fenced code blocks of one language ('' for plain fences), in order."""
    return [body for tag, body in re.findall(r"^```(\w*)\n(.*?)^```", text, flags=re.S | re.M) if tag == lang]


def _readme_files_and_commands() -> tuple[dict[str, str], list[str]]:
    """Files the section asks to save (blocks starting `# NAME`) and its shell commands, in order."""
    section = _own_logs_section()
    files = {}
    for body in _blocks(section, "yaml"):
        first, _, rest = body.partition("\n")
        m = re.fullmatch(r"# (\S+\.yaml)", first.strip())
        if m:
            files[m.group(1)] = body
    commands = [line.strip() for block in _blocks(section, "sh")
                for line in block.splitlines() if line.strip() and not line.strip().startswith("#")]
    return files, commands


def test_readme_steps_take_a_raw_log_to_a_report(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys) -> None:
    monkeypatch.setenv("LOGTRIAL_HOME", str(tmp_path / "home"))
    monkeypatch.chdir(tmp_path)
    files, commands = _readme_files_and_commands()
    assert {"app-format.yaml", "my-experiment.yaml", "small-fleet.yaml"} <= set(files)
    assert [c.split()[1] for c in commands] == ["simulate", "ingest", "run", "report"]
    for name, body in files.items():
        (tmp_path / name).write_text(body)
    for cmd in commands:
        argv = shlex.split(cmd)
        assert argv[0] == "logtrial"
        assert main(argv[1:]) == 0, (cmd, capsys.readouterr().err)
    out = capsys.readouterr().out
    assert "registered dataset 'my-app'" in out
    # wc -l of the raw log equals the event table's rows (nothing quarantined in the simulated log).
    lines = sum(1 for _ in open(tmp_path / "my-logs" / "fleet.log", "rb"))
    assert f"rows {lines:,} of {lines:,} lines" in out
    results = (tmp_path / "my-results" / "results.csv").read_text().splitlines()
    assert len(results) == 1 + 3 and all(",my-app," in r for r in results[1:])
    assert (tmp_path / "my-results" / "report.md").is_file()
    # The registry entry lives in the data home and names the user's files.
    reg = (tmp_path / "home" / "registry.yaml").read_text()
    assert "my-app:" in reg and (tmp_path / "my-logs" / "fleet.log").resolve().as_uri() in reg


def test_readme_incidents_example_is_valid(tmp_path: Path) -> None:
    from logtrial.labels.incidents import read_incidents

    section = _own_logs_section()
    example = next(b for b in _blocks(section, "") if b.startswith("id,entity"))
    (tmp_path / "incidents.csv").write_text(example)
    inc = read_incidents(tmp_path / "incidents.csv")
    assert list(inc["kind"]) == ["other", "failure"]
    # +01:00 is converted to UTC (the README's time-zone rule).
    assert str(inc["start"].iloc[1]) == "2026-01-09 13:00:00+00:00"


FORMAT = """regex: '^(?P<ts>\\S+) (?P<host>\\S+) (?P<content>.*)$'
timestamp: {fields: [ts], format: "%Y-%m-%dT%H:%M:%SZ"}
entity: host
"""


def _write_own_files(folder: Path, n: int = 200) -> tuple[Path, Path, Path]:
    folder.mkdir(parents=True, exist_ok=True)
    log = folder / "app.log"
    log.write_text("".join(f"2026-01-01T{h % 24:02d}:{m:02d}:00Z node-{h % 3} job {m} done\n"
                           for h in range(n // 20) for m in range(20)))
    fmt = folder / "fmt.yaml"
    fmt.write_text(FORMAT)
    inc = folder / "incidents.csv"
    inc.write_text("id,entity,start,end,kind\n1,node-1,2026-01-01T05:00:00Z,2026-01-01T06:00:00Z,failure\n")
    return log, fmt, inc


def _register(log: Path, fmt: Path, inc: Path, name: str = "my-app") -> int:
    return main(["ingest", "--file", str(log), "--format", str(fmt), "--incidents", str(inc), "--name", name])


def test_changed_local_file_is_read_again_and_the_user_told(tmp_path: Path, home: Path, capsys) -> None:
    log, fmt, inc = _write_own_files(tmp_path / "mine")
    assert _register(log, fmt, inc) == 0
    capsys.readouterr()
    assert main(["fetch", "my-app"]) == 0
    assert "already present" in capsys.readouterr().out
    inc.write_text(inc.read_text() + "2,node-2,2026-01-01T07:00:00Z,2026-01-01T07:30:00Z,other\n")
    assert main(["fetch", "my-app"]) == 0
    out = capsys.readouterr().out
    assert f"{inc} changed since it was last read" in out
    assert (home / "data" / "my-app" / "incidents.csv").read_text() == inc.read_text()
    lock = json.loads((home / "datasets.lock").read_text())["my-app"]["incidents.csv"]
    assert lock["size"] == inc.stat().st_size  # no lock surgery needed


def test_run_ids_follow_the_content_of_local_files(tmp_path: Path, home: Path) -> None:
    from logtrial.data.registry import get_entry, load_registry
    from logtrial.running.experiment import entry_fingerprint

    log, fmt, inc = _write_own_files(tmp_path / "mine")
    assert _register(log, fmt, inc) == 0
    before = entry_fingerprint(get_entry("my-app", load_registry()))
    inc.write_text(inc.read_text().replace("06:00:00Z", "06:30:00Z"))
    assert entry_fingerprint(get_entry("my-app", load_registry())) != before


def test_bad_incidents_file_is_named_before_anything_is_written(tmp_path: Path, home: Path, capsys) -> None:
    log, fmt, inc = _write_own_files(tmp_path / "mine")
    inc.write_text("id,entity,start,end,kind\n1,node-1,2026-01-01T05:00:00Z,2026-01-01T06:00:00Z,outage\n")
    assert _register(log, fmt, inc) == 1
    err = capsys.readouterr().err
    assert f"{inc}: line 2: kind: expected one of ('failure', 'other')" in err
    assert not (home / "registry.yaml").exists()


def test_dataset_error_stops_the_grid_once_naming_the_users_file(tmp_path: Path, home: Path, capsys) -> None:
    # Before: each run of the grid failed with the same error about the cached copy.
    log, fmt, inc = _write_own_files(tmp_path / "mine")
    assert _register(log, fmt, inc) == 0
    inc.write_text("id,entity,start,end,kind\n1,node-1,2026-01-01T05:00:00Z,2026-01-01T04:00:00Z,failure\n")
    exp = tmp_path / "exp.yaml"
    exp.write_text("experiment: e\noutput: out\ndatasets: [my-app]\nwindows: [{kind: time, size: 1h}]\n"
                   "task: {name: detect}\ndetectors: [pca, rate_rule]\nseeds: [1, 2]\n")
    capsys.readouterr()
    assert main(["run", str(exp), "--no-track"]) == 1
    err = capsys.readouterr().err
    assert err.count("end: expected end >= start") == 1
    assert f"{inc}: line 2" in err and "no run was started" in err
    assert str(home / "data") not in err
    assert not list((tmp_path / "out" / "runs").glob("*.json"))


def test_register_refuses_bad_names_and_builtin_names(tmp_path: Path, home: Path, capsys) -> None:
    log, fmt, inc = _write_own_files(tmp_path / "mine")
    assert _register(log, fmt, inc, name="../escape") == 2
    assert "--name '../escape'" in capsys.readouterr().err
    assert _register(log, fmt, inc, name="bgl-2k") == 2
    assert "built-in dataset" in capsys.readouterr().err
    assert not (home / "registry.yaml").exists() and not (tmp_path / "escape").exists()


def test_fetch_refresh_records_a_changed_source_afresh(tmp_path: Path, home: Path, capsys) -> None:
    # Before: a changed mirror file was refused for a size mismatch until datasets.lock was edited by hand.
    mirror = tmp_path / "mirror"
    mirror.mkdir()
    (mirror / "a.log").write_text("2026-01-01T00:00:00Z n1 hello 1\n")
    reg = tmp_path / "reg.yaml"
    reg.write_text("datasets:\n  mine:\n    system: s\n    sources: [{file: a.log, mirror: a.log}]\n"
                   "    logs: [a.log]\n    format: {regex: '^(?P<ts>\\S+) (?P<host>\\S+) (?P<content>.*)$'}\n")
    assert main(["fetch", "mine", "--mirror", str(mirror), "--registry", str(reg)]) == 0
    (mirror / "a.log").write_text("2026-01-01T00:00:00Z n1 hello 1\n2026-01-01T00:00:01Z n1 hello 2\n")
    assert main(["fetch", "mine", "--mirror", str(mirror), "--registry", str(reg), "--refresh"]) == 0
    out = capsys.readouterr().out
    assert "refreshed and verified" in out and "sha256 changed" in out
    assert (home / "data" / "mine" / "a.log").read_text().count("\n") == 2


def test_fetched_data_files_are_copies_and_edits_are_noticed(tmp_path: Path, home: Path, capsys) -> None:
    # Before: data files were hard links to the downloads, and an edited one passed "verified against the lock".
    mirror = tmp_path / "mirror"
    mirror.mkdir()
    (mirror / "a.log").write_text("2026-01-01T00:00:00Z n1 hello 1\n")
    reg = tmp_path / "reg.yaml"
    reg.write_text("datasets:\n  mine:\n    system: s\n    sources: [{file: a.log, mirror: a.log}]\n"
                   "    logs: [a.log]\n    format: {regex: '^(?P<ts>\\S+) (?P<host>\\S+) (?P<content>.*)$'}\n")
    args = ["fetch", "mine", "--mirror", str(mirror), "--registry", str(reg)]
    assert main(args) == 0
    data, download = home / "data" / "mine" / "a.log", home / "downloads" / "mine" / "a.log"
    assert data.stat().st_ino != download.stat().st_ino and data.stat().st_nlink == 1
    data.write_text("2026-01-01T00:00:00Z n1 EDITED 1\n")  # same size, new time and bytes
    capsys.readouterr()
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "changed since it was fetched" in out and "verified against the lock" not in out
    assert data.read_text() == (mirror / "a.log").read_text()
    # Touched but unchanged: size differs? no; mtime differs: re-hash says same, so it stays cached.
    os.utime(data, ns=(1, 1))
    assert main(args) == 0
    assert "already present" in capsys.readouterr().out


def test_failed_local_copy_leaves_no_part_file(tmp_path: Path, home: Path, monkeypatch, capsys) -> None:
    # Before: a failed copy left its .part file behind (no resume is possible for a local copy).
    import errno

    from logtrial.data import acquire

    mirror = tmp_path / "mirror"
    mirror.mkdir()
    (mirror / "a.log").write_text("2026-01-01T00:00:00Z n1 hello 1\n" * 100)
    reg = tmp_path / "reg.yaml"
    reg.write_text("datasets:\n  mine:\n    system: s\n    sources: [{file: a.log, mirror: a.log}]\n"
                   "    logs: [a.log]\n    format: {regex: '^(?P<ts>\\S+) (?P<host>\\S+) (?P<content>.*)$'}\n")
    real = acquire._pump

    def full(src, out, bar, limit=None):
        out.write(src.read(10))
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(acquire, "_pump", full)
    assert main(["fetch", "mine", "--mirror", str(mirror), "--registry", str(reg)]) == 1
    err = capsys.readouterr().err
    assert "No space left on device" in err and "partial copy was removed" in err and "Traceback" not in err
    assert not list((home / "downloads" / "mine").glob("*.part"))
    monkeypatch.setattr(acquire, "_pump", real)


def test_partial_downloads_are_reported(tmp_path: Path, home: Path, capsys) -> None:
    # A .part file is kept only for an https download that can resume; `datasets` says where and how big.
    reg = tmp_path / "reg.yaml"
    reg.write_text("datasets:\n  remote:\n    system: s\n"
                   "    sources: [{file: a.log, url: 'https://example.invalid/a.log'}]\n"
                   "    logs: [a.log]\n    format: {regex: '^(?P<content>.*)$'}\n")
    part = home / "downloads" / "remote" / "a.log.part"
    part.parent.mkdir(parents=True)
    part.write_bytes(b"x" * 2**20)
    assert main(["datasets", "--registry", str(reg)]) == 0
    out = capsys.readouterr().out
    assert f"{part} (1.0 MiB): kept so that `logtrial fetch remote` resumes it" in out


def test_format_errors_name_the_users_log_not_the_copy(tmp_path: Path, home: Path, capsys) -> None:
    log, fmt, inc = _write_own_files(tmp_path / "mine")
    fmt.write_text("regex: '^(?P<ts>\\\\d{8}) (?P<content>.*)$'\n")
    assert _register(log, fmt, inc) == 1
    err = capsys.readouterr().err
    assert f"{log}: no line matched the format" in err and str(home) not in err


def test_inline_dataset_in_the_experiment_runs_without_an_ingest_step(tmp_path: Path, home: Path, capsys) -> None:
    log, fmt, inc = _write_own_files(tmp_path / "mine", n=2000)
    exp = tmp_path / "exp.yaml"
    exp.write_text("experiment: e\noutput: out\n"
                   "datasets: [{name: inline-app, file: mine/app.log, format: mine/fmt.yaml, "
                   "incidents: mine/incidents.csv}]\n"
                   "windows: [{kind: time, size: 1h}]\ntask: {name: detect}\ndetectors: [rate_rule]\n"
                   "scoring: {bootstrap: 10}\n")
    from logtrial.running.experiment import load_experiment

    first = load_experiment(exp)
    stamp = (home / "registry.yaml").stat().st_mtime_ns
    again = load_experiment(exp)  # loading again leaves the registry file alone
    assert (home / "registry.yaml").stat().st_mtime_ns == stamp
    assert [r.run_id for r in first.runs] == [r.run_id for r in again.runs]
    assert main(["run", str(exp), "--no-track"]) in (0, 1)  # tiny data: the run may fail, but it runs
    err = capsys.readouterr().err
    assert "unknown dataset" not in err and "[1/1] inline-app rate_rule" in err
    bad = tmp_path / "bad.yaml"
    bad.write_text(exp.read_text().replace("file: mine/app.log", "fil: mine/app.log"))
    assert main(["run", str(bad)]) == 2
    assert "datasets[0].fil: unknown field" in capsys.readouterr().err
