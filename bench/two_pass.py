"""Prototype for logs larger than one machine: two-pass template mining, its grouping accuracy and its match speed.

Sequential Drain assigns each line in file order, so it cannot be spread over a
cluster as it stands. The two-pass scheme measured here could be:

1. learn: run Drain over a sample of the lines (the first share of the file, or a
   seeded random share kept in file order);
2. match: with the learnt templates frozen, route and score every line (no template
   is created or generalised, so the lines are independent and the step could run in
   parallel, e.g. one Dask task per byte range);
3. residue: the lines that matched no frozen template go through Drain again, in file
   order, continuing from the learnt state (one process; few lines when the sample
   was representative).

Grouping accuracy (the share of lines whose predicted group equals their true group
exactly; Zhu et al., ICSE-SEIP 2019) is computed against the Loghub 2k ground truth
for sequential Drain and for each two-pass variant. The loss is sequential minus
two-pass. The match step's speed is timed on a replicated HDFS-like log in one process
against sequential Drain on the same lines (CPU seconds). Prints figures; not a test.

    python bench/two_pass.py [--share 0.1] [--seed 0] [--match-lines 200000]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from logtrial.data.header import LineParser  # noqa: E402
from logtrial.data.lines import byte_ranges, decode_range  # noqa: E402
from logtrial.data.mining import DrainMiner, registry_miner  # noqa: E402
from logtrial.data.parse_score import grouping_accuracy  # noqa: E402
from logtrial.data.registry import load_registry, mirror_dir  # noqa: E402


def match_frozen(miner: DrainMiner, content: str) -> int:
    """The template a raw line would join without changing anything (Drain's routing and scoring), or -1."""
    return int(miner.match_masked_many([miner._mask(content)])[0])


def two_pass(contents: list[str], settings: dict, learn: np.ndarray) -> np.ndarray:
    """Template ids by the two-pass scheme: Drain on the `learn` lines, frozen matching, Drain on the residue."""
    miner = registry_miner(settings)
    miner.add_many([contents[i] for i in np.flatnonzero(learn)])
    ids = np.asarray([match_frozen(miner, c) for c in contents], dtype=np.int64)
    residue = np.flatnonzero(ids < 0)
    if len(residue):
        ids[residue] = miner.add_many([contents[i] for i in residue])
    return ids


def sample_contents(name: str, entry) -> tuple[list[str], list[str]]:
    """Content fields of a Loghub 2k sample and its ground-truth event ids."""
    folder = mirror_dir() / entry.system
    path = folder / entry.logs[0]
    lines = decode_range(byte_ranges(path, 1 << 40)[0], entry.format.encoding, False).lines
    chunk, _ = LineParser(entry.format).parse(lines, 1)
    truth = pd.read_csv(folder / entry.truth.file, dtype=str, keep_default_na=False)
    return list(chunk.content), truth[entry.truth.id].tolist()


def accuracy_table(share: float, seed: int) -> pd.DataFrame:
    """Grouping accuracy of sequential Drain and of the two-pass variants on the 16 samples."""
    registry = load_registry()
    rows = []
    for name in sorted(n for n in registry if n.endswith("-2k")):
        entry = registry[name]
        contents, truth = sample_contents(name, entry)
        settings = entry.miner.model_dump()
        n = len(contents)
        seq = grouping_accuracy(truth, registry_miner(settings).add_many(contents))
        first = np.zeros(n, dtype=bool)
        first[: max(1, int(round(share * n)))] = True
        rand = np.random.default_rng(seed).random(n) < share
        acc_first = grouping_accuracy(truth, two_pass(contents, settings, first))
        acc_rand = grouping_accuracy(truth, two_pass(contents, settings, rand))
        rows.append({"sample": name, "sequential": seq, "first_share": acc_first, "random_share": acc_rand,
                     "loss_first": seq - acc_first, "loss_random": seq - acc_rand})
    return pd.DataFrame(rows)


def match_speed(n_lines: int, seed: int, share: float) -> None:
    """CPU seconds of frozen matching vs sequential Drain on replicated HDFS-like contents."""
    sys.path.insert(0, str(ROOT / "bench"))
    from ingest import build_replicated_log  # noqa: PLC0415  (bench/ingest.py)

    entry = load_registry()["hdfs-2k"]
    with tempfile.TemporaryDirectory(prefix="logtrial-two-pass-") as tmp:
        path = build_replicated_log(Path(tmp) / "hdfs.log", n_lines, seed, systems=("HDFS",))
        lines = decode_range(byte_ranges(path, 1 << 40)[0], "utf-8", False).lines
    contents = list(LineParser(entry.format).parse(lines, 1)[0].content)
    settings = entry.miner.model_dump()
    t = time.process_time()
    registry_miner(settings).add_many(contents)
    seq = time.process_time() - t
    miner = registry_miner(settings)
    miner.add_many(contents[: int(share * len(contents))])
    t = time.process_time()
    unmatched = sum(match_frozen(miner, c) < 0 for c in contents)
    frozen = time.process_time() - t
    print(f"match step on {len(contents):,d} HDFS-like lines: sequential Drain {len(contents) / seq:,.0f} lines/CPU s, "
          f"frozen matching {len(contents) / frozen:,.0f} lines/CPU s per process ({unmatched:,d} unmatched lines "
          f"left for the residue pass)")


def main(argv: list[str] | None = None) -> int:
    """Print the accuracy table and the match-step speed."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--share", type=float, default=0.1, help="share of lines the first pass learns on (default 0.1)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--match-lines", type=int, default=200_000, help="lines for the match-speed figure (0 skips)")
    args = ap.parse_args(argv)
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    table = accuracy_table(args.share, args.seed)
    pd.set_option("display.width", 200)
    print(f"grouping accuracy, learning on {args.share:.0%} of the lines:")
    print(table.to_string(index=False, float_format=lambda v: f"{v:.4f}"))
    worst = table[["loss_first", "loss_random"]].max()
    print(f"largest loss: first share {worst['loss_first']:.4f}, random share {worst['loss_random']:.4f} "
          f"(criterion for --engine dask: < 0.01 on every sample)")
    if args.match_lines:
        match_speed(args.match_lines, args.seed, args.share)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
