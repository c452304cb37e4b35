"""Command line: one verb per stage of the harness."""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from logtrial import __version__
from logtrial.errors import ConfigError, DataError, LogtrialError


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
    from logtrial.data.acquire import partial_downloads, status
    from logtrial.data.registry import SessionEntry, home_dir

    reg = _registry(args)
    home = home_dir()
    rows = []
    parts: list[str] = []
    for name, e in sorted(reg.items()):
        lines = e.expected.get("lines")
        rows.append(
            {
                "name": name,
                "system": e.system,
                "lines": f"{int(lines):,}" if lines else "?",
                "labels": e.labels.scheme,
                "licence": (e.licence.split(":")[0] if e.licence else "-")[:28],
                "on disk": "generated on demand" if e.generator is not None else _session_status(e) if isinstance(
                    e, SessionEntry) else status(e, home),
            }
        )
        parts += [f"  {path} ({size / 2**20:.1f} MiB): kept so that `logtrial fetch {name}` resumes it; "
                  "delete it to start over" for path, size in partial_downloads(e, home)]
    print(_table(rows, ["name", "system", "lines", "labels", "licence", "on disk"]))
    if parts:
        print("\npartial downloads:\n" + "\n".join(parts))
    print(f"\ndata folder: {home}  (set LOGTRIAL_HOME to move it)")
    return 0


def _session_status(entry) -> str:
    """'session files' when a session-file dataset's folder is there, else 'missing (folder)'."""
    try:
        entry.sessions.resolve(entry.name)
    except ConfigError:
        return "missing (" + (entry.sessions.folder_env or entry.sessions.folder) + ")"
    return "session files"


def cmd_fetch(args: argparse.Namespace) -> int:
    """Acquire and verify one or more datasets (names or groups); report each; non-zero if any failed."""
    from logtrial.data.acquire import LOCK_NAME, FetchOutcome, fetch_many
    from logtrial.data.registry import home_dir, load_groups, select_entries

    paths = [Path(p) for p in getattr(args, "registry", None) or []]
    entries = select_entries(args.names, _registry(args), load_groups(paths))
    home = home_dir()

    label = {"fetched": "refreshed and verified" if args.refresh else "fetched and verified",
             "present": "already present (files unchanged since they were fetched; `--refresh` obtains them again)"}

    def report(out: FetchOutcome) -> None:
        print(f"{out.name}: {label.get(out.state, out.state)}: {out.detail}", flush=True)
        for note in out.notes:
            print(f"  {note}", flush=True)
        if out.first_use:
            print(f"  no pinned checksum for {', '.join(out.first_use)}: this first fetch recorded size and sha256 "
                  f"in {home / LOCK_NAME} (trust on first use); later fetches must match", flush=True)

    if len(entries) > 1:
        print(f"fetching {len(entries)} datasets into {home}", flush=True)
    outcomes = fetch_many(entries, home=home, mirror=Path(args.mirror) if args.mirror else None,
                          progress=True, on_done=report, refresh=args.refresh)
    counts = {k: sum(o.state == k for o in outcomes) for k in ("fetched", "present", "skipped", "failed")}
    if len(entries) > 1:
        print(", ".join(f"{n} {k}" for k, n in counts.items() if n or k in ("fetched", "failed")))
    failed = [o for o in outcomes if o.state == "failed"]
    if failed:
        print(f"logtrial fetch: {len(failed)} of {len(outcomes)} dataset(s) failed: "
              f"{', '.join(o.name for o in failed)}", file=sys.stderr)
        for o in failed:
            print(f"  {o.name}: {o.detail}", file=sys.stderr)
        return max(o.exit_code for o in failed)
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
    opts = dict(force=args.force, strict=args.strict, progress=True, workers=args.workers,
                max_rejected_share=args.max_rejected_share, max_quarantine_bytes=int(args.max_quarantine_mb * 2**20),
                engine=args.engine, scheduler=args.scheduler)
    if args.scheduler and args.engine != "dask":
        raise ConfigError("--scheduler: only used with --engine dask")
    if args.dataset_name or args.incidents:
        return _ingest_and_register(args, home, opts)
    if args.file:
        if not args.format:
            raise LogtrialError("ingest --file needs --format FILE.yaml (a `regex` with a `content` group)")
        fmt = format_from_file(Path(args.format))
        miner = miner_from_file(Path(args.format))
        name = args.name or f"file-{Path(args.file).stem.lower()}"
        res = ingest_files(name, [Path(args.file)], fmt, miner, home / "tables", **opts)
        print("  (to use it in experiments, add --incidents FILE.csv --name NAME: it then becomes a dataset)",
              file=sys.stderr)
    else:
        if not args.name:
            raise LogtrialError("ingest needs a dataset NAME or --file LOG --format FORMAT.yaml")
        entry = get_entry(args.name, _registry(args))
        res = ingest_entry(entry, home, Path(args.mirror) if args.mirror else None, **opts)
        name = entry.name
    _print_ingest(res, name)
    return 0


