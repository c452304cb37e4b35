"""Simulated radar-relay fleet: determinism, statistics of the truth, ingestibility, config errors."""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from logtrial.errors import ConfigError
from logtrial.simulation.scenario import FAILURE_MODES, PRECURSORS, TEMPLATES, plan_fleet
from logtrial.simulation.simulate import (
    LINE_REGEX,
    RECOMMENDED_MINER,
    Scenario,
    ensure_generated,
    generate,
    host_names,
    load_scenario,
)
from scipy import stats

ROOT = Path(__file__).resolve().parents[1]
QUIET = {"failures": {"rate_per_node_year": 0.0},
         "anomalies": {"maintenance_per_node_year": 0.0, "power_dips_per_year": 0.0,
                       "firmware_rollouts_per_year": 0.0, "network_blips_per_node_year": 0.0}}
BUSY = {"days": 20, "nodes": 12, "failures": {"rate_per_node_year": 40.0},
        "anomalies": {"maintenance_per_node_year": 20.0, "power_dips_per_year": 120.0,
                      "firmware_rollouts_per_year": 30.0, "network_blips_per_node_year": 30.0},
        "drift": {"enabled": True}}
ROLE = np.array([t.role for t in TEMPLATES])


def sha256(path: Path) -> str:
    """SHA-256 of a file."""
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def busy(tmp_path_factory) -> tuple[Scenario, object]:
    """A small fleet with many incidents of every kind (every template occurs)."""
    sc = load_scenario(BUSY)
    return sc, generate(sc, tmp_path_factory.mktemp("busy"))


def read_truth(res) -> tuple[pd.DataFrame, np.ndarray, np.ndarray, np.ndarray]:
    """(incidents, per-line ms timestamps, template ids, incident ids) of a generated folder."""
    inc = pd.read_csv(res.incidents_path, dtype=str, keep_default_na=False)
    ms = ms_of(pd.Series([l[:24] for l in res.log_path.read_text().splitlines()]))
    return inc, ms, np.load(res.line_templates_path), np.load(res.line_incidents_path)


def ms_of(col: pd.Series) -> np.ndarray:
    """ISO timestamps as int64 ms since the epoch."""
    return pd.to_datetime(col, utc=True).dt.as_unit("ms").astype("int64").to_numpy()


# ------------------------------------------------------------- determinism


def test_same_seed_same_bytes_other_seed_other_bytes(tmp_path: Path) -> None:
    # reference: SHA-256 (FIPS 180-4, via hashlib) of every output file
    cfg = {**BUSY, "days": 5, "nodes": 6}
    a = generate(load_scenario(cfg), tmp_path / "a")
    b = generate(load_scenario(cfg), tmp_path / "b")
    c = generate(load_scenario({**cfg, "seed": 8}), tmp_path / "c")
    for name in ("fleet.log", "incidents.csv", "scenario.yaml", "templates.csv", "line_templates.npy", "line_incidents.npy"):
        assert sha256(tmp_path / "a" / name) == sha256(tmp_path / "b" / name), name
    assert a.log_sha256 == sha256(a.log_path) == b.log_sha256
    assert sha256(c.log_path) != sha256(a.log_path)
    assert not list(tmp_path.glob("*/*.part")), "temporary files left behind"


def test_scenario_file_round_trips_and_example_loads(busy) -> None:
    sc, res = busy
    assert load_scenario(res.scenario_path) == sc
    example = load_scenario(ROOT / "examples" / "scenario.yaml")
    assert example == Scenario()  # the example documents the defaults


def test_ensure_generated_caches_by_config(tmp_path: Path) -> None:
    sc = load_scenario({**QUIET, "days": 1, "nodes": 3})
    first = ensure_generated(sc, tmp_path)
    stamp = (first / "fleet.log").stat().st_mtime_ns
    again = ensure_generated(load_scenario(sc.canonical()), tmp_path)
    assert again == first and (again / "fleet.log").stat().st_mtime_ns == stamp
    other = ensure_generated(load_scenario({**sc.canonical(), "seed": 99}), tmp_path)
    assert other != first
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([first.name, other.name]), "temp folders left"


# ------------------------------------------------------------ line format


