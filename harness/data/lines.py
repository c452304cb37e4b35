"""Lines: cut a log file into line-aligned byte ranges and decode one range into lines."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

# A range ends at the end of the line holding its (RANGE_BYTES + 1)-th byte: the
# same cut that ``file.readlines(RANGE_BYTES)`` makes, so ranges are the chunks ingest
# has always used (a clock-change hour is inferred within one chunk).
RANGE_BYTES = 1 << 24


@dataclass(frozen=True)
class ByteRange:
    """Bytes [start, end) of one file; start and end fall just after a newline (or at the file's ends)."""

    path: Path
    start: int
    end: int

    @property
    def size(self) -> int:
        """Number of bytes in the range."""
        return self.end - self.start


@dataclass
class DecodedRange:
    """The lines of one range, and where its bytes were not valid in the encoding (1-based within the range)."""

    lines: list[str] | pa.StringArray
    bad_lines: list[int] = field(default_factory=list)
    strict_error: tuple[int, int] | None = None  # (line within the range, byte within the line)


def byte_ranges(path: Path, range_bytes: int = RANGE_BYTES) -> list[ByteRange]:
    """Line-aligned byte ranges covering a file, cut where ``readlines(range_bytes)`` would cut."""
    size = Path(path).stat().st_size
    out: list[ByteRange] = []
    start = 0
    with open(path, "rb") as fh:
        while start < size:
            if start + range_bytes >= size:
                out.append(ByteRange(Path(path), start, size))
                break
            fh.seek(start + range_bytes)
            fh.readline()  # to the end of the line holding the byte just past the wanted ones
            end = min(fh.tell(), size)
            out.append(ByteRange(Path(path), start, end))
            start = end
    return out


def _is_utf8(encoding: str) -> bool:
    return encoding.replace("-", "").replace("_", "").lower() in ("utf8", "utf8sig")


def decode_range(rng: ByteRange, encoding: str, strict: bool, column: bool = False) -> DecodedRange:
    """Decode one byte range into lines without newlines (a trailing CR is dropped); bad bytes are replaced and listed.

    With ``column``, valid UTF-8 comes back as an Arrow string array cut straight from the
    bytes (no Python string per line); anything else as a list of str.
    """
    with open(rng.path, "rb") as fh:
        fh.seek(rng.start)
        blob = fh.read(rng.size)
    if rng.start == 0 and _is_utf8(encoding) and blob.startswith(b"\xef\xbb\xbf"):
        blob = blob[3:]  # a UTF-8 byte-order mark is not part of the first line
    out = DecodedRange(lines=[])
    if column and _is_utf8(encoding) and len(blob) < 2**31:
        lines = _line_column(blob)
        try:
            lines.validate(full=True)  # valid UTF-8 (Arrow's check; no Python string is built)
        except pa.ArrowInvalid:
            pass
        else:
            out.lines = lines
            return out
    try:
        lines = blob.decode(encoding).split("\n")
        if lines and lines[-1] == "":
            lines.pop()
    except UnicodeDecodeError:
        raw = blob.split(b"\n")
        if raw and raw[-1] == b"":
            raw.pop()
        lines = []
        for i, b in enumerate(raw):
            try:
                s = b.decode(encoding)
            except UnicodeDecodeError as exc:
                if strict:
                    out.strict_error = (i + 1, exc.start)
                    return out
                s = b.decode(encoding, errors="replace")
                out.bad_lines.append(i + 1)
            lines.append(s)
    out.lines = [s[:-1] if s.endswith("\r") else s for s in lines]
    return out


def _line_column(blob: bytes) -> pa.StringArray:
    """Valid UTF-8 bytes as an Arrow array of lines: split at LF, LF dropped, one CR before it (or at the end) dropped."""
    buf = np.frombuffer(blob, dtype=np.uint8)
    if len(buf) == 0:
        return pa.array([], type=pa.string())
    newline = np.flatnonzero(buf == 10)
    ends = newline if (len(buf) and buf[-1] == 10) else np.r_[newline, len(buf)]
    starts = np.r_[0, newline + 1][: len(ends)]
    cr = (ends > starts) & (buf[np.maximum(ends - 1, 0)] == 13)
    keep = np.ones(len(buf), dtype=bool)
    keep[newline] = False
    keep[ends[cr] - 1] = False
    lengths = ends - starts - cr
    offsets = np.zeros(len(ends) + 1, dtype=np.int32)
    np.cumsum(lengths, out=offsets[1:])
    data = buf[keep]
    return pa.StringArray.from_buffers(len(ends), pa.py_buffer(offsets), pa.py_buffer(data))
