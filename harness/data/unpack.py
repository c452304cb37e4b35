"""Safe archive extraction: tar (any compression), zip and single-file gzip into a target folder.

Every member is checked before anything is written: no absolute paths, no ``..``
components, no links whose target leaves the folder, no devices or fifos, and
the total (declared and actually decompressed) size stays under a cap. Errors
raise :class:`logtrial.errors.DataError` naming the archive and the member; the
caller extracts into a temporary folder and removes it on any error.
"""

from __future__ import annotations

import gzip
import lzma
import os
import re
import stat
import tarfile
import zipfile
import zlib
from pathlib import Path, PurePosixPath
from typing import BinaryIO, Iterator

from logtrial.errors import DataError

CHUNK = 1 << 20
UNPACK_KINDS = ("none", "zip", "tar", "gzip")
_DRIVE = re.compile(r"^[A-Za-z]:")
# What a damaged compressed stream or archive raises while being read.
_CORRUPT = (
    EOFError,
    tarfile.TarError,
    zipfile.BadZipFile,
    zlib.error,
    gzip.BadGzipFile,
    lzma.LZMAError,
)


def _corrupt_message(archive: Path, member: str, exc: BaseException) -> DataError:
    detail = str(exc) or type(exc).__name__
    return DataError(
        f"{archive}: member '{member}': truncated or corrupt data ({detail}); expected a complete, undamaged archive"
    )


def safe_member_path(archive: Path, name: str) -> PurePosixPath | None:
    """The relative path of an archive member, or None for the root itself; refuses unsafe names."""
    if "\x00" in name:
        raise DataError(f"{archive}: member {name!r}: expected a path without NUL characters")
    if name.startswith(("/", "\\")) or _DRIVE.match(name):
        raise DataError(f"{archive}: member '{name}': absolute path refused, expected a path relative to the target")
    parts = [p for p in re.split(r"[/\\]", name) if p not in ("", ".")]
    if ".." in parts:
        raise DataError(f"{archive}: member '{name}': '..' component refused, expected a path inside the target")
    return PurePosixPath(*parts) if parts else None


def _inside(root_real: str, path: str) -> bool:
    return path == root_real or path.startswith(root_real + os.sep)