def test_every_line_matches_format_and_is_time_ordered(busy) -> None:
    sc, res = busy
    # reference: ISO 8601 UTC timestamps with milliseconds, parsed by pandas with an explicit format
    rx = re.compile(LINE_REGEX)
    lines = res.log_path.read_text().splitlines()
    assert len(lines) == res.lines == len(np.load(res.line_templates_path))
    parsed = [rx.match(l) for l in lines]
    assert all(parsed)
    ts = pd.to_datetime(pd.Series([m["ts"] for m in parsed]), format="%Y-%m-%dT%H:%M:%S.%fZ", utc=True)
    assert ts.is_monotonic_increasing
    assert ts.iloc[0] >= pd.Timestamp(sc.start) and ts.iloc[-1] < pd.Timestamp(sc.start) + pd.Timedelta(days=sc.days)
    assert set(m["host"] for m in parsed) <= set(host_names(sc.nodes))
    # a daemon keeps its pid until it restarts: far fewer pids than lines
    pids = pd.DataFrame({"h": [m["host"] for m in parsed], "d": [m["daemon"] for m in parsed], "p": [m["pid"] for m in parsed]})
    assert pids.drop_duplicates().shape[0] < len(lines) / 20


def test_ingests_with_zero_quarantine_and_drain_parse_score(busy, tmp_path: Path) -> None:
    # reference: Drain (He et al., ICWS 2017) as implemented in logtrial.data.mining, whose output is
    # checked line for line against the drain3 library in tests/test_mining.py; grouping accuracy
    # as defined by Zhu et al., ICSE-SEIP 2019.
    from logtrial.data.ingest import ingest_entry, read_events
    from logtrial.data.parse_score import grouping_accuracy
    from logtrial.data.registry import parse_entry

    sc, res = busy
    # a registry entry shaped like `radar-relay`, generating on demand into the cache
    entry = parse_entry("radar-relay-test", {
        "system": "RadarRelay", "generator": BUSY, "logs": ["fleet.log"],
        "format": {"regex": LINE_REGEX, "entity": "host",
                   "timestamp": {"fields": ["ts"], "format": "%Y-%m-%dT%H:%M:%S.%fZ"}},
        "labels": {"scheme": "incidents", "file": "incidents.csv"}, "miner": RECOMMENDED_MINER,
    }, "test")
    out = ingest_entry(entry, tmp_path)
    cached = ensure_generated(sc, tmp_path / "generated")
    assert sha256(cached / "fleet.log") == res.log_sha256  # same config through the cache: same bytes
    assert out.manifest["quarantined"] == 0 and out.manifest["rows"] == res.lines
    events = read_events(out.events)
    truth = np.load(res.line_templates_path)
    # the busy scenario uses every template except reworded forms of roll-outs that did not happen
    assert len(np.unique(truth)) == res.templates_used
    assert set(np.flatnonzero(ROLE != "variant")) <= set(np.unique(truth.astype(np.int64)))
    assert 30 <= out.manifest["templates"] <= 150  # issue [B]: a few dozen to ~150 templates
    score = grouping_accuracy(truth, events["event"].to_numpy())
    assert score >= 0.95, score
    assert events["entity"].isin(host_names(sc.nodes)).all()


