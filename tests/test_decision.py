"""Intervals, the paired test, the detectable difference and the decision ranking.

References: scipy.stats.binomtest (Wilson interval via proportion_ci, and the exact
binomial test on the discordant pairs, which is the exact McNemar test), a textbook
McNemar table worked by hand, and the normal-approximation power formula for two
proportions (z_{1-alpha/2} + z_{power}) * sqrt(2 p (1 - p) / n), checked here at p = 0.5.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from logtrial.evaluation.paired import (
    indistinguishable,
    mcnemar_exact,
    min_detectable_difference,
    wilson_interval,
)
from logtrial.output.decision import _board, board_table, decision_boards, format_duration, over_budget, sentence
from scipy.stats import binomtest, norm


@pytest.mark.parametrize("k,n", [(0, 10), (10, 10), (3, 10), (1, 24), (23, 24), (50, 100), (0, 1)])
def test_wilson_matches_scipy_and_never_collapses(k: int, n: int) -> None:
    lo, hi = wilson_interval(k, n)
    ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    assert lo == pytest.approx(ref.low, abs=1e-12) and hi == pytest.approx(ref.high, abs=1e-12)
    assert hi - lo > 0.0  # 10/10 gives [0.72, 1.00], not [1.00, 1.00]


def test_mcnemar_exact_equals_binomial_test_on_discordant_pairs() -> None:
    rng = np.random.default_rng(4)
    for _ in range(40):
        n = int(rng.integers(1, 60))
        a = rng.random(n) < rng.random()
        b = rng.random(n) < rng.random()
        p, only_a, only_b = mcnemar_exact(a, b)
        assert only_a == int(np.sum(a & ~b)) and only_b == int(np.sum(~a & b))
        ref = binomtest(only_a, only_a + only_b, 0.5).pvalue if only_a + only_b else 1.0
        assert p == pytest.approx(ref, rel=1e-12)


def test_mcnemar_hand_worked_table() -> None:
    # 10 failures: A alone catches 6, B alone 0, both 2, neither 2. Discordant pairs 6 + 0:
    # p = 2 * 0.5**6 = 0.03125 -> A is ahead. With 4 vs 1: p = 2 * (1 + 5) / 32 = 0.375.
    a = np.array([1] * 6 + [1, 1] + [0, 0], dtype=bool)
    b = np.array([0] * 6 + [1, 1] + [0, 0], dtype=bool)
    assert mcnemar_exact(a, b)[0] == pytest.approx(0.03125)
    a2 = np.array([1, 1, 1, 1, 0, 1, 0, 0], dtype=bool)
    b2 = np.array([0, 0, 0, 0, 1, 1, 0, 0], dtype=bool)
    assert mcnemar_exact(a2, b2)[0] == pytest.approx(0.375)
    assert set(indistinguishable({"A": a, "B": b, "C": a.copy()}, "A")) == {"A", "C"}


@pytest.mark.parametrize("n", [10, 24, 100, 400])
def test_min_detectable_difference_power_formula(n: int) -> None:
    d = min_detectable_difference(n)
    assert d == pytest.approx((norm.ppf(0.975) + norm.ppf(0.8)) * np.sqrt(2 * 0.25 / n))
    # At that difference around 0.5 the two-sided z-test has 80 % power (normal approximation).
    se = np.sqrt(2 * 0.25 / n)
    power = 1 - norm.cdf(norm.ppf(0.975) - d / se) + norm.cdf(-norm.ppf(0.975) - d / se)
    assert power == pytest.approx(0.8, abs=1e-3)


def test_format_duration() -> None:
    given = ("0 days 01:00:00", "7 days", "1 days 12:00:00", "90min", "bogus")
    shown = [format_duration(x) for x in given]
    assert shown == ["1h", "7d", "36h", "90min", "bogus"]
    # reference: pandas reads every short form back as the same duration (pandas spells days "D")
    assert all(pd.Timedelta(s.replace("d", "D") if s.endswith("d") else s) == pd.Timedelta(g)
               for s, g in zip(shown[:-1], given[:-1]))


def _record(det: str, seed: int, outcomes: str, alarms: float, leads: list[float]) -> dict:
    point = {"outcomes": {"predicted": outcomes, "caught": outcomes}, "lead_times_h": leads,
             "metrics": {"alarms_per_week_per_100_entities": alarms, "false_alarms_per_predicted_failure": 1.0}}
    return {"status": "finished", "config": {"detector": {"name": det}, "seed": seed, "noise": {"name": "clean"},
                                             "task": {"name": "predict", "horizon": "1 days"}},
            "at_budget": {"5": point}, **point}


def test_board_ranks_by_failures_then_lead_and_marks_ties() -> None:
    recs = [
        _record("a", 1, "1111100000", 4.0, [5, 6, 7, 8, 9]),
        _record("b", 1, "1111000000", 4.5, [20, 20, 20, 20]),
        _record("c", 1, "0000000000", 1.0, []),
        _record("d", 1, "1111100000", 3.0, [1, 1, 1, 1, 1]),
    ]
    b = _board("s", "clean", "5", recs, ["a", "b", "c", "d"])
    assert list(b.rows["detector"]) == ["a", "d", "b", "c"]  # a and d tie on 5/10, a leads longer
    assert list(b.rows["k"]) == [5, 5, 4, 0] and set(b.rows["n"]) == {10}
    assert list(b.rows["rank"]) == [1, 2, 3, 4]
    tied = _board("s", "clean", "5", [_record("x", 1, "1100", 1.0, [2, 2]), _record("y", 1, "0110", 1.0, [2, 2]),
                                      _record("z", 1, "0100", 1.0, [3])], ["x", "y", "z"])
    assert list(tied.rows["detector"]) == ["x", "y", "z"] and list(tied.rows["rank"]) == [1, 1, 3]
    # c misses the 5 failures a catches: p = 2 * 0.5**5 = 0.0625 -> still indistinguishable at 10 failures.
    assert b.rows.set_index("detector").loc["c", "p_vs_best"] == pytest.approx(0.0625)
    assert b.rows["same_as_best"].all()
    assert b.warnings and "fewer than 20 failures" in b.warnings[0]
    lo, hi = b.rows.iloc[0][["low", "high"]]
    assert (lo, hi) == pytest.approx(wilson_interval(5, 10))


def test_board_combines_seeds_by_majority() -> None:
    recs = [_record("a", s, o, 2.0, [1.0]) for s, o in zip((1, 2, 3), ("1100", "1010", "1001"))]
    b = _board("s", "clean", "5", recs, ["a"])
    assert b.rows.iloc[0]["k"] == 1  # only the first failure is caught by at least half the seeds
    combos = list(itertools.product("01", repeat=2))
    recs2 = [_record("a", s, "".join(c), 2.0, []) for s, c in enumerate(combos[:2])]
    assert _board("s", "clean", "5", recs2, ["a"]).rows.iloc[0]["k"] == 1  # "00","01": second failure at 1/2


def test_seeds_testing_different_failures_are_not_pooled() -> None:
    # A random split gives each seed its own test failures: the ranking falls back to one seed and says so.
    recs = [_record("a", 1, "1100", 2.0, []), _record("a", 2, "101", 2.0, []),
            _record("b", 1, "0000", 2.0, []), _record("b", 2, "111", 2.0, [])]
    b = _board("s", "clean", "5", recs, ["a", "b"])
    assert list(b.rows["k"]) == [2, 0] and set(b.rows["n"]) == {4}
    assert any("seed 1 only" in w for w in b.warnings)


def test_movement_sentence_names_shared_first_places() -> None:
    import pandas as pd
    from logtrial.output.decision import movement_sentence

    t = pd.DataFrame({"detector": ["a", "b", "c"], "clean": [1, 1, 3], "noisy": [3, 1, 1]})
    assert movement_sentence(t) == "first with clean labels: a, b; with noisy labels: b, c; fell back: a (rank 3)."
    same = pd.DataFrame({"detector": ["a", "b"], "clean": [1, 2], "noisy": [1, 2]})
    assert movement_sentence(same) == "first place stays with a from clean to noisy labels."


def test_a_detector_far_over_its_budget_on_test_ranks_after_those_within_it() -> None:
    # worked example: budget 5/week/100; a catches 5/10 but raises 40 on test (8x), d catches 3/10 at 3 (0.6x)
    recs = [_record("a", 1, "1111100000", 40.0, [5, 6, 7, 8, 9]), _record("d", 1, "1110000000", 3.0, [1, 1, 1])]
    b = _board("s", "clean", "5", recs, ["a", "d"])
    assert list(b.rows["detector"]) == ["d", "a"] and list(b.rows["rank"]) == [1, 2]
    assert list(over_budget(b)) == [False, True]
    table = board_table(b)
    assert list(table["test alarms vs budget"]) == ["0.6x", "8.0x OVER"]
    text = sentence(b, recs)
    assert "pick d" in text and "Caution" not in text
    assert "a cannot be told apart" not in text  # the over-budget one is not offered as an equal alternative
    # with the headline threshold policy there is no budget to keep: failures caught decide
    assert list(_board("s", "clean", "policy", recs, ["a", "d"]).rows["detector"]) == ["a", "d"]
    # when nobody kept to the budget, the sentence says so
    alone = _board("s", "clean", "5", recs[:1], ["a"])
    assert "no detector stayed within 2x the budget" in sentence(alone, recs) and "8.0x it" in sentence(alone, recs)
    within = _board("s", "clean", "5", [_record("d", 1, "1110000000", 3.0, [1, 1, 1])], ["d"])
    assert "Caution" not in sentence(within, recs)


def test_settings_come_in_horizon_order_whatever_the_record_order() -> None:
    # records arrive in run-id (hash) order; the sections must not: the 1-day horizon comes before the 7-day one
    week = [_record("a", 1, "1100", 3.0, [9, 9]), _record("b", 1, "1000", 3.0, [9])]
    day = [_record("a", 1, "1010", 3.0, [2, 2]), _record("b", 1, "0010", 3.0, [2])]
    for r in week:
        r["config"]["task"]["horizon"] = "7 days"
    for r in week + day:
        r["config"].update(dataset="d", windows={"kind": "time", "size": "1h"})
    boards = decision_boards(week + day, ["a", "b"], ["clean"])
    assert [b.horizon_h for b in boards] == [24.0, 24.0, 168.0, 168.0]  # budget 5, then the policy, per setting
