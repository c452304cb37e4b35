"""Masking: replace every match of the miner's masks by `<*>` over a whole column of message contents.

The result is exactly Python's ``re.sub`` applied mask after mask (what the miner does
line by line). Masks run through Arrow's RE2 kernel (``replace_substring_regex``) on
plain contents when every mask qualifies (see ``re2_form``); other contents, or other
masks, go through Python's ``re``.
"""

from __future__ import annotations

import re
from typing import Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from logtrial.data.re2_form import plain_rows, replace_ok

WILDCARD = "<*>"


def mask_contents(contents: Sequence[str] | pa.Array, masks: Sequence[str]) -> pa.Array:
    """Contents with each mask, in order, replaced by `<*>` (same strings as ``re.sub`` mask after mask)."""
    arr = contents if isinstance(contents, pa.Array) else pa.array(list(contents), type=pa.string())
    if not masks or len(arr) == 0:
        return arr
    compiled = [re.compile(m) for m in masks]
    if not all(replace_ok(m) for m in masks):
        return pa.array([_mask_one(c, compiled) for c in arr.to_pylist()], type=pa.string())
    plain = np.asarray(plain_rows(arr), dtype=bool)
    if plain.all():
        for mask in masks:
            arr = pc.replace_substring_regex(arr, pattern=mask, replacement=WILDCARD)
        return arr
    where_plain, where_other = np.flatnonzero(plain), np.flatnonzero(~plain)
    done = arr.take(pa.array(where_plain))
    for mask in masks:
        done = pc.replace_substring_regex(done, pattern=mask, replacement=WILDCARD)
    other = pa.array([_mask_one(c, compiled) for c in arr.take(pa.array(where_other)).to_pylist()], type=pa.string())
    back = np.argsort(np.concatenate([where_plain, where_other]), kind="stable")
    return pa.concat_arrays([done, other]).take(pa.array(back))


def _mask_one(content: str, compiled: list[re.Pattern]) -> str:
    """One content masked by Python's ``re``, mask after mask."""
    for rx in compiled:
        content = rx.sub(WILDCARD, content)
    return content
