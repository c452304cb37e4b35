"""Command line: one verb per stage of the harness."""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from logtrial import __version__
from logtrial.errors import ConfigError, LogtrialError


def _table(rows: list[dict], columns: list[str]) -> str:
    """Render rows as a plain aligned text table."""
    widths = {c: max([len(c)] + [len(str(r.get(c, ""))) for r in rows]) for c in columns}
    head = "  ".join(c.ljust(widths[c]) for c in columns)
    rule = "  ".join("-" * widths[c] for c in columns)
    body = ["  ".join(str(r.get(c, "")).ljust(widths[c]) for c in columns) for r in rows]
    return "\n".join([head, rule, *body])


def _registry(args: argparse.Namespace):
    from logtrial.data.registry import load_registry

    return load_registry([Path(p) for p in getattr(args, "registry", None) or []])


def cmd_datasets(args: argparse.Namespace) -> int:
    """List the registry and what is on disk."""
    from logtrial.data.acquire import status
    from logtrial.data.registry import home_dir

    reg = _registry(args)
    home = home_dir()
    rows = []
    for name, e in sorted(reg.items()):
        lines = e.expected.get("lines")
        rows.append(
            {
                "name": name,
                "system": e.system,
                "lines": f"{int(lines):,}" if lines else "?",
                "labels": e.labels.scheme,
                "licence": (e.licence.split(":")[0] if e.licence else "-")[:28],
                "on disk": "generated on demand" if e.generator is not None else status(e, home),
            }
        )
    print(_table(rows, ["name", "system", "lines", "labels", "licence", "on disk"]))
    print(f"\ndata folder: {home}  (set LOGTRIAL_HOME to move it)")
    return 0


def cmd_fetch(args: argparse.Namespace) -> int:
    """Acquire and verify one dataset."""
    from logtrial.data.acquire import fetch
    from logtrial.data.registry import get_entry, home_dir

    entry = get_entry(args.name, _registry(args))
    res = fetch(entry, home=home_dir(), mirror=Path(args.mirror) if args.mirror else None, progress=True)
    state = "already present, verified against the lock" if res.cached else "fetched and verified"
    print(f"{entry.name}: {state}: {res.path}")
    if res.recorded_hashes:
        print("  first fetch: sizes and sha256 recorded in the lock file")
    return 0


def _print_ingest(res, name: str) -> None:
    m = res.manifest
    how = "reused cached table" if res.cached else "built event table"
    print(f"{name}: {how}: {res.events}")
    print(f"  rows {m['rows']:,} of {m['lines']:,} lines, {m['templates']:,} templates, "
          f"quarantined {m['quarantined']:,}" + (f" (see {res.quarantine})" if m["quarantined"] else ""))
    if m.get("bad_encoding_lines"):
        first = ", ".join(str(x) for x in m["first_bad_encoding_lines"])
        print(f"  warning: {m['bad_encoding_lines']:,} line(s) had bytes that are not valid "
              f"{m['format']['encoding']}; replaced with U+FFFD (first at {first})", file=sys.stderr)


def cmd_ingest(args: argparse.Namespace) -> int:
    """Build or reuse an event table."""
    from logtrial.data.ingest import ingest_entry, ingest_files
    from logtrial.data.registry import format_from_file, get_entry, home_dir, miner_from_file

    home = home_dir()
    opts = dict(force=args.force, strict=args.strict, progress=True)
    if args.file:
        if not args.format:
            raise LogtrialError("ingest --file needs --format FILE.yaml (a `regex` with a `content` group)")
        fmt = format_from_file(Path(args.format))
        miner = miner_from_file(Path(args.format))
        name = args.name or f"file-{Path(args.file).stem.lower()}"
        res = ingest_files(name, [Path(args.file)], fmt, miner, home / "tables", **opts)
    else:
        if not args.name:
            raise LogtrialError("ingest needs a dataset NAME or --file LOG --format FORMAT.yaml")
        entry = get_entry(args.name, _registry(args))
        res = ingest_entry(entry, home, Path(args.mirror) if args.mirror else None, **opts)
        name = entry.name
    _print_ingest(res, name)
    return 0


def cmd_parse_score(args: argparse.Namespace) -> int:
    """Grouping accuracy of the miner against ground-truth templates."""
    from logtrial.data.ingest import dataset_folder, ingest_entry
    from logtrial.data.parse_score import score_against_truth
    from logtrial.data.registry import get_entry, home_dir

    entry = get_entry(args.name, _registry(args))
    if entry.truth is None:
        raise LogtrialError(f"dataset '{entry.name}' has no ground-truth template file (`truth:` in the registry)")
    home = home_dir()
    mirror = Path(args.mirror) if args.mirror else None
    res = ingest_entry(entry, home, mirror, progress=True)
    truth_path = dataset_folder(entry, home, mirror) / entry.truth.file
    score = score_against_truth(res.events, res.templates, truth_path, entry.truth)
    rows = [{"dataset": entry.name, **{k: (f"{v:.4f}" if isinstance(v, float) else v) for k, v in score.items()}}]
    print(_table(rows, list(rows[0])))
    return 0


