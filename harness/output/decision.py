"""The decision section: at each alarm budget and noise level, which detector to pick and which tie with it.

Per (setting, noise level, operating point) the detectors are ranked by failures
caught on the test split (predicted ahead for the predict task, caught at all for
the detect task), ties broken by the longer median lead time; exact ties share a rank
(listed in the experiment's order). With several seeds a
failure counts as caught when at least half of the seeds catch it, so every row is a
whole k of n failures. The best detector is compared with each other one by the
exact McNemar test on the per-failure outcomes (same failures, paired); those with
p >= 0.05 are statistically indistinguishable from it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from logtrial.evaluation.paired import FEW_FAILURES, mcnemar_exact, min_detectable_difference, wilson_interval
from logtrial.running.experiment import vocabulary_label
from logtrial.windowing import durations

ALPHA = 0.05
METHOD = ("exact McNemar test on per-failure outcomes (two-sided, alpha 0.05; checked against "
          "scipy.stats.binomtest); intervals: Wilson score, 95 %")


# A detector that raises more than this many times its alarm budget on test is flagged "OVER":
# its validation-chosen threshold did not carry over (common practice: budgets are checked on live data).
OVERRUN = 2.0


def budget_label(key: str) -> str:
    """'5 alarms/week/100' for a budget key, or the policy name for the headline point."""
    return f"{key} alarms/week/100" if key[:1].isdigit() else key


def format_duration(value: object) -> str:
    """A duration as 1h, 7d, 90min (anything that is not a duration unchanged)."""
    try:
        return durations.format_duration(value)
    except (ValueError, TypeError):
        return str(value)


def setting_label(cfg: dict) -> str:
    """Dataset, vocabulary, windows and task of a run config in one short line."""
    win = " ".join(f"{k}={format_duration(v) if k in ('size', 'step', 'gap') else v}" for k, v in cfg["windows"].items())
    task = cfg["task"]["name"] + (f" {format_duration(cfg['task']['horizon'])} ahead" if "horizon" in cfg["task"] else "")
    return f"{cfg['dataset']} | {vocabulary_label(cfg.get('vocabulary'))} | {win} | {task}"


@dataclass
class Board:
    """One ranking: a setting, a noise level and an operating point, with its rows and verdicts."""

    setting: str
    noise: str
    point: str
    task: str
    horizon_h: float | None
    rows: pd.DataFrame
    n: int
    warnings: list[str] = field(default_factory=list)

    @property
    def power_note(self) -> str:
        """The smallest difference in share caught this many failures can reveal at 80 % power."""
        return (f"smallest detectable difference at 80 % power: {min_detectable_difference(self.n):.0%} of failures"
                if self.n else "no test failure")

    @property
    def best(self) -> str:
        """The top-ranked detector."""
        return str(self.rows["detector"].iloc[0])


def _point_of(rec: dict, key: str) -> dict:
    """The record's figures at a budget key (or the headline threshold policy)."""
    return rec if key == "policy" else rec.get("at_budget", {}).get(key, rec)


def _detector(rec: dict) -> str:
    return rec["config"]["detector"].get("label") or rec["config"]["detector"]["name"]