def _ingest_and_register(args: argparse.Namespace, home: Path, opts: dict) -> int:
    """`ingest --file LOG --format FMT [--incidents CSV] --name NAME`: a dataset experiments can name."""
    from logtrial.data.acquire import fetch, log_files, user_paths
    from logtrial.data.ingest import ingest_files
    from logtrial.data.registry import register_local
    from logtrial.labels.incidents import read_incidents

    if not (args.file and args.format and args.dataset_name):
        raise ConfigError("to make a dataset of your own logs give --file LOG --format FORMAT.yaml --name NAME "
                          "(and --incidents INCIDENTS.csv for its truth)")
    if args.name:
        raise ConfigError(f"give the dataset name once: either NAME ({args.name}) or --name ({args.dataset_name})")
    if args.incidents:
        read_incidents(Path(args.incidents))  # errors name the user's own file, before anything is written
    entry, where = register_local(args.dataset_name, Path(args.file), Path(args.format),
                                  Path(args.incidents) if args.incidents else None, home)
    res = fetch(entry, home=home, progress=True)
    for note in res.notes:
        print(f"{entry.name}: {note}")
    try:
        table = ingest_files(entry.name, log_files(entry, res.path), entry.format, entry.miner, home / "tables",
                             **opts)
    except DataError as exc:  # name the user's own file, not the copy in the data home
        raise DataError(user_paths(str(exc), entry, res.path)) from None
    _print_ingest(table, entry.name)
    print(f"  registered dataset '{entry.name}' in {where}; name it in an experiment: datasets: [{entry.name}]")
    if not args.incidents:
        print("  no --incidents file: the dataset has no truth, so experiments cannot score it", file=sys.stderr)
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
    exp = load_experiment(Path(args.experiment), output=args.out, registry=args.registry)
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
    from logtrial.output.report import compact, to_text, write_experiment_report
    from logtrial.running.experiment import load_experiment

    exp = load_experiment(Path(args.experiment), output=args.out, registry=args.registry)
    paths = write_experiment_report(exp)
    print(paths["decision"] + "\n\nAll figures at the threshold policy:")
    print(to_text(compact(paths["table"])))
    print(f"\nreport: {paths['markdown']}\n        {paths['html']}\n        {paths['csv']}")
    from logtrial.running.tracking import TRACKING_DB, tracking_uri

    if (exp.output / TRACKING_DB).is_file():  # runs made with --no-track have nothing to browse
        print(f"tracking: mlflow ui --backend-store-uri {tracking_uri(exp.output)}")
    return 0


