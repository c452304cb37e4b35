"""Gate: compare a fresh run of an experiment with its committed reference; a regression fails the build."""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from logtrial.errors import ConfigError
from logtrial.windowing.durations import shorten_durations

KEYS = ["dataset", "vocabulary", "windows", "task", "noise", "detector"]
# Metric -> True when higher is better.
DIRECTION = {
    "auprc": True, "auroc": True, "f1": True, "precision": True, "recall": True,
    "recall_predicted": True, "recall_detected_or_predicted": True, "lead_time_median_h": True,
    "share_lead_ge_1h": True, "share_lead_ge_6h": True, "share_lead_ge_24h": True,
    "false_alarms_per_predicted_failure": False, "false_alarms_per_caught_failure": False,
    "alarms_per_week_per_100_entities": False,
}
DEFAULT_METRICS = {
    "predict": ["auprc", "auroc", "recall_predicted", "false_alarms_per_predicted_failure"],
    "detect": ["auprc", "auroc", "recall_detected_or_predicted", "false_alarms_per_caught_failure"],
}
DEFAULT_TOLERANCE = 0.02


@dataclass
class GateResult:
    """Every compared figure with its verdict."""

    table: pd.DataFrame

    @property
    def regressions(self) -> pd.DataFrame:
        """Rows that moved the wrong way by more than allowed."""
        return self.table[self.table["verdict"] == "REGRESSION"]

    @property
    def passed(self) -> bool:
        """True when nothing regressed."""
        return self.regressions.empty


def gate_settings(raw: dict | None) -> tuple[list[str] | None, float, float]:
    """Validated gate settings from the experiment's `gate:` block: metrics, absolute and relative tolerance."""
    raw = raw or {}
    if not isinstance(raw, dict):
        raise ConfigError("gate: expected a mapping like {metrics: [auprc], tolerance: 0.02}")
    unknown = sorted(set(raw) - {"metrics", "tolerance", "relative"})
    if unknown:
        raise ConfigError(f"gate.{unknown[0]}: unknown field (allowed: metrics, tolerance, relative)")
    metrics = raw.get("metrics")
    if metrics is not None:
        bad = [m for m in metrics if m not in DIRECTION]
        if bad:
            raise ConfigError(f"gate.metrics: unknown metric {bad[0]!r}; known: {sorted(DIRECTION)}")
    tol = raw.get("tolerance", DEFAULT_TOLERANCE)
    rel = raw.get("relative", 0.10)
    for name, v in (("tolerance", tol), ("relative", rel)):
        if not isinstance(v, (int, float)) or v < 0:
            raise ConfigError(f"gate.{name}: expected a non-negative number, got {v!r}")
    return metrics, float(tol), float(rel)


def read_results(folder: Path, what: str) -> pd.DataFrame:
    """The per-run results table of a results folder, with a clear error when it is missing."""
    path = Path(folder) / "results.csv"
    if not path.is_file():
        raise ConfigError(
            f"{what}: {path} not found; create it by running the experiment and its report "
            "(logtrial run EXP.yaml && logtrial report EXP.yaml) and committing the results folder"
        )
    return pd.read_csv(path, keep_default_na=True)


def _mean_over_seeds(results: pd.DataFrame) -> pd.DataFrame:
    if "vocabulary" not in results.columns:  # results written before vocabularies were a grid axis
        results = results.assign(vocabulary="templates")
    # Results written before durations were shown as '1h' spell them '0 days 01:00:00': same key.
    results = results.assign(**{c: results[c].map(shorten_durations) for c in ("windows", "task")
                                if c in results.columns})
    num = [c for c in results.columns if c not in KEYS + ["run_id", "seed"] and
           pd.api.types.is_numeric_dtype(results[c])]
    grouped = results.groupby(KEYS, sort=False)
    with np.errstate(all="ignore"):
        # A seed whose figure is undefined makes the mean undefined: never average over fewer seeds.
        out = grouped[num].agg(lambda c: c.mean(skipna=False))
    out["n_seeds"] = grouped["seed"].nunique() if "seed" in results.columns else 1
    return out


