"""Honest comparisons of failure counts: score intervals, an exact paired test, and the detectable difference.

- :func:`wilson_interval`: the Wilson score interval of k successes in n trials; it
  never collapses to a point at k = 0 or k = n (unlike a percentile bootstrap).
- :func:`mcnemar_exact`: the exact McNemar test of two detectors judged on the same
  failures (each failure caught or missed by each detector). Only the discordant
  failures count: with b caught by A alone and c by B alone, the two-sided p-value
  is ``min(1, 2 * P[X <= min(b, c)])`` for ``X ~ Binomial(b + c, 1/2)``.
- :func:`min_detectable_difference`: the smallest difference in the share of
  failures caught that a two-sided test at level ``alpha`` finds with the given
  power, with ``n`` failures per detector (normal approximation, worst case
  p = 0.5, unpaired; a paired test needs fewer failures when detectors agree often).
- :func:`indistinguishable`: which detectors the exact McNemar test cannot tell
  apart from the best one.
"""

from __future__ import annotations

import math

import numpy as np
from logtrial.errors import MetricError
from scipy.stats import binom, norm

FEW_FAILURES = 20  # below this a comparison rests on too few failures (common practice, no source)


def wilson_interval(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of the proportion k/n (NaN, NaN when n is 0)."""
    if n < 0 or k < 0 or k > n:
        raise MetricError(f"wilson interval: need 0 <= k <= n, got k={k}, n={n}")
    if n == 0:
        return float("nan"), float("nan")
    z = float(norm.ppf(0.5 + level / 2.0))
    p = k / n
    denom = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return max(0.0, centre - half), min(1.0, centre + half)


def mcnemar_exact(a: np.ndarray, b: np.ndarray) -> tuple[float, int, int]:
    """Exact two-sided McNemar p-value of two boolean outcome vectors over the same failures, with (b, c)."""
    x, y = np.asarray(a, dtype=bool), np.asarray(b, dtype=bool)
    if x.shape != y.shape:
        raise MetricError(f"paired test: outcome vectors differ in length ({x.shape} vs {y.shape}); not the same failures")
    only_a = int(np.sum(x & ~y))
    only_b = int(np.sum(~x & y))
    n = only_a + only_b
    if n == 0:
        return 1.0, only_a, only_b
    p = 2.0 * float(binom.cdf(min(only_a, only_b), n, 0.5))
    return min(1.0, p), only_a, only_b


def min_detectable_difference(n: int, alpha: float = 0.05, power: float = 0.8) -> float:
    """Smallest difference in share caught a two-sided test detects with ``power`` at n failures per detector."""
    if n <= 0:
        return float("nan")
    z = float(norm.ppf(1 - alpha / 2) + norm.ppf(power))
    return z * math.sqrt(2 * 0.25 / n)


def indistinguishable(outcomes: dict[str, np.ndarray], best: str, alpha: float = 0.05) -> dict[str, float]:
    """McNemar p-value against ``best`` for every detector the test cannot tell apart from it (best included, p=1)."""
    ref = outcomes[best]
    out = {}
    for name, o in outcomes.items():
        p = 1.0 if name == best else mcnemar_exact(ref, o)[0]
        if p >= alpha:
            out[name] = p
    return out