def _board(setting: str, noise: str, point: str, recs: list[dict], order: list[str]) -> Board:
    """Rank the detectors of one setting, noise level and operating point."""
    task = recs[0]["config"]["task"]["name"]
    horizon = recs[0]["config"]["task"].get("horizon")
    field_ = "predicted" if task == "predict" else "caught"
    notes = []
    lengths = {len(_point_of(r, point).get("outcomes", {}).get(field_, "")) for r in recs}
    if len(lengths) > 1:  # e.g. a random split: each seed tests other failures, so seeds cannot be pooled
        seed = min(r["config"]["seed"] for r in recs)
        recs = [r for r in recs if r["config"]["seed"] == seed]
        notes.append(f"seeds test different failures (e.g. a random split): this ranking uses seed {seed} only")
    by_det: dict[str, list[dict]] = {}
    for r in recs:
        by_det.setdefault(_detector(r), []).append(r)
    outcomes, rows = {}, []
    for det, rs in by_det.items():
        pts = [_point_of(r, point) for r in rs]
        vecs = [np.frombuffer(p["outcomes"][field_].encode(), dtype=np.uint8) - ord("0") for p in pts if "outcomes" in p]
        if not vecs or len({len(v) for v in vecs}) != 1:
            continue
        votes = np.mean(np.vstack(vecs), axis=0)
        caught = votes >= 0.5
        outcomes[det] = caught
        n, k = len(caught), int(caught.sum())
        lo, hi = wilson_interval(k, n) if n else (math.nan, math.nan)
        leads = [x for p in pts for x in p.get("lead_times_h", [])]
        m = [p["metrics"] for p in pts]
        per = "false_alarms_per_predicted_failure" if task == "predict" else "false_alarms_per_caught_failure"
        rows.append({
            "detector": det, "k": k, "n": n, "share": k / n if n else math.nan, "low": lo, "high": hi,
            "lead_h": float(np.median(leads)) if leads and task == "predict" else math.nan,
            "alarms_test": float(np.mean([x["alarms_per_week_per_100_entities"] for x in m])),
            "false_per_caught": float(np.mean([x.get(per, math.nan) for x in m])),
            "seeds": len(rs), "order": order.index(det) if det in order else len(order),
        })
    frame = pd.DataFrame(rows)
    if frame.empty:
        return Board(setting, noise, point, task, None, frame, 0)
    # At a budget, detectors that kept to it on test come first: a detector that caught more by raising far more
    # alarms than the budget is not an answer to "which one at this alarm rate".
    over = (frame["alarms_test"] > OVERRUN * float(point)) if point != "policy" else pd.Series(False, frame.index)
    frame = frame.assign(_over=over, _lead=frame["lead_h"].fillna(-1.0)).sort_values(
        ["_over", "k", "_lead", "order"], ascending=[True, False, False, True], kind="stable").reset_index(drop=True)
    # Equal standing, failures caught and median lead share a rank (1, 1, 3, ...).
    new = (frame["_over"].ne(frame["_over"].shift()) | frame["k"].ne(frame["k"].shift())
           | frame["_lead"].ne(frame["_lead"].shift())).to_numpy()
    rank = np.maximum.accumulate(np.where(new, np.arange(1, len(frame) + 1), 0))
    frame = frame.drop(columns=["_lead", "_over"])
    best = str(frame["detector"].iloc[0])
    p = [1.0 if d == best else mcnemar_exact(outcomes[best], outcomes[d])[0] for d in frame["detector"]]
    frame["p_vs_best"] = p
    frame["same_as_best"] = frame["p_vs_best"] >= ALPHA
    frame.insert(0, "rank", rank)
    n = int(frame["n"].max())
    warnings = list(notes)
    if n < FEW_FAILURES:
        warnings.append(f"only {n} test failures: this comparison rests on fewer than {FEW_FAILURES} failures, so it "
                        f"is a mechanics check, not a ranking; differences below "
                        f"{min_detectable_difference(n):.0%} of failures cannot be told apart")
    hours = pd.Timedelta(horizon).total_seconds() / 3600 if horizon else None
    return Board(setting, noise, point, task, hours, frame.reset_index(drop=True), n, warnings)


def decision_boards(records: list[dict], detectors: list[str], noises: list[str]) -> list[Board]:
    """Every ranking, in order: setting, then operating point (budgets rising, then the policy), then noise."""
    fin = [r for r in records if r.get("status") == "finished"]
    groups: dict[tuple, list[dict]] = {}
    for r in fin:
        groups.setdefault((setting_label(r["config"]), r["config"]["noise"].get("name", "clean")), []).append(r)
    budgets = sorted({k for r in fin for k in r.get("at_budget", {})}, key=float)
    n_rank = {n: i for i, n in enumerate(noises)}
    boards = []
    # settings in a stable, readable order (the records come in run-id order): task, then horizon, then label
    first_cfg = {}
    for r in fin:
        first_cfg.setdefault(setting_label(r["config"]), r["config"])
    settings = sorted(first_cfg, key=lambda s: _setting_order(first_cfg[s], s))
    for setting in settings:
        noise_names = sorted({nz for s, nz in groups if s == setting}, key=lambda x: (n_rank.get(x, 999), x))
        for point in budgets + ["policy"]:
            for nz in noise_names:
                b = _board(setting, nz, point, groups[(setting, nz)], detectors)
                if not b.rows.empty:
                    boards.append(b)
    return boards


def _setting_order(cfg: dict, label: str) -> tuple:
    """Sort key of a setting: task name, horizon (none first), then its label."""
    horizon = cfg["task"].get("horizon")
    return cfg["task"]["name"], pd.Timedelta(horizon) if horizon else pd.Timedelta(0), label


def _policy_name(records: list[dict], short: bool = False) -> str:
    fin = [r for r in records if r.get("status") == "finished"]
    kind = fin[0]["threshold"]["policy"]["kind"] if fin else "threshold"
    return f"{kind} (own thresholds)" if short else f"{kind} (each detector its own threshold; alarm rates differ)"


def point_title(board: Board, records: list[dict], short: bool = False) -> str:
    """Heading of a board's operating point."""
    return budget_label(board.point) if board.point != "policy" else _policy_name(records, short)


def _fmt_share(row: pd.Series) -> str:
    return f"{row['k']}/{row['n']} = {row['share']:.2f} [{row['low']:.2f}, {row['high']:.2f}]"


def _fmt(x: float, digits: int = 1) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    if math.isinf(x):
        return "∞"
    return f"{x:.{digits}f}"


