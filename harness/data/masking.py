"""Masking: replace every match of the miner's masks by `<*>` over a whole column of message contents.

The result is exactly Python's ``re.sub`` applied mask after mask (what the miner does
line by line). A mask runs through Arrow's RE2 kernel (``replace_substring_regex``)
only where both engines provably agree: the mask compiles in RE2, it cannot match the
empty string (the two engines step over empty matches differently), and the content is
printable ASCII or tab (where ``\\d``, ``\\w``, ``\\s``, ``\\b`` and case folding mean the
same in both). Every other content, and every other mask, goes through Python's ``re``.
"""

from __future__ import annotations

import re
from functools import lru_cache
from typing import Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

WILDCARD = "<*>"
_NOT_PLAIN = r"[^\t\x20-\x7e]"


def _sre_parser():
    """The standard library's regex parser (the shortest match a pattern allows comes from it)."""
    try:
        import re._parser as parser  # noqa: PLC0415  (Python >= 3.11)
    except ImportError:  # pragma: no cover
        import sre_parse as parser  # noqa: PLC0415
    return parser


@lru_cache(maxsize=256)
def _re2_ok(mask: str) -> bool:
    """Tell whether a mask gives Python's result when run by RE2 on printable ASCII."""
    try:
        parsed = re.compile(mask)
        lo, _ = _sre_parser().parse(mask, parsed.flags).getwidth()
    except Exception:  # noqa: BLE001  any doubt: use Python
        return False
    if lo == 0 or parsed.flags & (re.VERBOSE | re.MULTILINE | re.DOTALL):
        return False
    try:
        pc.replace_substring_regex(pa.array(["a"]), pattern=mask, replacement=WILDCARD)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return False
    return True


def mask_contents(contents: Sequence[str], masks: Sequence[str]) -> list[str]:
    """Contents with each mask, in order, replaced by `<*>` (same strings as ``re.sub`` mask after mask)."""
    contents = list(contents)
    if not masks or not contents:
        return contents
    compiled = [re.compile(m) for m in masks]
    if not all(_re2_ok(m) for m in masks):
        return [_mask_one(c, compiled) for c in contents]
    arr = pa.array(contents, type=pa.string())
    plain = np.asarray(pc.invert(pc.match_substring_regex(arr, _NOT_PLAIN)), dtype=bool)
    if not plain.all():
        other = np.flatnonzero(~plain)
        arr = arr.filter(pa.array(plain))
    for mask in masks:
        arr = pc.replace_substring_regex(arr, pattern=mask, replacement=WILDCARD)
    done = arr.to_pylist()
    if plain.all():
        return done
    out: list[str] = [""] * len(contents)
    for i, s in zip(np.flatnonzero(plain).tolist(), done):
        out[i] = s
    for i in other.tolist():
        out[i] = _mask_one(contents[i], compiled)
    return out


def _mask_one(content: str, compiled: list[re.Pattern]) -> str:
    """One content masked by Python's ``re``, mask after mask."""
    for rx in compiled:
        content = rx.sub(WILDCARD, content)
    return content