class _Writer:
    """Writes checked members under one folder and keeps the running size total."""

    def __init__(self, archive: Path, dest: Path, size_cap: int) -> None:
        self.archive = archive
        self.dest = dest
        self.root = os.path.realpath(dest)
        self.size_cap = size_cap
        self.declared = 0
        self.written = 0

    def _target(self, rel: PurePosixPath, member: str) -> str:
        """Absolute output path for rel; creates its folders one by one, refusing any that leads outside."""
        cur = self.root
        for part in rel.parts[:-1]:
            cur = os.path.join(cur, part)
            if os.path.islink(cur):
                real = os.path.realpath(cur)
                if not _inside(self.root, real):
                    raise DataError(
                        f"{self.archive}: member '{member}': folder '{part}' is a link leading outside the target, "
                        "expected folders inside the destination"
                    )
                if not os.path.isdir(real):
                    raise DataError(f"{self.archive}: member '{member}': '{part}' is a link, expected a folder")
            elif not os.path.lexists(cur):
                os.mkdir(cur)
            elif not os.path.isdir(cur):
                raise DataError(f"{self.archive}: member '{member}': a file stands where folder '{part}' is expected")
        return os.path.join(cur, rel.parts[-1])

    def declare(self, member: str, size: int) -> None:
        """Count a member's declared size against the cap before reading it."""
        self.declared += max(size, 0)
        if self.declared > self.size_cap:
            raise DataError(
                f"{self.archive}: member '{member}': declared sizes add up to {self.declared} bytes, "
                f"over the size cap, expected at most {self.size_cap} bytes"
            )

    def directory(self, rel: PurePosixPath | None, member: str) -> None:
        """Create a folder member."""
        if rel is None:
            return
        path = self._target(rel, member)
        if os.path.islink(path):
            raise DataError(f"{self.archive}: member '{member}': a link already stands where a folder is expected")
        if not os.path.lexists(path):
            os.mkdir(path)
        elif not os.path.isdir(path):
            raise DataError(f"{self.archive}: member '{member}': a file already stands where a folder is expected")

    def file(self, rel: PurePosixPath | None, member: str, stream: BinaryIO, executable: bool) -> None:
        """Stream a regular file member to disk, counting the decompressed bytes against the cap."""
        if rel is None:
            raise DataError(f"{self.archive}: member '{member}': expected a file name, got the archive root")
        path = self._target(rel, member)
        if os.path.lexists(path):
            if os.path.isdir(path) and not os.path.islink(path):
                raise DataError(f"{self.archive}: member '{member}': a folder already stands where a file is expected")
            os.unlink(path)
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW, 0o755 if executable else 0o644)
        with os.fdopen(fd, "wb") as out:
            while True:
                try:
                    chunk = stream.read(CHUNK)
                except _CORRUPT + (OSError,) as exc:
                    raise _corrupt_message(self.archive, member, exc) from None
                if not chunk:
                    break
                self.written += len(chunk)
                if self.written > self.size_cap:
                    raise DataError(
                        f"{self.archive}: member '{member}': decompressed data exceeds the size cap, "
                        f"expected at most {self.size_cap} bytes"
                    )
                out.write(chunk)

    def symlink(self, rel: PurePosixPath | None, member: str, target: str) -> None:
        """Create a symbolic link whose target stays inside the folder."""
        if rel is None:
            raise DataError(f"{self.archive}: member '{member}': expected a link name, got the archive root")
        if not target or target.startswith(("/", "\\")) or _DRIVE.match(target):
            raise DataError(
                f"{self.archive}: member '{member}': symlink to absolute path '{target}' refused, "
                "expected a target inside the destination"
            )
        path = self._target(rel, member)
        lexical = os.path.normpath(os.path.join(os.path.dirname(path), target))
        real = os.path.realpath(os.path.join(os.path.dirname(path), target))
        if not (_inside(self.root, lexical) and _inside(self.root, real)):
            raise DataError(
                f"{self.archive}: member '{member}': symlink to '{target}' leaves the target folder, "
                "expected a target inside the destination"
            )
        if os.path.lexists(path):
            if os.path.isdir(path) and not os.path.islink(path):
                raise DataError(f"{self.archive}: member '{member}': a folder already stands where a link is expected")
            os.unlink(path)
        os.symlink(target, path)

    def hardlink(self, rel: PurePosixPath | None, member: str, target: str) -> None:
        """Materialise a hard-link member as a copy of an already extracted file inside the folder."""
        if rel is None:
            raise DataError(f"{self.archive}: member '{member}': expected a link name, got the archive root")
        try:
            trel = safe_member_path(self.archive, target)
        except DataError:
            trel = None
        src = os.path.realpath(os.path.join(self.root, *trel.parts)) if trel is not None else ""
        if trel is None or not _inside(self.root, src) or src == self.root:
            raise DataError(
                f"{self.archive}: member '{member}': hard link to '{target}' leaves the target folder, "
                "expected a file inside the destination"
            )
        if not os.path.isfile(src):
            raise DataError(
                f"{self.archive}: member '{member}': hard link to '{target}', expected an earlier file member"
            )
        with open(src, "rb") as fh:
            self.file(rel, member, fh, executable=bool(os.stat(src).st_mode & stat.S_IXUSR))

    def final_check(self) -> None:
        """Refuse the result when any link, as now laid out, resolves outside the folder."""
        for base, dirs, files in os.walk(self.root):
            for name in dirs + files:
                path = os.path.join(base, name)
                if os.path.islink(path) and not _inside(self.root, os.path.realpath(path)):
                    rel = os.path.relpath(path, self.root)
                    raise DataError(
                        f"{self.archive}: member '{rel}': symlink resolves outside the target folder once "
                        "all members are in place, expected a target inside the destination"
                    )


def _tar_members(archive: Path, tf: tarfile.TarFile) -> Iterator[tarfile.TarInfo]:
    it = iter(tf)
    last = "(first member)"
    while True:
        try:
            member = next(it)
        except StopIteration:
            return
        except _CORRUPT + (OSError,) as exc:
            raise _corrupt_message(archive, f"after {last}", exc) from None
        last = member.name
        yield member


