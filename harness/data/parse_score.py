"""Scores of a template miner's output against ground-truth templates."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd


def _pair_table(truth_ids: Sequence, pred_ids: Sequence) -> pd.DataFrame:
    """Return one row per (truth, predicted) pair with its line count and both group sizes."""
    if len(truth_ids) != len(pred_ids):
        raise ValueError(f"truth has {len(truth_ids)} lines but predicted has {len(pred_ids)}")
    frame = pd.DataFrame({"truth": pd.factorize(np.asarray(truth_ids, dtype=object))[0],
                          "pred": pd.factorize(np.asarray(pred_ids, dtype=object))[0]})
    pairs = frame.groupby(["truth", "pred"], sort=False).size().rename("lines").reset_index()
    pairs["truth_lines"] = pairs["truth"].map(frame["truth"].value_counts())
    pairs["pred_lines"] = pairs["pred"].map(frame["pred"].value_counts())
    pairs["exact"] = (pairs["lines"] == pairs["truth_lines"]) & (pairs["lines"] == pairs["pred_lines"])
    return pairs


def grouping_accuracy(truth: Sequence, predicted: Sequence) -> float:
    """Return the share of lines whose predicted group holds exactly the lines of their true group."""
    if len(truth) == 0:
        return float("nan")
    pairs = _pair_table(truth, predicted)
    return float(pairs.loc[pairs["exact"], "lines"].sum() / len(truth))


def _normalise(text: str) -> str:
    """Collapse runs of whitespace to one space and trim the ends."""
    return " ".join(str(text).split())


def template_match_share(
    truth_templates: Sequence[str] | Mapping[Any, str],
    predicted_templates: Sequence[str] | Mapping[Any, str],
    truth_ids: Sequence,
    pred_ids: Sequence,
) -> float:
    """Return the share of true templates recovered as exactly one predicted group with the same text."""
    # line i has true template truth_templates[truth_ids[i]] and predicted template
    # predicted_templates[pred_ids[i]] (lists indexed by id, or dicts); whitespace is normalised
    if len(truth_ids) == 0:
        return float("nan")
    truth_arr = np.asarray(truth_ids, dtype=object)
    pred_arr = np.asarray(pred_ids, dtype=object)
    truth_codes, truth_uniques = pd.factorize(truth_arr)
    pred_codes, pred_uniques = pd.factorize(pred_arr)
    pairs = _pair_table(truth_codes, pred_codes)
    exact = pairs[pairs["exact"]]
    same_text = [
        _normalise(truth_templates[truth_uniques[t]]) == _normalise(predicted_templates[pred_uniques[p]])
        for t, p in zip(exact["truth"], exact["pred"])
    ]
    return float(sum(same_text) / len(truth_uniques))


def score_against_truth(events_path, templates_path, truth_path, truth) -> dict:
    """Grouping accuracy and exact-template share of an ingested table against a ground-truth CSV."""
    from logtrial.errors import DataError

    events = pd.read_parquet(events_path, columns=["line", "event"])
    templates = pd.read_csv(templates_path, keep_default_na=False)["template"].tolist()
    truth_path = Path(truth_path)
    if truth_path.suffix == ".npy":
        # Per-line template ids (line i+1 -> ids[i]) plus a template list with `id` and `template`.
        ids = np.load(truth_path, allow_pickle=False)
        cat_path = truth_path.parent / (truth.templates or "templates.csv")
        cat = pd.read_csv(cat_path, keep_default_na=False)
        gt = pd.DataFrame({truth.id: ids, truth.template: cat.set_index("id")["template"].reindex(ids).to_numpy()})
        gt.index = np.arange(1, len(gt) + 1, dtype=np.int64)
    else:
        try:
            gt = pd.read_csv(truth_path, dtype=str, keep_default_na=False)
        except (OSError, pd.errors.ParserError) as exc:
            raise DataError(f"{truth_path}: cannot read ground-truth templates: {exc}") from None
        for col in (truth.id, truth.template):
            if col not in gt.columns:
                raise DataError(f"{truth_path}: line 1: expected a column {col!r}, found {list(gt.columns)}")
        if "LineId" in gt.columns:
            gt.index = pd.to_numeric(gt["LineId"]).astype(np.int64)
        else:
            gt.index = np.arange(1, len(gt) + 1, dtype=np.int64)
    common = events[events["line"].isin(gt.index)]
    if common.empty:
        raise DataError(f"{truth_path}: no ground-truth row matches an ingested line number")
    # Lines the format quarantined were never grouped: each counts as wrongly grouped
    # (its own singleton group), so the accuracy is over every ground-truth line.
    missing = gt.index.difference(pd.Index(common["line"]))
    pred = pd.Series(common["event"].to_numpy().astype(object), index=common["line"].to_numpy())
    pred = pd.concat([pred, pd.Series([f"unscored-{i}" for i in missing], index=missing, dtype=object)]).sort_index()
    all_truth = gt.loc[pred.index, truth.id].to_numpy()
    truth_ids = gt.loc[common["line"], truth.id].to_numpy()
    truth_tpl = dict(zip(gt[truth.id], gt[truth.template]))
    return {
        "lines": int(len(gt)),
        "unscored_lines": int(len(missing)),
        "true_templates": int(pd.unique(truth_ids).size),
        "mined_templates": int(common["event"].nunique()),
        "grouping_accuracy": grouping_accuracy(all_truth, pred.to_numpy()),
        "exact_templates": template_match_share(truth_tpl, templates, truth_ids, common["event"].to_numpy()),
    }
