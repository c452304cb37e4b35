"""Column fast paths checked against independent references.

- `re2_form.plain_rows` against Python's ``re.fullmatch(r"[\\t\\x20-\\x7e]*", s)``;
- `shape_keys.tokenise_column` / `ShapeCoder` against Python's ``str.strip()``, ``str.replace()``, ``str.split()``;
- `DrainMiner.add_many` (the column path, `_assign_column`) against ``DrainMiner.add`` line by line and against
  the reference library drain3 0.9.11 (``TemplateMiner.add_log_message``);
- `header_split.split_form` / `SplitForm` / `ColumnParser.parse` against Python's ``re.match`` (directly and through
  the line-by-line `LineParser`);
- `lines.decode_range(..., column=True)` against the non-column path (Python's ``bytes.decode``).
"""

from __future__ import annotations

import os
import random
import re
from pathlib import Path

import logtrial.data.mining as mining
import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from logtrial.data.header import LineParser
from logtrial.data.header_columns import ColumnParser
from logtrial.data.header_split import split_form
from logtrial.data.lines import ByteRange, decode_range
from logtrial.data.mining import DrainMiner
from logtrial.data.re2_form import extraction_pattern, plain_rows
from logtrial.data.registry import LineFormat, get_entry, load_registry
from logtrial.data.shape_keys import ShapeCoder, tokenise_column
from test_mining import _drain3_run as drain3_reference

REGISTRY = load_registry()
PLAIN = re.compile(r"[\t\x20-\x7e]*")
FAST = settings(max_examples=150, deadline=None, database=None, derandomize=True)


def _is_plain(s: str | None) -> bool:
    """Reference: Python's re.fullmatch(r"[\\t\\x20-\\x7e]*", s); a null is not plain."""
    return s is not None and PLAIN.fullmatch(s) is not None


def _py_tokens(s: str, delimiters: list[str]) -> tuple[str, ...]:
    """Reference: Python's str.strip(), then str.replace(d, " ") per delimiter in order, then str.split()."""
    s = s.strip()
    for d in delimiters:
        s = s.replace(d, " ")
    return tuple(s.split())


def _first_difference(a: list, b: list) -> str:
    i = next((k for k, (x, y) in enumerate(zip(a, b)) if x != y), min(len(a), len(b)))
    return f"first difference at {i}: {a[i:i + 1]} != {b[i:i + 1]} (lengths {len(a)}, {len(b)})"


# ------------------------------------------------------------------------------------------------ 1. plain_rows

_PLAIN_PIECES = ["a", "Z", "0", " ", "~", "\t", "\n", "\r", "\x00", "\x1c", "\x1f", "\x7f", "\x80", "é", "\xa0", "€",
                 "\U0001f600", "\u2028", "abc", "  "]


@FAST
@given(values=st.lists(st.one_of(st.none(), st.lists(st.sampled_from(_PLAIN_PIECES), max_size=6).map("".join)),
                       max_size=25),
       large=st.booleans(), start=st.integers(0, 5), stop_back=st.integers(0, 5))
def test_plain_rows_equals_re_fullmatch(values, large, start, stop_back):
    # reference: Python's re.fullmatch(r"[\t\x20-\x7e]*", s) per string; nulls are not plain.
    # Whole, sliced and large_string arrays; control characters, DEL, tab, newline, non-ASCII, empty, null.
    arr = pa.array(values, type=pa.large_string() if large else pa.string())
    for a in (arr, arr.slice(min(start, len(arr))), arr.slice(min(start, len(arr)), max(0, len(arr) - start - stop_back))):
        got = plain_rows(a)
        assert isinstance(got, np.ndarray) and got.dtype == bool
        assert got.tolist() == [_is_plain(v) for v in a.to_pylist()]


def test_plain_rows_on_fixed_cases():
    # reference: Python's re.fullmatch(r"[\t\x20-\x7e]*", s); an all-empty array has no data buffer at all
    values = ["", "plain text\twith tab", "new\nline", "del\x7f", "nul\x00", "\x1c", "caf\xe9", "\xa0", None, "~ ok"]
    arr = pa.array(values)
    assert plain_rows(arr).tolist() == [_is_plain(v) for v in values]
    assert plain_rows(arr.slice(2, 5)).tolist() == [_is_plain(v) for v in values[2:7]]
    assert plain_rows(pa.array(["", "", None], type=pa.large_string())).tolist() == [True, True, False]
    assert plain_rows(pa.array([], type=pa.string())).tolist() == []


