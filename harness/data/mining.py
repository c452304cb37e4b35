"""Template mining: map each log message content to a template (event) id.

`DrainMiner` is our own implementation of the Drain algorithm (He et al.,
"Drain: An Online Log Parsing Approach with Fixed Depth Tree", ICWS 2017). Its
results are meant to be identical, line for line, to the drain3 0.9.11 library
(`TemplateMiner.add_log_message`) configured with the same masks (each replaced
by `<*>`), `sim_th`, `depth`, `max_children`, unlimited `max_clusters` and
`parametrize_numeric_tokens=True`; tests/test_mining.py checks this.

How Drain assigns a line (as in the reference library):
1. Mask: each mask regex, in order, is replaced by `<*>` in the raw content.
2. Tokenise: extra delimiters become spaces, then split on whitespace.
3. Route through a prefix tree: first by token count, then by the first
   `depth - 3` tokens (never the last token of a line). A token without an
   exact child goes to the `<*>` child; no child at all means "new template".
4. In the leaf, pick the template with the most equal non-`<*>` positions
   (ties: the one with more `<*>`, then the oldest). It matches when
   equal / token count >= similarity; otherwise a new template starts.
5. A match turns every position where line and template differ into `<*>`.
When a new template is inserted, tokens containing a digit take the `<*>`
branch, and a tree node that reaches `max_children` children sends every further
new token to `<*>`.

Speed comes from the following, none of which changes a result:
- Answers are cached per raw content, per masked content and per "shape" (the
  tokens with every token that never was a literal template token replaced by
  one placeholder: such tokens cannot equal a template token nor name a tree
  child, so lines of one shape are routed and scored identically). A cached
  answer is reused only while nothing it depends on has changed: each leaf
  has a version, bumped when a template in it is created or generalised, and
  a routing version is bumped when a new tree child could divert lines that
  used to take a `<*>` branch. Only answers that changed nothing (a plain
  match) are cached, so replaying one is exactly what Drain would do. A shape
  is keyed by the bytes of its int32 token codes; `add_many` gets those keys
  for whole columns at once (`logtrial.data.shape_keys`), tokenised in the
  ingest workers.
- Similarity is one C-level pass, `sum(map(eq, tokens, pattern))`, where the
  pattern holds a space (never part of a token) at `<*>` positions; leaves
  with many templates (lines that are mostly parameters start a new template
  each time) are scored with one NumPy comparison over a table of token codes.
- The cyclic garbage collector is paused inside `add_many` (the caches hold
  many objects but no reference cycles).
- Masks are applied one after the other, as the reference does; `add_many`
  applies each to the whole column at once (`logtrial.data.masking`: Arrow's
  RE2 kernel where it provably equals `re.sub`, else `re`). One alternation
  regex is *not* equivalent in general (with masks `\\d+` then `a\\d`, "a1"
  becomes "a<*>" one after the other but "<*>" with `\\d+|a\\d`), so it is not used.
"""

from __future__ import annotations

import copy
import gc
import operator
import re
from array import array
from contextlib import contextmanager
from itertools import repeat
from typing import Any, Callable, Iterator, Protocol, Sequence, runtime_checkable

import numpy as np
import pyarrow as pa
from logtrial.data.masking import mask_contents
from logtrial.data.shape_keys import UNKNOWN_CODE, ShapeCoder, TokenColumn, tokenise_column

WILDCARD = "<*>"

# add_many masks whole columns at once from this many contents on.
_BULK_FROM = 256

# Stands for a `<*>` position in a similarity pattern: tokens come from
# str.split(), so they never contain a space and never equal this.
_NEVER_A_TOKEN = " "

# Code of a token that was never a literal template token (codes are >= 0; a
# `<*>` position in a leaf table is -1).
_UNKNOWN_CODE = UNKNOWN_CODE
_WILD_CODE = -1

# Leaves with at least this many templates are matched with NumPy.
_TABLE_FROM = 32

# Shape keys are computed this many lines at a time (adaptive between the bounds).
_BLOCK_FROM, _BLOCK_MIN, _BLOCK_MAX = 1024, 64, 16384

# Caches are cleared when they reach this many entries (bounds memory on logs
# whose lines are all distinct; 2**16 measured faster than 2**18 on 500k HDFS
# lines, and peaks near 75 MB there).
_CACHE_LIMIT = 1 << 16


