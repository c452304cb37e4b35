"""Radar-relay scenario: message template catalogue, vectorised rendering, and the incident plan.

The built-in scenario is a regional weather-radar relay network. Every log
message comes from one template of ``TEMPLATES``; a template names its daemon,
its role (routine traffic, health check, failure precursor, failure signature,
boot, recovery, non-failure event or decoy) and, for incident templates, the
mode it belongs to. Variable parts are written as fields in braces:

- ``{i:LO:HI}`` integer, uniform in [LO, HI]
- ``{d:LO:HI}`` decimal with one place, uniform in [LO, HI]
- ``{p:W:LO:HI}`` zero-padded integer of width W
- ``{ip}`` a private IPv4 address
- ``{b:K}``, ``{bd:K}``, ``{bp:W:K}`` integer / tenths / zero-padded value
  bound by the generator in parameter column K (sweep ids, health readings,
  firmware versions)

``plan_fleet`` lays out, before any routine line is drawn, every failure and
non-failure anomaly of the scenario together with the lines they emit and the
intervals in which they change the node's routine behaviour (silence, degraded
uplink, stopped compressor, daemon restarts).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from logtrial.simulation.config import FAILURE_MODES, MS_DAY, MS_HOUR, MS_MIN, Scenario

OTHER_MODES = ("maintenance", "power_dip", "firmware_rollout", "network_blip")
# Each non-failure anomaly borrows precursor templates of one failure mode
# (with probability `decoy_similarity` per decoy line).
LOOKALIKE = {
    "maintenance": "disk_wear",
    "power_dip": "cooling_fault",
    "firmware_rollout": "memory_leak",
    "network_blip": "uplink_degradation",
}
DAEMONS = ("kernel", "initd", "sweepd", "packd", "uplinkd", "healthd", "diskmon", "fanctl", "fwagent", "timesync", "cron")
FIXED_PIDS = {"kernel": 0, "initd": 1}
N_PARAMS = 6

# (key, daemon, role, mode, text)
_CATALOGUE: list[tuple[str, str, str, str, str]] = [
    # routine sweep pipeline and health checks
    ("sweep_rx", "sweepd", "routine", "", "received sweep sw-{bp:10:0} from radar rdr-{p:2:1:24} elev={d:0.5:19.5}deg bins={i:480:1440} size={i:900:4800}KB"),
    ("sweep_pack", "packd", "routine", "", "compressed sweep sw-{bp:10:0} ratio={d:2:7} out={i:150:1600}KB took {i:40:900}ms"),
    ("sweep_fwd", "uplinkd", "routine", "", "forwarded sweep sw-{bp:10:0} to centre {ip}:7400 in {i:20:400}ms queue={i:0:12}"),
    ("sweep_fwd_fail", "uplinkd", "degraded", "", "forward of sweep sw-{bp:10:0} failed: centre {ip}:7400 not responding, queued={i:13:400}"),
    ("health", "healthd", "health", "", "health cpu={b:0}% mem={b:1}% disk={b:2}% temp={bd:3}C"),
    # benign background messages
    ("clock_adjust", "timesync", "misc", "", "clock offset {i:0:40}ms corrected against server {ip}"),
    ("logrotate", "cron", "misc", "", "job logrotate finished in {i:1:30}s rotated={i:1:6} files"),
    ("cache_prune", "cron", "misc", "", "job cache-prune removed {i:10:400} stale sweeps freeing {i:50:2000}MB"),
    ("late_sweep", "sweepd", "misc", "", "sweep sw-{p:10:0:9999999999} arrived late by {i:200:5000}ms, accepted"),
    ("dup_sweep", "sweepd", "misc", "", "duplicate sweep sw-{p:10:0:9999999999} from radar rdr-{p:2:1:24} ignored"),
    ("radar_idle", "sweepd", "misc", "", "no sweep from radar rdr-{p:2:1:24} for {i:300:900}s, feed idle"),
    ("dict_refresh", "packd", "misc", "", "dictionary refresh completed entries={i:4000:9000} took {i:50:400}ms"),
    ("slow_pack", "packd", "misc", "", "compression of sweep sw-{p:10:0:9999999999} exceeded budget: {i:1000:3000}ms > 800ms"),
    ("keepalive", "uplinkd", "misc", "", "keepalive to centre {ip}:7400 rtt={i:8:60}ms"),
    ("token_renew", "uplinkd", "misc", "", "session token renewed ttl={i:600:3600}s serial={i:1000:99999}"),
    ("smart_ok", "diskmon", "misc", "", "smart summary disk{i:0:1} healthy realloc={i:0:3} wear={i:1:30}%"),
    ("fan_status", "fanctl", "misc", "", "fan{i:1:2} speed {i:2200:3400}rpm target {i:2400:3200}rpm"),
    ("load_warn", "healthd", "misc", "", "load average {d:1:4} above soft limit {d:0.5:1}"),
    # precursors
    ("disk_realloc", "diskmon", "precursor", "disk_wear", "disk{i:0:1} reallocated sectors rose to {i:4:800} threshold 1000"),
    ("ata_retry", "kernel", "precursor", "disk_wear", "ata{i:1:2}: exception on sda sector {i:1000000:900000000} retrying attempt {i:1:3}"),
    ("disk_latency", "diskmon", "precursor", "disk_wear", "disk{i:0:1} write latency p99={i:80:900}ms above threshold 50ms"),
    ("spool_slow", "sweepd", "precursor", "disk_wear", "spool write for sweep sw-{p:10:0:9999999999} took {i:500:9000}ms"),
    ("fwd_retry", "uplinkd", "precursor", "uplink_degradation", "retransmitting sweep sw-{p:10:0:9999999999} to centre {ip}:7400 attempt {i:2:6}"),
    ("link_quality", "uplinkd", "precursor", "uplink_degradation", "link quality to centre degraded rtt={i:120:900}ms loss={d:1:30}%"),
    ("carrier_err", "kernel", "precursor", "uplink_degradation", "eth1: carrier errors {i:1:80} crc errors {i:1:500} in last interval"),
    ("rss_grow", "packd", "precursor", "memory_leak", "resident memory grew to {i:400:3800}MB after {i:1000:90000} sweeps"),
    ("alloc_stall", "kernel", "precursor", "memory_leak", "page allocation stall for packd order={i:0:4} waited {i:100:4000}ms"),
    ("mem_pressure", "healthd", "precursor", "memory_leak", "memory pressure high available={i:40:400}MB swap used={i:5:90}%"),
    ("fan_drop", "fanctl", "precursor", "cooling_fault", "fan{i:1:2} speed dropped to {i:300:1800}rpm below minimum 2000rpm"),
    ("thermal_trip", "kernel", "precursor", "cooling_fault", "thermal zone{i:0:2} reached {d:70:92}C trip point 95C"),
    ("temp_rise", "healthd", "precursor", "cooling_fault", "enclosure temperature rising {d:0.5:3}C per hour now {d:45:80}C"),
    # failure signatures
    ("ata_fail", "kernel", "signature", "disk_wear", "ata{i:1:2}: failed read command at sector {i:1000000:900000000}, device not ready"),
    ("fs_readonly", "kernel", "signature", "disk_wear", "filesystem on sda{i:1:3} remounted read-only after I/O errors"),
    ("spool_fail", "sweepd", "signature", "disk_wear", "cannot write spool file for sweep sw-{p:10:0:9999999999}: read-only filesystem"),
    ("halt_storage", "initd", "signature", "disk_wear", "node halting: storage unavailable"),
    ("uplink_lost", "uplinkd", "signature", "uplink_degradation", "uplink to centre {ip}:7400 lost after {i:5:30} consecutive timeouts"),
    ("queue_drop", "uplinkd", "signature", "uplink_degradation", "forward queue full, dropping {i:10:500} oldest sweeps"),
    ("oom_kill", "kernel", "signature", "memory_leak", "out of memory: killed process {i:300:32000} (packd) total-vm:{i:3000000:4200000}kB"),
    ("svc_exit", "initd", "signature", "memory_leak", "packd exited with status 137, restarting in {i:5:60}s"),
    ("fan_stall", "fanctl", "signature", "cooling_fault", "fan{i:1:2} stalled, no tach signal for {i:10:120}s"),
    ("thermal_halt", "kernel", "signature", "cooling_fault", "critical temperature {d:96:105}C reached, shutting down"),
    # boot sequence (after any reboot)
    ("boot_image", "kernel", "boot", "", "booting relay image {b:0}.{b:1}.{b:2} with 4 cpus"),
    ("boot_mem", "kernel", "boot", "", "memory available {i:3700:3900}MB of 4096MB"),
    ("boot_link", "kernel", "boot", "", "eth{i:0:1} link up at 1000Mbps full duplex"),
    ("boot_start", "initd", "boot", "", "starting relay services after {i:900:4000}ms"),
    ("sweepd_ready", "sweepd", "boot", "", "listening for radar feeds on port 7300 with {i:8:24} slots"),
    ("packd_ready", "packd", "boot", "", "compressor ready with {i:2:4} worker threads"),
    ("uplinkd_ready", "uplinkd", "boot", "", "connected to centre {ip}:7400 after {i:30:900}ms handshake"),
    ("healthd_ready", "healthd", "boot", "", "monitoring started interval=60s sensors={i:6:9}"),
    ("diskmon_ready", "diskmon", "boot", "", "watching disk{i:0:1} class=ssd capacity={i:240:480}GB"),
    ("fanctl_ready", "fanctl", "boot", "", "fan control loop started target {i:2400:3200}rpm"),
    # recovery
    ("disk_replaced", "diskmon", "recovery", "disk_wear", "new disk{i:0:1} detected, spool rebuilt in {i:30:600}s"),
    ("uplink_restored", "uplinkd", "recovery", "uplink_degradation", "uplink to centre restored after {i:60:20000}s outage, resending {i:1:400} queued sweeps"),
    ("packd_restarted", "initd", "recovery", "memory_leak", "packd restarted, backlog of {i:5:300} sweeps drained in {i:5:600}s"),
    ("fan_replaced", "fanctl", "recovery", "cooling_fault", "fan{i:1:2} replaced, speed {i:2400:3200}rpm nominal"),
    # non-failure anomalies: their own event lines and decoys
    ("selftest_start", "diskmon", "decoy", "maintenance", "scheduled self-test started on disk{i:0:1} by operator"),
    ("selftest_done", "diskmon", "decoy", "maintenance", "self-test completed on disk{i:0:1} in {i:60:900}s result=pass"),
    ("maint_open", "initd", "event", "maintenance", "maintenance window opened ticket chg-{p:5:1:99999}"),
    ("maint_stop", "initd", "event", "maintenance", "stopping relay services for maintenance"),
    ("maint_close", "initd", "event", "maintenance", "maintenance window closed ticket chg-{p:5:1:99999} after {i:300:3600}s"),
    ("undervolt", "kernel", "event", "power_dip", "undervoltage detected on rail {i:1:3} at {i:4300:4700}mV"),
    ("power_ok", "kernel", "event", "power_dip", "supply rail {i:1:3} back to nominal after {i:20:2000}ms"),
    ("fan_spinup", "fanctl", "decoy", "power_dip", "fan{i:1:2} spin-up after supply dip took {i:200:1500}ms"),
    ("fw_download", "fwagent", "event", "firmware_rollout", "downloading firmware {b:0}.{b:1}.{b:2} size={i:20000:60000}KB"),
    ("fw_verify", "fwagent", "event", "firmware_rollout", "firmware image verified, signature valid"),
    ("fw_apply", "fwagent", "event", "firmware_rollout", "applying firmware {b:0}.{b:1}.{b:2}, reboot in {i:5:30}s"),
    ("fw_running", "fwagent", "event", "firmware_rollout", "now running firmware {b:0}.{b:1}.{b:2} previous {b:3}.{b:4}.{b:5}"),
    ("table_rebuild", "packd", "decoy", "firmware_rollout", "rebuilding compression tables for new firmware, {i:2000:9000} entries"),
    ("peer_unreach", "uplinkd", "event", "network_blip", "peer {ip} unreachable, retrying in {i:1:30}s"),
    ("route_change", "uplinkd", "decoy", "network_blip", "route to centre changed via gateway {ip}"),
    ("eth_down", "kernel", "event", "network_blip", "eth1: link down"),
    ("eth_up", "kernel", "event", "network_blip", "eth1: link up, negotiated 1000Mbps"),
    # reworded routine messages brought by firmware roll-outs when drift is on (see VARIANTS);
    # each has more words than the form it replaces, so a template miner keeps them apart
    ("sweep_fwd_v2", "uplinkd", "variant", "", "forwarded sweep sw-{bp:10:0} to centre {ip}:7443 over tls in {i:20:400}ms queue={i:0:12}"),
    ("keepalive_v2", "uplinkd", "variant", "", "keepalive to centre {ip}:7443 rtt={i:8:60}ms jitter={i:0:9}ms"),
    ("sweep_pack_v2", "packd", "variant", "", "compressed sweep sw-{bp:10:0} with dictionary d{i:1:9} ratio={d:2:7} out={i:150:1600}KB took {i:40:900}ms"),
    ("clock_adjust_v2", "timesync", "variant", "", "clock offset {i:0:40}ms corrected against server {ip} using ptp domain {i:0:3}"),
    ("sweep_rx_v2", "sweepd", "variant", "", "received sweep sw-{bp:10:0} from radar rdr-{p:2:1:24} elev={d:0.5:19.5}deg bins={i:480:1440} size={i:900:4800}KB codec=zstd"),
    ("fan_status_v2", "fanctl", "variant", "", "fan{i:1:2} speed {i:2200:3400}rpm target {i:2400:3200}rpm duty={i:20:90}%"),
]
# (routine template, its reworded form): the k-th firmware roll-out with drift on brings the k-th pair
VARIANTS = (("sweep_fwd", "sweep_fwd_v2"), ("keepalive", "keepalive_v2"), ("sweep_pack", "sweep_pack_v2"),
            ("clock_adjust", "clock_adjust_v2"), ("sweep_rx", "sweep_rx_v2"), ("fan_status", "fan_status_v2"))

MISC_WEIGHTS = {
    "clock_adjust": 3.0, "logrotate": 1.0, "cache_prune": 1.0, "late_sweep": 2.0, "dup_sweep": 1.0,
    "radar_idle": 1.0, "dict_refresh": 1.0, "slow_pack": 1.5, "keepalive": 4.0, "token_renew": 1.0,
    "smart_ok": 1.0, "fan_status": 2.0, "load_warn": 1.0,
}
BOOT_SEQUENCE = (  # (template key, offset after the reboot in ms)
    ("boot_image", 0), ("boot_mem", 210), ("boot_link", 1_450), ("boot_start", 2_900), ("sweepd_ready", 4_100),
    ("packd_ready", 4_600), ("uplinkd_ready", 6_300), ("healthd_ready", 7_000), ("diskmon_ready", 7_400),
    ("fanctl_ready", 8_200),
)
SIGNATURES = {
    "disk_wear": ("ata_fail", "ata_fail", "fs_readonly", "spool_fail", "halt_storage"),
    "uplink_degradation": ("uplink_lost", "queue_drop"),
    "memory_leak": ("alloc_stall", "oom_kill", "svc_exit"),
    "cooling_fault": ("thermal_trip", "fan_stall", "thermal_halt"),
}
# how long the node stays failed, in minutes (uniform range)
FAILURE_MINUTES = {"disk_wear": (120, 1440), "uplink_degradation": (10, 360), "memory_leak": (2, 30), "cooling_fault": (60, 720)}
SILENT_MODES = ("disk_wear", "cooling_fault")
RECOVERY = {"disk_wear": "disk_replaced", "uplink_degradation": "uplink_restored", "memory_leak": "packd_restarted",
            "cooling_fault": "fan_replaced"}
DECOY_OWN = {"maintenance": ("selftest_start", "selftest_done"), "power_dip": ("fan_spinup",),
             "firmware_rollout": ("table_rebuild",), "network_blip": ("route_change",)}

_FIELD = re.compile(r"\{(i|d|p|ip|b|bd|bp)((?::[0-9.]+)*)\}")


@dataclass(frozen=True)
class Field:
    """One variable part of a template."""

    kind: str
    args: tuple[float, ...]


@dataclass(frozen=True)
class Template:
    """A message template: id, daemon, role, mode, spec text and its parsed pieces."""

    id: int
    key: str
    daemon: str
    role: str
    mode: str
    spec: str
    pieces: tuple[str | Field, ...]

    @property
    def text(self) -> str:
        """Template text with every variable part shown as `<*>`."""
        return _FIELD.sub("<*>", self.spec)


def _parse(spec: str) -> tuple[str | Field, ...]:
    """Split a template spec into literal strings and fields."""
    pieces: list[str | Field] = []
    pos = 0
    for m in _FIELD.finditer(spec):
        if m.start() > pos:
            pieces.append(spec[pos : m.start()])
        args = tuple(float(a) for a in m.group(2).split(":")[1:])
        pieces.append(Field(m.group(1), args))
        pos = m.end()
    if pos < len(spec):
        pieces.append(spec[pos:])
    return tuple(pieces)


TEMPLATES: tuple[Template, ...] = tuple(
    Template(i, key, daemon, role, mode, spec, _parse(spec)) for i, (key, daemon, role, mode, spec) in enumerate(_CATALOGUE)
)
TID: dict[str, int] = {t.key: t.id for t in TEMPLATES}
TEMPLATE_DAEMON = np.array([DAEMONS.index(t.daemon) for t in TEMPLATES], dtype=np.int64)
PRECURSORS: dict[str, tuple[int, ...]] = {
    m: tuple(t.id for t in TEMPLATES if t.role == "precursor" and t.mode == m) for m in FAILURE_MODES
}


# ----------------------------------------------------------------- rendering


def _int_str(values: np.ndarray) -> pa.Array:
    """Integers as decimal strings."""
    return pc.cast(pa.array(np.asarray(values, dtype=np.int64)), pa.string())


def _render_field(f: Field, params: np.ndarray, rng: np.random.Generator, n: int) -> list:
    """String pieces (arrays or scalars) of one field for n lines."""
    a = f.args
    if f.kind == "i":
        return [_int_str(rng.integers(int(a[0]), int(a[1]) + 1, n))]
    if f.kind == "d":
        v = rng.integers(round(a[0] * 10), round(a[1] * 10) + 1, n)
        return [_int_str(v // 10), pa.scalar("."), _int_str(v % 10)]
    if f.kind == "p":
        v = rng.integers(int(a[1]), int(a[2]) + 1, n)
        return [pc.utf8_lpad(_int_str(v), width=int(a[0]), padding="0")]
    if f.kind == "ip":
        v = rng.integers(0, 256, (3, n))
        dot = pa.scalar(".")
        return [pa.scalar("10."), _int_str(v[0]), dot, _int_str(v[1]), dot, _int_str(v[2] + 1)]
    if f.kind == "b":
        return [_int_str(params[:, int(a[0])])]
    if f.kind == "bd":
        v = params[:, int(a[0])]
        return [_int_str(v // 10), pa.scalar("."), _int_str(v % 10)]
    if f.kind == "bp":
        return [pc.utf8_lpad(_int_str(params[:, int(a[1])]), width=int(a[0]), padding="0")]
    raise ValueError(f"unknown field kind {f.kind!r}")


def render_template(tpl: Template, params: np.ndarray, rng: np.random.Generator) -> pa.Array:
    """Message texts of n lines of one template (params: n x N_PARAMS bound values)."""
    n = len(params)
    parts: list = []
    for piece in tpl.pieces:
        if isinstance(piece, str):
            parts.append(pa.scalar(piece))
        else:
            parts.extend(_render_field(piece, params, rng, n))
    if all(isinstance(p, pa.Scalar) for p in parts):
        return pa.array([tpl.spec] * n, type=pa.string())
    return pc.binary_join_element_wise(*parts, pa.scalar(""))


def render_messages(tpl_ids: np.ndarray, params: np.ndarray, rng: np.random.Generator) -> pa.Array:
    """Message texts for lines given their template ids and bound params, in input order."""
    n = len(tpl_ids)
    if n == 0:
        return pa.array([], type=pa.string())
    order = np.argsort(tpl_ids, kind="stable")
    sorted_ids = tpl_ids[order]
    cuts = np.flatnonzero(np.diff(sorted_ids)) + 1
    bounds = np.concatenate([[0], cuts, [n]])
    chunks = []
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        idx = order[lo:hi]
        chunks.append(render_template(TEMPLATES[int(sorted_ids[lo])], params[idx], rng))
    grouped = pa.concat_arrays(chunks)
    inverse = np.empty(n, dtype=np.int64)
    inverse[order] = np.arange(n)
    return grouped.take(pa.array(inverse))


# ------------------------------------------------------------------ the plan


@dataclass
class Plan:
    """Everything incident-related, laid out before routine traffic is drawn.

    Times are int64 milliseconds since the Unix epoch. ``lines_*`` are the
    lines emitted by incidents, sorted by time; ``lines_inc`` holds the row of
    ``incidents`` each came from. Interval arrays are (node, start, end[, owner]).
    """

    start_ms: int
    end_ms: int
    incidents: list[dict]
    lines_t: np.ndarray
    lines_node: np.ndarray
    lines_tpl: np.ndarray
    lines_params: np.ndarray
    lines_inc: np.ndarray
    silence: np.ndarray  # (k, 4): node, start, end, owner incident
    uplink_down: np.ndarray  # (k, 3)
    pack_down: np.ndarray  # (k, 3)
    restarts: np.ndarray  # (k, 3): node, daemon index (-1 = every daemon), time
    trends: list[tuple[int, str, int, int]]  # (node, mode, precursor start, onset) of visible precursors
    node_rate: np.ndarray  # per-node traffic multiplier
    node_phase: np.ndarray  # per-node health-check phase in ms
    node_base: np.ndarray  # (nodes, 3): base memory %, disk %, temperature tenths
    variant_switch: np.ndarray  # (len(VARIANTS), nodes): when each node starts writing each reworded form (int64 max = never)


class _Lines:
    """Accumulates incident lines."""

    def __init__(self) -> None:
        self.t: list[np.ndarray] = []
        self.node: list[np.ndarray] = []
        self.tpl: list[np.ndarray] = []
        self.params: list[np.ndarray] = []
        self.inc: list[np.ndarray] = []

    def add(self, t, node: int, tpl, inc: int, params: np.ndarray | None = None) -> None:
        """Append lines of one node and incident (t and tpl broadcast together)."""
        t = np.atleast_1d(np.asarray(t, dtype=np.int64))
        tpl = np.broadcast_to(np.atleast_1d(np.asarray(tpl, dtype=np.int64)), t.shape)
        n = len(t)
        p = np.zeros((n, N_PARAMS), dtype=np.int64)
        if params is not None:
            p[:] = params
        self.t.append(t)
        self.node.append(np.full(n, node, dtype=np.int64))
        self.tpl.append(np.array(tpl))
        self.params.append(p)
        self.inc.append(np.full(n, inc, dtype=np.int64))

    def arrays(self) -> tuple[np.ndarray, ...]:
        """Concatenated arrays (t, node, tpl, params, inc)."""
        if not self.t:
            z = np.zeros(0, dtype=np.int64)
            return z, z, z, np.zeros((0, N_PARAMS), dtype=np.int64), z
        return (np.concatenate(self.t), np.concatenate(self.node), np.concatenate(self.tpl),
                np.concatenate(self.params), np.concatenate(self.inc))


def _poisson_times(rng: np.random.Generator, rate_per_ms: float, t0: int, t1: int) -> np.ndarray:
    """Sorted event times of a homogeneous Poisson process on [t0, t1)."""
    if t1 <= t0 or rate_per_ms <= 0:
        return np.zeros(0, dtype=np.int64)
    n = rng.poisson(rate_per_ms * (t1 - t0))
    return np.sort(rng.integers(t0, t1, n))


def _decoy_tpls(rng: np.random.Generator, mode: str, n: int, similarity: float) -> np.ndarray:
    """Template ids of n decoy lines: look-alike precursors with probability `similarity`."""
    look = np.array(PRECURSORS[LOOKALIKE[mode]])
    own = np.array([TID[k] for k in DECOY_OWN[mode]])
    use_look = rng.random(n) < similarity
    return np.where(use_look, rng.choice(look, n), rng.choice(own, n))


class _Firmware:
    """Firmware version of each node over time (changes at roll-outs)."""

    def __init__(self, nodes: int) -> None:
        self.changes: list[list[tuple[int, tuple[int, int, int]]]] = [[] for _ in range(nodes)]
        self.initial = (4, 2, 0)

    def at(self, node: int, t: int) -> tuple[int, int, int]:
        """Version running on a node at time t."""
        version = self.initial
        for when, v in self.changes[node]:
            if when <= t:
                version = v
        return version


def _boot(lines: _Lines, restarts: list, fw: _Firmware, node: int, t: int, inc: int) -> int:
    """Emit a boot sequence at t; return the time of its last line."""
    v = fw.at(node, t)
    offs = np.array([o for _, o in BOOT_SEQUENCE], dtype=np.int64)
    tpls = np.array([TID[k] for k, _ in BOOT_SEQUENCE])
    params = np.zeros((len(offs), N_PARAMS), dtype=np.int64)
    params[0, :3] = v
    lines.add(t + offs, node, tpls, inc, params)
    restarts.append((node, -1, t))
    return int(t + offs[-1])


def plan_fleet(sc: Scenario) -> Plan:
    """Lay out all failures and non-failure anomalies of a scenario with their lines and effects."""
    rng = np.random.default_rng(np.random.SeedSequence(sc.seed, spawn_key=(0,)))
    t0 = sc.start_ms
    t1 = sc.end_ms
    n_nodes = sc.nodes
    sim = sc.anomalies.decoy_similarity
    fcfg = sc.failures

    node_rate = np.exp(rng.normal(0.0, 0.2, n_nodes))
    period = int(round(sc.health_period_minutes * MS_MIN))
    node_phase = rng.integers(0, period, n_nodes)
    node_base = np.stack([rng.integers(28, 46, n_nodes), rng.integers(35, 60, n_nodes), rng.integers(-20, 21, n_nodes)], axis=1)

    lines = _Lines()
    incidents: list[dict] = []
    silence: list[tuple[int, int, int, int]] = []
    uplink_down: list[tuple[int, int, int]] = []
    pack_down: list[tuple[int, int, int]] = []
    restarts: list[tuple[int, int, int]] = []
    trends: list[tuple[int, str, int, int]] = []
    fw = _Firmware(n_nodes)

    def incident(node: int, start: int, kind: str, mode: str, precursor_start: int | None = None) -> int:
        incidents.append({"node": node, "start": int(start), "end": int(start), "kind": kind, "mode": mode,
                          "precursor_start": precursor_start})
        return len(incidents) - 1

    # firmware roll-outs first: boots after them need the running version
    minor, patch = 2, 0
    variant_switch = np.full((len(VARIANTS), n_nodes), np.iinfo(np.int64).max, dtype=np.int64)
    rollouts = _poisson_times(rng, sc.anomalies.firmware_rollouts_per_year / (365.25 * MS_DAY), t0, t1)
    for rollout, t_r in enumerate(rollouts):
        if rng.random() < 0.4:
            minor, patch = minor + 1, 0
        else:
            patch += 1
        new = (4, minor, patch)
        order = rng.permutation(n_nodes)
        wave = max(1, int(round(n_nodes * rng.uniform(0.1, 0.25))))
        t_wave = int(t_r)
        for w0 in range(0, n_nodes, wave):
            if w0:
                t_wave += int(rng.uniform(2, 8) * MS_HOUR)
            for node in order[w0 : w0 + wave]:
                node = int(node)
                t = t_wave + int(rng.uniform(0, 20) * MS_MIN)
                old = fw.at(node, t)
                k = incident(node, t, "other", "firmware_rollout")
                p = np.zeros((1, N_PARAMS), dtype=np.int64)
                p[0, :3] = new
                t_ver = t + int(rng.uniform(20, 120) * 1000)
                t_app = t_ver + int(rng.uniform(5, 30) * 1000)
                lines.add([t, t_ver, t_app], node, [TID["fw_download"], TID["fw_verify"], TID["fw_apply"]], k,
                          np.repeat(p, 3, axis=0))
                t_boot = t_app + int(rng.uniform(60, 300) * 1000)
                if sc.drift.enabled and rollout < len(VARIANTS):
                    variant_switch[rollout, node] = t_boot
                silence.append((node, t_app + 1, t_boot, k))
                fw.changes[node].append((t_boot, new))
                last = _boot(lines, restarts, fw, node, t_boot, k)
                p_run = np.zeros((1, N_PARAMS), dtype=np.int64)
                p_run[0, :3], p_run[0, 3:] = new, old
                last += int(rng.uniform(1, 5) * 1000)
                lines.add(last, node, TID["fw_running"], k, p_run)
                n_decoy = int(rng.poisson(4))
                if n_decoy:
                    dt = np.sort(rng.uniform(0, rng.uniform(1, 6), n_decoy) * MS_HOUR).astype(np.int64)
                    lines.add(last + 1000 + dt, node, _decoy_tpls(rng, "firmware_rollout", n_decoy, sim), k)
                    last = int(last + 1000 + dt[-1])
                incidents[k]["end"] = last

    # failures
    mix = np.array([fcfg.mode_mix.get(m, 0.0) for m in FAILURE_MODES], dtype=float)
    mix = mix / mix.sum()
    lo_h, hi_h = fcfg.lead_time_hours
    for node in range(n_nodes):
        busy_until = t0 - 1
        for onset in _poisson_times(rng, fcfg.rate_per_node_year / (365.25 * MS_DAY), t0, t1):
            onset = int(onset)
            mode = FAILURE_MODES[int(rng.choice(len(FAILURE_MODES), p=mix))]
            lead_h = float(np.exp(rng.uniform(np.log(lo_h), np.log(hi_h))))
            visible = bool(rng.random() < fcfg.precursor_visibility)
            minutes = rng.uniform(*FAILURE_MINUTES[mode])
            if onset <= busy_until:  # the node is still down from the previous failure
                continue
            ps = onset - int(round(lead_h * MS_HOUR))
            k = incident(node, onset, "failure", mode, ps if visible else None)
            if visible:
                lead_ms = onset - ps
                # at least ~8 precursor lines expected: mean rate of the ramp is 0.4 * peak
                peak = max(fcfg.precursor_peak_per_hour, 20.0 / lead_h)
                floor = 0.1 * peak
                cand = _poisson_times(rng, peak / MS_HOUR, ps, onset)
                u = (cand - ps) / lead_ms
                keep = rng.random(len(cand)) < (floor + (peak - floor) * u**2) / peak
                pt = np.concatenate([[ps], cand[keep]])
                lines.add(pt, node, rng.choice(np.array(PRECURSORS[mode]), len(pt)), k)
                trends.append((node, mode, ps, onset))
            sig = [TID[s] for s in SIGNATURES[mode]]
            st = onset + np.concatenate([[0], np.cumsum(rng.integers(100, 5000, len(sig) - 1))])
            lines.add(st, node, sig, k)
            t_end = onset + int(minutes * MS_MIN)
            if mode in SILENT_MODES:
                silence.append((node, int(st[-1]) + 1, t_end, k))
                last = _boot(lines, restarts, fw, node, t_end, k)
            elif mode == "uplink_degradation":
                uplink_down.append((node, onset, t_end))
                last = t_end
            else:
                pack_down.append((node, onset, t_end))
                restarts.append((node, DAEMONS.index("packd"), t_end))
                lines.add(t_end, node, TID["packd_ready"], k)
                last = t_end
            last += int(rng.uniform(1, 60) * 1000)
            lines.add(last, node, TID[RECOVERY[mode]], k)
            incidents[k]["end"] = last
            busy_until = last

    # maintenance windows
    for node in range(n_nodes):
        for t_m in _poisson_times(rng, sc.anomalies.maintenance_per_node_year / (365.25 * MS_DAY), t0, t1):
            t_m = int(t_m)
            n_pre = 1 + int(rng.poisson(3))
            pre = t_m - np.sort(rng.uniform(0.02, rng.uniform(1, 12), n_pre) * MS_HOUR).astype(np.int64)[::-1]
            k = incident(node, int(pre[0]), "other", "maintenance")
            lines.add(pre, node, _decoy_tpls(rng, "maintenance", n_pre, sim), k)
            lines.add([t_m, t_m + 1500], node, [TID["maint_open"], TID["maint_stop"]], k)
            t_boot = t_m + int(rng.uniform(5, 45) * MS_MIN)
            silence.append((node, t_m + 1501, t_boot, k))
            last = _boot(lines, restarts, fw, node, t_boot, k) + int(rng.uniform(5, 120) * 1000)
            lines.add(last, node, TID["maint_close"], k)
            incidents[k]["end"] = last

    # power dips: fleet-wide events hitting a share of the nodes
    for t_p in _poisson_times(rng, sc.anomalies.power_dips_per_year / (365.25 * MS_DAY), t0, t1):
        hit = np.flatnonzero(rng.random(n_nodes) < rng.uniform(0.2, 0.6))
        for node in hit:
            node = int(node)
            t = int(t_p) + int(rng.integers(0, 3000))
            k = incident(node, t, "other", "power_dip")
            lines.add(t, node, TID["undervolt"], k)
            n_decoy = 1 + int(rng.poisson(2))
            dt = np.sort(rng.integers(500, 10 * MS_MIN, n_decoy))
            if rng.random() < 0.3:
                t_boot = t + int(rng.uniform(1, 5) * MS_MIN)
                silence.append((node, t + 1, t_boot, k))
                last = _boot(lines, restarts, fw, node, t_boot, k)
                lines.add(last + dt, node, _decoy_tpls(rng, "power_dip", n_decoy, sim), k)
                last = int(last + dt[-1])
            else:
                t_ok = t + int(rng.integers(20, 2000))
                lines.add(t_ok, node, TID["power_ok"], k)
                lines.add(t_ok + dt, node, _decoy_tpls(rng, "power_dip", n_decoy, sim), k)
                last = int(t_ok + dt[-1])
            incidents[k]["end"] = last

    # network blips
    for node in range(n_nodes):
        for t_b in _poisson_times(rng, sc.anomalies.network_blips_per_node_year / (365.25 * MS_DAY), t0, t1):
            t_b = int(t_b)
            dur = int(rng.uniform(1, 20) * MS_MIN)
            k = incident(node, t_b, "other", "network_blip")
            lines.add([t_b, t_b + int(rng.integers(200, 3000))], node, [TID["eth_down"], TID["peer_unreach"]], k)
            n_decoy = 2 + int(rng.poisson(3))
            lines.add(t_b + np.sort(rng.integers(3000, dur, n_decoy)), node, _decoy_tpls(rng, "network_blip", n_decoy, sim), k)
            uplink_down.append((node, t_b, t_b + dur))
            lines.add(t_b + dur, node, TID["eth_up"], k)
            incidents[k]["end"] = t_b + dur

    # keep what falls inside the scenario; number incidents by start time
    lt, ln, ltpl, lp, linc = lines.arrays()
    inside = (lt >= t0) & (lt < t1)
    lt, ln, ltpl, lp, linc = lt[inside], ln[inside], ltpl[inside], lp[inside], linc[inside]
    keep_inc = [i for i, r in enumerate(incidents) if r["start"] < t1 and r["end"] >= t0]
    keep_inc.sort(key=lambda i: (incidents[i]["start"], incidents[i]["node"], incidents[i]["mode"]))
    new_id = np.full(len(incidents) + 1, -1, dtype=np.int64)
    for rank, i in enumerate(keep_inc):
        new_id[i] = rank + 1
    final = []
    for i in keep_inc:
        r = dict(incidents[i])
        r["id"] = int(new_id[i])
        r["end"] = min(r["end"], t1 - 1)
        final.append(r)
    linc = new_id[linc]
    order = np.argsort(lt, kind="stable")

    def arr(rows: list, width: int) -> np.ndarray:
        return np.array(rows, dtype=np.int64).reshape(-1, width)

    sil = arr(silence, 4)
    if len(sil):
        sil[:, 3] = new_id[sil[:, 3]]
    return Plan(
        start_ms=t0, end_ms=t1, incidents=final,
        lines_t=lt[order], lines_node=ln[order], lines_tpl=ltpl[order], lines_params=lp[order], lines_inc=linc[order],
        silence=sil, uplink_down=arr(uplink_down, 3), pack_down=arr(pack_down, 3), restarts=arr(restarts, 3),
        trends=trends, node_rate=node_rate, node_phase=node_phase, node_base=node_base, variant_switch=variant_switch,
    )
