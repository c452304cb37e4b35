"""What the decision machinery costs: operating curves and paired tests as a share of a grid's time.

Runs a small grid (a simulated radar-relay fleet, several detectors, two noise levels,
budgets [2, 5, 20]) in one process, timing inside it: the test-side operating curves
(``Runner.curve``), the extra budget evaluations (``Runner.evaluate_budgets``, which
reuse the fitted scores) and the decision rankings with their exact McNemar tests
(``decision_boards``). Prints each as a ratio of the grid's wall time (the target is
curves + paired tests under 10 %). Run: ``python bench/decision.py [--quick]``.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import yaml

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from conftest import relay_registry  # noqa: E402


def main() -> int:
    """Run the grid once and print the time shares."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a smaller fleet and fewer detectors")
    args = ap.parse_args()
    import os

    nodes, days = (15, 45) if args.quick else (40, 90)
    detectors = ["rate_rule", "pca", "logistic"] if args.quick else ["rate_rule", "pca", "iforest", "hbos",
                                                                      "logistic", "decision_tree", "ecod"]
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        os.environ["LOGTRIAL_HOME"] = str(work / "home")
        (work / "fleet.yaml").write_text(relay_registry(
            "bench-fleet", f"{{nodes: {nodes}, days: {days}, seed: 3, line_rate: 2.0, failures: "
                           "{rate_per_node_year: 10.0, lead_time_hours: [4, 48], precursor_visibility: 1.0}}"))
        doc = {"experiment": "bench-decision", "registry": ["fleet.yaml"], "output": "out",
               "datasets": ["bench-fleet"], "windows": [{"kind": "time", "size": "1h"}],
               "task": {"name": "predict", "horizon": "24h"},
               "noise": [{"name": "clean", "level": 0.0}, {"name": "drop-30", "level": 0.3, "drop": {"p": 0.3}}],
               "detectors": detectors, "seeds": [1], "threshold": {"kind": "best_f1"}, "budgets": [2, 5, 20],
               "scoring": {"cooldown": "2h", "bootstrap": 1000}}
        (work / "exp.yaml").write_text(yaml.safe_dump(doc))

        from logtrial.output.decision import decision_boards
        from logtrial.running.experiment import experiment_order, load_experiment
        from logtrial.running.runner import Runner
        from logtrial.running.runs import run_experiment
        from logtrial.running.store import RunStore

        spent = {"curve": 0.0, "budgets": 0.0}

        def timed(name, fn):
            def wrapper(*a, **k):
                t = time.perf_counter()
                try:
                    return fn(*a, **k)
                finally:
                    spent[name] += time.perf_counter() - t
            return wrapper

        Runner.curve = timed("curve", Runner.curve)
        Runner.evaluate_budgets = timed("budgets", Runner.evaluate_budgets)
        exp = load_experiment(work / "exp.yaml")
        # Ingest first, so the grid's time is the runs themselves (fits, scores, evaluation).
        Runner(exp, work / "home", progress=False).dataset("bench-fleet")
        t0 = time.perf_counter()
        counts = run_experiment(exp, work / "home", progress=False, track=False)
        grid = time.perf_counter() - t0
        records = RunStore(exp.output).records()
        t1 = time.perf_counter()
        boards = decision_boards(records, *experiment_order(exp))
        paired = time.perf_counter() - t1
    n_pts = sum(r["curve"]["points"] for r in records if r.get("status") == "finished")
    print(f"grid: {counts['finished']} runs ({len(detectors)} detectors x 2 noise levels), fleet {nodes} nodes x {days} "
          f"days; {len(boards)} rankings; {n_pts} curve points stored")
    print(f"operating curves        : {spent['curve'] / grid:6.1%} of the grid's time")
    print(f"paired tests + rankings : {paired / grid:6.1%}")
    print(f"curves + paired tests   : {(spent['curve'] + paired) / grid:6.1%}  (target < 10 %)")
    print(f"3 extra budgets (no refit, incl. 1000-resample bootstraps): {spent['budgets'] / grid:6.1%}")
    print("(ratios measured in one process on a shared machine)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
