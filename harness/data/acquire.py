"""Acquire: obtain a dataset's source files (https, file:// or a mirror folder), verify, unpack, publish.

Layout under the home folder (``LOGTRIAL_HOME``):

- ``downloads/<dataset>/<file>.part`` while a file is being obtained; renamed to
  ``downloads/<dataset>/<file>`` only after its size and sha256 are verified.
  A file that fails verification is renamed ``<file>.rejected`` (kept for
  inspection, replaced by the next rejected one).
- ``data/.<dataset>.tmp-<random>/`` while unpacking; renamed to ``data/<dataset>/``
  only when every source is in place and the entry's log files are present. An
  archive that cannot be unpacked safely is renamed ``<file>.rejected`` as well.
- ``datasets.lock``: JSON, dataset → source file → {size, sha256}. The first
  successful fetch of a source without a registry hash records it; later fetches
  must match.
"""

from __future__ import annotations

import contextlib
import fnmatch
import hashlib
import json
import os
import re
import shutil
import sys
import tempfile
import urllib.error
import urllib.parse
import urllib.request
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import BinaryIO, Callable, Iterator, Literal

from logtrial.data.registry import Entry, Source, home_dir, mirror_folder
from logtrial.data.unpack import CHUNK, unpack_archive
from logtrial.errors import ConfigError, DataError, LogtrialError

LOCK_NAME = "datasets.lock"
TIMEOUT_S = 30.0
DEFAULT_SIZE_CAP = 64 * 2**30


@dataclass
class FetchResult:
    """Outcome of a fetch: the dataset folder, its log files, and whether anything new was recorded."""

    name: str
    path: Path
    files: list[Path]
    cached: bool
    recorded_hashes: bool
    notes: list[str] = field(default_factory=list)


# ---------------------------------------------------------------- lock file


def lock_path(home: Path) -> Path:
    """Path of the lock file under a home folder."""
    return Path(home) / LOCK_NAME


def read_lock(home: Path) -> dict[str, dict[str, dict[str, object]]]:
    """The lock file's content (empty when absent)."""
    path = lock_path(home)
    if not path.exists():
        return {}
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise DataError(
            f"{path}: line {exc.lineno}: invalid JSON ({exc.msg}); expected the lock written by `logtrial fetch` "
            "(delete it to record hashes afresh)"
        ) from None
    if not isinstance(doc, dict) or not all(isinstance(v, dict) for v in doc.values()):
        raise DataError(f"{path}: expected a JSON object mapping dataset → file → {{size, sha256}}")
    return doc


def _write_atomic(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


@contextlib.contextmanager
def _lock_guard(home: Path) -> Iterator[None]:
    """Serialise read-modify-write of the lock file between processes (POSIX advisory lock)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - non-POSIX systems
        yield
        return
    Path(home).mkdir(parents=True, exist_ok=True)
    with open(Path(home) / f".{LOCK_NAME}.guard", "a") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def _record(home: Path, dataset: str, checks: dict[str, tuple[int, str]],
            origins: dict[str, dict] | None = None) -> None:
    with _lock_guard(home):
        doc = read_lock(home)
        entry = doc.setdefault(dataset, {})
        for file, (size, digest) in checks.items():
            entry[file] = {"size": size, "sha256": digest, **(origins or {}).get(file, {})}
        _write_atomic(lock_path(home), json.dumps(doc, indent=2, sort_keys=True) + "\n")


# ---------------------------------------------------------------- hashing and copying


def sha256_file(path: Path) -> str:
    """Hex sha256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(CHUNK), b""):
            h.update(chunk)
    return h.hexdigest()


def _bar(total: int | None, initial: int, desc: str, progress: bool):  # type: ignore[no-untyped-def]
    from tqdm import tqdm

    enabled = progress and sys.stderr.isatty()
    return tqdm(
        total=total, initial=initial, desc=desc, unit="B", unit_scale=True, unit_divisor=1024,
        file=sys.stderr, disable=not enabled, leave=False,
    )


