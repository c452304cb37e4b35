"""Ingest benchmark: template-mining speed on a large replicated log.

(a) a bare loop of drain3 0.9.11 `TemplateMiner.add_log_message` (the reference
    library) over the content fields;
(b) our `DrainMiner.add_many` over the same contents, with the same settings;
(c) `logtrial ingest` end to end (read, split headers, parse times, mine, write
    Parquet) of the same lines, one file per system; and the peak RSS growth of
    ingesting a 5,000,000-line log in a fresh process.

The log is built from the HDFS and BGL Loghub 2k samples: lines are drawn at
random and their identifiers (block ids, IP addresses and ports, node names,
core files, hex values, long numbers) and header timestamps are regenerated,
so most raw lines are new. Miner settings and line formats come from the
registry entries hdfs-2k and bgl-2k. Times are CPU seconds of this process
(steadier than wall time on a shared machine); `--repeat N` keeps the least of
N alternating runs. Prints figures; this is not a test.

    python bench/ingest.py            # 1,000,000 lines
    python bench/ingest.py --quick    # 100,000 lines
"""

from __future__ import annotations

import argparse
import logging
import random
import re
import sys
import tempfile
import time
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from logtrial.data.mining import registry_miner  # noqa: E402
from logtrial.data.registry import get_entry, load_registry, mirror_dir  # noqa: E402

REGISTRY_NAMES = {"HDFS": "hdfs-2k", "BGL": "bgl-2k"}

# Identifiers to regenerate inside a line, most specific first.
_IDENTIFIER = re.compile(
    r"(?P<blk>blk_-?\d+)"
    r"|(?P<ip>\b(?:\d{1,3}\.){3}\d{1,3}\b)(?P<port>:\d+)?"
    r"|(?P<node>R\d\d-M\d-N[0-9A-F](?:-[CIL]:J\d\d-U\d\d)?)"
    r"|(?P<core>core\.\d+)"
    r"|(?P<hex>0x[0-9a-fA-F]+)"
    r"|(?P<num>\b\d{5,}\b)"
)


@dataclass(frozen=True)
class SampleLine:
    """One raw sample line split into the header fields we rewrite and the rest."""

    system: str
    fields: dict[str, str]


def _fresh_identifier(rng: random.Random) -> Callable[[re.Match], str]:
    """Return a regex callback that replaces one identifier with a fresh value of the same shape."""

    def digits(n: int) -> str:
        return str(rng.randrange(10 ** (n - 1), 10**n))

    def replace(m: re.Match) -> str:
        kind = m.lastgroup
        text = m.group(0)
        if kind == "blk":
            sign = "-" if rng.random() < 0.5 else ""
            return f"blk_{sign}{rng.getrandbits(62)}"
        if kind in ("ip", "port"):
            ip = f"10.{rng.randrange(250, 252)}.{rng.randrange(256)}.{rng.randrange(1, 255)}"
            port = m.group("port")
            if port and port != ":50010":
                port = f":{rng.randrange(32768, 61000)}"
            return ip + (port or "")
        if kind == "node":
            rack = f"R{rng.randrange(80):02d}-M{rng.randrange(2)}-N{rng.choice('0123456789ABCDEF')}"
            if len(text) <= 10:
                return rack
            return f"{rack}-{rng.choice('CI')}:J{rng.randrange(2, 19):02d}-U{rng.choice(('01', '11'))}"
        if kind == "core":
            return f"core.{rng.randrange(100000)}"
        if kind == "hex":
            return "0x" + format(rng.getrandbits(4 * (len(text) - 2)), f"0{len(text) - 2}x")
        return digits(len(text))

    return replace


def _read_samples(systems: Sequence[str]) -> list[SampleLine]:
    """Read the raw sample lines of the given systems, split by their registry line formats."""
    registry = load_registry()
    samples: list[SampleLine] = []
    for system in systems:
        entry = get_entry(REGISTRY_NAMES[system], registry)
        pattern = re.compile(entry.format.regex)
        path = mirror_dir() / system / f"{system}_2k.log"
        for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
            m = pattern.match(line)
            if m:
                samples.append(SampleLine(system, m.groupdict()))
    return samples


def _render(sample: SampleLine, content: str, node: str, when: datetime) -> str:
    """Write one line in its system's format with a new time stamp (and node for BGL)."""
    f = sample.fields
    if sample.system == "HDFS":
        return f"{when:%y%m%d %H%M%S} {f['pid']} {f['level']} {f['component']}: {content}"
    stamp = f"{when:%Y-%m-%d-%H.%M.%S.%f}"
    return (f"{f['label']} {int(when.timestamp())} {when:%Y.%m.%d} {node} {stamp} {node} "
            f"{f['type']} {f['component']} {f['level']} {content}")