def _unpack_tar(archive: Path, w: _Writer) -> None:
    try:
        tf = tarfile.open(archive, mode="r:*")
    except _CORRUPT + (OSError,) as exc:
        raise DataError(f"{archive}: not a readable tar archive, expected tar (optionally gz/bz2/xz) ({exc})") from None
    with tf:
        for m in _tar_members(archive, tf):
            rel = safe_member_path(archive, m.name)
            if m.ischr() or m.isblk() or m.isfifo():
                raise DataError(f"{archive}: member '{m.name}': device or fifo refused, expected files and folders")
            if m.isdir():
                w.directory(rel, m.name)
            elif m.issym():
                w.symlink(rel, m.name, m.linkname)
            elif m.islnk():
                w.hardlink(rel, m.name, m.linkname)
            elif m.isfile():
                w.declare(m.name, m.size)
                try:
                    stream = tf.extractfile(m)
                except _CORRUPT + (OSError,) as exc:
                    raise _corrupt_message(archive, m.name, exc) from None
                if stream is None:
                    raise DataError(f"{archive}: member '{m.name}': cannot be read as a file")
                w.file(rel, m.name, stream, executable=bool(m.mode & stat.S_IXUSR))
            else:
                raise DataError(f"{archive}: member '{m.name}': unsupported member type {m.type!r} refused")


def _unpack_zip(archive: Path, w: _Writer) -> None:
    try:
        zf = zipfile.ZipFile(archive)
    except _CORRUPT + (OSError,) as exc:
        raise DataError(f"{archive}: not a readable zip archive, expected a zip file ({exc})") from None
    with zf:
        infos = zf.infolist()
        for info in infos:  # check every name and the declared total before writing anything
            safe_member_path(archive, info.filename)
            w.declare(info.filename, info.file_size)
        for info in infos:
            rel = safe_member_path(archive, info.filename)
            mode = info.external_attr >> 16
            kind = stat.S_IFMT(mode)
            if kind in (stat.S_IFCHR, stat.S_IFBLK, stat.S_IFIFO, stat.S_IFSOCK):
                raise DataError(
                    f"{archive}: member '{info.filename}': device or fifo refused, expected files and folders"
                )
            try:
                if info.is_dir():
                    w.directory(rel, info.filename)
                elif kind == stat.S_IFLNK:
                    with zf.open(info) as fh:
                        target = fh.read(4097)
                    if len(target) > 4096:
                        raise DataError(f"{archive}: member '{info.filename}': symlink target longer than 4096 bytes")
                    w.symlink(rel, info.filename, target.decode("utf-8", errors="replace"))
                else:
                    with zf.open(info) as fh:
                        w.file(rel, info.filename, fh, executable=bool(mode & stat.S_IXUSR))
            except (_CORRUPT + (RuntimeError, NotImplementedError)) as exc:
                raise _corrupt_message(archive, info.filename, exc) from None


def gzip_output_name(archive: Path) -> str:
    """Name of the single file inside a gzip archive: the archive name without `.gz`."""
    name = archive.name
    for suffix in (".gz", ".gzip"):
        if name.lower().endswith(suffix) and len(name) > len(suffix):
            return name[: -len(suffix)]
    return name + ".out"


def _unpack_gzip(archive: Path, w: _Writer) -> None:
    name = gzip_output_name(archive)
    rel = safe_member_path(archive, name)
    with gzip.open(archive, "rb") as fh:
        w.file(rel, name, fh, executable=False)  # type: ignore[arg-type]


def unpack_archive(archive: Path, dest: Path, kind: str, size_cap: int) -> list[Path]:
    """Extract `archive` of the given kind (tar, zip, gzip) safely into `dest`; return the files written."""
    archive, dest = Path(archive), Path(dest)
    if kind not in ("zip", "tar", "gzip"):
        raise DataError(f"{archive}: unpack kind '{kind}' is not an archive kind, expected zip, tar or gzip")
    dest.mkdir(parents=True, exist_ok=True)
    before = {p for p in dest.rglob("*")}
    w = _Writer(archive, dest, size_cap)
    {"tar": _unpack_tar, "zip": _unpack_zip, "gzip": _unpack_gzip}[kind](archive, w)
    w.final_check()
    return sorted(p for p in dest.rglob("*") if p not in before and p.is_file())


__all__ = ["UNPACK_KINDS", "gzip_output_name", "safe_member_path", "unpack_archive"]