@runtime_checkable
class TemplateMiner(Protocol):
    """What ingest needs from a template miner."""

    def add(self, content: str) -> int:
        """Assign one message content; return its 0-based template id."""
        ...

    def add_many(self, contents: Sequence[str]) -> np.ndarray:
        """Assign contents in order; return their template ids as int32."""
        ...

    def templates(self) -> list[str]:
        """Return the current template text per id."""
        ...

    def counts(self) -> np.ndarray:
        """Return the number of lines assigned to each id."""
        ...

    def settings(self) -> dict:
        """Return the JSON-able settings that reproduce this miner."""
        ...


class _Node:
    """Prefix-tree node: children by token; a leaf also lists its templates."""

    __slots__ = ("children", "clusters", "version", "table")

    def __init__(self) -> None:
        self.children: dict[str, _Node] = {}
        self.clusters: list[int] = []
        self.version = 0
        self.table: _LeafTable | None = None


class _LeafTable:
    """Token codes of a big leaf's templates (one row each) for vectorised matching."""

    __slots__ = ("codes", "wild", "size")

    def __init__(self, width: int) -> None:
        self.codes = np.full((_TABLE_FROM * 2, width), _WILD_CODE, dtype=np.int64)
        self.wild = np.zeros(_TABLE_FROM * 2, dtype=np.int64)
        self.size = 0

    def append(self, codes: Sequence[int], wild: int) -> None:
        """Add a row for a new template."""
        if self.size == len(self.wild):
            self.codes = np.concatenate([self.codes, np.full_like(self.codes, _WILD_CODE)])
            self.wild = np.concatenate([self.wild, np.zeros_like(self.wild)])
        self.size += 1
        self.update(self.size - 1, codes, wild)

    def update(self, row: int, codes: Sequence[int], wild: int) -> None:
        """Replace a template's row."""
        self.codes[row] = codes
        self.wild[row] = wild

    def best(self, codes: np.ndarray) -> tuple[int, int]:
        """Return (first row with the most equal tokens, then the most <*>; its equal count)."""
        equal = np.count_nonzero(self.codes[: self.size] == codes, axis=1)
        score = equal * (self.codes.shape[1] + 1) + self.wild[: self.size]
        row = int(score.argmax())
        return row, int(equal[row])


# A cache entry is a list [template id, leaf, leaf version, routing version,
# tokens]; it is valid while leaf.version and the miner's routing version still
# equal the recorded ones. New entries point at this node, whose version never
# equals the recorded -1, so they start invalid.
_NO_LEAF = _Node()
_NO_LEAF.version = -2


def _has_digit(token: str) -> bool:
    """Tell whether a token contains a digit (same test as str.isdigit)."""
    return any(ch.isdigit() for ch in token)


def _pattern(template: tuple[str, ...]) -> tuple[str, ...]:
    """Return the similarity pattern of a template (`<*>` never counts)."""
    return tuple(_NEVER_A_TOKEN if tok == WILDCARD else tok for tok in template)