def _pump(src: BinaryIO, out: BinaryIO, bar, limit: int | None = None) -> int:  # type: ignore[no-untyped-def]
    """Copy src to out in chunks (at most `limit` bytes when given); return the bytes copied."""
    n = 0
    while limit is None or n < limit:
        chunk = src.read(CHUNK if limit is None else min(CHUNK, limit - n))
        if not chunk:
            break
        out.write(chunk)
        n += len(chunk)
        bar.update(len(chunk))
    return n


def _copy_local(src: Path, part: Path, desc: str, progress: bool) -> None:
    """Copy a local source into part; on failure remove the part (a local copy restarts from zero anyway)."""
    size = src.stat().st_size
    try:
        with open(src, "rb") as fin, open(part, "wb") as fout, _bar(size, 0, desc, progress) as bar:
            _pump(fin, fout, bar)
    except OSError as exc:
        with contextlib.suppress(OSError):
            part.unlink()
        raise DataError(f"{src}: copy to {part.parent} failed ({exc.strerror or exc}); the partial copy was "
                        "removed (a local copy is not resumed): free space or fix permissions, then fetch again") \
            from None


# ---------------------------------------------------------------- http(s) with resume

_CONTENT_RANGE = re.compile(r"bytes\s+(?:(\d+)-(\d+)|\*)/(\d+|\*)")


def _download(url: str, part: Path, desc: str, progress: bool, timeout: float) -> None:
    """Download url into part, resuming from an existing part with a Range request."""
    have = part.stat().st_size if part.exists() else 0
    req = urllib.request.Request(url, headers={"User-Agent": "logtrial-fetch", "Accept-Encoding": "identity"})
    if have:
        req.add_header("Range", f"bytes={have}-")
    try:
        resp = urllib.request.urlopen(req, timeout=timeout)
    except urllib.error.HTTPError as exc:
        if exc.code == 416 and have:
            m = _CONTENT_RANGE.match(exc.headers.get("Content-Range", "") or "")
            if m and m.group(3) != "*" and int(m.group(3)) == have:
                return  # the part already holds the whole file
            part.unlink()
            return _download(url, part, desc, progress, timeout)
        hint = (": the file is not at this address; check the address (a base address can be changed with "
                "its environment variable, see `bases:` in datasets.yaml)" if exc.code == 404 else "")
        raise DataError(f"{url}: download failed: HTTP {exc.code} {exc.reason}{hint}") from None
    except (urllib.error.URLError, OSError) as exc:
        reason = getattr(exc, "reason", exc)
        raise DataError(
            f"{url}: cannot connect ({reason}); check the internet connection and run the fetch again, "
            "or work offline: pass --mirror DIR or set LOGTRIAL_MIRROR to a folder holding a copy"
        ) from None
    with resp:
        code = resp.status
        if code == 206:
            m = _CONTENT_RANGE.match(resp.headers.get("Content-Range", "") or "")
            if not m or m.group(1) is None or int(m.group(1)) != have:
                part.unlink()
                raise DataError(
                    f"{url}: server answered a resume request with range "
                    f"'{resp.headers.get('Content-Range')}', expected bytes {have}-; the partial file was "
                    "removed: run the fetch again to download from the start"
                )
            total = None if m.group(3) == "*" else int(m.group(3))
            mode, start = "ab", have
        elif code == 200:
            length = resp.headers.get("Content-Length")
            total = int(length) if length and length.isdigit() else None
            mode, start = "wb", 0
        else:
            raise DataError(f"{url}: unexpected HTTP status {code}, expected 200 or 206")
        expect = None if total is None else total - start
        with open(part, mode) as out, _bar(total, start, desc, progress) as bar:
            try:
                got = _pump(resp, out, bar, expect)
            except OSError as exc:
                raise DataError(
                    f"{url}: download interrupted after {out.tell()} bytes "
                    f"({exc}); the partial file {part} is kept: run the fetch again to resume"
                ) from None
    if expect is not None and got < expect:
        raise DataError(
            f"{url}: download interrupted after {start + got} of {total} bytes; the partial file {part} "
            "is kept: run the fetch again to resume"
        )