# ------------------------------------------------------------------------------ 2. tokenise_column / ShapeCoder

_DELIMITER_SETS = [[], ["="], [",", ":"], [" =", "= "], ["= ", ","], ["::"], ["\t", "="], ["é", "="]]
# pieces of the middle of a row; the edges (after strip) are alphanumeric, so no delimiter touches them
_MIDDLE_PIECES = ["a", "bc", "Z9", " ", "  ", "\t", "=", ",", ":", " =", "= ", "::", "<*>", "é", "\xa0", "\x1c",
                  "\x85", "\u2003", "\x7f", "\n", "\r"]
_WORD = st.text(alphabet="abcxyz019", min_size=1, max_size=4)
_PAD = st.sampled_from(["", " ", "\t", " \t ", "\xa0", "\x1c"])
_INNER_ROW = st.one_of(
    st.sampled_from(["", " ", "   ", "\t", " \t\t ", "\xa0", "\x1c\x1d"]),  # empty and whitespace-only
    st.builds(lambda p, a, mid, b, q: p + a + "".join(mid) + b + q,
              _PAD, _WORD, st.lists(st.sampled_from(_MIDDLE_PIECES), max_size=8), _WORD, _PAD),
)


def _check_tokens(contents: pa.Array, delimiters: list[str]) -> None:
    """tokenise_column + ShapeCoder.tokens against Python's str.strip/replace/split (the reference)."""
    values = contents.to_pylist()
    col = tokenise_column(contents, delimiters)
    coder = ShapeCoder(col, {})
    assert len(col) == len(values)
    # exactly the non-plain rows go to Python (else the comparison below would be empty)
    assert col.python_rows.tolist() == [not _is_plain(v) for v in values]
    for i, v in enumerate(values):
        if col.python_rows[i]:
            assert col.texts[i] == v
        else:
            assert coder.tokens(i) == _py_tokens(v, delimiters), (i, v, delimiters)


@FAST
@given(rows=st.lists(_INNER_ROW, max_size=20), delimiters=st.sampled_from(_DELIMITER_SETS),
       start=st.integers(0, 3), large=st.booleans())
def test_tokenise_column_tokens_equal_python_split(rows, delimiters, start, large):
    # reference: Python's s.strip(), s.replace(d, " ") per delimiter, s.split(). Empty and whitespace-only rows,
    # tabs, delimiters holding spaces, non-plain rows (\x1c, \xa0, \x85, \u2003 are whitespace to str.split,
    # é is not); the array is also given sliced and as large_string.
    arr = pa.array(["pre fix"] * start + rows + ["post"], type=pa.large_string() if large else pa.string())
    _check_tokens(arr.slice(start, len(rows)), delimiters)
    _check_tokens(arr, delimiters)


def test_tokenise_column_delimiter_next_to_line_edge():
    # reference: Python's str.strip/replace/split (as drain3 0.9.11 tokenises). A delimiter at the start or end of
    # the stripped content becomes a leading/trailing space, which str.split() drops (no empty token).
    rows = ["x=", "=x", "=", "a =", "= b", ",", "k: v:", " , ", "a=b=", "==", "key=val"]
    for delimiters in (["="], [",", ":"], [" ="], ["= "], ["=", ",", ":"]):
        _check_tokens(pa.array(rows), delimiters)


def test_tokenise_column_null_row_does_not_disturb_other_rows():
    # reference: Python's str.split() for the non-null rows; a null row is a Python row (text None)
    for values in (["a b", None, "c d", "e"], ["a", "b c", None]):
        col = tokenise_column(pa.array(values), [])
        coder = ShapeCoder(col, {})
        assert col.python_rows.tolist() == [v is None for v in values]
        assert {i: v for i, v in enumerate(values) if v is None} == col.texts
        assert [coder.tokens(i) for i, v in enumerate(values) if v is not None] == [
            tuple(v.split()) for v in values if v is not None]


def _expected_sequences(values: list[str], delimiters: list[str], codes: dict[str, int]) -> list:
    """Token-code sequence per row (code = codes.get(token, -2)) from Python's tokenisation; None for non-plain."""
    return [tuple(codes.get(t, -2) for t in _py_tokens(v, delimiters)) if _is_plain(v) else None for v in values]


