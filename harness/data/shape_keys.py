"""Shape keys: split a column of masked contents into tokens at once, then key each line by its shape.

A line's *shape* is its token sequence with each token replaced by its code (the
miner's number for a token that was ever a literal template token, or one shared
"unknown" code). Lines of one shape are routed and scored identically by Drain, so
the miner can answer a line from its shape alone while nothing it depends on has
changed.

The work is cut in two. `tokenise_column` (in a worker process) splits a whole column
with Arrow kernels and numbers its distinct tokens. `ShapeCoder` (in the miner's
process) maps those distinct tokens to codes and gives each line a key: the bytes of
its int32 codes. When the miner learns new literal tokens, `ShapeCoder.sync` updates
only those tokens' codes.

The tokens are exactly Python's ``content.strip()``, then every extra delimiter
replaced by a space, then ``str.split()``: on plain lines (printable ASCII and tab,
where the only whitespace is space and tab) Arrow's ASCII trim and split read the same.
Other lines get no key (None) and are tokenised by Python.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from logtrial.data.re2_form import plain_rows

UNKNOWN_CODE = -2

Key = bytes | None


@dataclass
class TokenColumn:
    """A column of contents as tokens: each token an index into the column's distinct tokens."""

    offsets: np.ndarray  # int32, one more than the rows: row i's tokens are indices[offsets[i]:offsets[i+1]]
    indices: np.ndarray  # int32, one per token
    distinct: pa.Array  # the distinct tokens (Arrow: cheap to send between processes)
    python_rows: np.ndarray  # bool per row: tokenised by Python only (no key)
    texts: dict[int, str]  # the contents of those rows

    def __len__(self) -> int:
        return len(self.offsets) - 1


def tokenise_column(contents: pa.Array, delimiters: Sequence[str]) -> TokenColumn:
    """Split every content into tokens as the miner does; number the distinct tokens."""
    python_rows = ~plain_rows(contents)
    if any(not d for d in delimiters):  # Python puts a space between every character; leave all to Python
        python_rows[:] = True
        delimiters = ()  # (and Arrow would grow such a replacement without bound)
    arr = pc.ascii_trim_whitespace(contents)
    if delimiters:
        for delimiter in delimiters:
            arr = pc.replace_substring(arr, pattern=delimiter, replacement=" ")
        arr = pc.ascii_trim_whitespace(arr)  # a delimiter at either end became a space that split() ignores
    tokens = pc.ascii_split_whitespace(arr)
    offsets = np.asarray(tokens.offsets, dtype=np.int64)
    offsets = (offsets - offsets[0]).astype(np.int32)
    flat = tokens.flatten()
    # Arrow splits an empty string into one empty token; Python into none
    empty = np.flatnonzero(np.asarray(pc.fill_null(pc.equal(arr, ""), False), dtype=bool))
    if len(empty):
        keep = np.ones(len(flat), dtype=bool)
        keep[offsets[empty]] = False
        flat = flat.filter(pa.array(keep))
        counts = np.diff(offsets)
        counts[empty] = 0
        offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int32)
    if contents.null_count:
        python_rows |= np.asarray(contents.is_null(), dtype=bool)
    rows = np.flatnonzero(python_rows)
    texts = dict(zip(rows.tolist(), contents.take(pa.array(rows)).to_pylist())) if len(rows) else {}
    if len(flat) == 0:
        return TokenColumn(offsets, np.zeros(0, dtype=np.int32), pa.array([], type=pa.string()), python_rows, texts)
    encoded = flat.dictionary_encode()
    # the narrowest index type: these arrays travel between processes
    width = np.uint16 if len(encoded.dictionary) <= 1 << 16 else np.int32
    indices = np.asarray(encoded.indices).astype(width)
    return TokenColumn(offsets, indices, encoded.dictionary, python_rows, texts)


class ShapeCoder:
    """Shape keys of a token column under a miner's token codes, kept current as the codes grow."""

    def __init__(self, column: TokenColumn, codes: dict[str, int]):
        self.column = column
        self.codes = codes
        self.distinct: list[str] = column.distinct.to_pylist()
        get = codes.get
        self.lookup = np.fromiter((get(t, UNKNOWN_CODE) for t in self.distinct), dtype=np.int32,
                                  count=len(self.distinct))
        self.known = len(codes)
        self._where: dict[str, int] | None = None

    def sync(self, code_list: Sequence[str]) -> None:
        """Take in the tokens that got codes since the last call (``code_list``: every coded token, in code order)."""
        if len(code_list) == self.known:
            return
        if self._where is None:
            self._where = {t: j for j, t in enumerate(self.distinct)}
        where, codes = self._where, self.codes
        for token in code_list[self.known:]:
            j = where.get(token)
            if j is not None:
                self.lookup[j] = codes[token]
        self.known = len(code_list)

    def tokens(self, row: int) -> tuple[str, ...]:
        """The tokens of a row that has a key."""
        offsets, distinct = self.column.offsets, self.distinct
        return tuple([distinct[j] for j in self.column.indices[offsets[row] : offsets[row + 1]].tolist()])

    def keys(self, start: int, stop: int) -> list[Key]:
        """The shape keys of rows start..stop-1 (None for rows Python must tokenise)."""
        col = self.column
        bounds = col.offsets[start : stop + 1]
        first = int(bounds[0])
        buffer = self.lookup[col.indices[first : int(bounds[-1])]].tobytes()
        edges = ((bounds.astype(np.int64) - first) * 4).tolist()
        keys: list[Key] = [buffer[a:b] for a, b in zip(edges[:-1], edges[1:])]
        skip = np.flatnonzero(col.python_rows[start:stop])
        for i in skip.tolist():
            keys[i] = None
        return keys