# ---------------------------------------------------------------- sources


def _relative(path: str, field: str, entry: str) -> PurePosixPath:
    p = PurePosixPath(path)
    if p.is_absolute() or ".." in p.parts:
        raise ConfigError(f"dataset '{entry}': sources.{field} '{path}': expected a relative path inside the mirror folder")
    return p


def _origin(entry: Entry, src: Source, mirror: Path | None) -> tuple[str, Path | str]:
    """Where a source comes from: ('copy', path) from a mirror folder that is set and holds it, else ('url', url)."""
    folder = mirror_folder(mirror)
    if folder is not None:
        if src.mirror is not None:
            cand = folder / _relative(src.mirror, "mirror", entry.name)
            if cand.is_file():
                return "copy", cand
        if (folder / src.file).is_file():
            return "copy", folder / src.file
    if src.url is not None:
        if src.url.startswith("file://"):
            parsed = urllib.parse.urlparse(src.url)
            if parsed.netloc not in ("", "localhost"):
                raise DataError(f"{src.url}: file:// URL with host '{parsed.netloc}', expected a local path")
            path = Path(urllib.request.url2pathname(parsed.path))
            if not path.is_file():
                raise DataError(f"dataset '{entry.name}': {src.file}: local source {path} not found")
            return "copy", path
        return "url", src.url
    if folder is None:
        raise DataError(
            f"dataset '{entry.name}': {src.file} has no download address and no mirror folder is set; "
            f"pass --mirror DIR or set LOGTRIAL_MIRROR to the folder holding {src.mirror or src.file}"
        )
    looked = folder / (src.mirror or src.file)
    raise DataError(
        f"dataset '{entry.name}': {src.file} not found in the mirror folder {folder} (looked for {looked}); "
        "pass --mirror DIR or set LOGTRIAL_MIRROR to the folder holding it"
    )


def _expected(entry: Entry, src: Source, lock: dict) -> tuple[int | None, str | None, str, str]:
    """Expected size and sha256 of a source (registry first, else lock) and where each comes from."""
    rec = lock.get(entry.name, {}).get(src.file, {})
    size_from = "registry" if src.size is not None else LOCK_NAME
    sha_from = "registry" if src.sha256 is not None else LOCK_NAME
    size = src.size if src.size is not None else rec.get("size")
    sha = src.sha256 if src.sha256 is not None else rec.get("sha256")
    return size, sha, size_from, sha_from


def _reject(part: Path) -> Path:
    bad = part.with_name(part.name.removesuffix(".part") + ".rejected")
    os.replace(part, bad)
    return bad


def _verify(entry: Entry, src: Source, path: Path, lock: dict, move_bad: bool) -> tuple[int, str]:
    """Check size and sha256 of an obtained file; on mismatch move it aside (when asked) and raise."""
    want_size, want_sha, size_from, sha_from = _expected(entry, src, lock)
    size = path.stat().st_size
    digest = sha256_file(path)
    problems = []
    if want_size is not None and size != want_size:
        problems.append(f"size mismatch: expected {want_size} bytes (from {size_from}), got {size} bytes")
    if want_sha is not None and digest != want_sha:
        problems.append(f"sha256 mismatch: expected {want_sha} (from {sha_from}), got {digest}")
    problem = "; ".join(problems) or None
    if problem is None:
        return size, digest
    note = ""
    if move_bad:
        note = f"; the file was moved to {_reject(path)}"
    raise DataError(f"dataset '{entry.name}': {src.file}: {problem}{note}; {_advice(entry, sha_from, size_from)}")


def _advice(entry: Entry, sha_from: str, size_from: str) -> str:
    """What to do about a checksum mismatch, depending on whether the value was pinned or recorded."""
    if "registry" in (sha_from, size_from):
        return ("the registry pins the published file, so this copy is not it: if it came from a mirror folder, "
                "replace that copy with the published file; if it was downloaded, run the fetch again (a damaged "
                "or changed download); if the publisher changed the file on purpose, check the new file and update "
                f"size and sha256 of dataset '{entry.name}' in the registry")
    return (f"the value was recorded by the first fetch (trust on first use); if the new file is expected, "
            f"remove dataset '{entry.name}' from {LOCK_NAME} in the data folder (LOGTRIAL_HOME) and fetch again")


