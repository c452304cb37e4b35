"""Ingest benchmark: template mining and end-to-end ingest against a bare drain3 loop and a line-reading floor.

On HDFS-like and BGL-like replicated content (one file per system), measured in this
process, alternating, `--repeat` times (default 3), reporting medians:

(a) a bare loop of drain3 0.9.11 `TemplateMiner.add_log_message` (the reference
    library, installed for benchmarks only) over the content fields;
(b) our `DrainMiner.add_many` over the same contents, with the same settings;
(c) `logtrial ingest` end to end (read, split headers, parse times, mask, mine, write
    Parquet) with `--workers` processes (default 2);
(d) the floor: iterating over the file's lines in Python and doing nothing else.

Ratios printed: (b) vs (a) in CPU seconds; (c) vs (a) as lines per wall second of
ingest over lines per CPU second of drain3 (what a user waits for, against what the
library costs), and also in CPU seconds of ingest's whole process tree; (c) vs (d)
in wall seconds; and (c) against 550,000 lines/s, the published pace of a parallel
parser (11M HDFS lines in under 20 s on a laptop; arXiv 2408.00645). Then the peak
RSS of ingesting two log sizes in fresh processes (flat memory: the two peaks should
be close). On a shared machine, wall-time ratios move with the other load; CPU-time
ratios are steadier.

The log is built from the HDFS and BGL Loghub 2k samples: lines are drawn at
random and their identifiers (block ids, IP addresses and ports, node names,
core files, hex values, long numbers) and header timestamps are regenerated,
so most raw lines are new. Miner settings and line formats come from the
registry entries hdfs-2k and bgl-2k. Prints figures; this is not a test.

    python bench/ingest.py            # 1,000,000 lines
    python bench/ingest.py --quick    # 100,000 lines, one repetition
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


def time_ingest(path: Path, system: str, workdir: Path, workers: int) -> tuple[int, float, float]:
    """(c) Ingest one system's file end to end; return rows, wall seconds and CPU seconds of the process tree."""
    from logtrial.data.ingest import ingest_files

    entry = get_entry(REGISTRY_NAMES[system], load_registry())
    cpu0 = _tree_cpu()
    wall0 = time.perf_counter()
    res = ingest_files(f"bench-{system.lower()}", [path], entry.format, entry.miner, workdir / "tables",
                       force=True, workers=workers)
    return res.manifest["rows"], time.perf_counter() - wall0, _tree_cpu() - cpu0


def time_floor(path: Path) -> tuple[float, float]:
    """(d) Iterate over a file's lines in Python, nothing else; return wall and CPU seconds."""
    wall0, cpu0 = time.perf_counter(), time.process_time()
    with path.open(encoding="utf-8") as lines:
        for _ in lines:
            pass
    return time.perf_counter() - wall0, time.process_time() - cpu0


def _tree_cpu() -> float:
    """CPU seconds of this process and of its finished children (ingest's workers)."""
    import resource

    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


_RSS_PROBE = """
import resource, sys
from pathlib import Path
from logtrial.data.ingest import ingest_files
from logtrial.data.registry import get_entry, load_registry
import pyarrow.parquet, pandas, numpy

def status(key):
    # this process's own figures (ru_maxrss would carry the parent's peak across fork and exec)
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1])
    return 0

entry = get_entry(sys.argv[1], load_registry())
before = status("VmHWM")
res = ingest_files("bench-rss", [Path(sys.argv[2])], entry.format, entry.miner, Path(sys.argv[3]), force=True,
                   workers=int(sys.argv[4]))
after = status("VmHWM")
kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
print(before, after, kids, res.manifest["rows"])
"""


def peak_rss(n_lines: int, seed: int, workdir: Path, workers: int, system: str = "BGL") -> None:
    """Ingest an n_lines single-system log in a fresh process; print its peak RSS and its largest worker's."""
    import subprocess

    path = build_replicated_log(workdir / f"rss-{system}-{n_lines}.log", n_lines, seed, systems=(system,))
    out = subprocess.run(
        [sys.executable, "-c", _RSS_PROBE, REGISTRY_NAMES[system], str(path), str(workdir / "rss-tables"), str(workers)],
        check=True, capture_output=True, text=True, cwd=Path(__file__).resolve().parents[1],
    ).stdout.split()
    before, after, kids, rows = (int(x) for x in out[:4])
    print(f"  {rows:>10,d} {system} lines: main process peak {after / 1024:.0f} MiB ({before / 1024:.0f} MiB after "
          f"imports), largest worker peak {kids / 1024:.0f} MiB (workers are forked from the main process)")
    path.unlink()