def test_cli_simulate_writes_and_overrides_seed(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    from logtrial.simulation.simulate import cli_simulate

    cfg = tmp_path / "scenario.yaml"
    cfg.write_text("nodes: 3\ndays: 1\nseed: 5\n")
    assert cli_simulate(str(cfg), str(tmp_path / "out"), seed=11, progress=False) == 0
    assert load_scenario(tmp_path / "out" / "scenario.yaml").seed == 11
    assert "lines from 3 nodes" in capsys.readouterr().out


def test_registry_entry_matches_generator_format() -> None:
    from logtrial.data.registry import load_registry

    registry = load_registry()
    if "radar-relay" not in registry:
        pytest.skip("datasets.yaml has no `radar-relay` entry yet")
    entry = registry["radar-relay"]
    assert entry.format.regex == LINE_REGEX
    assert entry.miner.masks == RECOMMENDED_MINER["masks"]
    assert entry.logs == ["fleet.log"]


# --------------------------------------------------------------- the truth


def test_incident_file_is_read_by_the_incident_reader(busy) -> None:
    from logtrial.labels.incidents import read_incidents

    sc, res = busy
    inc = read_incidents(res.incidents_path)
    assert set(inc["kind"]) == {"failure", "other"}
    assert set(inc.loc[inc["kind"] == "failure", "mode"]) == set(FAILURE_MODES)
    assert set(inc.loc[inc["kind"] == "other", "mode"]) == {"maintenance", "power_dip", "firmware_rollout", "network_blip"}
    assert (inc["id"].to_numpy() == np.arange(1, len(inc) + 1)).all()


def test_incident_lines_lie_inside_their_intervals(busy) -> None:
    sc, res = busy
    inc, ms, tpl, line_inc = read_truth(res)
    start, end = ms_of(inc["start"]), ms_of(inc["end"])
    has_ps = (inc["precursor_start"] != "").to_numpy()
    first = start.copy()
    first[has_ps] = ms_of(inc.loc[has_ps, "precursor_start"])
    row = line_inc[line_inc >= 0] - 1
    t = ms[line_inc >= 0]
    assert (t >= np.minimum(first, start)[row]).all() and (t <= end[row]).all()
    # routine traffic (pipeline, background, health, degraded forwards) never uses an incident template
    assert not np.isin(ROLE[tpl[line_inc < 0]], ["precursor", "signature", "boot", "recovery", "event", "decoy"]).any()


def test_node_is_silent_while_down(busy) -> None:
    sc, res = busy
    inc, ms, tpl, line_inc = read_truth(res)
    hosts = np.array([l.split(" ", 2)[1] for l in res.log_path.read_text().splitlines()])
    down = inc[(inc["kind"] == "failure") & inc["mode"].isin(["disk_wear", "cooling_fault"])]
    assert len(down)
    for _, r in down.iterrows():
        own = line_inc == int(r["id"])
        if not (own & (ROLE[tpl] == "boot")).any():
            continue  # still down when the scenario ends
        sig_end = ms[own & (ROLE[tpl] == "signature")].max()
        boot = ms[own & (ROLE[tpl] == "boot")].min()
        between = (hosts == r["entity"]) & (ms > sig_end) & (ms < boot)
        assert between.sum() == 0, r["id"]


def test_precursors_start_inside_lead_time_range(busy) -> None:
    sc, res = busy
    inc, ms, tpl, line_inc = read_truth(res)
    lo, hi = sc.failures.lead_time_hours
    fail = inc[(inc["kind"] == "failure") & (inc["precursor_start"] != "")]
    assert len(fail) >= 10
    lead_h = (ms_of(fail["start"]) - ms_of(fail["precursor_start"])) / 3.6e6
    assert ((lead_h >= lo - 1e-6) & (lead_h <= hi + 1e-6)).all()
    t0 = int(pd.Timestamp(sc.start).value // 10**6)
    for (_, r), ps, onset in zip(fail.iterrows(), ms_of(fail["precursor_start"]), ms_of(fail["start"])):
        # precursor templates before the onset (some signatures reuse one at the onset itself)
        own = (line_inc == int(r["id"])) & np.isin(tpl, PRECURSORS[r["mode"]]) & (ms < onset)
        if ps >= t0:  # the first precursor line is the recorded precursor start
            assert ms[own].min() == ps
        assert (ms[own] >= ps).all()


def test_failure_statistics_match_configuration(tmp_path: Path) -> None:
    # reference: scipy.stats (Poisson interval, chi-square goodness of fit, binomial test,
    # Kolmogorov-Smirnov against the log-uniform lead-time law)
    rate, nodes, days, vis = 2.0, 200, 365.0, 0.7
    cfg = {**QUIET, "nodes": nodes, "days": days, "line_rate": 0.01, "health_period_minutes": 1440,
           "failures": {"rate_per_node_year": rate, "precursor_visibility": vis, "precursor_peak_per_hour": 0.2,
                        "lead_time_hours": [3, 200], "mode_mix": {"disk_wear": 1, "uplink_degradation": 2,
                                                                  "memory_leak": 3, "cooling_fault": 4}}}
    res = generate(load_scenario(cfg), tmp_path)
    inc = pd.read_csv(res.incidents_path, dtype=str, keep_default_na=False)
    fail = inc[inc["kind"] == "failure"]
    expected = rate * nodes * days / 365.25
    lo, hi = stats.poisson.interval(0.999, expected)
    assert lo <= len(fail) <= hi, (len(fail), expected)
    counts = fail["mode"].value_counts().reindex(list(FAILURE_MODES)).to_numpy()
    assert stats.chisquare(counts, len(fail) * np.array([1, 2, 3, 4]) / 10).pvalue > 0.001
    visible = int((fail["precursor_start"] != "").sum())
    assert stats.binomtest(visible, len(fail), vis).pvalue > 0.001
    lead_h = (ms_of(fail.loc[fail["precursor_start"] != "", "start"])
              - ms_of(fail.loc[fail["precursor_start"] != "", "precursor_start"])) / 3.6e6
    assert stats.kstest(lead_h, stats.loguniform(3, 200).cdf).pvalue > 0.001


def test_failure_count_over_many_seeds_is_poisson() -> None:
    # reference: scipy.stats.poisson; index of dispersion (variance / mean) of Poisson counts is 1,
    # and (n - 1) * dispersion follows chi-square with n - 1 degrees of freedom
    counts = []
    for seed in range(60):
        sc = load_scenario({**QUIET, "seed": seed, "nodes": 20, "days": 365.25, "failures": {"rate_per_node_year": 1.5}})
        counts.append(sum(r["kind"] == "failure" for r in plan_fleet(sc).incidents))
    counts = np.array(counts)
    n = len(counts)
    assert abs(counts.mean() - 30.0) < 4 * np.sqrt(30.0 / n)
    d = (n - 1) * counts.var(ddof=1) / counts.mean()
    assert stats.chi2.ppf(0.0005, n - 1) < d < stats.chi2.ppf(0.9995, n - 1)


def test_health_checks_and_routine_rate_follow_configuration(tmp_path: Path) -> None:
    sc = load_scenario({**QUIET, "nodes": 8, "days": 6, "line_rate": 6.0, "health_period_minutes": 20})
    res = generate(sc, tmp_path)
    lines = res.log_path.read_text().splitlines()
    tpl = np.load(res.line_templates_path)
    hosts = np.array([l.split(" ", 2)[1] for l in lines])
    ms = ms_of(pd.Series([l[:24] for l in lines]))
    health = ROLE[tpl] == "health"
    per_node = pd.Series(hosts[health]).value_counts()
    # one check per period per node (the configured period; exact up to the partial first/last period)
    assert ((per_node - 6 * 24 * 3).abs() <= 1).all() and len(per_node) == 8
    for h in host_names(8):
        gaps = np.diff(np.sort(ms[health & (hosts == h)]))
        assert abs(np.median(gaps) - 20 * 60_000) <= 1500
    # routine lines: Poisson with the configured rate (times the plan's per-node multipliers);
    # sweeps come as triples, so the variance is 9x the sweep rate plus the background rate
    plan = plan_fleet(sc)
    mean = 6.0 * plan.node_rate.sum() * 24 * 6
    var = 9 * 0.3 * mean + 0.1 * mean
    routine = int((~health).sum())
    assert abs(routine - mean) < 4.5 * np.sqrt(var), (routine, mean)
    # daily load cycle: busier at the 14:00 UTC peak than at 02:00 (common practice: diurnal load)
    hour = (ms[~health] // 3_600_000) % 24
    assert (np.isin(hour, [13, 14, 15]).sum()) > 2 * (np.isin(hour, [1, 2, 3]).sum())


def test_decoy_similarity_controls_lookalike_lines(tmp_path: Path) -> None:
    shares = {}
    for sim in (0.0, 1.0):
        res = generate(load_scenario({**BUSY, "days": 10, "failures": {"rate_per_node_year": 0.0},
                                      "anomalies": {**BUSY["anomalies"], "decoy_similarity": sim}}), tmp_path / str(sim))
        tpl, line_inc = np.load(res.line_templates_path), np.load(res.line_incidents_path)
        roles = ROLE[tpl[line_inc >= 0]]
        shares[sim] = ((roles == "precursor").sum(), (roles == "decoy").sum())
    assert shares[0.0][0] == 0 and shares[0.0][1] > 20
    assert shares[1.0][1] == 0 and shares[1.0][0] > 20


def test_precursor_rate_ramps_up_towards_failure(busy) -> None:
    sc, res = busy
    inc, ms, tpl, line_inc = read_truth(res)
    early = late = 0
    for _, r in inc[(inc["kind"] == "failure") & (inc["precursor_start"] != "")].iterrows():
        ps, onset = ms_of(pd.Series([r["precursor_start"], r["start"]]))
        own = (line_inc == int(r["id"])) & (ROLE[tpl] == "precursor") & (ms > ps)
        u = (ms[own] - ps) / (onset - ps)
        early += int((u < 1 / 3).sum())
        late += int((u >= 2 / 3).sum())
    # ramp 0.1 + 0.9 u^2 of the peak rate: expected late/early ratio 5.5
    assert late > 3 * early


# ----------------------------------------------------------- bad configs


@pytest.mark.parametrize(
    ("cfg", "needle"),
    [
        ({"nodez": 4}, "unknown field 'nodez'"),
        ({"failures": {"rate": 1}}, "unknown field 'failures.rate'"),
        ({"failures": {"rate_per_node_year": -1}}, "failures.rate_per_node_year"),
        ({"line_rate": -0.5}, "line_rate"),
        ({"anomalies": {"decoy_similarity": 1.5}}, "anomalies.decoy_similarity"),
        ({"failures": {"lead_time_hours": [300, 2]}}, "failures.lead_time_hours"),
        ({"failures": {"mode_mix": {"disk_wear": 1, "psu_fault": 1}}}, "psu_fault"),
        ({"nodes": 0}, "nodes"),
    ],
)
def test_bad_config_names_the_field(cfg: dict, needle: str) -> None:
    with pytest.raises(ConfigError, match=re.escape(needle)):
        load_scenario(cfg)


def test_bad_config_file_names_the_file(tmp_path: Path) -> None:
    path = tmp_path / "scenario.yaml"
    path.write_text("nodes: 4\nfailures:\n  lead_time_hours: [48, 12]\n")
    with pytest.raises(ConfigError, match=r"scenario\.yaml.*lead_time_hours.*reversed"):
        load_scenario(path)
    path.write_text("nodes: 4\nseed: [4\n")
    with pytest.raises(ConfigError, match=r"scenario\.yaml: line 3"):
        load_scenario(path)


def test_per_node_files_hold_exactly_each_nodes_lines(tmp_path: Path) -> None:
    # The per-node layout is the fleet log split by the syslog host field, order kept.
    cfg = {**BUSY, "days": 4, "nodes": 5}
    res = generate(load_scenario(cfg), tmp_path / "sim", per_node=True)
    fleet = res.log_path.read_text().splitlines()
    by_host: dict[str, list[str]] = {}
    for line in fleet:
        by_host.setdefault(line.split(" ", 2)[1], []).append(line)
    files = sorted((tmp_path / "sim" / "nodes").glob("*.log"))
    assert [f.stem for f in files] == sorted(by_host)
    for f in files:
        assert f.read_text().splitlines() == by_host[f.stem]
    assert not list((tmp_path / "sim").rglob("*.part"))
    # The single-file output does not change when per-node files are also written.
    plain = generate(load_scenario(cfg), tmp_path / "plain")
    assert sha256(plain.log_path) == sha256(res.log_path)


# ----- slow drift (firmware roll-outs reword routine messages, the background mix moves) ----------------------
def _day_events(sc_raw: dict, days: range):
    from logtrial.simulation.simulate import _DayMaker

    sc = load_scenario(sc_raw)
    plan = plan_fleet(sc)
    maker = _DayMaker(sc, plan)
    parts = [maker.events(d) for d in days]
    return sc, plan, maker, [np.concatenate([p[i] for p in parts]) for i in (0, 1, 2)]


def test_drift_rewords_only_after_the_nodes_firmware_and_leaves_incidents_alone() -> None:
    from logtrial.simulation.scenario import TID, VARIANTS

    raw = {"nodes": 6, "days": 90, "seed": 3, "anomalies": {"firmware_rollouts_per_year": 24.0}}
    _, plan_off, _, (t_off, node_off, tpl_off) = _day_events(raw, range(0, 90, 3))
    sc, plan, maker, (t, node, tpl) = _day_events({**raw, "drift": {"enabled": True}}, range(0, 90, 3))
    assert plan.incidents == plan_off.incidents  # drift changes messages, not failures or anomalies
    assert not np.isin(tpl_off, [TID[v] for _, v in VARIANTS]).any()  # off: no reworded line at all
    switched = 0
    for j, (base, variant) in enumerate(VARIANTS):
        switch = plan.variant_switch[j]
        is_v = tpl == TID[variant]
        assert (t[is_v] >= switch[node[is_v]]).all()  # never before the node runs the firmware bringing it
        after = (t >= switch[node]) & np.isin(tpl, [TID[base], TID[variant]])
        if after.sum() >= 200:
            switched += 1
            # share of reworded lines after the switch: binomial with p = variant_share (scipy.stats.binomtest)
            k = int(is_v[after].sum())
            assert stats.binomtest(k, int(after.sum()), sc.drift.variant_share).pvalue > 0.001
    assert switched >= 2
    # the background mix moves from its start weights towards the reshuffled ones, linearly in time
    first, last = maker.misc_weights(plan.start_ms, plan.start_ms), maker.misc_weights(plan.end_ms, plan.end_ms)
    np.testing.assert_allclose(first, maker.misc_p)
    np.testing.assert_allclose(last, (1 - sc.drift.mix_shift) * maker.misc_p + sc.drift.mix_shift * maker.misc_p_late)