def _obtain(entry: Entry, src: Source, downloads: Path, mirror: Path | None, lock: dict,
            progress: bool, force: bool, timeout: float) -> tuple[Path, int, str]:
    """Bring one source to downloads/<file>, verified; return its path, size and sha256."""
    final = downloads / src.file
    part = downloads / (src.file + ".part")
    if final.is_file() and not force:
        if _expected(entry, src, lock)[1] is not None:
            try:
                size, digest = _verify(entry, src, final, lock, move_bad=False)
                return final, size, digest
            except DataError:
                pass  # stale or damaged download: obtain it again
    kind, origin = _origin(entry, src, mirror)
    downloads.mkdir(parents=True, exist_ok=True)
    desc = f"{entry.name}: {src.file}"
    if kind == "copy":
        _copy_local(Path(origin), part, desc, progress)
    else:
        if force and part.exists():
            part.unlink()
        _download(str(origin), part, desc, progress, timeout)
    size, digest = _verify(entry, src, part, lock, move_bad=True)
    os.replace(part, final)
    return final, size, digest


# ---------------------------------------------------------------- log files


def log_files(entry: Entry, folder: Path) -> list[Path]:
    """The entry's log files inside a dataset folder, in registry order (glob patterns allowed).

    A bare file name that is not at the top also matches one file of that name in a
    sub-folder, as archives often wrap their content in one top folder.
    """
    folder = Path(folder)
    found: list[Path] = []
    missing: list[str] = []
    for pattern in entry.logs:
        hits = sorted(p for p in folder.glob(pattern) if p.is_file())
        if not hits and not any(c in pattern for c in "/*?["):
            deep = sorted(p for p in folder.rglob(pattern) if p.is_file())
            if len(deep) > 1:
                rels = ", ".join(str(p.relative_to(folder)) for p in deep)
                raise DataError(f"dataset '{entry.name}': log file '{pattern}' is ambiguous in {folder}: {rels}")
            hits = deep
        if not hits:
            missing.append(pattern)
        found.extend(h for h in hits if h not in found)
    if missing:
        raise DataError(
            f"dataset '{entry.name}': {folder}: expected log file(s) {missing} listed under `logs`, not found"
        )
    return found


# ---------------------------------------------------------------- fetch


def _cached(entry: Entry, folder: Path, lock: dict) -> bool:
    if not folder.is_dir():
        return False
    rec = lock.get(entry.name, {})
    for src in entry.sources:
        got = rec.get(src.file)
        if not got:
            return False
        if src.sha256 is not None and got.get("sha256") != src.sha256:
            return False
        if src.size is not None and got.get("size") != src.size:
            return False
    try:
        log_files(entry, folder)
    except DataError:
        return False
    return True


def _files_manifest(home: Path, name: str) -> Path:
    """Where the size, mtime and sha256 of a published dataset's files are kept (beside its folder)."""
    return Path(home) / "data" / f".{name}.files.json"


def _write_files_manifest(home: Path, name: str, folder: Path) -> None:
    """Record size, mtime and sha256 of every file of a published dataset folder."""
    files = sorted(p for p in Path(folder).rglob("*") if p.is_file())
    doc = {p.relative_to(folder).as_posix(): [p.stat().st_size, p.stat().st_mtime_ns, sha256_file(p)]
           for p in files}
    _write_atomic(_files_manifest(home, name), json.dumps(doc, indent=1, sort_keys=True) + "\n")