def cmd_simulate(args: argparse.Namespace) -> int:
    """Write a simulated fleet's logs and incidents."""
    from logtrial.simulation.simulate import cli_simulate

    return cli_simulate(args.config, args.out, seed=args.seed, progress=True, per_node=args.per_node)


def cmd_run(args: argparse.Namespace) -> int:
    """Run or resume an experiment grid."""
    from logtrial.data.registry import home_dir
    from logtrial.running.engines import check_engine_options, is_url, local_home
    from logtrial.running.experiment import load_experiment
    from logtrial.running.runs import run_experiment

    check_engine_options(args.engine, args.scheduler, args.workers)
    exp = load_experiment(Path(args.experiment), output=args.out)
    home: Path | str = home_dir()
    raw_home = os.environ.get("LOGTRIAL_HOME", "")
    if is_url(raw_home):
        home = local_home(raw_home) or raw_home
        if args.engine == "local" and isinstance(home, str):
            raise ConfigError(f"LOGTRIAL_HOME: {raw_home} is an object-store URL; it needs --engine dask")
    counts = run_experiment(exp, home, progress=True, mirror=Path(args.mirror) if args.mirror else None,
                            track=not args.no_track, engine=args.engine, scheduler=args.scheduler,
                            workers=args.workers)
    print(f"{exp.name}: {counts['finished']} finished, {counts['failed']} failed, "
          f"{counts['skipped']} already done; results in {exp.output}")
    return 1 if counts["failed"] else 0


def cmd_report(args: argparse.Namespace) -> int:
    """Write tables and plots from recorded runs."""
    from logtrial.output.report import compact, to_text, write_report
    from logtrial.running.experiment import experiment_order, load_experiment

    exp = load_experiment(Path(args.experiment), output=args.out)
    paths = write_report(exp.output, exp.name, *experiment_order(exp), run_ids={r.run_id for r in exp.runs})
    print(to_text(compact(paths["table"])))
    print(f"\nreport: {paths['markdown']}\n        {paths['html']}\n        {paths['csv']}")
    print(f"tracking: mlflow ui --backend-store-uri sqlite:///{(exp.output / 'mlflow.db').resolve()}")
    return 0