def build_replicated_log(out_path: str | Path, n_lines: int, seed: int,
                         systems: Sequence[str] = ("HDFS", "BGL")) -> Path:
    """Write an n_lines log of sample lines (HDFS and BGL by default) with fresh identifiers."""
    rng = random.Random(seed)
    fresh = _fresh_identifier(rng)
    samples = _read_samples(systems)
    when = datetime(2005, 6, 3, tzinfo=timezone.utc)
    out_path = Path(out_path)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_path.with_name(out_path.name + ".part")
    with tmp.open("w", encoding="utf-8") as out:
        for _ in range(n_lines):
            sample = rng.choice(samples)
            content = _IDENTIFIER.sub(fresh, sample.fields["content"])
            node = _IDENTIFIER.sub(fresh, sample.fields.get("node", ""))
            when += timedelta(microseconds=rng.randrange(1, 20000))
            out.write(_render(sample, content, node, when) + "\n")
    tmp.replace(out_path)
    return out_path


def read_contents(path: Path, systems: Sequence[str] = ("HDFS", "BGL")) -> dict[str, list[str]]:
    """Return the content field of every line, per system (first matching line format wins)."""
    # order matters: the BGL format also accepts HDFS lines, so HDFS is tried first
    registry = load_registry()
    patterns = {s: re.compile(get_entry(REGISTRY_NAMES[s], registry).format.regex) for s in systems}
    contents: dict[str, list[str]] = {s: [] for s in systems}
    with path.open(encoding="utf-8") as lines:
        for line in lines:
            line = line.rstrip("\n")
            for system, pattern in patterns.items():
                m = pattern.match(line)
                if m:
                    contents[system].append(m.group("content"))
                    break
    return contents


def miner_settings(system: str) -> dict:
    """Return the registry's template-miner settings for a sample system."""
    return get_entry(REGISTRY_NAMES[system], load_registry()).miner.model_dump()


def time_reference(contents: list[str], settings: dict) -> tuple[np.ndarray, float]:
    """(a) Run a bare drain3 add_log_message loop; return 0-based cluster ids and CPU seconds."""
    from drain3 import TemplateMiner
    from drain3.masking import MaskingInstruction
    from drain3.template_miner_config import TemplateMinerConfig

    config = TemplateMinerConfig()
    config.masking_instructions = [MaskingInstruction(m, "*") for m in settings["masks"]]
    config.drain_sim_th = settings["similarity"]
    config.drain_depth = settings["depth"]
    config.drain_max_children = settings["max_children"]
    miner = TemplateMiner(config=config)
    add = miner.add_log_message
    start = time.process_time()
    ids = [add(c)["cluster_id"] for c in contents]
    seconds = time.process_time() - start
    return np.asarray(ids, dtype=np.int64) - 1, seconds


def time_ours(contents: list[str], settings: dict) -> tuple[np.ndarray, float]:
    """(b) Run our miner over the contents; return template ids and CPU seconds."""
    miner = registry_miner(settings)
    start = time.process_time()
    ids = miner.add_many(contents)
    return ids, time.process_time() - start


# =============================================================================
# Part (c): end-to-end ingest, and peak memory of a large ingest.
# =============================================================================


def split_by_system(log_path: Path, systems: Sequence[str] = ("HDFS", "BGL")) -> dict[str, Path]:
    """Write each system's lines of the mixed log to a file of its own (one line format per file)."""
    registry = load_registry()
    patterns = {s: re.compile(get_entry(REGISTRY_NAMES[s], registry).format.regex) for s in systems}
    outs = {s: log_path.with_name(f"{log_path.stem}-{s}.log") for s in systems}
    handles = {s: p.open("w", encoding="utf-8") for s, p in outs.items()}
    try:
        with log_path.open(encoding="utf-8") as lines:
            for line in lines:
                for system, pattern in patterns.items():  # HDFS first: the BGL format also accepts HDFS lines
                    if pattern.match(line.rstrip("\n")):
                        handles[system].write(line)
                        break
    finally:
        for h in handles.values():
            h.close()
    return outs


def time_ingest_end_to_end(files: dict[str, Path], workdir: Path) -> tuple[int, float]:
    """(c) Ingest each system's file end to end (read, split headers, parse times, mine, write Parquet)."""
    from logtrial.data.ingest import ingest_files

    registry = load_registry()
    total_n, total_s = 0, 0.0
    for system, path in files.items():
        entry = get_entry(REGISTRY_NAMES[system], registry)
        start = time.process_time()
        res = ingest_files(f"bench-{system.lower()}", [path], entry.format, entry.miner, workdir / "tables",
                           force=True)
        seconds = time.process_time() - start
        n = res.manifest["rows"]
        _report(f"(c) ingest {system}", n, seconds)
        total_n, total_s = total_n + n, total_s + seconds
    return total_n, total_s


_RSS_PROBE = """
import resource, sys, time
from pathlib import Path
from logtrial.data.ingest import ingest_files
from logtrial.data.registry import get_entry, load_registry
import pyarrow.parquet, pandas, numpy
entry = get_entry(sys.argv[1], load_registry())
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
res = ingest_files("bench-rss", [Path(sys.argv[2])], entry.format, entry.miner, Path(sys.argv[3]), force=True)
after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(before, after, res.manifest["rows"])
"""