def edited_files(home: Path, name: str, folder: Path) -> list[str]:
    """Files of a published dataset that differ from what fetch placed (size and mtime, else re-hash)."""
    path = _files_manifest(home, name)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (FileNotFoundError, json.JSONDecodeError):
        _write_files_manifest(home, name, folder)  # a folder published before this check: take it as is
        return []
    edited: list[str] = []
    touched = False
    for rel, (size, mtime_ns, digest) in doc.items():
        p = Path(folder) / rel
        try:
            st = p.stat()
        except FileNotFoundError:
            edited.append(rel)
            continue
        if st.st_size != size:
            edited.append(rel)
        elif st.st_mtime_ns != mtime_ns:
            if sha256_file(p) != digest:
                edited.append(rel)
            else:
                doc[rel] = [size, st.st_mtime_ns, digest]  # touched, same bytes: remember the new mtime
                touched = True
    if touched and not edited:
        _write_atomic(path, json.dumps(doc, indent=1, sort_keys=True) + "\n")
    return edited


def local_origin(src: Source) -> Path | None:
    """The user's own file behind a source tracked by content (a file:// URL without a pinned size or sha256)."""
    if src.url is None or not src.url.startswith("file://") or src.sha256 is not None or src.size is not None:
        return None
    return Path(urllib.request.url2pathname(urllib.parse.urlparse(src.url).path))


def local_content(entry: Entry, home: Path | None = None) -> dict[str, str]:
    """sha256 of each local source's current file (the lock's value while its size and mtime are unchanged)."""
    rec = read_lock(Path(home) if home is not None else home_dir()).get(entry.name, {})
    out: dict[str, str] = {}
    for src in entry.sources:
        origin = local_origin(src)
        if origin is None or not origin.is_file():
            continue
        got, st = rec.get(src.file) or {}, origin.stat()
        same = got.get("origin_size") == st.st_size and got.get("origin_mtime_ns") == st.st_mtime_ns
        out[src.file] = str(got["sha256"]) if same and got.get("sha256") else sha256_file(origin)
    return out


def user_paths(message: str, entry: Entry, folder: Path) -> str:
    """A message with the data home's copies of local sources replaced by the user's own file paths."""
    for src in entry.sources:
        origin = local_origin(src)
        if origin is not None:
            message = message.replace(str(Path(folder) / src.file), str(origin))
    return message


def _origin_stamp(path: Path) -> dict[str, int]:
    st = path.stat()
    return {"origin_size": st.st_size, "origin_mtime_ns": st.st_mtime_ns}


def _local_changes(entry: Entry, lock: dict) -> list[str]:
    """Local sources whose file changed since the lock recorded it (size and mtime, else re-hash)."""
    rec = lock.get(entry.name, {})
    changed = []
    for src in entry.sources:
        origin = local_origin(src)
        got = rec.get(src.file)
        if origin is None or not got or not origin.is_file():
            continue
        st = origin.stat()
        if got.get("origin_size") == st.st_size and got.get("origin_mtime_ns") == st.st_mtime_ns:
            continue
        if st.st_size != got.get("size") or sha256_file(origin) != got.get("sha256"):
            changed.append(src.file)
    return changed


def _place(entry: Entry, src: Source, download: Path, tmp: Path, size_cap: int) -> None:
    if src.unpack == "none":
        if download.stat().st_size > size_cap:
            raise DataError(
                f"{download}: {download.stat().st_size} bytes is over the size cap, expected at most {size_cap} bytes"
            )
        target = tmp / src.file
        if target.exists():
            raise DataError(f"dataset '{entry.name}': {src.file}: already provided by another source "
                            "(expected each source to add files of its own)")
        # A copy, not a hard link: editing the dataset's file must not alter the verified download.
        shutil.copyfile(download, target)
    else:
        unpack_archive(download, tmp, src.unpack, size_cap)


def _publish(tmp: Path, folder: Path) -> None:
    """Move the finished temp folder to its final name, replacing an older copy."""
    if not folder.exists():
        os.replace(tmp, folder)
        return
    old = Path(tempfile.mkdtemp(prefix=f".{folder.name}.old-", dir=folder.parent))
    os.replace(folder, old / folder.name)
    os.replace(tmp, folder)
    shutil.rmtree(old, ignore_errors=True)