def board_table(board: Board) -> pd.DataFrame:
    """The rows a person reads for one board."""
    caught = "failures predicted" if board.task == "predict" else "failures caught"
    out = pd.DataFrame({
        "rank": board.rows["rank"],
        "detector": board.rows["detector"],
        f"{caught} k/n [95% Wilson]": [_fmt_share(r) for _, r in board.rows.iterrows()],
        "median lead (h)": [_fmt(x) for x in board.rows["lead_h"]],
        "alarms/week/100 on test": [_fmt(x) for x in board.rows["alarms_test"]],
        "false alarms per failure": [_fmt(x) for x in board.rows["false_per_caught"]],
        "vs best (McNemar p)": ["best" if i == 0 else (f"{p:.3f}" if p >= 0.001 else "<0.001") + (" same" if s else "")
                                for i, (p, s) in enumerate(zip(board.rows["p_vs_best"], board.rows["same_as_best"]))],
    })
    if board.point != "policy":
        ratio = board.rows["alarms_test"] / float(board.point)
        out.insert(5, "test alarms vs budget", [
            "–" if math.isnan(r) else f"{r:.1f}x" + (" OVER" if r > OVERRUN else "") for r in ratio])
    if board.task != "predict":
        out = out.drop(columns="median lead (h)")
    return out


def over_budget(board: Board) -> pd.Series:
    """Per row: the detector raised more than OVERRUN times the budget on test (its threshold did not carry over)."""
    if board.point == "policy":
        return pd.Series(False, index=board.rows.index)
    return board.rows["alarms_test"] > OVERRUN * float(board.point)


def sentence(board: Board, records: list[dict]) -> str:
    """One plain sentence: what to pick at this operating point and what it costs."""
    top = board.rows.iloc[0]
    kept = ~over_budget(board)  # a detector that overshot the budget is no alternative at it
    ties = [d for d, s, k in zip(board.rows["detector"].iloc[1:], board.rows["same_as_best"].iloc[1:], kept.iloc[1:])
            if s and k]
    verb = "predicts" if board.task == "predict" else "catches"
    lead = f", median {top['lead_h']:.1f} h ahead" if board.task == "predict" and not math.isnan(top["lead_h"]) else ""
    where = f"At {point_title(board, records)} ({board.noise} labels)"
    if top["k"] == 0:
        return f"{where}: no detector {verb.rstrip('s')}s any of the {board.n} test failures; this budget is too tight here."
    cost = (f"it costs {top['alarms_test']:.1f} alarms per week per 100 entities on test and "
            f"{_fmt(top['false_per_caught'])} false alarms per failure")
    tie = (f"; {', '.join(ties)} cannot be told apart from it on {board.n} failures" if ties
           else f"; it is ahead of every other detector{'' if board.point == 'policy' else ' that kept to the budget'} "
                f"on {board.n} failures")
    text = f"{where}: pick {top['detector']}, which {verb} {top['k']}/{top['n']} failures{lead}; {cost}{tie}."
    if bool(over_budget(board).iloc[0]):  # the rows are ranked within-budget first: then none kept to it
        text += (f" Caution: no detector stayed within {OVERRUN:g}x the budget on test; this one raised "
                 f"{top['alarms_test'] / float(board.point):.1f}x it, so its threshold chosen on validation did not "
                 f"carry over (drift or a shifted score scale).")
    return text


def noise_movement(boards: list[Board]) -> dict[tuple[str, str], pd.DataFrame]:
    """Per (setting, operating point): rank of each detector at each noise level (rows in clean-label order)."""
    out: dict[tuple[str, str], pd.DataFrame] = {}
    for b in boards:
        key = (b.setting, b.point)
        col = pd.Series(b.rows["rank"].to_numpy(), index=b.rows["detector"], name=b.noise)
        out[key] = col.to_frame() if key not in out else out[key].join(col, how="outer")
    return {k: v.sort_values(v.columns[0]).rename_axis("detector").reset_index() for k, v in out.items()}


def movement_sentence(table: pd.DataFrame) -> str:
    """Which detectors share first place at the first and at the last noise level, and who fell back."""
    cols = list(table.columns[1:])
    if len(cols) < 2:
        return "One noise level only: nothing to compare."
    first, last = cols[0], cols[-1]
    lead0 = list(table.loc[table[first] == 1, "detector"])
    lead1 = list(table.loc[table[last] == 1, "detector"])
    if set(lead0) == set(lead1):
        who = lead0[0] if len(lead0) == 1 else ", ".join(lead0) + " (tied)"
        return f"first place stays with {who} from {first} to {last} labels."
    fell = [f"{d} (rank {int(r)})" for d, r in zip(table["detector"], table[last]) if d in lead0 and d not in lead1
            and r == r]
    return (f"first with {first} labels: {', '.join(lead0)}; with {last} labels: {', '.join(lead1)}"
            + (f"; fell back: {', '.join(fell)}" if fell else "") + ".")
