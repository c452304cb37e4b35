"""Durations as people write them: '1h', '15min', '2d' (not pandas' '0 days 01:00:00')."""

from __future__ import annotations

import re
from typing import Any

import pandas as pd

_PANDAS_REPR = re.compile(r"-?\d+ days? [+-]?\d{2}:\d{2}:\d{2}(?:\.\d+)?")


def format_duration(value: Any) -> str:
    """A duration written the way users write it: '1h', '15min', '2d', '90s' (not '0 days 01:00:00')."""
    td = pd.Timedelta(value)
    ns = int(td.value)
    if ns == 0:
        return "0s"
    sign, ns = ("-", -ns) if ns < 0 else ("", ns)
    for unit, size in (("d", 86_400 * 10**9), ("h", 3_600 * 10**9), ("min", 60 * 10**9), ("s", 10**9),
                       ("ms", 10**6), ("us", 10**3)):
        if ns % size == 0:
            return f"{sign}{ns // size}{unit}"
    return f"{sign}{ns}ns"


def shorten_durations(text: str) -> str:
    """Text with every pandas duration repr ('0 days 01:00:00') rewritten in the short form ('1h')."""
    return _PANDAS_REPR.sub(lambda m: format_duration(m.group(0)), str(text))
