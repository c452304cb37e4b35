"""Header split: read the fields of a space-separated line format by cutting at its spaces, not by regex captures.

Many formats are a run of fields, each a named group that cannot match a space, with
literal text around it, separated by single spaces, and the message after the last
one: ``^(?P<date>\\d{6}) (?P<time>\\d{6}) ... (?P<component>\\S+): (?P<content>.*)$``.
On a line that matches such a pattern, the n-th literal space of the pattern is the
n-th space of the line (nothing before it can match a space), so each field is the
text between two spaces less its literal prefix and suffix, and the message is the
rest of the line. Arrow then only has to *match* the pattern (RE2's fast automaton,
no captures) and split on spaces, which is several times cheaper than extracting
captures. `split_form` recognises such patterns by parsing them with Python's own
regex parser and says None for anything else.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from logtrial.data.re2_form import _sre_parser, extraction_pattern

_SPACE = 0x20


@dataclass(frozen=True)
class Field:
    """A named field: which space-separated part of the line holds it, and its literal prefix and suffix lengths."""

    name: str
    part: int
    prefix: int
    suffix: int


@dataclass(frozen=True)
class SplitForm:
    """How to cut a matching line into fields: ``separators`` spaces, then the message named ``rest``."""

    separators: int
    fields: tuple[Field, ...]
    rest: str
    head: str | None  # the pattern without its message group and end (``^...: ``), where it can be cut off

    def matches(self, lines: pa.Array, re2: str) -> np.ndarray:
        """Which plain lines match (``re2``: the whole pattern's RE2 form, used when there is no head)."""
        # a message `.*` matches any rest of a line that holds no newline: checking the head is enough
        pattern = extraction_pattern(self.head) if self.head is not None else None
        return np.asarray(pc.match_substring_regex(lines, pattern=pattern or re2), dtype=bool)

    def read(self, lines: pa.Array, matched: np.ndarray, wanted: Sequence[str]) -> dict[str, pa.Array]:
        """The wanted fields of every line (null where the line did not match), by name."""
        every = bool(matched.all())
        where = None if every else np.flatnonzero(matched)
        parts = pc.split_pattern(lines if every else lines.take(pa.array(where)), pattern=" ",
                                 max_splits=self.separators)
        lengths = np.asarray(pc.list_value_length(parts), dtype=np.int64)
        if len(lengths) and lengths.min() != self.separators + 1:
            raise ValueError("a matching line has fewer parts than the pattern has separators")
        spread = None
        if not every:  # back to one row per line, null where the line did not match
            back = np.full(len(lines), -1, dtype=np.int64)
            back[where] = np.arange(len(where))
            spread = pa.array(back, mask=back < 0)

        def field(part: int, prefix: int = 0, suffix: int = 0) -> pa.Array:
            value = pc.list_element(parts, part)
            if prefix or suffix:
                value = pc.utf8_slice_codeunits(value, start=prefix, stop=-suffix if suffix else 1 << 62)
            return value if spread is None else value.take(spread)

        out = {f.name: field(f.part, f.prefix, f.suffix) for f in self.fields if f.name in wanted}
        if self.rest in wanted:
            out[self.rest] = field(self.separators)
        return out


def split_form(pattern: str) -> SplitForm | None:
    """The split form of a line pattern, or None when the pattern is not a plain run of space-separated fields."""
    try:
        compiled = re.compile(pattern)
        parsed = _sre_parser().parse(pattern, compiled.flags)
    except Exception:  # noqa: BLE001  any doubt: not a split form
        return None
    if compiled.flags & (re.VERBOSE | re.MULTILINE | re.DOTALL | re.IGNORECASE):
        return None
    names = {gid: name for name, gid in compiled.groupindex.items()}
    if len(names) != compiled.groups:  # unnamed groups
        return None
    items = list(parsed)
    c = _constants()
    if items and items[0] == (c.AT, c.AT_BEGINNING):
        items = items[1:]
    # the message: a space, (?P<name>.*), end of line
    if len(items) < 3 or items[-1] != (c.AT, c.AT_END) or items[-3] != (c.LITERAL, _SPACE):
        return None
    rest = _group(items[-2], names)
    if rest is None or not _any_run(rest[1]):
        return None
    fields: list[Field] = []
    part, prefix, group, suffix = 0, 0, None, 0
    for op, av in items[:-3] + [items[-3]]:
        if (op, av) == (c.LITERAL, _SPACE):
            if group is not None:
                fields.append(Field(group, part, prefix, suffix))
            part, prefix, group, suffix = part + 1, 0, None, 0
        elif op == c.LITERAL:
            if group is None:
                prefix += 1
            else:
                suffix += 1
        elif op == c.SUBPATTERN and group is None:
            found = _group((op, av), names)
            if found is None or not all(_space_free(x) for x in found[1]):
                return None
            group = found[0]
        else:
            return None
    ending = f"(?P<{rest[0]}>.*)$"
    head = pattern[: -len(ending)] if pattern.endswith(ending) else None
    if head is not None and not _compiles(head):
        head = None
    return SplitForm(part, tuple(fields), rest[0], head)


def _compiles(head: str) -> bool:
    """Tell whether the head of a pattern compiles on its own (a cut inside a construct would not)."""
    try:
        re.compile(head)
    except re.error:
        return False
    return True


def _any_run(body: list) -> bool:
    """Tell whether a group body is exactly ``.*`` (greedy)."""
    c = _constants()
    if len(body) != 1 or body[0][0] != c.MAX_REPEAT:
        return False
    lo, hi, inner = body[0][1]
    return lo == 0 and hi == c.MAXREPEAT and list(inner) == [(c.ANY, None)]


def _group(item: tuple, names: dict[int, str]) -> tuple[str, list] | None:
    """(name, body) of a named group without flags, or None."""
    c = _constants()
    op, av = item
    if op != c.SUBPATTERN:
        return None
    gid, add_flags, del_flags, body = av
    if add_flags or del_flags or gid not in names:
        return None
    return names[gid], list(body)


def _space_free(item: tuple) -> bool:
    """Tell whether a pattern element can never match a space (unsure: False)."""
    c = _constants()
    op, av = item
    if op == c.LITERAL:
        return av != _SPACE
    if op == c.NOT_LITERAL:
        return av == _SPACE
    if op == c.IN:
        return not _set_has_space(av)
    if op in (c.MAX_REPEAT, c.MIN_REPEAT):
        return all(_space_free(x) for x in av[2])
    return False


def _set_has_space(members: list) -> bool:
    """Tell whether a character set ``[...]`` contains the space (unknown members count as yes)."""
    c = _constants()
    negate = bool(members) and members[0][0] == c.NEGATE
    has = False
    for op, av in members[1:] if negate else members:
        if op == c.LITERAL:
            has |= av == _SPACE
        elif op == c.RANGE:
            has |= av[0] <= _SPACE <= av[1]
        elif op == c.CATEGORY:
            if av in (c.CATEGORY_SPACE, c.CATEGORY_NOT_DIGIT, c.CATEGORY_NOT_WORD):
                has = True
            elif av not in (c.CATEGORY_DIGIT, c.CATEGORY_WORD, c.CATEGORY_NOT_SPACE):
                return True
        else:
            return True
    return has != negate


def _constants():
    """The regex parser's opcode constants."""
    try:
        import re._constants as constants  # noqa: PLC0415  (Python >= 3.11)
    except ImportError:  # pragma: no cover
        import sre_constants as constants  # noqa: PLC0415
    return constants
