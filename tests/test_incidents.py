"""Incidents from inline tags, session labels and incident files."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from logtrial.errors import DataError
from logtrial.labels.incidents import (
    incidents_from_sessions,
    incidents_from_tags,
    read_incidents,
)

T0 = pd.Timestamp("2024-03-01", tz="UTC")


def _events(rows: list[tuple[float, str, str, str | None]]) -> pd.DataFrame:
    """Event table from (minutes after T0, entity, tag, group) rows."""
    return pd.DataFrame(
        {
            "line": np.arange(1, len(rows) + 1, dtype=np.int64),
            "ts": [T0 + pd.Timedelta(minutes=m) for m, *_ in rows],
            "entity": pd.array([r[1] for r in rows], dtype="str"),
            "group": pd.array([r[3] for r in rows], dtype="str"),
            "event": np.zeros(len(rows), dtype=np.int32),
            "tag": pd.array([r[2] for r in rows], dtype="str"),
        }
    )


def test_tag_runs_merge_by_gap_and_entity() -> None:
    ev = _events(
        [
            (0, "a", "DISK", None),
            (5, "a", "DISK", None),
            (9, "b", "NET", None),   # other entity: own incident
            (30, "a", "", None),     # normal line inside the run does not break it
            (40, "a", "DISK", None),  # 35 min after last alert: merged with gap 1h
            (200, "a", "FAN", None),  # 160 min later: new incident
        ]
    )
    inc = incidents_from_tags(ev, pd.Timedelta("1h"))
    assert list(inc.columns) == ["id", "entity", "start", "end", "kind", "mode"]
    assert inc["id"].dtype == np.int64
    assert str(inc["start"].dt.tz) == "UTC"
    got = [(r.entity, r.start, r.end, r.kind, r.mode) for r in inc.itertuples()]
    m = lambda x: T0 + pd.Timedelta(minutes=x)  # noqa: E731
    assert got == [
        ("a", m(0), m(40), "failure", "DISK"),
        ("a", m(200), m(200), "failure", "FAN"),
        ("b", m(9), m(9), "failure", "NET"),
    ]
    # "closer than gap" merges; a gap equal to the distance splits (35 min apart)
    assert len(incidents_from_tags(ev, pd.Timedelta("35min"))) == 4
    assert len(incidents_from_tags(ev, pd.Timedelta("36min"))) == 3


def test_tag_kinds_parameter() -> None:
    ev = _events([(0, "a", "MAINT", None), (100, "a", "DISK", None), (101, "a", "MAINT", None)])
    inc = incidents_from_tags(ev, pd.Timedelta("10min"), failure_tags={"DISK"})
    assert list(inc["kind"]) == ["other", "failure"]  # a run with any failure line is a failure
    inc2 = incidents_from_tags(ev, pd.Timedelta("10min"), tag_kinds={"MAINT": "other"})
    assert list(inc2["kind"]) == ["other", "failure"]
    inc3 = incidents_from_tags(ev, pd.Timedelta("10min"))
    assert list(inc3["kind"]) == ["failure", "failure"]


def test_sessions_become_incidents_over_their_span() -> None:
    ev = _events(
        [(0, "", "", "blk_1"), (3, "", "", "blk_2"), (7, "", "", "blk_1"), (8, "", "", None), (9, "", "", "blk_3")]
    )
    inc = incidents_from_sessions(ev, ["blk_1", "blk_3", "blk_missing"])
    assert list(inc["group"]) == ["blk_1", "blk_3"]
    assert list(inc["start"]) == [T0, T0 + pd.Timedelta(minutes=9)]
    assert list(inc["end"]) == [T0 + pd.Timedelta(minutes=7), T0 + pd.Timedelta(minutes=9)]
    assert set(inc["kind"]) == {"failure"}


def test_read_incidents_round_trip(tmp_path: Path) -> None:
    p = tmp_path / "inc.csv"
    p.write_text(
        "id,entity,start,end,kind,mode\n"
        "1,node-a,2024-03-01T00:00:00Z,2024-03-01T02:00:00Z,failure,disk\n"
        "2,,2024-03-02 00:00:00+00:00,2024-03-02 00:30:00+00:00,other,\n"
    )
    inc = read_incidents(p)
    assert list(inc["id"]) == [1, 2]
    assert list(inc["entity"]) == ["node-a", ""]
    assert inc.loc[0, "end"] - inc.loc[0, "start"] == pd.Timedelta("2h")
    assert list(inc["mode"]) == ["disk", ""]


@pytest.mark.parametrize(
    ("row", "needle"),
    [
        ("x,n,2024-03-01,2024-03-02,failure", "line 3: id"),
        ("2,n,yesterday,2024-03-02,failure", "line 3: start"),
        ("2,n,2024-03-03,2024-03-02,failure", "line 3: end: expected end >= start"),
        ("2,n,2024-03-01,2024-03-02,outage", "line 3: kind"),
        ("1,n,2024-03-01,2024-03-02,failure", "line 3: id: expected unique"),
    ],
)
def test_read_incidents_bad_rows_name_file_and_line(tmp_path: Path, row: str, needle: str) -> None:
    p = tmp_path / "bad.csv"
    p.write_text("id,entity,start,end,kind\n1,n,2024-03-01,2024-03-02,failure\n" + row + "\n")
    with pytest.raises(DataError) as err:
        read_incidents(p)
    assert str(p) in str(err.value) and needle in str(err.value)


def test_read_incidents_missing_column(tmp_path: Path) -> None:
    p = tmp_path / "bad.csv"
    p.write_text("id,entity,start,kind\n1,n,2024-03-01,failure\n")
    with pytest.raises(DataError, match="line 1: missing column"):
        read_incidents(p)


def test_bgl_alert_lines_as_incidents(bgl_events: pd.DataFrame) -> None:
    # Reference: the BGL 2k sample itself (Loghub), 143 alert lines in 12 categories,
    # counted from the file (datasets.yaml `expected.alerts: 143`).
    per_line = incidents_from_tags(bgl_events, pd.Timedelta(0))
    assert len(per_line) == 143
    assert per_line["mode"].nunique() == 12
    assert (per_line["start"] == per_line["end"]).all()
    # Merging by a 1 h gap: the 60 KERNDTLB lines of node R30-M0-N9-C:J16-U01 (file
    # lines 104-163, 2005-06-11 17:32:07.581048 .. 23:26:23.330548, never more than
    # 46 min apart) form one incident; read off the log by hand.
    merged = incidents_from_tags(bgl_events, pd.Timedelta("1h"))
    r30 = merged.loc[merged["entity"] == "R30-M0-N9-C:J16-U01"]
    assert len(r30) == 1
    assert r30.iloc[0]["start"] == pd.Timestamp("2005-06-11 17:32:07.581048", tz="UTC")
    assert r30.iloc[0]["end"] == pd.Timestamp("2005-06-11 23:26:23.330548", tz="UTC")
    assert r30.iloc[0]["mode"] == "KERNDTLB"
    # 84 distinct nodes carry alerts; apart from R30 each node's alerts are hours apart
    # or single, so merging only collapses R30's run (counted from the file with awk).
    assert merged["entity"].nunique() == 84
    assert len(merged) == 143 - 59
