"""Simulated radar-relay fleet: scenario config, streaming generator and cached generation.

``load_scenario`` validates a scenario (YAML file, dict or defaults);
``generate`` writes into a folder:

- ``fleet.log``: all nodes' lines in global time order, one line per message,
  ``2026-01-05T00:00:03.123Z relay-07 sweepd[1234]: message``
- ``incidents.csv``: the truth, ``id, entity, start, end, kind, mode, precursor_start``
  (kind ``failure`` with start = onset, end = recovery, precursor_start empty when
  the failure had no visible precursor and possibly before the scenario start;
  kind ``other`` for maintenance, power dips, firmware roll-outs, network blips)
- ``scenario.yaml``: the scenario actually used (with its seed)
- ``templates.csv``: generator template id, daemon, role, mode, template text
- ``line_templates.npy`` / ``line_incidents.npy``: per line of ``fleet.log``
  its generator template id and the incident id that emitted it (-1 = routine)

Lines are generated one day at a time from per-day random streams
(``SeedSequence(seed, spawn_key=(stream, day))``), so memory is bounded by one
day of traffic and the bytes do not depend on how the run is chunked.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import yaml
from logtrial.simulation.config import Scenario, load_scenario
from logtrial.simulation.scenario import (
    DAEMONS,
    FIXED_PIDS,
    MISC_WEIGHTS,
    MS_DAY,
    MS_HOUR,
    MS_MIN,
    N_PARAMS,
    TEMPLATE_DAEMON,
    TEMPLATES,
    TID,
    VARIANTS,
    Plan,
    plan_fleet,
    render_messages,
)

LINE_REGEX = r"^(?P<ts>\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z) (?P<host>\S+) (?P<daemon>[\w.-]+)\[(?P<pid>\d+)\]: (?P<content>.*)$"
# Drain settings for the `radar-relay` registry entry: every digit run (with
# dotted parts, e.g. versions, addresses, decimals) is a variable.
RECOMMENDED_MINER: dict[str, Any] = {"kind": "drain", "masks": [r"\d+(?:\.\d+)*"], "similarity": 0.5, "depth": 4}
INCIDENT_COLUMNS = ["id", "entity", "start", "end", "kind", "mode", "precursor_start"]

_ROUTINE_SHARE_SWEEP = 0.9  # share of routine lines from the sweep pipeline (3 lines per sweep)
_SWEEP_SPAN_MS = 6_000  # a sweep's three lines fit in this span; sweeps do not start closer to a day's end


# ---------------------------------------------------------------- generator


@dataclass
class SimResult:
    """Where a simulation was written and what it holds."""

    out_dir: Path
    log_path: Path
    incidents_path: Path
    scenario_path: Path
    templates_path: Path
    line_templates_path: Path
    line_incidents_path: Path
    lines: int
    failures: int
    others: int
    templates_used: int
    log_sha256: str


def host_names(nodes: int) -> list[str]:
    """Host names relay-01, relay-02, ... (zero-padded to the fleet size)."""
    width = max(2, len(str(nodes)))
    return [f"relay-{i + 1:0{width}d}" for i in range(nodes)]


def _cycle(t: np.ndarray) -> np.ndarray:
    """Daily load factor in [0, 1], peaking at 14:00 UTC."""
    hour = (t % MS_DAY) / MS_HOUR
    return 0.5 * (1.0 + np.sin(2.0 * np.pi * (hour - 8.0) / 24.0))


def _thinned(rng: np.random.Generator, rate_h: np.ndarray, amp: float, d0: int, d1: int) -> tuple[np.ndarray, np.ndarray]:
    """(node, time) of Poisson events per node on [d0, d1) with rate modulated by the daily cycle."""
    if d1 <= d0:
        z = np.zeros(0, dtype=np.int64)
        return z, z
    hours = (d1 - d0) / MS_HOUR
    counts = rng.poisson(rate_h * (1.0 + amp) * hours)
    node = np.repeat(np.arange(len(rate_h)), counts)
    t = rng.integers(d0, d1, len(node))
    accept = rng.random(len(node)) * (1.0 + amp) < 1.0 + amp * (2.0 * _cycle(t) - 1.0)
    return node[accept], t[accept]


def _overlapping(intervals: np.ndarray, d0: int, d1: int) -> np.ndarray:
    """Rows of an interval array (node, start, end, ...) that overlap [d0, d1)."""
    if len(intervals) == 0:
        return intervals
    return intervals[(intervals[:, 1] < d1) & (intervals[:, 2] > d0)]


def _in_intervals(node: np.ndarray, t: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Boolean mask: the (node, t) falls in one of the (node, start, end) rows."""
    hit = np.zeros(len(t), dtype=bool)
    for r in rows:
        hit |= (node == r[0]) & (t >= r[1]) & (t < r[2])
    return hit