class DrainMiner:
    """Drain template miner with drain3 0.9.11 semantics."""

    def __init__(
        self,
        masks: Sequence[str] = (),
        similarity: float = 0.5,
        depth: int = 4,
        max_children: int = 100,
        extra_delimiters: Sequence[str] = (),
    ) -> None:
        if depth < 3:
            raise ValueError(f"depth must be at least 3, got {depth}")
        if max_children < 1:
            raise ValueError(f"max_children must be at least 1, got {max_children}")
        self._mask_texts = [str(m) for m in masks]
        self._masks = [_compile_mask(m) for m in self._mask_texts]
        self._similarity = float(similarity)
        self._depth = int(depth)
        self._max_children = int(max_children)
        self._delimiters = [str(d) for d in extra_delimiters]
        self._route_levels = depth - 2  # tree levels below the token-count level, incl. leaf

        self._by_length: dict[int, _Node] = {}
        self._routing_version = 0
        self._templates: list[tuple[str, ...]] = []
        self._patterns: list[tuple[str, ...]] = []
        self._fixed: list[int] = []  # non-<*> positions per template
        self._wild: list[int] = []  # <*> positions per template
        self._leaves: list[_Node] = []
        self._counts = np.zeros(64, dtype=np.int64)
        self._needed: dict[int, int] = {}  # token count -> least equal tokens for a match

        # a code for every token that was ever a literal (non-<*>) template token
        self._codes: dict[str, int] = {}
        self._code_list: list[str] = []  # the same tokens in code order
        self._rows: list[int] = []  # row of each template in its leaf

        self._by_raw: dict[str, list] = {}
        self._by_masked: dict[str, list] = {}
        self._by_shape: dict[bytes, list] = {}  # by shape key: the line's token codes as int32 bytes (`shape_keys`)

    # ----------------------------------------------------------- public API

    def add(self, content: str) -> int:
        """Assign one message content; return its 0-based template id."""
        cid = self._assign_content(content)
        self._grow_counts(len(self._templates))
        self._counts[cid] += 1
        return cid

    def add_many(self, contents: Sequence[str]) -> np.ndarray:
        """Assign contents in order; return their template ids as int32."""
        if self._masks and len(contents) >= _BULK_FROM:
            # masks over the whole column at once (same strings as re.sub mask after mask)
            return self.add_many_masked(mask_contents(contents, self._mask_texts))
        with _gc_paused():
            ids = self._assign_all(contents)
        return self._counted(ids)

    def add_many_masked(self, masked: Sequence[str] | pa.Array | None, tokens: TokenColumn | None = None
                        ) -> np.ndarray:
        """Assign contents already masked (by `mask_patterns()`, in order) in order; return template ids as int32.

        Instead of the contents, ``tokens`` may give them as `tokenise_column` splits them
        (with `delimiters()`), e.g. in a worker process; ``masked`` is then not read.
        """
        with _gc_paused():
            if tokens is not None:
                ids = self._assign_column(tokens)
            elif isinstance(masked, pa.Array):
                ids = self._assign_column(tokenise_column(masked, self._delimiters))
            else:
                ids = self._assign_all_masked(masked)
        return self._counted(ids)

    def _counted(self, ids: list[int]) -> np.ndarray:
        """The assigned ids as int32, added to the per-template line counts."""
        out = np.array(ids, dtype=np.int32)
        n_templates = len(self._templates)
        self._grow_counts(n_templates)
        if len(out):
            self._counts[:n_templates] += np.bincount(out, minlength=n_templates)
        return out

    def match_masked_many(self, masked: Sequence[str]) -> np.ndarray:
        """Return the template each masked content would join, changing nothing (-1 where none); int32.

        Drain's routing and scoring with every template frozen: no template is created or
        generalised, so contents may be matched in any order or in parallel.
        """
        out = np.full(len(masked), -1, dtype=np.int32)
        by_length, route_levels, needed_equal = self._by_length, self._route_levels, self._needed_equal
        patterns, wild = self._patterns, self._wild
        for i, content in enumerate(masked):
            tokens = self._tokenise(content)
            node = by_length.get(len(tokens))
            if node is None:
                continue
            if not tokens:
                out[i] = node.clusters[0]
                continue
            for token in tokens[: min(route_levels, len(tokens)) - 1]:
                child = node.children.get(token)
                if child is None:
                    child = node.children.get(WILDCARD)
                    if child is None:
                        break
                node = child
            else:
                best, best_equal, best_wild = -1, -1, -1
                for cid in node.clusters:
                    equal = sum(map(operator.eq, tokens, patterns[cid]))
                    if equal > best_equal or (equal == best_equal and wild[cid] > best_wild):
                        best, best_equal, best_wild = cid, equal, wild[cid]
                if best >= 0 and best_equal >= needed_equal(len(tokens)):
                    out[i] = best
        return out

    def frozen_copy(self) -> "DrainMiner":
        """A copy without the answer caches, small enough to ship to other processes for `match_masked_many`."""
        clone = copy.copy(self)
        clone._by_raw, clone._by_masked, clone._by_shape = {}, {}, {}
        return clone

    def delimiters(self) -> list[str]:
        """Return the extra token delimiters."""
        return list(self._delimiters)

    def mask_patterns(self) -> list[str]:
        """Return the mask regexes, in the order they are applied."""
        return list(self._mask_texts)

    def templates(self) -> list[str]:
        """Return the current template text per id (wildcard `<*>`)."""
        return [" ".join(t) for t in self._templates]

    def counts(self) -> np.ndarray:
        """Return the number of lines assigned to each id."""
        return self._counts[: len(self._templates)].copy()

    def settings(self) -> dict:
        """Return the JSON-able settings that reproduce this miner."""
        return {
            "kind": "drain",
            "masks": list(self._mask_texts),
            "similarity": self._similarity,
            "depth": self._depth,
            "max_children": self._max_children,
            "extra_delimiters": list(self._delimiters),
        }

    # ------------------------------------------------------------ caching

    def _assign_all(self, contents: Sequence[str]) -> list[int]:
        """Return the template id of each content (the hot loop: cache hits stay inline)."""
        by_raw, by_masked = self._by_raw, self._by_masked
        raw_get, masked_get = by_raw.get, by_masked.get
        subs = [regex.sub for regex in self._masks]
        new_entry, resolve = self._new_entry, self._resolve
        ids: list[int] = []
        append = ids.append
        for content in contents:
            entry = raw_get(content)
            if entry is None:
                masked = content
                for sub in subs:
                    masked = sub(WILDCARD, masked)
                entry = masked_get(masked)
                if entry is None:
                    entry = new_entry(masked)
                if len(by_raw) >= _CACHE_LIMIT:
                    by_raw.clear()
                by_raw[content] = entry
            if entry[1].version == entry[2] and entry[3] == self._routing_version:
                append(entry[0])
            else:
                append(resolve(entry))
        return ids

    def _assign_all_masked(self, masked: Sequence[str]) -> list[int]:
        """Return the template id of each masked content (the raw-content cache is skipped; answers are the same)."""
        masked_get = self._by_masked.get
        new_entry, resolve = self._new_entry, self._resolve
        ids: list[int] = []
        append = ids.append
        for content in masked:
            entry = masked_get(content)
            if entry is None:
                entry = new_entry(content)
            if entry[1].version == entry[2] and entry[3] == self._routing_version:
                append(entry[0])
            else:
                append(resolve(entry))
        return ids

    def _assign_column(self, tokens: TokenColumn) -> list[int]:
        """Return the template id of each line of a token column (`tokenise_column`), answering from shape keys.

        Keys come a block of lines at a time; when a line gives the miner new literal
        tokens the keys of the rest of the block may be stale, so the next block starts
        after that line. The block size grows while blocks pass without new tokens and
        shrinks when they do not.
        """
        codes = self._codes
        coder = ShapeCoder(tokens, codes)
        texts = tokens.texts
        key_get = self._by_shape.get
        ids: list[int] = []
        append = ids.append
        n, start, block = len(tokens), 0, _BLOCK_FROM
        while start < n:
            stop = min(n, start + block)
            coder.sync(self._code_list)
            n_codes = len(codes)
            for i, key in enumerate(coder.keys(start, stop), start):
                entry = key_get(key) if key is not None else None
                if entry is not None and entry[1].version == entry[2] and entry[3] == self._routing_version:
                    append(entry[0])
                    continue
                if key is None:
                    append(self._assign_masked_one(texts[i]))
                else:
                    append(self._run_drain(key, coder.tokens(i))[0])
                if len(codes) != n_codes:
                    stop = i + 1
                    block = max(_BLOCK_MIN, block // 4)
                    break
            else:
                block = min(_BLOCK_MAX, block * 2)
            start = stop
        return ids

    def _assign_masked_one(self, content: str) -> int:
        """Return the template id of one masked content (the per-line caches)."""
        entry = self._by_masked.get(content)
        if entry is None:
            entry = self._new_entry(content)
        if entry[1].version == entry[2] and entry[3] == self._routing_version:
            return entry[0]
        return self._resolve(entry)

    def _assign_content(self, content: str) -> int:
        """Return the template id for one content, using the caches."""
        entry = self._by_raw.get(content)
        if entry is None:
            entry = self._entry_for(content)
        if entry[1].version == entry[2] and entry[3] == self._routing_version:
            return entry[0]
        return self._resolve(entry)

    def _entry_for(self, content: str) -> list:
        """Return the cache entry of a raw content (masking and tokenising it)."""
        masked = self._mask(content)
        entry = self._by_masked.get(masked)
        if entry is None:
            entry = self._new_entry(masked)
        if len(self._by_raw) >= _CACHE_LIMIT:
            self._by_raw.clear()
        self._by_raw[content] = entry
        return entry

    def _new_entry(self, masked: str) -> list:
        """Create the (not yet valid) cache entry of a masked content."""
        if len(self._by_masked) >= _CACHE_LIMIT:
            self._by_masked.clear()
        entry = [-1, _NO_LEAF, -1, -1, self._tokenise(masked)]
        self._by_masked[masked] = entry
        return entry

    def _resolve(self, entry: list) -> int:
        """Run Drain for an entry's tokens (or reuse the answer for their shape); remember it if nothing changed."""
        tokens = entry[4]
        shape = array("i", map(self._codes.get, tokens, repeat(_UNKNOWN_CODE, len(tokens)))).tobytes()
        known = self._by_shape.get(shape)
        if known is None or known[1].version != known[2] or known[3] != self._routing_version:
            cid, known = self._run_drain(shape, tokens)
            if known is None:
                return cid
        entry[:4] = known
        return known[0]

    def _run_drain(self, shape: bytes, tokens: tuple[str, ...]) -> tuple[int, list | None]:
        """Run Drain for a line; if nothing changed, remember (and return) the answer under the line's shape key."""
        cid, changed = self._assign_tokens(tokens)
        if changed:
            return cid, None
        leaf = self._leaves[cid]
        if len(self._by_shape) >= _CACHE_LIMIT:
            self._by_shape.clear()
        record = self._by_shape[shape] = [cid, leaf, leaf.version, self._routing_version]
        return cid, record

    # --------------------------------------------------------------- Drain

    def _mask(self, content: str) -> str:
        """Replace every mask match by `<*>`, mask after mask."""
        for regex in self._masks:
            content = regex.sub(WILDCARD, content)
        return content

    def _tokenise(self, content: str) -> tuple[str, ...]:
        """Split a masked content into tokens."""
        if self._delimiters:
            content = content.strip()  # before the delimiters, as the reference does
            for delimiter in self._delimiters:
                content = content.replace(delimiter, " ")
        return tuple(content.split())

    def _assign_tokens(self, tokens: tuple[str, ...]) -> tuple[int, bool]:
        """Return (template id, whether any template or the tree changed)."""
        n = len(tokens)
        node = self._by_length.get(n)
        if node is None:
            return self._create(tokens), True
        if n == 0:
            return node.clusters[0], False
        for token in tokens[: min(self._route_levels, n) - 1]:
            children = node.children
            child = children.get(token)
            if child is None:
                child = children.get(WILDCARD)
                if child is None:
                    return self._create(tokens), True
            node = child
        cid, equal = self._best_match(node, tokens)
        if cid < 0:
            return self._create(tokens), True
        if equal == self._fixed[cid]:
            return cid, False
        self._generalise(cid, tokens)
        return cid, True

    def _best_match(self, leaf: _Node, tokens: tuple[str, ...]) -> tuple[int, int]:
        """Return (most similar template id in a leaf or -1 if below the threshold, equal tokens)."""
        if leaf.table is not None:
            codes = np.fromiter(map(self._codes.get, tokens, repeat(_UNKNOWN_CODE, len(tokens))),
                                dtype=np.int64, count=len(tokens))
            row, best_equal = leaf.table.best(codes)
            best = leaf.clusters[row]
        else:
            eq = operator.eq
            patterns, wild = self._patterns, self._wild
            best, best_equal, best_wild = -1, -1, -1
            for cid in leaf.clusters:
                equal = sum(map(eq, tokens, patterns[cid]))
                if equal > best_equal or (equal == best_equal and wild[cid] > best_wild):
                    best, best_equal, best_wild = cid, equal, wild[cid]
        if best_equal < self._needed_equal(len(tokens)):
            return -1, best_equal
        return best, best_equal

    def _needed_equal(self, n: int) -> int:
        """Return the least number of equal tokens out of n that reaches the threshold."""
        needed = self._needed.get(n)
        if needed is None:
            # same float expression as the reference library: equal / n >= sim_th
            needed = next((k for k in range(n + 1) if float(k) / n >= self._similarity), n + 1)
            self._needed[n] = needed
        return needed

    def _generalise(self, cid: int, tokens: tuple[str, ...]) -> None:
        """Put `<*>` wherever the line differs from template cid."""
        merged = tuple(t if t == s else WILDCARD for t, s in zip(self._templates[cid], tokens))
        self._set_template(cid, merged)
        leaf = self._leaves[cid]
        leaf.version += 1
        if leaf.table is not None:
            leaf.table.update(self._rows[cid], self._template_codes(cid), self._wild[cid])

    def _set_template(self, cid: int, template: tuple[str, ...]) -> None:
        """Store a template and its derived similarity data."""
        wild = template.count(WILDCARD)
        self._templates[cid] = template
        self._patterns[cid] = _pattern(template)
        self._fixed[cid] = len(template) - wild
        self._wild[cid] = wild

    def _create(self, tokens: tuple[str, ...]) -> int:
        """Start a new template from a line and file it in the tree."""
        cid = len(self._templates)
        for store in (self._templates, self._patterns, self._fixed, self._wild):
            store.append(None)  # type: ignore[arg-type]
        self._set_template(cid, tokens)
        codes = self._codes
        for tok in tokens:
            if tok != WILDCARD and tok not in codes:
                codes[tok] = len(codes)
                self._code_list.append(tok)
        leaf = self._insert(tokens)
        self._rows.append(len(leaf.clusters))
        leaf.clusters.append(cid)
        leaf.version += 1
        self._leaves.append(leaf)
        if leaf.table is not None:
            leaf.table.append(self._template_codes(cid), self._wild[cid])
        elif len(leaf.clusters) >= _TABLE_FROM:
            self._build_table(leaf)
        return cid

    def _template_codes(self, cid: int) -> list[int]:
        """Return the token codes of template cid (-1 at <*>)."""
        codes = self._codes
        return [_WILD_CODE if tok == WILDCARD else codes[tok] for tok in self._templates[cid]]

    def _build_table(self, leaf: _Node) -> None:
        """Give a leaf that has grown big a NumPy table of its templates."""
        table = _LeafTable(len(self._templates[leaf.clusters[0]]))
        for cid in leaf.clusters:
            table.append(self._template_codes(cid), self._wild[cid])
        leaf.table = table

    def _insert(self, tokens: tuple[str, ...]) -> _Node:
        """Walk (growing where needed) the tree path of a new template; return its leaf."""
        n = len(tokens)
        node = self._by_length.get(n)
        if node is None:
            node = self._by_length[n] = _Node()
        if n == 0:
            return node
        for token in tokens[: min(self._route_levels, n) - 1]:
            node = self._child_for_new(node, token)
        return node

    def _child_for_new(self, node: _Node, token: str) -> _Node:
        """Return (creating if allowed) the child a new template's token goes to."""
        children = node.children
        child = children.get(token)
        if child is not None:
            return child
        if _has_digit(token):
            return _child(children, WILDCARD)
        if WILDCARD in children:
            if len(children) < self._max_children:
                # lines with this token used to take the <*> branch here
                self._routing_version += 1
                return _child(children, token)
            return children[WILDCARD]
        if len(children) + 1 < self._max_children:
            return _child(children, token)
        return _child(children, WILDCARD)

    def _grow_counts(self, n: int) -> None:
        """Make room for n counters."""
        if n > len(self._counts):
            grown = np.zeros(max(n, 2 * len(self._counts)), dtype=np.int64)
            grown[: len(self._counts)] = self._counts
            self._counts = grown


@contextmanager
def _gc_paused() -> Iterator[None]:
    """Pause the cyclic garbage collector (the caches hold many objects but no cycles)."""
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()


def _child(children: dict[str, _Node], key: str) -> _Node:
    """Return the child under key, creating it if absent."""
    child = children.get(key)
    if child is None:
        child = children[key] = _Node()
    return child


def _compile_mask(mask: str) -> re.Pattern:
    """Compile a mask regex, naming it when it is invalid."""
    try:
        return re.compile(mask)
    except re.error as exc:
        raise ValueError(f"invalid mask regex {mask!r}: {exc}") from None


def _drain_from_settings(options: dict[str, Any]) -> DrainMiner:
    """Build a DrainMiner from settings without the kind."""
    allowed = {"masks", "similarity", "depth", "max_children", "extra_delimiters"}
    unknown = sorted(set(options) - allowed)
    if unknown:
        raise ValueError(f"unknown drain miner setting(s) {unknown}; known: {sorted(allowed)}")
    return DrainMiner(**options)


MINER_KINDS: dict[str, Callable[[dict[str, Any]], TemplateMiner]] = {
    "drain": _drain_from_settings,
}


def registry_miner(settings: dict) -> TemplateMiner:
    """Build the template miner described by a settings dict (kind defaults to drain)."""
    options = dict(settings)
    kind = options.pop("kind", "drain")
    factory = MINER_KINDS.get(kind)
    if factory is None:
        raise ValueError(f"unknown template miner kind {kind!r}; known kinds: {sorted(MINER_KINDS)}")
    return factory(options)