def fetch(entry: Entry, home: Path | None = None, mirror: Path | None = None, progress: bool = True,
          size_cap: int = DEFAULT_SIZE_CAP, force: bool = False, timeout: float = TIMEOUT_S,
          refresh: bool = False) -> FetchResult:
    """Acquire a dataset: obtain and verify each source, unpack safely, publish `<home>/data/<name>/`.

    ``refresh`` obtains every source again and records its size and sha256 afresh (sizes
    and hashes pinned in the registry still apply). Local sources (``file://`` without a
    pinned hash) are tracked by content: a changed file is read again and a note says so.

    Processes fetching the same dataset take turns (an advisory lock per dataset), so a
    second one finds the first one's verified copy instead of racing on the same `.part`.
    """
    if not entry.sources:
        raise DataError(f"dataset '{entry.name}': has no `sources` to fetch (it is generated, not downloaded)")
    home = Path(home) if home is not None else home_dir()
    with _dataset_guard(home, entry.name):
        return _fetch(entry, home, mirror, progress, size_cap, force, timeout, refresh)


@dataclass
class FetchOutcome:
    """What happened to one dataset of a multi-dataset fetch."""

    name: str
    state: Literal["fetched", "present", "failed", "skipped"]
    detail: str
    exit_code: int = 0
    first_use: list[str] = field(default_factory=list)  # files whose checksums this fetch recorded, unpinned
    notes: list[str] = field(default_factory=list)  # e.g. a local file that changed since it was last read


def fetch_many(entries: list[Entry], home: Path | None = None, mirror: Path | None = None, progress: bool = True,
               timeout: float = TIMEOUT_S, on_done: Callable[[FetchOutcome], None] | None = None,
               refresh: bool = False) -> list[FetchOutcome]:
    """Fetch several datasets, one after the other; a failure is reported for its dataset and the rest go on."""
    outcomes: list[FetchOutcome] = []
    for entry in entries:
        if not entry.sources:
            out = FetchOutcome(entry.name, "skipped", "generated on demand, nothing to download")
        else:
            try:
                res = fetch(entry, home=home, mirror=mirror, progress=progress, timeout=timeout, refresh=refresh)
            except LogtrialError as exc:
                out = FetchOutcome(entry.name, "failed", str(exc), exit_code=exc.exit_code)
            except OSError as exc:
                out = FetchOutcome(entry.name, "failed", f"{type(exc).__name__}: {exc}", exit_code=1)
            else:
                pinned = sum(s.sha256 is not None for s in entry.sources)
                check = (f"{pinned} of {len(entry.sources)} file(s) match their pinned sha256" if pinned
                         else "no pinned checksums")
                first_use = [s.file for s in entry.sources if s.sha256 is None] if res.recorded_hashes else []
                out = FetchOutcome(entry.name, "present" if res.cached else "fetched",
                                   f"{res.path} ({check})", first_use=first_use, notes=list(res.notes))
        outcomes.append(out)
        if on_done is not None:
            on_done(out)
    return outcomes