class _DayMaker:
    """Builds one day of lines (all nodes) from the scenario, its plan and per-day seeds."""

    def __init__(self, sc: Scenario, plan: Plan) -> None:
        self.sc = sc
        self.plan = plan
        n = sc.nodes
        self.period = int(round(sc.health_period_minutes * MS_MIN))
        self.misc_ids = np.array([TID[k] for k in MISC_WEIGHTS])
        w = np.array(list(MISC_WEIGHTS.values()))
        self.misc_p = w / w.sum()
        # drift: background weights move towards a seeded reshuffle of themselves
        drng = np.random.default_rng(np.random.SeedSequence(sc.seed, spawn_key=(4,)))
        self.misc_p_late = drng.permutation(self.misc_p)
        self.variant_pairs = np.array([[TID[a], TID[b]] for a, b in VARIANTS], dtype=np.int64)
        # pid of (node, daemon) after e epochs: base + e * step (mod range)
        prng = np.random.default_rng(np.random.SeedSequence(sc.seed, spawn_key=(3,)))
        nd = len(DAEMONS)
        self.pid_base = prng.integers(0, 31000, n * nd)
        self.pid_step = prng.integers(1000, 9000, n * nd)
        fixed = np.full(nd, -1)
        for name, pid in FIXED_PIDS.items():
            fixed[DAEMONS.index(name)] = pid
        self.fixed_pid = fixed
        r = plan.restarts
        if len(r):
            every = r[:, 1] < 0
            single = r[~every]
            expanded = [single]
            for d in range(nd):
                e = r[every].copy()
                e[:, 1] = d
                expanded.append(e)
            allr = np.concatenate(expanded)
            keys = ((allr[:, 0] * nd + allr[:, 1]) << 42) | np.maximum(allr[:, 2] - plan.start_ms, 0)
            self.restart_keys = np.sort(keys)
        else:
            self.restart_keys = np.zeros(0, dtype=np.int64)
        self.hosts = pa.array(host_names(n))
        self.daemons = pa.array(list(DAEMONS))

    def events(self, day: int) -> tuple[np.ndarray, ...]:
        """Time-sorted (t, node, tpl, params, inc) of one day."""
        sc, plan = self.sc, self.plan
        rng = np.random.default_rng(np.random.SeedSequence(sc.seed, spawn_key=(1, day)))
        d0 = plan.start_ms + day * MS_DAY
        d1 = min(d0 + MS_DAY, plan.end_ms)
        amp = sc.daily_cycle
        rate = sc.line_rate * plan.node_rate

        # sweep pipeline: received -> compressed -> forwarded
        s_node, s_t = _thinned(rng, rate * _ROUTINE_SHARE_SWEEP / 3.0, amp, d0, max(d0, d1 - _SWEEP_SPAN_MS))
        order = np.lexsort((s_t, s_node))
        s_node, s_t = s_node[order], s_t[order]
        n_s = len(s_t)
        sweep_id = day * 1_000_000 + np.arange(n_s)
        t_pack = s_t + rng.integers(200, 3000, n_s)
        t_fwd = t_pack + rng.integers(50, 2000, n_s)
        sw_t = np.concatenate([s_t, t_pack, t_fwd])
        sw_node = np.tile(s_node, 3)
        sw_tpl = np.repeat([TID["sweep_rx"], TID["sweep_pack"], TID["sweep_fwd"]], n_s)
        sw_par = np.zeros((3 * n_s, N_PARAMS), dtype=np.int64)
        sw_par[:, 0] = np.tile(sweep_id, 3)

        # benign background messages
        m_node, m_t = _thinned(rng, rate * (1.0 - _ROUTINE_SHARE_SWEEP), amp, d0, d1)
        m_tpl = rng.choice(self.misc_ids, len(m_t), p=self.misc_weights(d0, d1))
        m_par = np.zeros((len(m_t), N_PARAMS), dtype=np.int64)

        h_node, h_t, h_par = self._health(rng, d0, d1)

        i0, i1 = np.searchsorted(plan.lines_t, [d0, d1])
        t = np.concatenate([sw_t, m_t, h_t, plan.lines_t[i0:i1]])
        node = np.concatenate([sw_node, m_node, h_node, plan.lines_node[i0:i1]])
        tpl = np.concatenate([sw_tpl, m_tpl, np.full(len(h_t), TID["health"]), plan.lines_tpl[i0:i1]])
        par = np.concatenate([sw_par, m_par, h_par, plan.lines_params[i0:i1]])
        inc = np.concatenate([np.full(len(t) - (i1 - i0), -1), plan.lines_inc[i0:i1]])

        keep = np.ones(len(t), dtype=bool)
        down = _overlapping(plan.uplink_down, d0, d1)
        if len(down):
            fwd = (tpl == TID["sweep_fwd"]) & _in_intervals(node, t, down)
            tpl[fwd] = TID["sweep_fwd_fail"]
        stopped = _overlapping(plan.pack_down, d0, d1)
        if len(stopped):
            pipeline = np.isin(tpl, [TID["sweep_pack"], TID["sweep_fwd"], TID["sweep_fwd_fail"]]) & (inc < 0)
            keep &= ~(pipeline & _in_intervals(node, t, stopped))
        for r in _overlapping(plan.silence, d0, d1):
            keep &= ~((node == r[0]) & (t >= r[1]) & (t < r[2]) & (inc != r[3]))
        if sc.drift.enabled:
            self._reword(np.random.default_rng(np.random.SeedSequence(sc.seed, spawn_key=(5, day))), t, node, tpl)
        order = np.argsort(t[keep], kind="stable")
        return t[keep][order], node[keep][order], tpl[keep][order], par[keep][order], inc[keep][order]

    def misc_weights(self, d0: int, d1: int) -> np.ndarray:
        """Background message probabilities of a day: fixed, or drifting linearly over the scenario."""
        if not self.sc.drift.enabled:
            return self.misc_p
        plan = self.plan
        f = self.sc.drift.mix_shift * ((d0 + d1) / 2 - plan.start_ms) / max(plan.end_ms - plan.start_ms, 1)
        p = (1.0 - f) * self.misc_p + f * self.misc_p_late
        return p / p.sum()

    def _reword(self, rng: np.random.Generator, t: np.ndarray, node: np.ndarray, tpl: np.ndarray) -> None:
        """Replace routine lines by their reworded forms on nodes that run the firmware bringing them (in place)."""
        share = self.sc.drift.variant_share
        u = rng.random(len(t))
        for j, (base, variant) in enumerate(self.variant_pairs):
            switch = self.plan.variant_switch[j]
            hit = (tpl == base) & (t >= switch[node]) & (u < share)
            tpl[hit] = variant

    def _health(self, rng: np.random.Generator, d0: int, d1: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Health checks of every node on [d0, d1): times on the node's period grid plus readings."""
        plan, p = self.plan, self.period
        rel0 = d0 - plan.start_ms - plan.node_phase - 1500
        rel1 = d1 - plan.start_ms - plan.node_phase
        k_lo = -(-rel0 // p)
        k_hi = -(-rel1 // p)
        counts = np.maximum(k_hi - k_lo, 0)
        node = np.repeat(np.arange(len(counts)), counts)
        starts = np.repeat(k_lo - np.concatenate([[0], np.cumsum(counts)[:-1]]), counts)
        k = starts + np.arange(len(node))
        jitter = (k * 7919 + node * 104729) % 1500  # depends only on (node, k): chunk-independent
        t = plan.start_ms + plan.node_phase[node] + k * p + jitter
        ok = (t >= d0) & (t < d1)
        node, t = node[ok], t[ok]
        n = len(t)
        c = _cycle(t)
        base = plan.node_base[node]
        years = (t - plan.start_ms) / (365.25 * MS_DAY)
        cpu = np.clip(np.round(10 + 45 * c + rng.normal(0, 5, n)), 1, 99)
        mem = np.clip(base[:, 0] + rng.normal(0, 1.5, n), 5, 99)
        disk = np.clip(np.round(base[:, 1] + 25 * years + rng.normal(0, 0.3, n)), 1, 99)
        temp = 400 + 5 * base[:, 2] + 80 * c + rng.normal(0, 8, n)
        for n_i, mode, ps, onset in plan.trends:
            if mode not in ("memory_leak", "cooling_fault") or onset <= d0 or ps >= d1:
                continue
            sel = (node == n_i) & (t >= ps) & (t < onset)
            u = (t[sel] - ps) / (onset - ps)
            if mode == "memory_leak":
                mem[sel] = mem[sel] + (97 - mem[sel]) * u**2
            else:
                temp[sel] = temp[sel] + 350 * u**2
        par = np.zeros((n, N_PARAMS), dtype=np.int64)
        par[:, 0], par[:, 1], par[:, 2] = cpu, np.round(mem), disk
        par[:, 3] = np.round(temp)
        return node, t, par

    def pids(self, node: np.ndarray, tpl: np.ndarray, t: np.ndarray) -> np.ndarray:
        """Process id of each line's daemon: changes with every restart of that daemon on that node."""
        daemon = TEMPLATE_DAEMON[tpl]
        nd = node * len(DAEMONS) + daemon
        key = (nd << 42) | (t - self.plan.start_ms)
        epoch = np.searchsorted(self.restart_keys, key, side="right") - np.searchsorted(self.restart_keys, nd << 42)
        pid = 400 + (self.pid_base[nd] + epoch * self.pid_step[nd]) % 31000
        fixed = self.fixed_pid[daemon]
        return np.where(fixed >= 0, fixed, pid)

    def lines(self, day: int, t, node, tpl, par, pid) -> bytes:
        """The day's lines as UTF-8 bytes, each ending in a newline."""
        rng = np.random.default_rng(np.random.SeedSequence(self.sc.seed, spawn_key=(2, day)))
        if len(t) == 0:
            return b""
        msg = render_messages(tpl, par, rng)
        ts = pc.strftime(pa.array(t, type=pa.timestamp("ms")), format="%Y-%m-%dT%H:%M:%S")
        out = pc.binary_join_element_wise(
            ts, pa.scalar("Z "), self.hosts.take(pa.array(node)), pa.scalar(" "),
            self.daemons.take(pa.array(TEMPLATE_DAEMON[tpl])), pa.scalar("["), pc.cast(pa.array(pid), pa.string()),
            pa.scalar("]: "), msg, pa.scalar("\n"), pa.scalar(""),
        )
        offsets = np.frombuffer(out.buffers()[1], dtype=np.int32)[out.offset : out.offset + len(out) + 1]
        return out.buffers()[2].to_pybytes()[offsets[0] : offsets[-1]]


def _iso_ms(ms: np.ndarray) -> np.ndarray:
    """ms since the epoch as ISO-8601 UTC strings with milliseconds."""
    return np.char.add(np.datetime_as_string(np.asarray(ms, dtype=np.int64).astype("datetime64[ms]"), unit="ms"), "Z")


def incidents_frame(sc: Scenario, plan: Plan) -> pd.DataFrame:
    """The truth table written to incidents.csv."""
    hosts = np.array(host_names(sc.nodes), dtype=object)
    rows = plan.incidents
    ps = [r["precursor_start"] for r in rows]
    has_ps = np.array([p is not None for p in ps], dtype=bool)
    ps_ms = np.array([p if p is not None else 0 for p in ps], dtype=np.int64)
    ps_txt = np.where(has_ps, _iso_ms(ps_ms), "") if rows else np.zeros(0, dtype=object)
    return pd.DataFrame({
        "id": np.array([r["id"] for r in rows], dtype=np.int64),
        "entity": hosts[np.array([r["node"] for r in rows], dtype=np.int64)] if rows else np.zeros(0, dtype=object),
        "start": _iso_ms(np.array([r["start"] for r in rows], dtype=np.int64)),
        "end": _iso_ms(np.array([r["end"] for r in rows], dtype=np.int64)),
        "kind": [r["kind"] for r in rows],
        "mode": [r["mode"] for r in rows],
        "precursor_start": ps_txt,
    }, columns=INCIDENT_COLUMNS)


def templates_frame() -> pd.DataFrame:
    """The generator's template catalogue (id, daemon, role, mode, template)."""
    return pd.DataFrame({
        "id": [t.id for t in TEMPLATES], "daemon": [t.daemon for t in TEMPLATES], "role": [t.role for t in TEMPLATES],
        "mode": [t.mode for t in TEMPLATES], "template": [t.text for t in TEMPLATES],
    })


def _write_npy(raw_path: Path, final: Path, dtype: np.dtype, n: int) -> None:
    """Wrap a raw little-endian array file into a .npy file."""
    part = final.with_name(final.name + ".part")
    with open(part, "wb") as f, open(raw_path, "rb") as src:
        np.lib.format.write_array_header_1_0(f, {"descr": np.lib.format.dtype_to_descr(dtype), "fortran_order": False, "shape": (n,)})
        shutil.copyfileobj(src, f, 1 << 20)
    raw_path.unlink()
    os.replace(part, final)


def _progress(total: int, enabled: bool):
    """A progress bar over days (or None)."""
    if not enabled:
        return None
    try:
        from tqdm import tqdm
    except ImportError:
        return None
    return tqdm(total=total, unit="day", desc="simulate", file=sys.stderr)


def generate(scenario: Scenario, out_dir: Path, progress: bool = False, per_node: bool = False) -> SimResult:
    """Write a simulated fleet's log, truth and config into out_dir (with ``per_node``, also nodes/<host>.log)."""
    sc = load_scenario(scenario) if not isinstance(scenario, Scenario) else scenario
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    plan = plan_fleet(sc)
    maker = _DayMaker(sc, plan)
    n_days = -(-(plan.end_ms - plan.start_ms) // MS_DAY)

    log_path = out_dir / "fleet.log"
    log_part = out_dir / "fleet.log.part"
    tpl_raw = out_dir / "line_templates.raw.part"
    inc_raw = out_dir / "line_incidents.raw.part"
    digest = hashlib.sha256()
    n_lines = 0
    used = np.zeros(len(TEMPLATES), dtype=np.int64)
    bar = _progress(n_days, progress)
    node_files = _NodeFiles(out_dir, host_names(sc.nodes)) if per_node else None
    with open(log_part, "wb") as log, open(tpl_raw, "wb") as ftpl, open(inc_raw, "wb") as finc:
        for day in range(n_days):
            t, node, tpl, par, inc = maker.events(day)
            data = maker.lines(day, t, node, tpl, par, maker.pids(node, tpl, t))
            log.write(data)
            if node_files is not None:
                node_files.write(data, node)
            digest.update(data)
            ftpl.write(tpl.astype("<i2").tobytes())
            finc.write(inc.astype("<i4").tobytes())
            used += np.bincount(tpl, minlength=len(TEMPLATES))
            n_lines += len(t)
            if bar is not None:
                bar.update(1)
    if bar is not None:
        bar.close()
    os.replace(log_part, log_path)
    if node_files is not None:
        node_files.publish()
    _write_npy(tpl_raw, out_dir / "line_templates.npy", np.dtype("<i2"), n_lines)
    _write_npy(inc_raw, out_dir / "line_incidents.npy", np.dtype("<i4"), n_lines)

    incidents = incidents_frame(sc, plan)
    _write_text(out_dir / "incidents.csv", incidents.to_csv(index=False, lineterminator="\n"))
    _write_text(out_dir / "templates.csv", templates_frame().to_csv(index=False, lineterminator="\n"))
    header = "# Scenario used by `logtrial simulate` (load with logtrial.simulation.simulate.load_scenario).\n"
    _write_text(out_dir / "scenario.yaml", header + yaml.safe_dump(sc.canonical(), sort_keys=False))
    return SimResult(
        out_dir=out_dir, log_path=log_path, incidents_path=out_dir / "incidents.csv",
        scenario_path=out_dir / "scenario.yaml", templates_path=out_dir / "templates.csv",
        line_templates_path=out_dir / "line_templates.npy", line_incidents_path=out_dir / "line_incidents.npy",
        lines=n_lines, failures=int((incidents["kind"] == "failure").sum()),
        others=int((incidents["kind"] == "other").sum()), templates_used=int((used > 0).sum()),
        log_sha256=digest.hexdigest(),
    )


class _NodeFiles:
    """One log file per node under ``nodes/``, written beside the fleet log (same lines, same order)."""

    def __init__(self, out_dir: Path, hosts: list[str]):
        self.folder = out_dir / "nodes"
        self.folder.mkdir(parents=True, exist_ok=True)
        self.hosts = hosts
        self.handles = [open(self.folder / f"{h}.log.part", "wb") for h in hosts]

    def write(self, data: bytes, node: np.ndarray) -> None:
        """Append one day's lines, each to its node's file."""
        lines = data.split(b"\n")[: len(node)]
        order = np.argsort(node, kind="stable")
        bounds = np.searchsorted(node[order], np.arange(len(self.hosts) + 1))
        for i, fh in enumerate(self.handles):
            sel = order[bounds[i]: bounds[i + 1]]
            if len(sel):
                fh.write(b"\n".join(lines[j] for j in sel) + b"\n")

    def publish(self) -> None:
        """Close the files and give them their final names."""
        for h, fh in zip(self.hosts, self.handles):
            fh.close()
            os.replace(self.folder / f"{h}.log.part", self.folder / f"{h}.log")


def _write_text(path: Path, text: str) -> None:
    """Write a text file via a temporary name."""
    part = path.with_name(path.name + ".part")
    part.write_text(text, encoding="utf-8")
    os.replace(part, path)


def ensure_generated(scenario: Scenario, cache_dir: Path, progress: bool = False) -> Path:
    """Folder holding the generated scenario under cache_dir (generating it once, atomically)."""
    cache_dir = Path(cache_dir)
    final = cache_dir / f"radar-relay-{scenario.key()[:16]}"
    if (final / "fleet.log").is_file():
        return final
    cache_dir.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=".radar-relay-", dir=cache_dir))
    try:
        generate(scenario, tmp, progress=progress)
        try:
            os.rename(tmp, final)
        except OSError:
            if not (final / "fleet.log").is_file():
                raise
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    return final


def cli_simulate(config_path: str | None, out: str, seed: int | None = None, progress: bool = False,
                 per_node: bool = False) -> int:
    """Run `logtrial simulate`: generate the scenario into `out`, print a summary, return the exit code."""
    sc = load_scenario(config_path)
    if seed is not None:
        sc = load_scenario({**sc.canonical(), "seed": seed})
    res = generate(sc, Path(out), progress=progress, per_node=per_node)
    print(
        f"wrote {res.lines:,} lines from {sc.nodes} nodes over {sc.days:g} days to {res.log_path}\n"
        f"incidents: {res.failures} failures, {res.others} other anomalies -> {res.incidents_path}\n"
        f"templates used: {res.templates_used}; scenario -> {res.scenario_path}; sha256 {res.log_sha256[:16]}"
    )
    return 0