def cmd_sessions(args: argparse.Namespace) -> int:
    """Score detectors on preprocessed session files: k-fold false positives over normal sessions, recall on abnormal."""
    import time

    from logtrial.running.session_kfold import Protocol, _detector, load_protocol, run_protocol, write_outputs

    if args.protocol:
        if args.normal or args.abnormal:
            raise ConfigError("sessions: give a protocol file or --normal/--abnormal, not both")
        proto = load_protocol(Path(args.protocol), Path(args.out) if args.out else None)
    else:
        if not (args.normal and args.abnormal):
            raise ConfigError("sessions: give a protocol file, or both --normal FILE and --abnormal FILE")
        dets = [_detector(d.strip(), f"--detectors[{i}]") for i, d in enumerate(args.detectors.split(",")) if d.strip()]
        if args.folds < 2:
            raise ConfigError(f"--folds: expected a whole number >= 2, got {args.folds}")
        proto = Protocol("sessions", Path(args.out or "sessions-results"), args.folds, args.seeds, dets,
                         files={"normal": args.normal, "abnormal": args.abnormal, "first_id": args.first_id},
                         base=Path("."))
    print(f"sessions: {proto.name}: {len(proto.detectors)} detector(s) x {len(proto.seeds)} seed(s) x "
          f"{proto.folds} folds", flush=True)
    t0 = time.time()
    rows = run_protocol(proto, progress=not args.quiet)
    summary = write_outputs(proto, rows, time.time() - t0)
    print(summary[["detector", "recall", "recall_min", "recall_max", "fpr"]].to_string(index=False,
                                                                                     float_format="%.4f"))
    print(f"written: {proto.output / 'report.md'}, summary.csv, results.csv")
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

    exp = load_experiment(Path(args.experiment), registry=args.registry)
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
        try:
            fresh_exp = load_experiment(Path(args.experiment), output=out, registry=args.registry)
            counts = run_experiment(fresh_exp, home_dir(), progress=not args.quiet, track=False,
                                    mirror=Path(args.mirror) if args.mirror else None)
            if counts["failed"]:
                failed_runs = [r for r in RunStore(out).records() if r.get("status") == "failed"]
                for r in failed_runs[:3]:
                    print(f"gate: failed run {r['run_id']}: {r.get('error', '')}", file=sys.stderr)
            wanted = {r.run_id for r in fresh_exp.runs}
            records = [r for r in RunStore(out).records() if r["run_id"] in wanted]
            load_results(records).to_csv(out / "results.csv", index=False, float_format="%.6g")
            fresh = read_results(out, "fresh results")  # same rounding as the committed reference
        finally:
            if not args.out:
                import shutil

                shutil.rmtree(out, ignore_errors=True)  # the temporary fresh run is not kept
        where = out if args.out else "a temporary run (removed; pass --out DIR to keep it)"
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