@contextlib.contextmanager
def _dataset_guard(home: Path, name: str) -> Iterator[None]:
    """One fetch of a dataset at a time across processes (POSIX advisory lock)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - non-POSIX systems
        yield
        return
    guard = Path(home) / "downloads" / f".{name}.fetch.guard"
    guard.parent.mkdir(parents=True, exist_ok=True)
    with open(guard, "a") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def _fetch(entry: Entry, home: Path, mirror: Path | None, progress: bool, size_cap: int, force: bool,
           timeout: float, refresh: bool = False) -> FetchResult:
    """The body of `fetch`, run while holding the dataset's guard."""
    mirror = Path(mirror) if mirror is not None else None
    data_root = home / "data"
    folder = data_root / entry.name
    lock = read_lock(home)
    before = dict(lock.get(entry.name, {}))
    notes: list[str] = []
    if refresh:
        lock = {k: v for k, v in lock.items() if k != entry.name}  # forget what was recorded; pins still apply
        force = True
    changed = _local_changes(entry, lock)
    if changed:
        for file in changed:
            src = next(s for s in entry.sources if s.file == file)
            notes.append(f"{local_origin(src)} changed since it was last read: reading the new content")
        lock = {**lock, entry.name: {k: v for k, v in lock.get(entry.name, {}).items() if k not in changed}}
    if not force and not changed and _cached(entry, folder, lock):
        edited = edited_files(home, entry.name, folder)
        if not edited:
            return FetchResult(entry.name, folder, log_files(entry, folder), cached=True, recorded_hashes=False)
        notes.append(f"{', '.join(edited)} in {folder} changed since it was fetched: placing the verified "
                     "files again (edit the source instead, then fetch again)")

    downloads = home / "downloads" / entry.name
    obtained: list[tuple[Source, Path]] = []
    checks: dict[str, tuple[int, str]] = {}
    origins: dict[str, dict] = {}
    recorded = False
    for src in entry.sources:
        path, size, digest = _obtain(entry, src, downloads, mirror, lock, progress, force, timeout)
        obtained.append((src, path))
        checks[src.file] = (size, digest)
        origin = local_origin(src)
        if origin is not None and origin.is_file():
            origins[src.file] = _origin_stamp(origin)
        if lock.get(entry.name, {}).get(src.file) != {"size": size, "sha256": digest, **origins.get(src.file, {})}:
            recorded = True
        old = before.get(src.file, {}).get("sha256")
        if refresh and old is not None and old != digest:
            notes.append(f"{src.file}: sha256 changed from {old[:12]}… to {digest[:12]}… (recorded afresh)")

    data_root.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{entry.name}.tmp-", dir=data_root))
    try:
        for src, path in obtained:
            try:
                _place(entry, src, path, tmp, size_cap)
            except DataError as exc:
                raise DataError(f"{exc}; the download was moved to {_reject(path)}") from None
        log_files(entry, tmp)
        if recorded:
            _record(home, entry.name, checks, origins)
        _publish(tmp, folder)
        _write_files_manifest(home, entry.name, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return FetchResult(entry.name, folder, log_files(entry, folder), cached=False, recorded_hashes=recorded,
                       notes=notes)


# ---------------------------------------------------------------- status


def verify(entry: Entry, home: Path | None = None) -> dict[str, str]:
    """Re-hash each source's download against the lock: file → 'ok', 'mismatch', 'missing' or 'unrecorded'."""
    home = Path(home) if home is not None else home_dir()
    rec = read_lock(home).get(entry.name, {})
    downloads = home / "downloads" / entry.name
    out: dict[str, str] = {}
    for src in entry.sources:
        path = downloads / src.file
        want = rec.get(src.file)
        if not path.is_file():
            out[src.file] = "missing"
        elif not want:
            out[src.file] = "unrecorded"
        elif path.stat().st_size != want.get("size") or sha256_file(path) != want.get("sha256"):
            out[src.file] = "mismatch"
        else:
            out[src.file] = "ok"
    return out


def partial_downloads(entry: Entry, home: Path | None = None) -> list[tuple[Path, int]]:
    """`.part` files of a dataset's downloads with their sizes (kept so that an https download can resume)."""
    downloads = (Path(home) if home is not None else home_dir()) / "downloads" / entry.name
    if not downloads.is_dir():
        return []
    return [(p, p.stat().st_size) for p in sorted(downloads.glob("*.part")) if p.is_file()]


def status(entry: Entry, home: Path | None = None) -> str:
    """Cheap on-disk status without hashing: 'fetched', 'partial' or 'missing'."""
    home = Path(home) if home is not None else home_dir()
    folder = home / "data" / entry.name
    rec = read_lock(home).get(entry.name, {})
    if folder.is_dir() and all(src.file in rec for src in entry.sources):
        return "fetched"
    downloads = home / "downloads" / entry.name
    leftovers = downloads.is_dir() and any(downloads.iterdir())
    temps = (home / "data").is_dir() and any(
        fnmatch.fnmatch(p.name, f".{entry.name}.tmp-*") for p in (home / "data").iterdir()
    )
    return "partial" if folder.is_dir() or leftovers or temps else "missing"