def compare(reference: pd.DataFrame, fresh: pd.DataFrame, metrics: list[str] | None = None,
            tolerance: float = DEFAULT_TOLERANCE, relative: float = 0.10) -> GateResult:
    """Compare fresh results with the reference: a regression moves the wrong way by more than allowed.

    Allowed movement per figure = the larger of the absolute tolerance and the distance
    from the reference value to the worse end of its bootstrap interval; a lower-is-better
    ratio without an interval allows ``relative`` x its reference value instead. Figures
    are means over seeds.
    """
    ref, new = _mean_over_seeds(reference), _mean_over_seeds(fresh)
    rows = []
    for key in ref.index:
        task = "detect" if "name=detect" in str(key[KEYS.index("task")]) else "predict"
        wanted = metrics or DEFAULT_METRICS[task]
        if key not in new.index:
            for m in wanted:
                rows.append({**dict(zip(KEYS, key)), "metric": m, "reference": ref.at[key, m] if m in ref else np.nan,
                             "fresh": np.nan, "change": np.nan, "allowed": np.nan, "verdict": "REGRESSION",
                             "note": "missing from the fresh run"})
            continue
        if new.at[key, "n_seeds"] < ref.at[key, "n_seeds"]:
            rows.append({**dict(zip(KEYS, key)), "metric": "seeds", "reference": float(ref.at[key, "n_seeds"]),
                         "fresh": float(new.at[key, "n_seeds"]), "change": np.nan, "allowed": 0.0,
                         "verdict": "REGRESSION", "note": "fewer seeds finished in the fresh run"})
        for m in wanted:
            if m not in ref.columns:
                continue
            r, f = float(ref.at[key, m]), float(new.at[key, m]) if m in new.columns else np.nan
            lo = float(ref.at[key, f"{m}_low"]) if f"{m}_low" in ref else np.nan
            hi = float(ref.at[key, f"{m}_high"]) if f"{m}_high" in ref else np.nan
            # The reference's interval on the side that counts as worse.
            room = (r - lo) if DIRECTION[m] else (hi - r)
            if np.isfinite(room):
                allowed = max(tolerance, room)
            elif not DIRECTION[m] and np.isfinite(r):
                allowed = max(tolerance, relative * abs(r))  # unbounded ratio without an interval
            else:
                allowed = tolerance
            verdict, note, change = _verdict(r, f, allowed, DIRECTION[m])
            rows.append({**dict(zip(KEYS, key)), "metric": m, "reference": r, "fresh": f, "change": change,
                         "allowed": allowed, "verdict": verdict, "note": note})
    return GateResult(pd.DataFrame(rows))


def _verdict(ref: float, fresh: float, allowed: float, higher_better: bool) -> tuple[str, str, float]:
    """Verdict for one figure: ok, improved or REGRESSION, with a note and the signed change."""
    if math.isnan(ref) and math.isnan(fresh):
        return "ok", "undefined in both", np.nan
    if math.isnan(fresh):
        return "REGRESSION", "undefined in the fresh run", np.nan
    if math.isnan(ref):
        return "ok", "newly defined", np.nan
    if math.isinf(ref) or math.isinf(fresh):
        if ref == fresh:
            return "ok", "", 0.0
        worse = (fresh < ref) if higher_better else (fresh > ref)
        return ("REGRESSION" if worse else "improved"), "infinite", (fresh - ref)
    change = fresh - ref
    worse_by = -change if higher_better else change
    if worse_by > allowed + 1e-12:
        direction = "drop" if higher_better else "rise"
        return "REGRESSION", f"{direction} of {abs(change):.4g} exceeds {allowed:.4g}", change
    if -worse_by > allowed + 1e-12:
        return "improved", "", change
    return "ok", "", change


def format_table(result: GateResult, only_moved: bool = False) -> str:
    """The gate's verdicts as a readable text table."""
    t = result.table.copy()
    if only_moved:
        t = t[(t["verdict"] != "ok") | (t["change"].abs() > 0)]
    if t.empty:
        return "(no figure moved)"
    fmt = lambda v: "–" if pd.isna(v) else ("∞" if np.isinf(v) else f"{v:.4f}")  # noqa: E731
    rows = [[r.detector, r.noise, r.metric, fmt(r.reference), fmt(r.fresh),
             "–" if pd.isna(r.change) else f"{r.change:+.4f}", fmt(r.allowed), r.verdict, r.note]
            for r in t.itertuples()]
    head = ["detector", "noise", "metric", "reference", "fresh", "change", "allowed", "verdict", "note"]
    widths = [max(len(h), *(len(str(x[i])) for x in rows)) for i, h in enumerate(head)]
    lines = ["  ".join(h.ljust(w) for h, w in zip(head, widths)), "  ".join("-" * w for w in widths)]
    lines += ["  ".join(str(x).ljust(w) for x, w in zip(row, widths)) for row in rows]
    return "\n".join(lines)
