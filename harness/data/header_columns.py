"""Header columns: split a whole chunk of lines (an Arrow string array) into the format's fields at once.

Same rows, fields, rejects and reasons as ``header.LineParser`` line by line: plain
lines (printable ASCII and tab) go through Arrow's RE2 extraction when the format's
regex has an RE2 form that reads the same (``re2_form``); other lines, and formats
without such a form, go through Python's ``re``. A sample of every chunk is also
matched by ``re`` and compared; any difference sends the chunk (and the rest of the
file) to ``re``.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from logtrial.data.header import LineParser, ParsedChunk, parse_timestamps, stands_alone, take_rows
from logtrial.data.header_split import split_form
from logtrial.data.re2_form import extraction_pattern, plain_rows
from logtrial.data.registry import LineFormat

_NO_MATCH = "line does not match the format's regex"
_KEY = "logtrial_session_key"
_CHECKED_ROWS = 64


class ColumnParser:
    """Applies one line format to chunks of lines held as Arrow string arrays."""

    def __init__(self, fmt: LineFormat, path_group: str | None = None):
        self.fmt = fmt
        self.lines = LineParser(fmt, path_group)
        self.fields = self.lines.fields
        self.re2 = extraction_pattern(fmt.regex)
        # fields by cutting at spaces where the format allows it (only ever used with an RE2 form)
        self.split = split_form(fmt.regex) if self.re2 is not None else None
        group_rx = self.lines.group_rx
        # the session key by RE2 only for a pattern without groups (Python takes its whole match)
        self.key_re2 = None
        if group_rx is not None and group_rx.groups == 0:
            self.key_re2 = extraction_pattern(f"(?P<{_KEY}>{group_rx.pattern})", None, anchored=False)

    def parse(self, lines: pa.StringArray | list[str], first_line: int) -> tuple[ParsedChunk | None, list]:
        """Split lines into header fields; return the parsed rows and (line, reason, text) rejects."""
        if not isinstance(lines, pa.Array):
            return self.lines.parse(lines, first_line)
        if self.re2 is None or len(lines) == 0:
            return self.lines.parse(lines.to_pylist(), first_line)
        plain = np.asarray(plain_rows(lines), dtype=bool)
        where_plain = np.flatnonzero(plain)
        sub = lines if len(where_plain) == len(lines) else lines.take(pa.array(where_plain))
        if self.split is not None:
            valid = self.split.matches(sub, self.re2)
            fields = self.split.read(sub, valid, self.fields)
        else:
            extracted = pc.extract_regex(sub, pattern=self.re2)
            valid = np.asarray(extracted.is_valid(), dtype=bool)
            fields = {f: extracted.field(f) for f in self.fields}
        if not self._agrees(sub, valid, fields):
            self.re2 = self.split = None
            return self.lines.parse(lines.to_pylist(), first_line)
        cols, matched = self._plain_fields(fields, valid)
        if len(where_plain) < len(lines):
            where_other = np.flatnonzero(~plain)
            other_cols, other_matched = self._python_fields(lines.take(pa.array(where_other)).to_pylist())
            back = pa.array(np.argsort(np.concatenate([where_plain, where_other]), kind="stable"))
            cols = {f: pa.concat_arrays([cols[f], other_cols[f]]).take(back) for f in cols}
            matched = np.concatenate([matched, other_matched])[np.asarray(back)]
        return self._rows(lines, cols, matched, first_line)

    def _agrees(self, sub: pa.StringArray, valid: np.ndarray, fields: dict[str, pa.Array]) -> bool:
        """Tell whether the column answer (which lines match, their fields) equals Python's on a sample of rows."""
        rx = self.lines.rx
        for i in np.unique(np.linspace(0, len(sub) - 1, min(_CHECKED_ROWS, len(sub))).astype(np.int64)).tolist():
            m = rx.match(sub[i].as_py())
            if (m is not None) != bool(valid[i]):
                return False
            if m is not None and any((m.group(f) or "") != fields[f][i].as_py() for f in self.fields):
                return False
        return True

    def _plain_fields(self, fields: dict[str, pa.Array], valid: np.ndarray) -> tuple[dict[str, pa.Array], np.ndarray]:
        """Fields (content trimmed, session key found) of plain lines from the column answer, and which matched."""
        cols = dict(fields)
        cols["content"] = pc.utf8_trim_whitespace(cols["content"])
        if self.lines.group_rx is not None:
            if self.key_re2 is not None:
                found = pc.extract_regex(cols["content"], pattern=self.key_re2)
                cols[_KEY] = pc.if_else(found.is_valid(), found.field(_KEY), pa.scalar(None, pa.string()))
            else:
                cols[_KEY] = self._python_keys(cols["content"].to_pylist())
        return cols, valid

    def _python_fields(self, lines: list[str]) -> tuple[dict[str, pa.Array], np.ndarray]:
        """The same fields by Python's ``re``, line by line."""
        match = self.lines.rx.match
        found = [match(s) for s in lines]
        cols = {f: pa.array([(m.group(f) or "") if m is not None else "" for m in found], type=pa.string())
                for f in self.fields}
        content = [c.strip() for c in cols["content"].to_pylist()]
        cols["content"] = pa.array(content, type=pa.string())
        if self.lines.group_rx is not None:
            cols[_KEY] = self._python_keys(content)
        return cols, np.fromiter((m is not None for m in found), dtype=bool, count=len(found))

    def _python_keys(self, content: list[str | None]) -> pa.Array:
        """Session keys: the first match of the group pattern in each content (None where there is none or no content)."""
        rx = self.lines.group_rx
        which = 1 if rx.groups else 0
        return pa.array([m.group(which) if c is not None and (m := rx.search(c)) else None for c in content],
                        type=pa.string())

    def _rows(self, lines: pa.StringArray, cols: dict[str, pa.Array], matched: np.ndarray,
              first_line: int) -> tuple[ParsedChunk | None, list]:
        """Parsed rows and rejects from the fields of every line (the line-by-line parser's rules)."""
        fmt = self.fmt
        missing = np.flatnonzero(~matched)
        bad = [(first_line + int(i), _NO_MATCH, text)
               for i, text in zip(missing.tolist(), lines.take(pa.array(missing)).to_pylist())]
        good = np.flatnonzero(matched)
        if len(good) == 0:
            return None, bad
        if len(good) < len(lines):
            pick = pa.array(good)
            cols = {f: v.take(pick) for f, v in cols.items()}
        line = good.astype(np.int64) + first_line
        keep = None
        if fmt.timestamp:
            parts = [cols[f] for f in fmt.timestamp.fields]
            joined = parts[0] if len(parts) == 1 else pc.binary_join_element_wise(*parts, " ")
            if stands_alone(fmt):  # parse each distinct value once (log lines share their second)
                encoded = joined.dictionary_encode()
                distinct = parse_timestamps(encoded.dictionary.to_numpy(zero_copy_only=False), fmt)
                ts = distinct[np.asarray(encoded.indices, dtype=np.int64)]
            else:
                ts = parse_timestamps(joined.to_numpy(zero_copy_only=False), fmt)
            nat = np.isnat(ts)
            if nat.any():
                expect = fmt.timestamp.format or f"epoch {fmt.timestamp.unit}"
                where = np.flatnonzero(nat)
                texts = lines.take(pa.array(good[where])).to_pylist()
                values = joined.take(pa.array(where)).to_pylist()
                bad += [(int(line[i]), f"timestamp {value!r} does not match {expect!r}", text)
                        for i, value, text in zip(where.tolist(), values, texts)]
                keep = np.flatnonzero(~nat)
        else:
            ts = line.astype("datetime64[s]").astype("datetime64[us]")
        entity = cols[fmt.entity] if fmt.entity else ""
        if self.lines.group_rx is not None:
            group = cols[_KEY]
        elif fmt.group and fmt.group.field:
            v = cols[fmt.group.field]
            group = pc.if_else(pc.equal(v, ""), pa.scalar(None, pa.string()), v)
        else:
            group = self.lines.path_group
        tag = ""
        if fmt.tag:
            v = cols[fmt.tag.field]
            tag = pc.if_else(pc.equal(v, fmt.tag.normal), "", v) if fmt.tag.normal is not None else v
        chunk = ParsedChunk(line, ts, cols["content"], entity, group, tag)
        if keep is not None:
            chunk = take_rows(chunk, keep)
        bad.sort()
        return (chunk if len(chunk) else None), bad
