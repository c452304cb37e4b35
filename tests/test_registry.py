"""Registry: the shipped entries validate, and bad entries name the file, entry and field."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from logtrial.cli import main
from logtrial.data.registry import get_entry, load_registry
from logtrial.errors import ConfigError

LOGHUB_SYSTEMS = {
    "Android", "Apache", "BGL", "Hadoop", "HDFS", "HealthApp", "HPC", "Linux", "Mac", "OpenSSH", "OpenStack",
    "Proxifier", "Spark", "Thunderbird", "Windows", "Zookeeper",
}


def test_shipped_registry_has_the_16_samples_and_5_full_benchmarks() -> None:
    reg = load_registry()
    samples = {e.system for n, e in reg.items() if n.endswith("-2k")}
    assert samples == LOGHUB_SYSTEMS
    for name in ("hdfs-v1", "bgl", "thunderbird", "hadoop", "openstack"):
        assert reg[name].sources and reg[name].sources[0].url.startswith("https://")
    # Published counts, from memory (a mismatch on a real fetch is a warning, not an error).
    assert reg["hdfs-v1"].expected == {"lines": 11175629, "sessions": 575061, "anomalous_sessions": 16838}
    assert reg["bgl"].expected == {"lines": 4747963, "alerts": 348460}
    assert reg["hdfs-v1"].labels.scheme == "sessions" and reg["hdfs-v1"].format.group.pattern
    assert reg["bgl-2k"].labels.scheme == "inline" and reg["thunderbird-2k"].labels.scheme == "inline"
    assert all(reg[n].labels.scheme == "none" for n in reg if n.endswith("-2k") and reg[n].system not in
               ("BGL", "Thunderbird"))


def test_miner_settings_match_the_published_benchmark_table(loghub_dir: Path) -> None:
    # External reference: the per-system masks / similarity / depth table in the mirror's
    # README (parser benchmark of Zhu et al., ICSE-SEIP 2019, settings from memory).
    readme = (loghub_dir / "README.md").read_text()
    reg = load_registry()
    rows = [r for r in readme.splitlines() if r.startswith("| ") and r.count("|") >= 6 and "system" not in r]
    seen = 0
    for row in rows:
        cells = [c.strip() for c in row.strip("|").split(" | ")]
        system = cells[0]
        entry = next((e for n, e in reg.items() if n.endswith("-2k") and e.system == system), None)
        if entry is None:
            continue
        seen += 1
        masks = [m.replace("\\|", "|") for m in __import__("re").findall(r"`([^`]*)`", cells[1])]
        assert entry.miner.masks == masks, system
        assert entry.miner.similarity == float(cells[2]), system
        assert entry.miner.depth == int(cells[3]), system
        assert entry.expected["drain_grouping_accuracy"] == pytest.approx(float(cells[4])), system
    assert seen == 16


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "extra.yaml"
    p.write_text(text)
    return p


def test_entry_missing_field_names_entry_and_field(tmp_path: Path) -> None:
    extra = _write(tmp_path, "datasets:\n  mine:\n    system: X\n    sources: [{file: a.log, mirror: a.log}]\n"
                             "    format: {regex: '^(?P<content>.*)$'}\n")
    with pytest.raises(ConfigError, match=r"extra\.yaml: dataset 'mine': logs: required field is missing"):
        load_registry([extra])


def test_entry_unknown_field_and_bad_values(tmp_path: Path) -> None:
    extra = _write(tmp_path, "datasets:\n  mine:\n    system: X\n    logs: [a.log]\n    colour: red\n"
                             "    sources: [{file: a.log, mirror: a.log, sha256: xyz}]\n"
                             "    format: {regex: '^(?P<content>.*)$'}\n")
    with pytest.raises(ConfigError) as err:
        load_registry([extra])
    msg = str(err.value)
    assert "colour: unknown field" in msg and "sources.0.sha256: must be 64 lower-case hex digits" in msg


def test_format_regex_without_content_group(tmp_path: Path) -> None:
    extra = _write(tmp_path, "datasets:\n  mine:\n    system: X\n    logs: [a.log]\n"
                             "    sources: [{file: a.log, mirror: a.log}]\n    format: {regex: '^(?P<msg>.*)$'}\n")
    with pytest.raises(ConfigError, match=r"dataset 'mine': format: .*named group `content`"):
        load_registry([extra])


def test_format_role_pointing_at_missing_group(tmp_path: Path) -> None:
    extra = _write(tmp_path, "datasets:\n  mine:\n    system: X\n    logs: [a.log]\n"
                             "    sources: [{file: a.log, mirror: a.log}]\n"
                             "    format: {regex: '^(?P<content>.*)$', entity: host}\n")
    with pytest.raises(ConfigError, match=r"no named group\(s\) \['host'\]"):
        load_registry([extra])


def test_bad_yaml_names_the_line(tmp_path: Path) -> None:
    extra = _write(tmp_path, "datasets:\n  mine: [unclosed\n")
    with pytest.raises(ConfigError, match=r"extra\.yaml: line \d+, column \d+: invalid YAML"):
        load_registry([extra])


def test_source_path_with_folders_is_refused(tmp_path: Path) -> None:
    extra = _write(tmp_path, "datasets:\n  mine:\n    system: X\n    logs: [a.log]\n"
                             "    sources: [{file: ../a.log, mirror: a.log}]\n    format: {regex: '^(?P<content>.*)$'}\n")
    with pytest.raises(ConfigError, match=r"sources.0.file: must be a plain file name"):
        load_registry([extra])


def test_user_registry_adds_a_dataset_and_unknown_names_get_suggestions(tmp_path: Path) -> None:
    extra = _write(tmp_path, "datasets:\n  my-app:\n    system: MyApp\n    logs: [app.log]\n"
                             "    sources: [{file: app.log, mirror: app.log}]\n    format: {regex: '^(?P<content>.*)$'}\n")
    reg = load_registry([extra])
    assert "my-app" in reg and "bgl-2k" in reg
    with pytest.raises(ConfigError, match="Did you mean: bgl-2k"):
        get_entry("bgl2k", reg)


def test_cli_reports_bad_registry_with_exit_2(tmp_path: Path, home: Path, capsys) -> None:
    extra = _write(tmp_path, "datasets:\n  mine:\n    system: X\n")
    assert main(["datasets", "--registry", str(extra)]) == 2
    err = capsys.readouterr().err
    assert "extra.yaml" in err and "dataset 'mine'" in err


@pytest.mark.parametrize(
    "fmt_extra, needle",
    [
        ("encoding: utf8x", "unknown encoding 'utf8x'"),
        ("encoding: utf-16", "does not write a newline as the byte 0x0A"),
        ("timestamp: {fields: [content], format: '%Y', tz: CEST}", "unknown time zone 'CEST'"),
    ],
)
def test_format_settings_are_checked_on_load(tmp_path: Path, fmt_extra: str, needle: str) -> None:
    extra = _write(tmp_path, "datasets:\n  mine:\n    system: X\n    logs: [a.log]\n"
                             "    sources: [{file: a.log, mirror: a.log}]\n"
                             f"    format:\n      regex: '^(?P<content>.*)$'\n      {fmt_extra}\n")
    with pytest.raises(ConfigError, match=re.escape(needle)):
        load_registry([extra])


def test_unknown_miner_and_escaping_log_pattern(tmp_path: Path) -> None:
    extra = _write(tmp_path, "datasets:\n  mine:\n    system: X\n    logs: [../a.log]\n"
                             "    sources: [{file: a.log, mirror: a.log}]\n    format: {regex: '^(?P<content>.*)$'}\n"
                             "    miner: {kind: drian}\n")
    with pytest.raises(ConfigError) as err:
        load_registry([extra])
    assert "miner.kind: unknown template miner 'drian'" in str(err.value)
    assert "logs: '../a.log' must be a path or glob pattern inside the dataset folder" in str(err.value)
