"""Noise replay: identity at zero noise, monotone delays, drop frequencies, decoys, spurious tickets, bad specs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from logtrial.errors import ConfigError
from logtrial.labels.incidents import make_incidents
from logtrial.labels.noise import load_noise, noise_levels, replay
from scipy import stats

T0 = pd.Timestamp("2024-01-01", tz="UTC").value


def _incidents(n: int, seed: int = 0, other_share: float = 0.3) -> pd.DataFrame:
    """n random incidents over 60 days on 20 entities."""
    rng = np.random.default_rng(seed)
    start = T0 + rng.integers(0, 60 * 86_400 * 10**9, n)
    dur = rng.integers(0, 6 * 3_600 * 10**9, n)
    kind = np.where(rng.random(n) < other_share, "other", "failure")
    mode = rng.choice(["disk", "uplink", "memory"], n)
    return make_incidents(
        np.arange(n), rng.choice([f"n{i}" for i in range(20)], n).astype(object), start, start + dur, kind, mode=mode
    )


incident_tables = st.builds(
    _incidents, n=st.integers(0, 40), seed=st.integers(0, 10_000), other_share=st.floats(0, 1)
)


@settings(max_examples=40, deadline=None)
@given(inc=incident_tables, seed=st.integers(0, 2**32 - 1))
def test_zero_noise_is_identity(inc: pd.DataFrame, seed: int) -> None:
    zero_specs = [
        None,
        {},
        {"drop": {"p": 0.0}, "decoys": 0.0, "delay": {"dist": "fixed", "value": "0s"}, "end_jitter": {"scale": "0s"}},
        {"delay": {"dist": "uniform", "low": 0, "high": 0}, "spurious": {"per_day": 0}},
    ]
    for spec in zero_specs:
        out = replay(inc, spec, seed)
        assert load_noise(spec).is_clean()
        pd.testing.assert_frame_equal(out.drop(columns="true_id"), inc)
        assert (out["true_id"].to_numpy(dtype=np.int64) == inc["id"].to_numpy()).all()


@settings(max_examples=40, deadline=None)
@given(
    inc=incident_tables,
    seed=st.integers(0, 2**32 - 1),
    delay=st.sampled_from(
        [
            {"dist": "uniform"},
            {"dist": "exponential", "mean": "6h"},
            {"dist": "fixed", "value": "3h"},
            {"dist": "empirical", "values": ["0s", "1h", "2 days"]},
        ]
    ),
    jitter=st.sampled_from([None, {"dist": "normal", "scale": "2h"}, {"dist": "uniform", "scale": "1h"}]),
)
def test_delay_never_moves_a_start_earlier(inc: pd.DataFrame, seed: int, delay: dict, jitter: dict | None) -> None:
    out = replay(inc, {"delay": delay, "end_jitter": jitter}, seed)
    truth = inc.set_index("id")
    assert len(out) == len(inc)
    t = truth.loc[out["true_id"].to_numpy(dtype=np.int64)]
    assert (out["start"].to_numpy() >= t["start"].to_numpy()).all()
    assert (out["start"].to_numpy() - t["start"].to_numpy() <= np.timedelta64(2, "D")).all()
    assert (out["end"] >= out["start"]).all()


def test_delay_distributions_match_scipy() -> None:
    # Reference: scipy.stats.kstest against scipy.stats.uniform / expon.
    inc = _incidents(3000, seed=1)
    d = (replay(inc, {"delay": {"dist": "uniform", "low": "1h", "high": "1 day"}}, 7)["start"] - inc["start"])
    hours = d.dt.total_seconds().to_numpy() / 3600
    assert stats.kstest(hours, stats.uniform(loc=1, scale=23).cdf).pvalue > 1e-3
    d = (replay(inc, {"delay": {"dist": "exponential", "mean": "4h", "max": None}}, 7)["start"] - inc["start"])
    hours = d.dt.total_seconds().to_numpy() / 3600
    assert stats.kstest(hours, stats.expon(scale=4).cdf).pvalue > 1e-3
    d = replay(inc, {"delay": {"dist": "exponential", "mean": "1 day"}}, 7)["start"] - inc["start"]
    assert d.max() <= pd.Timedelta("2 days")  # default cap, common practice for ticket lag
    d = replay(inc, {"delay": {"dist": "empirical", "values": ["1h", "5h"]}}, 7)["start"] - inc["start"]
    assert set(d) == {pd.Timedelta("1h"), pd.Timedelta("5h")}


@settings(max_examples=15, deadline=None)
@given(p=st.floats(0.0, 1.0), seed=st.integers(0, 2**32 - 1))
def test_drop_keeps_each_incident_with_the_right_frequency(p: float, seed: int) -> None:
    # Reference: exact binomial test (scipy.stats.binomtest); 99.99 % interval so the
    # property fails by chance about once in 10,000 draws.
    n = 2000
    inc = _incidents(n, seed=3)
    kept = len(replay(inc, {"drop": {"p": p}}, seed))
    if p in (0.0, 1.0):
        assert kept == (n if p == 0 else 0)
        return
    assert stats.binomtest(kept, n, 1 - p).pvalue > 1e-4


def test_drop_per_kind_and_mode_and_nesting() -> None:
    inc = _incidents(4000, seed=4)
    out = replay(inc, {"drop": {"p": 0.0, "per_kind": {"other": 1.0}, "per_mode": {"disk": 0.5}}}, 11)
    kept = inc.set_index("id").loc[out["true_id"].to_numpy(dtype=np.int64)]
    assert set(kept.loc[kept["mode"] != "disk", "kind"]) == {"failure"}  # all non-disk 'other' dropped
    disk = inc["mode"] == "disk"
    # Reference: scipy.stats.binomtest for the per-mode rate (mode wins over kind).
    assert stats.binomtest(int((kept["mode"] == "disk").sum()), int(disk.sum()), 0.5).pvalue > 1e-4
    # Same seed, higher p: the reported set shrinks to a subset (coupled draws).
    lo = set(replay(inc, {"drop": 0.2}, 5)["true_id"])
    hi = set(replay(inc, {"drop": 0.5}, 5)["true_id"])
    assert hi <= lo


def test_decoys_and_other_incidents() -> None:
    inc = _incidents(4000, seed=5, other_share=0.5)
    plain = replay(inc, {}, 1)
    assert (plain["kind"] == inc["kind"]).all()  # without decoys 'other' stays 'other'
    out = replay(inc, {"decoys": {"share": 0.25}}, 1)
    was_other = (inc["kind"] == "other").to_numpy()
    flipped = (out["kind"].to_numpy() == "failure") & was_other
    # Reference: scipy.stats.binomtest on the decoy share.
    assert stats.binomtest(int(flipped.sum()), int(was_other.sum()), 0.25).pvalue > 1e-4
    assert (out.loc[~was_other, "kind"] == "failure").all()


def test_spurious_tickets_have_no_true_incident() -> None:
    inc = _incidents(50, seed=6)
    span = (pd.Timestamp("2024-01-01", tz="UTC"), pd.Timestamp("2024-03-01", tz="UTC"))
    out = replay(inc, {"spurious": {"per_day": 2, "duration": "30min"}}, 3, span=span, entities=["x", "y"])
    fake = out[out["true_id"].isna()]
    real = out[out["true_id"].notna()]
    assert len(real) == 50
    # Reference: Poisson(2/day * 60 days); scipy.stats.poisson 99.99 % interval.
    lo, hi = stats.poisson(120).interval(0.9999)
    assert lo <= len(fake) <= hi
    assert set(fake["entity"]) <= {"x", "y"} and (fake["kind"] == "failure").all()
    assert (fake["start"] >= span[0]).all() and (fake["start"] < span[1]).all()
    assert ((fake["end"] - fake["start"]) == pd.Timedelta("30min")).all()
    assert fake["id"].min() > inc["id"].max() and out["id"].is_unique
    with pytest.raises(ConfigError, match="noise.spurious"):
        replay(inc, {"spurious": 1.0}, 3)


def test_replay_is_deterministic_in_seed() -> None:
    inc = _incidents(300, seed=8)
    spec = {"drop": 0.3, "delay": {"dist": "exponential"}, "end_jitter": "1h", "decoys": 0.5}
    a, b, c = replay(inc, spec, 42), replay(inc, spec, 42), replay(inc, spec, 43)
    pd.testing.assert_frame_equal(a, b)
    assert not a.equals(c)


def test_yaml_file_and_names(tmp_path: Path) -> None:
    p = tmp_path / "noise.yaml"
    p.write_text("noise:\n  name: late-tickets\n  delay: {dist: uniform, high: 1 day}\n  drop: {p: 0.1}\n")
    spec = load_noise(p)
    assert spec.name == "late-tickets" and spec.drop.p == 0.1
    assert spec.delay.high == pd.Timedelta("1 day")
    assert load_noise(None).name == "clean"
    assert "drop" in load_noise({"drop": 0.2}).name


def test_noise_levels_family() -> None:
    specs = noise_levels({"delay": {"dist": "fixed", "value": "1h"}}, "drop.p", [0.0, 0.25, 0.5])
    assert [s.level for s in specs] == [0.0, 0.25, 0.5]
    assert [s.drop.p for s in specs] == [0.0, 0.25, 0.5]
    assert all(s.delay.value == pd.Timedelta("1h") for s in specs)
    assert len({s.name for s in specs}) == 3


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ({"drop": {"p": 1.5}}, "noise.drop.p: must be between 0 and 1, got 1.5"),
        ({"drop": {"per_kind": {"failure": -0.1}}}, "noise.drop.per_kind.failure: must be between 0 and 1"),
        ({"delay": {"dist": "lognormal"}}, "noise.delay.dist: unknown distribution 'lognormal'"),
        ({"delay": {"dist": "uniform", "low": "2h", "high": "1h"}}, "noise.delay.high"),
        ({"delay": {"dist": "fixed", "value": "-1h"}}, "noise.delay.value: must not be negative"),
        ({"delay": {"dist": "fixed", "value": "soon"}}, "noise.delay.value: expected a duration"),
        ({"decoys": {"share": 2}}, "noise.decoys.share: must be between 0 and 1"),
        ({"end_jitter": {"dist": "cauchy", "scale": "1h"}}, "noise.end_jitter.dist"),
        ({"spurious": {"per_day": -1}}, "noise.spurious.per_day"),
        ({"dropp": 0.1}, "noise.dropp: unknown field"),
    ],
)
def test_bad_specs_name_the_field(spec: dict, message: str) -> None:
    with pytest.raises(ConfigError) as err:
        load_noise(spec)
    assert message in str(err.value)


def test_bad_yaml_file_names_the_file(tmp_path: Path) -> None:
    p = tmp_path / "n.yaml"
    p.write_text("drop: {p: 3}\n")
    with pytest.raises(ConfigError) as err:
        load_noise(p)
    assert str(p) in str(err.value) and "noise.drop.p" in str(err.value)