def _check_keys(coder: ShapeCoder, expected: list, n: int) -> None:
    """Equal keys iff equal code sequences; None exactly for Python rows; sub-ranges give the same keys."""
    keys = coder.keys(0, n)
    assert len(keys) == n
    assert [k is None for k in keys] == [e is None for e in expected]
    for k in keys:
        assert k is None or isinstance(k, bytes)
    coded = [(k, e) for k, e in zip(keys, expected) if e is not None]
    for ka, ea in coded:
        for kb, eb in coded:
            assert (ka == kb) == (ea == eb), (ea, eb)
    for a, b in ((0, n), (1, n - 1), (n // 2, n), (3, 3)):
        assert coder.keys(a, b) == keys[a:b]


def test_shape_keys_follow_token_codes_and_sync():
    # reference: Python's str.strip/replace/split, then code = codes.get(token, -2): two rows get equal keys
    # iff their code sequences are equal. After new tokens get codes (and sync), keys follow the new codes.
    rng = random.Random(7)
    words = ["alpha", "beta", "gamma", "delta", "eps", "t", "u", "v", "k=v", "a,b", "x:y", "<*>"]
    values = ["t x", "u x", "v x", "x t", "x u", "", "  ", "\t", "t\tx", " t  x ", "caf\xe9 t", "t\x1cx", "a\xa0b",
              "k=v", "k = v", "a,b", "x:y", "x::y"]
    for _ in range(300):
        values.append(rng.choice([" ", "\t", "  "]).join(rng.choice(words) for _ in range(rng.randrange(1, 5))))
    delimiters = ["=", ","]
    arr = pa.array(["lead"] + values + ["tail end"]).slice(1, len(values))
    code_list = ["v", "x", "alpha", "k"]  # 't' and 'u' unknown: "t x" and "u x" share a key
    codes = {t: i for i, t in enumerate(code_list)}
    col = tokenise_column(arr, delimiters)
    coder = ShapeCoder(col, codes)
    n = len(values)
    _check_keys(coder, _expected_sequences(values, delimiters, codes), n)
    keys = coder.keys(0, n)
    assert keys[0] == keys[1] and keys[0] != keys[2]
    # new literal tokens, as the miner adds them: in the column ('t', 'beta', 'b') and not ('absent')
    for token in ("t", "absent", "beta", "b"):
        codes[token] = len(code_list)
        code_list.append(token)
    coder.sync(code_list)
    _check_keys(coder, _expected_sequences(values, delimiters, codes), n)
    keys = coder.keys(0, n)
    assert keys[0] != keys[1]  # 't' has a code now, 'u' still does not
    coder.sync(code_list)  # nothing new: no change
    assert coder.keys(0, n) == keys


# --------------------------------------------------------------------------------------------- 3. DrainMiner

def _drain3_run(lines: list[str], s: dict) -> tuple[list[int], list[str], list[int]]:
    """Reference library: drain3 0.9.11 `add_log_message` over lines; (0-based ids, templates, sizes).

    The same construction as tests/test_mining.py (masks replaced by `<*>`, same settings), as plain lists."""
    pytest.importorskip("drain3", reason="drain3 (reference library) not installed")
    ids, templates, sizes = drain3_reference(lines, s)
    return ids.tolist(), templates, sizes.tolist()


@pytest.fixture()
def column_calls(monkeypatch):
    """Rows that went through DrainMiner._assign_column (proves the column path ran)."""
    calls: list[int] = []
    original = DrainMiner._assign_column

    def spy(self, tokens):
        calls.append(len(tokens))
        return original(self, tokens)

    monkeypatch.setattr(DrainMiner, "_assign_column", spy)
    return calls


def _assert_same_as_add_and_drain3(lines: list[str], s: dict, chunks: list[int], column_calls: list[int]) -> None:
    """add_many over chunks == add one by one == drain3 0.9.11 (ids, templates, counts)."""
    bulk = DrainMiner(**s)
    ids: list[int] = []
    for a, b in zip([0] + chunks, chunks + [len(lines)]):
        ids += bulk.add_many(lines[a:b]).tolist()
    assert sum(column_calls) == len(lines), "add_many did not take the column path"
    one = DrainMiner(**s)
    one_ids = [one.add(c) for c in lines]
    ref_ids, ref_templates, ref_sizes = _drain3_run(lines, s)
    assert one_ids == ref_ids, "add() vs drain3: " + _first_difference(one_ids, ref_ids)
    assert ids == one_ids, "add_many vs add(): " + _first_difference(ids, one_ids) + \
        f"; line {lines[next(i for i in range(len(ids)) if ids[i] != one_ids[i])]!r}"
    assert bulk.templates() == one.templates() == ref_templates
    assert bulk.counts().tolist() == one.counts().tolist() == ref_sizes


_WORDS = ["open", "close", "read", "write", "send", "recv", "block", "user", "session", "error", "done", "ok",
          "start", "stop", "retry", "cache", "disk", "node", "job", "task", "from", "to", "size"]
_MASKS = [r"\d+\.\d+\.\d+\.\d+", r"blk_-?\d+"]


def _param(rng: random.Random) -> str:
    """A token that varies between lines of one shape (edges alphanumeric or masked)."""
    kind = rng.randrange(9)
    if kind == 0:
        return str(rng.randrange(1000))
    if kind == 1:
        return f"id{rng.randrange(100)}"
    if kind == 2:
        return f"10.{rng.randrange(3)}.{rng.randrange(256)}.{rng.randrange(256)}"
    if kind == 3:
        return f"blk_{rng.choice(['', '-'])}{rng.randrange(10 ** 9)}"
    if kind == 4:
        return rng.choice(_WORDS)
    if kind == 5:
        return f"{rng.choice(_WORDS)}={rng.randrange(50)}"
    if kind == 6:
        return f"{rng.choice(_WORDS)},{rng.choice(_WORDS)}"
    if kind == 7:
        return f"ip=10.0.0.{rng.randrange(9)}"
    return rng.choice(["caf\xe9", "a\xa0b", "x\x1cy"])  # non-plain: tokenised by Python


def _random_lines(seed: int, n: int) -> list[str]:
    """Lines of repeated shapes (literal words and parameter slots) plus fresh shapes that start templates mid-block."""
    rng = random.Random(seed)
    shapes: list[list] = []
    lines: list[str] = []
    for _ in range(n):
        r = rng.random()
        if r < 0.01:
            lines.append(rng.choice(["", "   ", "\t"]))
            continue
        if r < 0.3 or not shapes:
            shapes.append([rng.choice(_WORDS) if rng.random() < 0.6 else rng.randrange(9)
                           for _ in range(rng.randrange(1, 10))])
            shape = shapes[-1]
        else:
            shape = shapes[min(int(rng.expovariate(0.08)), len(shapes) - 1)]
        tokens = [slot if isinstance(slot, str) else _param(rng) for slot in shape]
        if rng.random() < 0.1:
            tokens[rng.randrange(len(tokens))] = rng.choice(_WORDS) + str(rng.randrange(3))
        line = ""
        for i, t in enumerate(tokens):
            line += (rng.choice([" ", " ", " ", "  ", "\t", " , "]) if i else "") + t
        if rng.random() < 0.1:
            line = rng.choice([" ", "\t"]) + line + rng.choice(["", " ", "  \t"])
        lines.append(line)
    return lines


@pytest.mark.parametrize("case", ["default", "max-children-3", "small-blocks-and-tables"])
def test_add_many_column_path_equals_add_and_drain3_on_random_lines(monkeypatch, column_calls, case):
    # reference: drain3 0.9.11 TemplateMiner (and DrainMiner.add line by line). 3000 random lines with masks and
    # extra delimiters; many new templates start mid-block; add_many is called on chunks of >= 256 lines.
    s = {"masks": _MASKS, "similarity": 0.5, "depth": 4, "extra_delimiters": ["=", ","]}
    if case == "max-children-3":
        s.update(similarity=0.7, depth=5, max_children=3, extra_delimiters=[",", "="])
    if case == "small-blocks-and-tables":  # block edges every few lines; leaves scored with NumPy tables
        monkeypatch.setattr(mining, "_BLOCK_FROM", 4)
        monkeypatch.setattr(mining, "_BLOCK_MIN", 1)
        monkeypatch.setattr(mining, "_BLOCK_MAX", 16)
        monkeypatch.setattr(mining, "_TABLE_FROM", 2)
    lines = _random_lines(seed=len(case), n=3000)
    _assert_same_as_add_and_drain3(lines, s, [400, 1300], column_calls)


def test_add_many_column_path_with_delimiter_at_line_end_equals_drain3(column_calls):
    # reference: drain3 0.9.11 TemplateMiner. "set value=" with delimiter "=" is ["set", "value"] for drain3
    # (strip, replace, str.split), so it joins the template of "set value".
    lines = ["set value", "set value=", "key=", "=key", "a , b ,", "key"] + [f"other {i}" for i in range(300)]
    s = {"masks": [r"\d+"], "extra_delimiters": ["=", ","]}
    _assert_same_as_add_and_drain3(lines, s, [], column_calls)


def _mirror_lines(system: str, log: str) -> list[str]:
    """Raw lines of a Loghub 2k sample from $LOGTRIAL_MIRROR (skips when absent)."""
    mirror = os.environ.get("LOGTRIAL_MIRROR")
    path = Path(mirror) / system / log if mirror else None
    if path is None or not path.is_file():
        pytest.skip(f"Loghub 2k sample {system}/{log} not found under LOGTRIAL_MIRROR={mirror!r}")
    text = path.read_bytes().decode("utf-8", errors="replace")
    return [s[:-1] if s.endswith("\r") else s for s in text.split("\n")[: -1 if text.endswith("\n") else None]]


_LOGHUB = sorted(n for n in REGISTRY if n.endswith("-2k"))


@pytest.mark.parametrize("name,delimiters", [(n, []) for n in _LOGHUB] + [
    (n, ["=", ",", ":"]) for n in ("hdfs-2k", "bgl-2k", "linux-2k", "mac-2k")])
def test_add_many_column_path_equals_add_and_drain3_on_loghub(column_calls, name, delimiters):
    # reference: drain3 0.9.11 TemplateMiner with the registry's miner settings, on real Loghub 2k contents
    # (split from the raw lines by the registry's line format, line by line with Python's re).
    e = REGISTRY[name]
    lines = _mirror_lines(e.system, e.logs[0])
    chunk, _ = LineParser(e.format).parse(lines, 1)
    contents = list(chunk.content)
    m = e.miner
    s = {"masks": list(m.masks), "similarity": m.similarity, "depth": m.depth, "max_children": m.max_children,
         "extra_delimiters": delimiters}
    if not s["masks"]:  # add_many takes the column path only with masks: one that never matches
        s["masks"] = [r"\A\Z never"]
    _assert_same_as_add_and_drain3(contents, s, [700], column_calls)


def test_add_many_masked_from_arrow_or_tokens_equals_list(column_calls):
    # reference: Python's re.sub mask after mask, then add_many_masked(list) (Python tokenisation line by line),
    # and drain3 0.9.11 on the raw lines.
    s = {"masks": _MASKS, "similarity": 0.5, "depth": 4, "extra_delimiters": ["=", ","]}
    lines = _random_lines(seed=11, n=1500)
    masked = list(lines)
    for rx in map(re.compile, _MASKS):
        masked = [rx.sub("<*>", c) for c in masked]
    by_list = DrainMiner(**s)
    ids_list = by_list.add_many_masked(masked).tolist()
    assert column_calls == []
    by_arrow = DrainMiner(**s)
    ids_arrow = by_arrow.add_many_masked(pa.array(masked)).tolist()
    by_tokens = DrainMiner(**s)
    ids_tokens = by_tokens.add_many_masked(None, tokens=tokenise_column(pa.array(masked), s["extra_delimiters"])).tolist()
    assert column_calls == [len(lines), len(lines)]
    assert ids_arrow == ids_list, _first_difference(ids_arrow, ids_list)
    assert ids_tokens == ids_list, _first_difference(ids_tokens, ids_list)
    assert by_arrow.templates() == by_tokens.templates() == by_list.templates()
    assert by_arrow.counts().tolist() == by_tokens.counts().tolist() == by_list.counts().tolist()
    assert ids_list == _drain3_run(lines, s)[0]


# ------------------------------------------------------------------------------- 4. split_form / ColumnParser

# Each of these would be cut wrongly at spaces (or read otherwise than re): split_form must say None.
_NOT_SPLIT = {
    r"^(?P<a>\S+)\s+(?P<content>.*)$": "\\s+ separator: a variable number of spaces",
    r"^(\d+) (?P<content>.*)$": "unnamed group",
    r"^(?P<a>.+) (?P<content>.*)$": "field can match a space",
    r"^(?P<a>[^x]+) (?P<content>.*)$": "negated class that holds the space",
    r"^(?P<a>[\w ]+) (?P<content>.*)$": "class with a space",
    r"^(?P<a>\D+) (?P<content>.*)$": "\\D matches a space",
    r"^(?P<a>\W+) (?P<content>.*)$": "\\W matches a space",
    r"^(?P<a>[^\S]+) (?P<content>.*)$": "[^\\S] is whitespace",
    r"^(?P<a>\w+|x y) (?P<content>.*)$": "alternative with a space",
    r"^(?P<a>x ?\d+) (?P<content>.*)$": "literal space inside a field",
    r"^(?P<a>.*?) (?P<content>.*)$": "lazy .*? field",
    r"(?i)^(?P<a>\w+) (?P<content>.*)$": "IGNORECASE",
    r"^(?P<a>\d+)-(?P<b>\d+) (?P<content>.*)$": "two groups inside one space-separated part",
    r"^(?P<content>.*) (?P<b>\S+)$": "content not last",
    r"^(?P<a>\S+) (?P<content>.*) (?P<b>.*)$": "content not last (followed by another .*)",
    r"^(?P<a>\S+) (?P<content>.*?)$": "lazy content",
    r"^(?P<a>\S+) (?P<content>.+)$": "content .+ (the head matching is not enough)",
    r"^(?P<a>\S+):? (?P<content>.*)$": "optional literal",
    r"^(?P<a>\S+)(?: (?P<b>\S+))? (?P<content>.*)$": "optional part holding a space",
    r"^(?P<a>\S+) (?P<content>.*)\Z": "\\Z end",
}

_HDFS = get_entry("hdfs-2k", REGISTRY).format
_BGL = get_entry("bgl-2k", REGISTRY).format
_BRACKET = LineFormat.model_validate({"regex": r"^(?P<a>\d+) \[(?P<b>\w+)\]: (?P<content>.*)$", "entity": "b",
                                      "group": {"field": "a"}})
_SYSLOGISH = LineFormat.model_validate({
    "regex": r"^(?P<epoch>\d+) <(?P<pri>\d*)> (?P<host>[^ ]+)  (?P<proc>[\w.-]+):: - (?P<content>.*)$",
    "timestamp": {"fields": ["epoch"], "unit": "s"}, "entity": "host", "tag": {"field": "pri", "normal": ""},
    "group": {"pattern": r"job-\d+"}})
_LAZY = LineFormat.model_validate({"regex": r"^(?P<a>[^\s]+?) (?P<b>[^\W_]+)_ (?P<content>.*)$", "entity": "a"})
_FORMATS = {"hdfs-2k": _HDFS, "bgl-2k": _BGL, "bracket": _BRACKET, "syslogish": _SYSLOGISH, "lazy": _LAZY}


@pytest.mark.parametrize("pattern", sorted(_NOT_SPLIT))
def test_split_form_refuses_patterns_it_cannot_cut(pattern):
    # reference: Python's re (a field able to match a space, or a separator of varying width, would put the
    # n-th space of the line elsewhere than the n-th literal space of the pattern)
    assert split_form(pattern) is None, _NOT_SPLIT[pattern]


@pytest.mark.parametrize("name", sorted(_FORMATS))
def test_split_form_accepts_space_separated_formats(name):
    # the registry's hdfs-2k and bgl-2k formats, and the formats the parse tests below rely on
    regex = _FORMATS[name].regex
    assert split_form(regex) is not None
    assert extraction_pattern(regex) is not None
    assert ColumnParser(_FORMATS[name]).split is not None


def _content(rng: random.Random) -> str:
    return rng.choice(["", " ", "x", "job-12 done", "blk_-42 served to 10.0.0.1", "a  b\tc", "key=val: x",
                       "ends with space ", "[tag]: - y", "job-7 job-8", "\t"])


def _matching_line(name: str, rng: random.Random) -> str:
    """A line built to match the format (fields random, some timestamps invalid)."""

    def d(k: int) -> str:
        return "".join(rng.choice("0123456789") for _ in range(k))

    def w() -> str:
        return rng.choice(["INFO", "WARN", "x", "dfs.DataNode$PR", "a_b", "Q9"])

    if name == "hdfs-2k":
        date = f"{rng.randrange(0, 100):02d}{rng.randrange(1, 13):02d}{rng.randrange(1, 29):02d}"
        time = f"{rng.randrange(0, 24):02d}{rng.randrange(0, 60):02d}{rng.randrange(0, 60):02d}"
        if rng.random() < 0.1:  # no such date or time
            date, time = rng.choice([(date, d(6)), ("081332", time), ("080230", time)])
        comp = rng.choice(["dfs.DataNode$PacketResponder", "dfs.X:", "a", "b:c", "[x]"])
        return f"{date} {time} {d(rng.randrange(1, 5))} {w()} {comp}: {_content(rng)}"
    if name == "bgl-2k":
        node = rng.choice(["R02-M1-N0-C:J12-U11", "R7", "UNKNOWN_LOCATION"])
        time = rng.choice(["2005-06-03-15.42.50.675872", "2005-06-03-15.42.50", "2005-13-03-15.42.50.1", "x"])
        return (f"{rng.choice(['-', 'APPREAD', 'KERNDTLB'])} {d(10)} 2005.06.03 {node} {time} {node} RAS "
                f"{rng.choice(['KERNEL', 'APP'])} {rng.choice(['INFO', 'FATAL'])} {_content(rng)}")
    if name == "bracket":
        return f"{d(rng.randrange(1, 4))} [{w()}]: {_content(rng)}"
    if name == "syslogish":
        host = rng.choice(["h1", "h:2", "h\t3", "[h]"])
        return (f"{d(rng.randrange(1, 11))} <{d(rng.randrange(0, 3))}> {host}  "
                f"{rng.choice(['cron', 'a.b-c', 'x::'])}:: - {_content(rng)}")
    assert name == "lazy"
    return f"{rng.choice(['a', 'b_c', 'x:y', '[q]'])} {rng.choice(['ab', 'Z9', 'a_b', 'c'])}_ {_content(rng)}"


def _mutate(line: str, rng: random.Random) -> str:
    """A near-matching variant: a space or character inserted, deleted, replaced, truncated, or padded."""
    for _ in range(rng.randrange(1, 3)):
        i = rng.randrange(len(line) + 1)
        kind = rng.randrange(7)
        if kind == 0:
            line = line[:i] + " " + line[i:]
        elif kind == 1:
            line = line[:i] + line[i + 1:]
        elif kind == 2:
            line = line[:i] + rng.choice(" \t:[]<>-_x9a.") + line[i + 1:]
        elif kind == 3:
            line = line[:i]
        elif kind == 4:
            line += rng.choice([" ", "  ", "\t", " \t "])
        elif kind == 5:
            line = " " + line
        else:
            line = line[:i] + rng.choice(["\xe9", "\x1c", "\xa0"]) + line[i:]  # not plain: Python's re
    return line


def _lines(name: str, seed: int, n: int) -> list[str]:
    rng = random.Random(seed)
    return [_mutate(line, rng) if rng.random() < 0.4 else line
            for line in (_matching_line(name, rng) for _ in range(n))]


def _rows(chunk) -> dict | None:
    """A parsed chunk as plain lists (Arrow arrays, lists and per-chunk constants alike)."""
    if chunk is None:
        return None
    n = len(chunk)

    def col(v):
        return v.to_pylist() if isinstance(v, pa.Array) else list(v) if isinstance(v, list) else [v] * n

    return {"line": chunk.line.tolist(), "ts": chunk.ts.astype("datetime64[us]").astype(np.int64).tolist(),
            "content": col(chunk.content), "entity": col(chunk.entity), "group": col(chunk.group),
            "tag": col(chunk.tag)}


def _assert_column_parser_equals_line_parser(fmt: LineFormat, lines: list[str]) -> None:
    """ColumnParser on the lines (whole and as a slice) == LineParser line by line (rows, fields, rejects)."""
    want = LineParser(fmt).parse(lines, 7)
    assert 100 < len(want[1]) < len(lines) - 100  # both accepted and rejected lines
    padded = pa.array(["junk"] * 5 + lines + ["junk"] * 3)
    for arr in (pa.array(lines), padded.slice(5, len(lines))):
        parser = ColumnParser(fmt)
        assert parser.split is not None
        got = parser.parse(arr, 7)
        assert parser.split is not None, "the split path was dropped (its sample disagreed with re)"
        assert got[1] == want[1]
        a, b = _rows(got[0]), _rows(want[0])
        for key in b:
            assert a[key] == b[key], f"{key}: " + _first_difference(a[key], b[key])


@pytest.mark.parametrize("name", sorted(_FORMATS))
def test_column_parser_split_path_equals_line_parser(name):
    # reference: Python's re.match line by line (LineParser). 1500 lines (matching, near-matching, extra spaces,
    # empty content, trailing spaces, a few non-plain), more than the 64 rows ColumnParser checks itself.
    _assert_column_parser_equals_line_parser(_FORMATS[name], _lines(name, seed=len(name), n=1500))


def test_column_parser_split_path_with_capturing_group_pattern_equals_line_parser():
    # reference: Python's re.match line by line (LineParser). A session-key pattern with a capturing group
    # (keys found by Python's re.search in the contents) while some plain lines do not match the format.
    fmt = LineFormat.model_validate({**_SYSLOGISH.model_dump(exclude_none=True), "group": {"pattern": r"job-(\d+)"}})
    _assert_column_parser_equals_line_parser(fmt, _lines("syslogish", seed=5, n=1500))


@pytest.mark.parametrize("name", sorted(_FORMATS))
def test_split_form_read_equals_re_match_groups(name):
    # reference: Python's re.match(pattern, line).group(name) for every named group of every plain line
    pattern = _FORMATS[name].regex
    form = split_form(pattern)
    rx = re.compile(pattern)
    lines = [s for s in _lines(name, seed=3 + len(name), n=800) if _is_plain(s)]
    arr = pa.array(lines)
    matched = form.matches(arr, extraction_pattern(pattern))
    found = [rx.match(s) for s in lines]
    assert matched.tolist() == [m is not None for m in found]
    assert 50 < int(matched.sum()) < len(lines) - 50
    fields = form.read(arr, matched, list(rx.groupindex))
    assert set(fields) == set(rx.groupindex)
    for group in rx.groupindex:
        assert fields[group].to_pylist() == [m.group(group) if m else None for m in found], group


# ----------------------------------------------------------------------------------------- 5. decode_range

@pytest.mark.parametrize("blob,lines,bad", [
    (b"ab\xc3\n\xa9cd\n", ["ab\ufffd", "\ufffdcd"], [1, 2]),  # a 2-byte sequence cut by a newline
    (b"\xe2\x82\r\n\xac\n", ["\ufffd", "\ufffd"], [1, 2]),  # a 3-byte sequence cut by CR LF
    (b"ok\r\n\xe2\r\x82\xac\n", ["ok", "\ufffd\r\ufffd\ufffd"], [2]),  # cut by a lone CR (kept)
    (b"\xc3\r\n", ["\ufffd"], [1]),
    (b"ok\r\n\xc3\xa9\r\nlast\r", ["ok", "\xe9", "last"], []),  # valid: the column path
    (b"\xef\xbb\xbfa\n\nb", ["a", "", "b"], []),
    (b"", [], []),
])
def test_decode_range_column_equals_line_path(tmp_path, blob, lines, bad):
    # reference: Python's bytes.decode per line (errors="replace") as the non-column path does; a multi-byte
    # UTF-8 sequence cut by a newline is invalid in both lines even though the bytes without the newline are valid.
    alone, after = tmp_path / "alone.log", tmp_path / "after.log"
    alone.write_bytes(blob)
    after.write_bytes(b"first line\n" + blob)
    for rng in (ByteRange(alone, 0, len(blob)), ByteRange(after, 11, 11 + len(blob)), ByteRange(after, 0, 11 + len(blob))):
        for strict in (False, True):
            col = decode_range(rng, "utf-8", strict, column=True)
            ref = decode_range(rng, "utf-8", strict, column=False)
            got = col.lines.to_pylist() if isinstance(col.lines, pa.Array) else col.lines
            assert (got, col.bad_lines, col.strict_error) == (ref.lines, ref.bad_lines, ref.strict_error)
            assert isinstance(col.lines, pa.Array) == (not bad)  # valid UTF-8 stays a column
    ref = decode_range(ByteRange(alone, 0, len(blob)), "utf-8", False)
    assert (ref.lines, ref.bad_lines) == (lines, bad)


def test_an_empty_extra_delimiter_goes_to_python_on_the_column_path() -> None:
    """Reference: DrainMiner.add line by line (Python's str.replace("", " ") puts a space between characters)."""
    lines = [f"ab {i % 7}" for i in range(300)]
    bulk, one = DrainMiner(masks=[r"\d+"], extra_delimiters=[""]), DrainMiner(masks=[r"\d+"], extra_delimiters=[""])
    assert bulk.add_many(lines).tolist() == [one.add(c) for c in lines]
    assert bulk.templates() == one.templates()


@pytest.mark.filterwarnings("ignore:Possible nested set:FutureWarning")  # Python's own note on `[[`
def test_a_posix_class_mask_is_not_handed_to_re2() -> None:
    """Reference: Python's re.sub, which reads `[[:digit:]]` as a set of characters, not as a class of digits."""
    from logtrial.data.masking import mask_contents

    mask = r"[[:digit:]]+"
    texts = ["a12 b:d]", "x:]] 7"]
    assert mask_contents(texts, [mask]).to_pylist() == [re.sub(mask, "<*>", t) for t in texts]
