"""Model age: failures predicted against the time since the model was trained (walk-forward runs).

Reads the ``walk_forward`` block of run records (see running/walk_forward.py): per alarm
policy (the chosen threshold, and each alarm budget when the experiment has budgets), the
failures and failures predicted per model-age bin, pooled over folds and seeds. It states the
retraining interval: the first model age at which the share of failures predicted is more
than the stated tolerance below that of a freshly trained model.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from logtrial.running.walk_forward import retraining_interval


def figure_at(rec: dict, budget: str | None, name: str) -> float:
    """A headline figure of a run at an alarm budget (key as ``format(b, 'g')``), else at the chosen threshold."""
    entry = rec if budget is None else rec.get("at_budget", {}).get(budget, rec)
    return entry["metrics"][name]


def age_table(records: list[dict]) -> pd.DataFrame:
    """One row per (detector, noise, task, policy, age bin): failures and failures predicted, pooled over seeds."""
    rows = []
    for r in records:
        wf = r.get("walk_forward") if r.get("status") == "finished" else None
        if not wf:
            continue
        cfg = r["config"]
        det = cfg["detector"].get("label") or cfg["detector"]["name"]
        task = task_label(cfg["task"])
        for policy, bins in wf["by_age"].items():
            budget = policy.removeprefix("budget ") if policy.startswith("budget ") else None
            last_fold = figure_at(r, budget, "recall_predicted")
            for b in bins:
                rows.append({"detector": det, "noise": cfg["noise"].get("name", "clean"), "task": task,
                             "policy": policy, "age_days": b["age_days"], "failures": b["failures"],
                             "predicted": b["predicted"], "folds": b["folds"], "tolerance": wf["tolerance"],
                             "alerts": b.get("alerts", 0), "entity_weeks": b.get("entity_weeks", 0.0),
                             "last_fold_recall": last_fold})
    if not rows:
        return pd.DataFrame()
    df = pd.DataFrame(rows)
    keys = ["detector", "noise", "task", "policy", "age_days"]
    out = df.groupby(keys, sort=False).agg(failures=("failures", "sum"), predicted=("predicted", "sum"),
                                           folds=("folds", "sum"), tolerance=("tolerance", "first"),
                                           alerts=("alerts", "sum"), entity_weeks=("entity_weeks", "sum"),
                                           last_fold_recall=("last_fold_recall", "mean")).reset_index()
    out["recall_predicted"] = out["predicted"] / out["failures"].where(out["failures"] > 0)
    out["alerts_per_week_per_100"] = 100.0 * out["alerts"] / out["entity_weeks"].where(out["entity_weeks"] > 0)
    return out


def retrain_after(group: pd.DataFrame, tolerance: float) -> float | None:
    """The retraining interval (days) of one detector's pooled age bins (see walk_forward.retraining_interval)."""
    return retraining_interval(group[["age_days", "failures", "predicted"]].to_dict("records"), tolerance)


def task_label(task: dict) -> str:
    """'predict 24h', 'predict 7d' or 'detect'."""
    if "horizon" not in task:
        return str(task["name"])
    h = pd.Timedelta(task["horizon"])
    hours = h / pd.Timedelta(hours=1)
    return f"{task['name']} {hours / 24:g}d" if hours >= 48 and hours % 24 == 0 else f"{task['name']} {hours:g}h"


def age_figure(table: pd.DataFrame, policy: str):
    """Share of failures predicted against model age, one line per detector and noise level."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(7, 4))
    for (det, noise, task), g in table[table["policy"] == policy].groupby(["detector", "noise", "task"], sort=False):
        ax.plot(g["age_days"], g["recall_predicted"], marker="o", label=f"{det} ({noise}, {task})")
    ax.set_xlabel("model age at the failure (days since the model went live)")
    ax.set_ylabel("share of failures predicted")
    ax.set_ylim(0, 1.02)
    ax.set_title(f"Failures predicted against model age ({policy})")
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def model_age_section(records: list[dict], out: Path) -> list[str]:
    """Markdown lines (and model_age.png) for walk-forward runs: figures against model age, retraining interval."""
    table = age_table(records)
    if table.empty:
        return []
    table.to_csv(Path(out) / "model_age.csv", index=False, float_format="%.6g")
    lines = ["## Figures against model age (walk-forward)", "",
             "Each fold retrains, picks its threshold on the validation span after its training span, and is "
             "tested on the span after that. A failure's model age is the time from the start of its fold's test "
             "span to the failure; counts are added up over folds and seeds. Cells: failures predicted / failures "
             "(share); alert windows per week per 100 nodes. The retraining interval is the first model age at "
             "which the failures predicted fall more than the tolerance below the fresh model's (first bin), with "
             "the drop beyond noise (Fisher's exact test, one-sided, 5 %). (In the headline "
             "table above, a walk-forward run shows its last fold.)",
             ""]
    for policy in table["policy"].drop_duplicates():
        sub = table[table["policy"] == policy]
        ages = list(sub["age_days"].drop_duplicates())
        head = ["detector", "noise", "task"] + [f"{a:g} d" for a in ages] + ["retrain within"]
        lines += [f"### At {'the chosen threshold' if policy == 'threshold' else 'alarm ' + policy}", "",
                  "| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
        for (det, noise, task), g in sub.groupby(["detector", "noise", "task"], sort=False):
            tol = float(g["tolerance"].iloc[0])
            cells = []
            for a in ages:
                row = g[g["age_days"] == a]
                if row.empty or int(row["failures"].iloc[0]) == 0:
                    cells.append("–")
                else:
                    k, n = int(row["predicted"].iloc[0]), int(row["failures"].iloc[0])
                    rate = float(row["alerts_per_week_per_100"].iloc[0])
                    cells.append(f"{k}/{n} ({k / n:.2f}); {rate:.0f}")
            after = retrain_after(g, tol)
            when = (f"{after:g} days (drop > {tol:.0%})" if after is not None
                    else f"no significant drop > {tol:.0%} within "
                         f"{max(ages) + (ages[1] - ages[0] if len(ages) > 1 else 0):g} days")
            lines.append("| " + " | ".join([det, noise, task, *cells, when]) + " |")
        lines.append("")
        verdicts = []
        for (det, noise, task), g in sub.groupby(["detector", "noise", "task"], sort=False):
            after = retrain_after(g, float(g["tolerance"].iloc[0]))
            if after is not None:
                verdicts.append(f"- `{det}` ({noise}, {task}): failures predicted drop by more than "
                                f"{float(g['tolerance'].iloc[0]):.0%} once the model is {after:g} days old: "
                                f"retrain at least every {max(after, 1):g} days.")
        for (det, noise, task), g in sub.groupby(["detector", "noise", "task"], sort=False):
            rates = g.sort_values("age_days")["alerts_per_week_per_100"].dropna()
            if len(rates) >= 2 and rates.iloc[0] > 0 and rates.iloc[-1] / rates.iloc[0] >= 1.5:
                verdicts.append(f"- `{det}` ({noise}, {task}): alerts grow from {rates.iloc[0]:.0f} to "
                                f"{rates.iloc[-1]:.0f} per week per 100 nodes ({rates.iloc[-1] / rates.iloc[0]:.1f}x) "
                                f"as the model ages: at this threshold it goes stale through false alarms rather "
                                f"than missed failures.")
        lines += verdicts + ([""] if verdicts else [])
    fig = age_figure(table, "threshold")
    fig.savefig(Path(out) / "model_age.png", dpi=110)
    import matplotlib.pyplot as plt

    plt.close(fig)
    lines += ["![model age](model_age.png)", ""]
    return lines