def peak_rss_growth(n_lines: int, seed: int, workdir: Path, system: str = "BGL") -> None:
    """Ingest an n_lines single-system log in a fresh process; print peak RSS growth over the imports."""
    import subprocess

    path = build_replicated_log(workdir / f"rss-{system}-{n_lines}.log", n_lines, seed, systems=(system,))
    out = subprocess.run(
        [sys.executable, "-c", _RSS_PROBE, REGISTRY_NAMES[system], str(path), str(workdir / "rss-tables")],
        check=True, capture_output=True, text=True, cwd=Path(__file__).resolve().parents[1],
    ).stdout.split()
    before, after, rows = int(out[0]), int(out[1]), int(out[2])
    print(f"peak RSS: {before / 1024:.0f} MiB after imports, {after / 1024:.0f} MiB after ingesting "
          f"{rows:,d} {system} lines; growth {(after - before) / 1024:.0f} MiB (target < 500 MiB)")


def _report(name: str, n: int, seconds: float) -> float:
    """Print one timing line and return lines/s."""
    rate = n / seconds
    print(f"  {name:28s} {n:>10,d} lines  {seconds:8.2f} CPU s  {rate:>12,.0f} lines/s")
    return rate


def _best_of(repeat: int, contents: list[str], settings: dict) -> tuple[np.ndarray, float, np.ndarray, float]:
    """Time (a) and (b) alternately `repeat` times; return the ids and least CPU seconds of each."""
    seconds_a = seconds_b = float("inf")
    for _ in range(repeat):
        ref_ids, seconds = time_reference(contents, settings)
        seconds_a = min(seconds_a, seconds)
        our_ids, seconds = time_ours(contents, settings)
        seconds_b = min(seconds_b, seconds)
    return ref_ids, seconds_a, our_ids, seconds_b


def run(n_lines: int, seed: int, workdir: Path, repeat: int = 1, rss_lines: int = 0) -> None:
    """Build the replicated log and print the (a)/(b) timings and their ratio."""
    logging.disable(logging.INFO)  # drain3 logs at INFO when a miner starts
    log_path = workdir / f"replicated-{n_lines}-{seed}.log"
    start = time.perf_counter()
    build_replicated_log(log_path, n_lines, seed)
    print(f"built {log_path} ({n_lines:,d} lines) in {time.perf_counter() - start:.1f} s")
    total_a = total_b = 0.0
    total_n = 0
    for system, contents in read_contents(log_path).items():
        settings = miner_settings(system)
        ref_ids, seconds_a, our_ids, seconds_b = _best_of(repeat, contents, settings)
        same = np.array_equal(ref_ids, our_ids)
        print(f"{system}: {len(set(our_ids.tolist()))} templates, identical grouping: {same}")
        _report("(a) drain3 add_log_message", len(contents), seconds_a)
        _report("(b) DrainMiner.add_many", len(contents), seconds_b)
        print(f"  ratio (b)/(a): {seconds_a / seconds_b:.2f}x")
        if not same:
            raise SystemExit(f"{system}: groupings differ from drain3")
        total_a, total_b, total_n = total_a + seconds_a, total_b + seconds_b, total_n + len(contents)
    print("all systems:")
    rate_a = _report("(a) drain3 add_log_message", total_n, total_a)
    rate_b = _report("(b) DrainMiner.add_many", total_n, total_b)
    print(f"  ratio (b)/(a): {rate_b / rate_a:.2f}x  (target >= 3)")
    n_c, seconds_c = time_ingest_end_to_end(split_by_system(log_path), workdir)
    rate_c = _report("(c) logtrial ingest, all", n_c, seconds_c)
    print(f"  ratio (c)/(a): {rate_c / rate_a:.2f}x  (target >= 1.5)")
    if rss_lines:
        peak_rss_growth(rss_lines, seed, workdir)


def main(argv: Sequence[str] | None = None) -> None:
    """Parse the command line and run the benchmark."""
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--lines", type=int, default=1_000_000, help="lines to generate (default 1,000,000)")
    parser.add_argument("--quick", action="store_true", help="100,000 lines")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--repeat", type=int, default=1, help="time each side this many times, keep the least")
    parser.add_argument("--rss-lines", type=int, default=5_000_000,
                        help="lines of the peak-memory ingest (default 5,000,000; 0 skips it)")
    parser.add_argument("--workdir", type=Path, default=None, help="where to write the log (default: a temp dir)")
    args = parser.parse_args(argv)
    n_lines = 100_000 if args.quick else args.lines
    rss_lines = 200_000 if args.quick else args.rss_lines
    if args.workdir is not None:
        run(n_lines, args.seed, args.workdir, args.repeat, rss_lines)
        return
    with tempfile.TemporaryDirectory(prefix="logtrial-bench-") as tmp:
        run(n_lines, args.seed, Path(tmp), args.repeat, rss_lines)


if __name__ == "__main__":
    main()