def cmd_gate(args: argparse.Namespace) -> int:
    """Re-run (or read) an experiment and compare it with the committed reference."""
    import tempfile

    from logtrial.data.registry import home_dir
    from logtrial.output.gate import compare, format_table, gate_settings, read_results
    from logtrial.output.report import load_results
    from logtrial.running.experiment import load_experiment
    from logtrial.running.runs import run_experiment
    from logtrial.running.store import RunStore

    exp = load_experiment(Path(args.experiment))
    reference_dir = Path(args.reference) if args.reference else exp.output
    reference = read_results(reference_dir, "reference")
    metrics, tol, rel = gate_settings(exp.raw.get("gate"))
    if args.tolerance is not None:
        tol = args.tolerance
    if args.fresh:
        fresh = read_results(Path(args.fresh), "fresh results")
        where = Path(args.fresh)
    else:
        out = Path(args.out) if args.out else Path(tempfile.mkdtemp(prefix="logtrial-gate-"))
        fresh_exp = load_experiment(Path(args.experiment), output=out)
        counts = run_experiment(fresh_exp, home_dir(), progress=not args.quiet, track=False)
        if counts["failed"]:
            print(f"gate: {counts['failed']} run(s) failed; see {out / 'runs'}", file=sys.stderr)
        wanted = {r.run_id for r in fresh_exp.runs}
        records = [r for r in RunStore(out).records() if r["run_id"] in wanted]
        load_results(records).to_csv(out / "results.csv", index=False, float_format="%.6g")
        fresh = read_results(out, "fresh results")  # same rounding as the committed reference
        where = out
    result = compare(reference, fresh, metrics, tol, rel)
    failed = 0 if args.fresh else counts["failed"]
    print(f"gate {exp.name}: reference {reference_dir / 'results.csv'}  vs  fresh {where}")
    print(format_table(result, only_moved=not args.all))
    n = len(result.table)
    bad = result.regressions
    if failed:
        print(f"\nFAIL: {failed} run(s) of the fresh grid failed (see the run records)")
        return 1
    if bad.empty:
        print(f"\nPASS: {n} figures compared, no regression (tolerance {tol:g} or the reference interval)")
        return 0
    worst = ", ".join(f"{r.detector}/{r.noise} {r.metric} {r.note}" for r in bad.head(5).itertuples())
    print(f"\nFAIL: {len(bad)} of {n} figures regressed: {worst}")
    return 1


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every verb and its examples."""
    p = argparse.ArgumentParser(
        prog="logtrial",
        description="Offline evaluation harness for log-based anomaly detection and failure prediction.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Example: logtrial demo   (the whole job on the built-in radar-relay scenario)",
    )
    p.add_argument("--version", action="version", version=f"logtrial {__version__}")
    sub = p.add_subparsers(dest="verb", metavar="VERB")

    def verb(name: str, func, help_: str, example: str) -> argparse.ArgumentParser:
        sp = sub.add_parser(name, help=help_, description=help_, epilog=f"Example:\n  {example}",
                            formatter_class=argparse.RawDescriptionHelpFormatter)
        sp.set_defaults(func=func)
        return sp

    def registry_opt(sp: argparse.ArgumentParser) -> None:
        sp.add_argument("--registry", action="append", metavar="FILE",
                        help="extra registry YAML with more datasets (repeatable)")

    sp = verb("datasets", cmd_datasets, "list the registry and what is on disk", "logtrial datasets")
    registry_opt(sp)

    sp = verb("fetch", cmd_fetch, "acquire a dataset and verify its size and sha256",
              "logtrial fetch bgl-2k --mirror ../shared/datasets/loghub-2k")
    sp.add_argument("name", metavar="NAME")
    sp.add_argument("--mirror", metavar="DIR", help="local folder holding the files (default: LOGTRIAL_MIRROR)")
    registry_opt(sp)

    sp = verb("ingest", cmd_ingest, "build (or reuse) the event table of a dataset or a log file",
              "logtrial ingest bgl-2k\n  logtrial ingest --file my.log --format my-format.yaml")
    sp.add_argument("name", metavar="NAME", nargs="?")
    sp.add_argument("--file", metavar="LOG", help="ingest this log file instead of a registry dataset")
    sp.add_argument("--format", metavar="YAML", help="line format for --file (regex with a `content` group)")
    sp.add_argument("--mirror", metavar="DIR")
    sp.add_argument("--force", action="store_true", help="rebuild even when a cached table matches")
    sp.add_argument("--strict", action="store_true", help="stop at the first undecodable line instead of replacing")
    registry_opt(sp)

    sp = verb("parse-score", cmd_parse_score, "template grouping accuracy against ground-truth templates",
              "logtrial parse-score bgl-2k")
    sp.add_argument("name", metavar="NAME")
    sp.add_argument("--mirror", metavar="DIR")
    registry_opt(sp)

    sp = verb("simulate", cmd_simulate, "write a simulated radar-relay fleet's logs and incidents",
              "logtrial simulate --out sim/\n  logtrial simulate scenario.yaml --out sim/")
    sp.add_argument("config", metavar="CONFIG", nargs="?", help="scenario YAML (default: built-in scenario)")
    sp.add_argument("--out", required=True, metavar="DIR")
    sp.add_argument("--seed", type=int)
    sp.add_argument("--per-node", action="store_true", help="also write one log file per node under nodes/")

    sp = verb("run", cmd_run, "run or resume an experiment grid (every run recorded)",
              "logtrial run reports/bgl-2k/experiment.yaml\n"
              "  logtrial run reports/bgl-2k/experiment.yaml --engine dask --workers 2\n"
              "  logtrial run reports/bgl-2k/experiment.yaml --engine dask --scheduler tcp://scheduler-host:8786")
    sp.add_argument("experiment", metavar="EXPERIMENT.yaml")
    sp.add_argument("--out", metavar="DIR", help="output folder (default: the file's `output`)")
    sp.add_argument("--mirror", metavar="DIR")
    sp.add_argument("--no-track", action="store_true", help="do not record runs in MLflow")
    sp.add_argument("--engine", choices=["local", "dask"], default="local",
                    help="local: fit groups in local processes, one per core (default); dask: one task per fit group on a Dask cluster")
    sp.add_argument("--scheduler", metavar="ADDRESS",
                    help="with --engine dask: address of a running Dask scheduler (data home must be shared)")
    sp.add_argument("--workers", type=int, metavar="N",
                    help="local: N worker processes (default: one per core; 1 = in this process); "
                         "dask without --scheduler: start a local cluster of N worker processes")

    sp = verb("report", cmd_report, "comparison tables and plots from recorded runs",
              "logtrial report reports/bgl-2k/experiment.yaml")
    sp.add_argument("experiment", metavar="EXPERIMENT.yaml")
    sp.add_argument("--out", metavar="DIR", help="output folder holding the runs (default: the file's `output`)")

    sp = verb("gate", cmd_gate, "compare a fresh run with the committed reference; exit 1 on regression",
              "logtrial gate reports/bgl-2k/experiment.yaml")
    sp.add_argument("experiment", metavar="EXPERIMENT.yaml")
    sp.add_argument("--reference", metavar="DIR", help="reference results folder (default: the file's `output`)")
    sp.add_argument("--fresh", metavar="DIR", help="compare these results instead of re-running")
    sp.add_argument("--out", metavar="DIR", help="where the fresh run goes (default: a temporary folder)")
    sp.add_argument("--tolerance", type=float, help="absolute tolerance (default: the file's gate.tolerance or 0.02)")
    sp.add_argument("--all", action="store_true", help="show every compared figure, not only those that moved")
    sp.add_argument("--quiet", action="store_true", help="no per-run progress")

    from logtrial.demo import add_demo_parser

    add_demo_parser(verb)
    return p


def main(argv: list[str] | None = None) -> int:
    """Entry point of the `logtrial` command."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except LogtrialError as exc:
        print(f"logtrial {args.verb}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
