"""RE2 form: when Arrow's RE2 kernels give the same answer as Python's ``re``, and the pattern to give them.

Arrow's string kernels run RE2. On *plain* text (printable ASCII and tab) RE2 and
``re`` agree on the common syntax: ``\\d``, ``\\w``, ``\\s`` and ``\\b`` mean the same,
submatches follow the same leftmost-first rule, and lazy quantifiers behave alike. A
pattern that RE2 refuses (look-arounds, back-references, possessive quantifiers,
``\\Z``) or that the two read differently (``{,n}``, verbose/multi-line/dot-all flags)
is never handed to RE2; the caller then stays with ``re``. Text that is not plain
always stays with ``re``.
"""

from __future__ import annotations

import re
from functools import lru_cache

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

# per byte value: not printable ASCII and not tab
_NOT_PLAIN_BYTE = np.ones(256, dtype=bool)
_NOT_PLAIN_BYTE[0x20:0x7F] = False
_NOT_PLAIN_BYTE[0x09] = False


def rewrite_groups(pattern: str, first_unnamed: str | None = None) -> str:
    """The pattern with unnamed capturing groups made non-capturing (Arrow's extraction wants only named groups);
    with ``first_unnamed``, the first unnamed group is named so instead."""
    out: list[str] = []
    i, n = 0, len(pattern)
    in_class = False
    class_start = -1
    named_first = first_unnamed is None
    while i < n:
        ch = pattern[i]
        if ch == "\\":
            out.append(pattern[i : i + 2])
            i += 2
            continue
        if in_class:
            # a ']' right after '[' or '[^' is a literal
            if ch == "]" and i > class_start:
                in_class = False
            out.append(ch)
            i += 1
            continue
        if ch == "[":
            in_class = True
            class_start = i + 1
            if i + 1 < n and pattern[i + 1] == "^":
                class_start += 1
            out.append(ch)
            i += 1
            continue
        if ch == "(" and not pattern.startswith("?", i + 1):
            if not named_first:
                out.append(f"(?P<{first_unnamed}>")
                named_first = True
            else:
                out.append("(?:")
            i += 1
            continue
        out.append(ch)
        i += 1
    return "".join(out)


def _same_reading(pattern: str) -> bool:
    """Tell whether Python reads the pattern the way RE2 would (no construct the two read differently)."""
    try:
        flags = re.compile(pattern).flags
    except re.error:
        return False
    # `[:digit:]` inside a set is a POSIX class to RE2 but plain characters to Python
    return "{," not in pattern and "[:" not in pattern and not flags & (re.VERBOSE | re.MULTILINE | re.DOTALL)


@lru_cache(maxsize=256)
def extraction_pattern(pattern: str, first_unnamed: str | None = None, anchored: bool = True) -> str | None:
    """The RE2 pattern for ``extract_regex`` that equals Python's ``match`` (``anchored``) or ``search``, or None."""
    if not _same_reading(pattern):
        return None
    body = rewrite_groups(pattern, first_unnamed)
    re2 = f"^(?:{body})" if anchored else body
    try:
        original, rewritten = re.compile(pattern), re.compile(re2)
        expected = set(original.groupindex)
        if first_unnamed and original.groups > len(original.groupindex):
            expected.add(first_unnamed)
        if set(rewritten.groupindex) != expected or rewritten.groups != len(rewritten.groupindex):
            return None
        pc.extract_regex(pa.array(["a"]), pattern=re2)
    except (re.error, pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    return re2


@lru_cache(maxsize=256)
def replace_ok(mask: str) -> bool:
    """Tell whether RE2 replaces this mask's matches in plain text exactly as ``re.sub`` does."""
    if not _same_reading(mask):
        return False
    try:
        lo, _ = _sre_parser().parse(mask, re.compile(mask).flags).getwidth()
    except Exception:  # noqa: BLE001  any doubt: stay with Python
        return False
    if lo == 0:  # the two engines step over empty matches differently
        return False
    try:
        pc.replace_substring_regex(pa.array(["a"]), pattern=mask, replacement="<*>")
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return False
    return True


def _sre_parser():
    """The standard library's regex parser (the shortest match a pattern allows comes from it)."""
    try:
        import re._parser as parser  # noqa: PLC0415  (Python >= 3.11)
    except ImportError:  # pragma: no cover
        import sre_parse as parser  # noqa: PLC0415
    return parser


def plain_rows(arr: pa.Array) -> np.ndarray:
    """Which strings are plain (printable ASCII and tab only); a null is not plain."""
    n = len(arr)
    if not (pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type)):
        raise TypeError(f"plain_rows needs strings, got {arr.type}")
    if n == 0:
        return np.zeros(0, dtype=bool)
    width = np.int64 if pa.types.is_large_string(arr.type) else np.int32
    _, offset_buf, data_buf = arr.buffers()
    offsets = np.frombuffer(offset_buf, dtype=width)[arr.offset : arr.offset + n + 1].astype(np.int64)
    data = np.frombuffer(data_buf, dtype=np.uint8)[offsets[0] : offsets[-1]] if data_buf is not None else \
        np.zeros(0, dtype=np.uint8)
    out = np.ones(n, dtype=bool)
    if len(data) and (data.min() < 0x20 or data.max() > 0x7E):  # else every byte is printable ASCII
        bad = _NOT_PLAIN_BYTE[data]
        rows = np.searchsorted(offsets, np.flatnonzero(bad) + offsets[0], side="right") - 1
        out[rows] = False
    if arr.null_count:
        out &= np.asarray(arr.is_valid(), dtype=bool)
    return out