def run(n_lines: int, seed: int, workdir: Path, repeat: int, workers: int, rss_lines: list[int]) -> None:
    """Build the replicated log and print the timings, medians and ratios."""
    logging.disable(logging.INFO)  # drain3 logs at INFO when a miner starts
    log_path = workdir / f"replicated-{n_lines}-{seed}.log"
    start = time.perf_counter()
    build_replicated_log(log_path, n_lines, seed)
    files = split_by_system(log_path)
    log_path.unlink()
    print(f"built {n_lines:,d} replicated lines in {time.perf_counter() - start:.1f} s; {repeat} alternating "
          f"repetition(s), medians; ingest with {workers} worker process(es)")
    contents = {s: c for s, c in read_contents_split(files).items()}
    for system, path in files.items():
        settings = miner_settings(system)
        a, b, c_wall, c_cpu, d_wall = [], [], [], [], []
        same = True
        for _ in range(repeat):
            ref_ids, sec = time_reference(contents[system], settings)
            a.append(sec)
            our_ids, sec = time_ours(contents[system], settings)
            b.append(sec)
            same &= bool(np.array_equal(ref_ids, our_ids))
            rows, wall, cpu = time_ingest(path, system, workdir, workers)
            c_wall.append(wall)
            c_cpu.append(cpu)
            d_wall.append(time_floor(path)[0])
        n = len(contents[system])
        ma, mb, mcw, mcc, md = (float(np.median(x)) for x in (a, b, c_wall, c_cpu, d_wall))
        print(f"{system}-like: {n:,d} lines, identical grouping to drain3: {same}")
        print(f"  (a) drain3 add_log_message   {n / ma:>10,.0f} lines per CPU s")
        print(f"  (b) DrainMiner.add_many      {n / mb:>10,.0f} lines per CPU s    (b)/(a) {ma / mb:5.2f}x  (target >= 3)")
        print(f"  (c) ingest, {workers} workers        {rows / mcw:>10,.0f} lines per wall s   (c)/(a) "
              f"{(rows / mcw) / (n / ma):5.2f}x  (target >= 4)")
        print(f"      ingest CPU, all processes {rows / mcc:>10,.0f} lines per CPU s    (c)/(a) in CPU "
              f"{(rows / mcc) / (n / ma):5.2f}x")
        print(f"  (d) line-iteration floor     {n / md:>10,.0f} lines per wall s   (c) takes {mcw / md:5.1f}x the floor")
        print(f"      against 550,000 lines/s published: {(rows / mcw) / 550_000:.2f}x")
        if not same:
            raise SystemExit(f"{system}: groupings differ from drain3")
    if rss_lines:
        print("peak RSS (fresh process per size; flat in lines when the peaks are close):")
        for n_rss in rss_lines:
            peak_rss(n_rss, seed, workdir, workers)


def read_contents_split(files: dict[str, Path]) -> dict[str, list[str]]:
    """The content field of every line of each system's file."""
    registry = load_registry()
    out: dict[str, list[str]] = {}
    for system, path in files.items():
        rx = re.compile(get_entry(REGISTRY_NAMES[system], registry).format.regex)
        with path.open(encoding="utf-8") as lines:
            out[system] = [m.group("content") for line in lines if (m := rx.match(line.rstrip("\n")))]
    return out


def main(argv: Sequence[str] | None = None) -> None:
    """Parse the command line and run the benchmark."""
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--lines", type=int, default=1_000_000, help="lines to generate (default 1,000,000)")
    parser.add_argument("--quick", action="store_true", help="100,000 lines, one repetition, small RSS probes")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--repeat", type=int, default=3, help="alternating repetitions; medians are reported")
    parser.add_argument("--workers", type=int, default=2, help="ingest worker processes (default 2)")
    parser.add_argument("--rss-lines", type=int, nargs="*", default=[1_000_000, 5_000_000],
                        help="log sizes of the peak-memory ingests (default 1M and 5M; none skips them)")
    parser.add_argument("--workdir", type=Path, default=None, help="where to write the log (default: a temp dir)")
    parser.add_argument("--rss-only", action="store_true", help="only the peak-memory ingests")
    args = parser.parse_args(argv)
    if args.rss_only:
        logging.disable(logging.INFO)
        with tempfile.TemporaryDirectory(prefix="logtrial-bench-") as tmp:
            print("peak RSS (fresh process per size; flat in lines when the peaks are close):")
            for n_rss in args.rss_lines:
                peak_rss(n_rss, args.seed, args.workdir or Path(tmp), args.workers)
        return
    n_lines = 100_000 if args.quick else args.lines
    repeat = 1 if args.quick else args.repeat
    rss = [50_000, 200_000] if args.quick else args.rss_lines
    if args.workdir is not None:
        run(n_lines, args.seed, args.workdir, repeat, args.workers, rss)
        return
    with tempfile.TemporaryDirectory(prefix="logtrial-bench-") as tmp:
        run(n_lines, args.seed, Path(tmp), repeat, args.workers, rss)


if __name__ == "__main__":
    main()