def cmd_fit_noise(args: argparse.Namespace) -> int:
    """Fit label noise to an audit of incidents and write it as a noise entry."""
    from logtrial.labels.audit import delay_figure, fit_audit, read_audit, summary_lines, write_noise_file

    fit = fit_audit(read_audit(Path(args.audit)), level=args.level, precision=args.precision, delay=args.delay,
                    name=args.name)
    out = write_noise_file(fit, Path(args.out))
    print("\n".join(summary_lines(fit)))
    if len(fit.delays_h):
        import matplotlib.pyplot as plt

        fig_path = Path(args.figure) if args.figure else out.with_suffix(".delay.png")
        fig = delay_figure(fit)
        fig.savefig(fig_path, dpi=110)
        plt.close(fig)
        print(f"delay fit figure: {fig_path}")
    print(f"noise entry: {out}  (in an experiment: noise: [{{name: clean}}, {{file: {out}}}])")
    return 0


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

    sp = verb("fetch", cmd_fetch, "download (or copy from a mirror folder) datasets and verify size and sha256",
              "logtrial fetch bgl-2k\n  logtrial fetch samples            # a group: every Loghub 2k sample\n"
              "  logtrial fetch bgl-2k hdfs-2k --mirror /data/loghub   # offline, from a local copy")
    sp.add_argument("names", metavar="NAME", nargs="+", help="dataset or group names (groups: samples, benchmarks)")
    sp.add_argument("--mirror", metavar="DIR",
                    help="offline: a local folder laid out like the source (default: LOGTRIAL_MIRROR; "
                         "unset: download from the public source)")
    sp.add_argument("--refresh", action="store_true",
                    help="obtain the files again and record their size and sha256 afresh (after the source "
                         "changed on purpose); sizes and hashes pinned in the registry still apply")
    registry_opt(sp)

    sp = verb("ingest", cmd_ingest, "build (or reuse) the event table of a dataset or a log file",
              "logtrial ingest bgl-2k\n"
              "  logtrial ingest --file app.log --format app-format.yaml --incidents incidents.csv --name my-app")
    sp.add_argument("name", metavar="NAME", nargs="?", help="registry dataset to ingest")
    sp.add_argument("--file", metavar="LOG", help="ingest this log file instead of a registry dataset")
    sp.add_argument("--format", metavar="YAML", help="line format for --file (regex with a `content` group)")
    sp.add_argument("--incidents", metavar="CSV",
                    help="incidents file for --file (columns id, entity, start, end, kind; see the README)")
    sp.add_argument("--name", dest="dataset_name", metavar="NAME",
                    help="with --file: register the files as dataset NAME in the data home's registry.yaml, "
                         "so experiments can name it")
    sp.add_argument("--mirror", metavar="DIR", help="local folder holding the files (default: LOGTRIAL_MIRROR)")
    sp.add_argument("--force", action="store_true", help="rebuild even when a cached table matches")
    sp.add_argument("--strict", action="store_true", help="stop at the first undecodable line instead of replacing")
    sp.add_argument("--workers", type=int, default=None, metavar="N",
                    help="processes that parse and mask in parallel (default: the number of cores)")
    sp.add_argument("--max-rejected-share", type=float, default=0.5, metavar="SHARE",
                    help="stop when more than this share of lines is rejected (default 0.5)")
    sp.add_argument("--max-quarantine-mb", type=float, default=256.0, metavar="MB",
                    help="stop when the quarantine file of rejected lines passes this size (default 256)")
    sp.add_argument("--engine", choices=["local", "dask"], default="local",
                    help="local: worker processes on this machine, sequential Drain (default); dask: parse, mask "
                         "and match on a Dask cluster against templates learnt on the first 10%% of the log")
    sp.add_argument("--scheduler", metavar="ADDRESS",
                    help="with --engine dask: a running Dask scheduler (the log files must be readable by its workers)")
    registry_opt(sp)

    sp = verb("parse-score", cmd_parse_score, "template grouping accuracy against ground-truth templates",
              "logtrial parse-score bgl-2k")
    sp.add_argument("name", metavar="NAME", help="registry dataset with a `truth:` template file")
    sp.add_argument("--mirror", metavar="DIR", help="local folder holding the files (default: LOGTRIAL_MIRROR)")
    registry_opt(sp)

    sp = verb("simulate", cmd_simulate, "write a simulated radar-relay fleet's logs and incidents",
              "logtrial simulate --out sim/\n  logtrial simulate scenario.yaml --out sim/")
    sp.add_argument("config", metavar="CONFIG", nargs="?", help="scenario YAML (default: built-in scenario)")
    sp.add_argument("--out", required=True, metavar="DIR", help="folder to write the logs and incidents.csv into")
    sp.add_argument("--seed", type=int, help="random seed (default: the scenario's own)")
    sp.add_argument("--per-node", action="store_true", help="also write one log file per node under nodes/")

    sp = verb("run", cmd_run, "run or resume an experiment grid (every run recorded)",
              "logtrial run reports/bgl-2k/experiment.yaml\n"
              "  logtrial run reports/bgl-2k/experiment.yaml --engine dask --workers 2\n"
              "  logtrial run reports/bgl-2k/experiment.yaml --engine dask --scheduler tcp://scheduler-host:8786")
    sp.add_argument("experiment", metavar="EXPERIMENT.yaml", help="the experiment file (a grid)")
    sp.add_argument("--out", metavar="DIR", help="output folder (default: the file's `output`)")
    sp.add_argument("--mirror", metavar="DIR", help="local folder holding the files (default: LOGTRIAL_MIRROR)")
    registry_opt(sp)
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
    sp.add_argument("experiment", metavar="EXPERIMENT.yaml", help="the experiment file whose runs to report")
    sp.add_argument("--out", metavar="DIR", help="output folder holding the runs (default: the file's `output`)")
    registry_opt(sp)

    sp = verb("gate", cmd_gate, "compare a fresh run with the committed reference; exit 1 on regression",
              "logtrial gate reports/bgl-2k/experiment.yaml")
    sp.add_argument("experiment", metavar="EXPERIMENT.yaml", help="the experiment file to re-run")
    sp.add_argument("--reference", metavar="DIR", help="reference results folder (default: the file's `output`)")
    sp.add_argument("--fresh", metavar="DIR", help="compare these results instead of re-running")
    sp.add_argument("--out", metavar="DIR",
                    help="where the fresh run goes and stays (default: a temporary folder, removed afterwards)")
    sp.add_argument("--mirror", metavar="DIR", help="local folder holding the files (default: LOGTRIAL_MIRROR)")
    registry_opt(sp)
    sp.add_argument("--tolerance", type=float, help="absolute tolerance (default: the file's gate.tolerance or 0.02)")
    sp.add_argument("--all", action="store_true", help="show every compared figure, not only those that moved")
    sp.add_argument("--quiet", action="store_true", help="no per-run progress")

    sp = verb("fit-noise", cmd_fit_noise, "fit ticket noise to an audit of incidents; write a noise entry (YAML)",
              "logtrial fit-noise examples/audit.csv --out noise.yaml")
    sp.add_argument("audit", metavar="AUDIT.csv", help="id, kind, true_start, true_end, reported, reported_start, "
                    "reported_end [, reported_kind, entity]")
    sp.add_argument("--out", required=True, metavar="YAML", help="where to write the noise entry")
    sp.add_argument("--precision", type=float, default=0.1,
                    help="largest half-width accepted for the drop-share interval (default: %(default)s)")
    sp.add_argument("--level", type=float, default=0.95, help="interval confidence level (default: %(default)s)")
    sp.add_argument("--delay", choices=["auto", "exponential", "empirical"], default="auto",
                    help="delay model; auto: exponential unless a KS test rejects it at 5%% (default: %(default)s)")
    sp.add_argument("--name", help="name of the noise setting (default: fitted-<file stem>)")
    sp.add_argument("--figure", metavar="PNG", help="delay goodness-of-fit figure (default: beside --out)")

    sp = verb("sessions", cmd_sessions, "score detectors on preprocessed session files (k-fold over normal sessions)",
              "logtrial sessions reports/hdfs-sessions/experiment.yaml\n"
              "  logtrial sessions --normal normal.txt --abnormal abnormal.txt --detectors next_event,pca --out res/")
    sp.add_argument("protocol", metavar="PROTOCOL.yaml", nargs="?", help="a session k-fold protocol file")
    sp.add_argument("--normal", metavar="FILE", help="normal sessions: one line of event ids per session")
    sp.add_argument("--abnormal", metavar="FILE", help="abnormal sessions: one line of event ids per session")
    sp.add_argument("--first-id", type=int, default=1, help="smallest event id in the files (default 1)")
    sp.add_argument("--detectors", default="next_event,pca,invariants", help="comma-separated detector names")
    sp.add_argument("--folds", type=int, default=5, help="folds over the normal sessions (default 5)")
    sp.add_argument("--seeds", type=int, nargs="+", default=[0], help="seeds (default 0)")
    sp.add_argument("--out", metavar="DIR", help="output folder (default: the file's `output`, else sessions-results)")
    sp.add_argument("--quiet", action="store_true", help="no per-fold progress")

    from logtrial.demo import add_demo_parser

    add_demo_parser(verb)
    return p


def os_error_text(exc: OSError) -> str:
    """One line for a system error: what failed, on which file, and what to do."""
    import errno

    where = f"{exc.filename}: " if exc.filename else ""
    advice = {errno.ENOSPC: "free some space (or point LOGTRIAL_HOME / --out elsewhere) and run again",
              errno.EDQUOT: "free some space (or point LOGTRIAL_HOME / --out elsewhere) and run again",
              errno.EACCES: "check the folder's permissions or choose another (LOGTRIAL_HOME, --out)",
              errno.EPERM: "check the folder's permissions or choose another (LOGTRIAL_HOME, --out)",
              errno.EROFS: "the file system is read-only: choose another folder (LOGTRIAL_HOME, --out)"}
    tip = advice.get(exc.errno or -1, "")
    return f"{where}{exc.strerror or exc}" + (f"; {tip}" if tip else "")


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
    except OSError as exc:  # disk full, read-only or missing folders: one line, not a traceback
        print(f"logtrial {args.verb}: error: {os_error_text(exc)}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
