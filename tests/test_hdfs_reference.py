"""The committed HDFS sessions reference against the published figures (Du et al., ACM CCS 2017, from memory).

Reuses the committed results (re-running takes minutes of CPU): the summary must follow
from the per-fold rows, and every detector's recall and false-positive rate must match the
published figure within the stated tolerance, or differ by the gap the experiment file
states and explains (`gaps:`), within the same tolerance, so a changed figure fails here.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
import yaml
from logtrial.running.session_kfold import load_protocol, published_figures, summarise

REF = Path(__file__).resolve().parents[1] / "reports" / "hdfs-sessions"


@pytest.fixture(scope="module")
def reference() -> tuple[dict, pd.DataFrame, pd.DataFrame]:
    doc = yaml.safe_load((REF / "experiment.yaml").read_text())
    return doc, pd.read_csv(REF / "results" / "results.csv"), pd.read_csv(REF / "results" / "summary.csv")


def test_summary_follows_from_the_per_fold_rows(reference) -> None:
    doc, rows, summary = reference
    proto = load_protocol(REF / "experiment.yaml")
    labels = [d.label for d in proto.detectors] + [v for d in proto.detectors for v, _ in d.variants]
    assert sorted(rows["detector"].unique()) == sorted(labels)
    assert len(rows) == len(labels) * len(proto.seeds) * proto.folds
    # every normal session is held out exactly once per seed and detector; every abnormal one scored per fold
    per = rows.groupby(["detector", "seed"])
    assert (per["normal"].sum() == 4855).all() and (rows["abnormal"] == 8419).all()
    again = summarise(rows, doc["published"])
    pd.testing.assert_frame_equal(again[["detector", "recall", "fpr"]], summary[["detector", "recall", "fpr"]],
                                  check_exact=False, rtol=1e-5)


def test_reproduced_figures_match_published_or_the_stated_gap(reference) -> None:
    doc, _, summary = reference
    tol, gaps = doc["tolerance"], doc.get("gaps", {})
    assert {"next_event", "pca", "invariants"} <= set(doc["published"])
    for row in summary.itertuples():
        if row.detector not in doc["published"]:
            continue  # variants have no published counterpart
        pub = published_figures(doc["published"][row.detector])
        for figure in ("recall", "fpr"):
            measured = getattr(row, figure) - pub[figure]
            stated = gaps.get(row.detector, {}).get(figure, 0.0)
            assert abs(measured - stated) <= tol[figure], (row.detector, figure, measured, stated)
    # the published next-event target (recall >= 0.93 at FPR <= 1 %): FPR holds on held-out normal sessions
    ne = summary.set_index("detector").loc["next_event"]
    assert ne["fpr_max"] <= 0.01
    assert ne["recall_min"] <= ne["recall"] <= ne["recall_max"]  # the seed spread is reported
    # the stricter end-event rule on the same models reaches the recall target, at an FPR just above 1 %
    strict = summary.set_index("detector").loc["next_event end-top-4"]
    assert strict["recall"] >= 0.93 and strict["fpr"] <= 0.011
