"""Acquire: mirror / file:// / http sources, size and sha256 checks, the lock file, safe unpacking.

External references named beside the checks:
- sha256 values are compared with Python's hashlib over the original bytes.
- Archive safety follows the "data" extraction filter of Python's tarfile
  (PEP 706, `tarfile.data_filter`): every tar this module refuses is also refused
  by that filter, except where a test below shows our rule is stricter on purpose.
- Resumable download follows HTTP range requests (RFC 9110, section 14: `Range`,
  `206 Partial Content`, `Content-Range`), served by a loopback test server.
- Real logs: the Loghub BGL 2k sample (fixture `loghub_dir`).
"""

from __future__ import annotations

import gzip
import hashlib
import http.server
import io
import json
import os
import random
import shutil
import tarfile
import threading
import zipfile
from pathlib import Path
from typing import Callable, Iterator

import pytest
from logtrial.data.acquire import FetchResult, fetch, log_files, read_lock, status, verify
from logtrial.data.registry import Entry, load_registry
from logtrial.data.unpack import unpack_archive
from logtrial.errors import DataError

# ---------------------------------------------------------------- helpers


def make_entry(name: str, sources: list[dict], logs: list[str]) -> Entry:
    """A minimal registry entry around the given sources."""
    return Entry.model_validate(
        {"name": name, "system": "test", "sources": sources, "logs": logs, "format": {"regex": r"^(?P<content>.*)$"}}
    )


def log_text(n: int, seed: int = 0) -> bytes:
    """Deterministic log-like lines (invented unit-fixture data)."""
    rng = random.Random(seed)
    words = ["relay", "sweep", "uplink", "compress", "ok", "retry", "disk", "temp"]
    return "".join(f"{i} node{rng.randrange(40)} {' '.join(rng.choices(words, k=6))}\n" for i in range(n)).encode()


def sha(data: bytes) -> str:
    """Hex sha256 of bytes (hashlib, the reference)."""
    return hashlib.sha256(data).hexdigest()


def tar_bytes(members: list[tuple[tarfile.TarInfo, bytes | None]], mode: str = "w:gz") -> bytes:
    """A tar archive (compression from `mode`) holding the given members in order."""
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode=mode) as tf:
        for info, data in members:
            if data is not None:
                info.size = len(data)
            tf.addfile(info, io.BytesIO(data) if data is not None else None)
    return buf.getvalue()


def tfile(name: str, data: bytes, mode: int = 0o644) -> tuple[tarfile.TarInfo, bytes]:
    """A regular-file tar member."""
    info = tarfile.TarInfo(name)
    info.mode = mode
    return info, data


def tlink(name: str, target: str, kind: bytes = tarfile.SYMTYPE) -> tuple[tarfile.TarInfo, None]:
    """A symbolic (default) or hard link tar member."""
    info = tarfile.TarInfo(name)
    info.type = kind
    info.linkname = target
    return info, None


def tdir(name: str) -> tuple[tarfile.TarInfo, None]:
    """A folder tar member."""
    info = tarfile.TarInfo(name)
    info.type = tarfile.DIRTYPE
    info.mode = 0o755
    return info, None


def zip_bytes(members: list[tuple[str, bytes]], method: int = zipfile.ZIP_DEFLATED) -> bytes:
    """A zip archive holding the given (name, bytes) members, names kept verbatim."""
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=method) as zf:
        for name, data in members:
            zf.writestr(zipfile.ZipInfo(name), data, compress_type=method)
    return buf.getvalue()


def tree(root: Path) -> dict[str, object]:
    """Relative path → file bytes, link target, or 'dir'."""
    out: dict[str, object] = {}
    for p in sorted(root.rglob("*")):
        rel = str(p.relative_to(root))
        if p.is_symlink():
            out[rel] = ("link", os.readlink(p))
        elif p.is_dir():
            out[rel] = "dir"
        else:
            out[rel] = p.read_bytes()
    return out


def assert_nothing_final(home: Path, name: str) -> None:
    """No dataset folder, no temp folder and no verified download of the dataset remain."""
    data = home / "data"
    assert not (data / name).exists()
    if data.exists():
        assert [p.name for p in data.iterdir()] == []
    downloads = home / "downloads" / name
    if downloads.exists():
        assert all(p.suffix in (".rejected", ".part") for p in downloads.iterdir()), list(downloads.iterdir())


LOG = log_text(300)


@pytest.fixture()
def mirror(tmp_path: Path) -> Path:
    """A mirror folder holding one log file at sys/app.log."""
    m = tmp_path / "mirror"
    (m / "sys").mkdir(parents=True)
    (m / "sys" / "app.log").write_bytes(LOG)
    return m


# ---------------------------------------------------------------- good paths


def test_mirror_fetch_records_hashes_then_uses_cache(home: Path, mirror: Path) -> None:
    entry = make_entry("demo", [{"file": "app.log", "mirror": "sys/app.log"}], ["app.log"])
    assert status(entry, home) == "missing"
    res = fetch(entry, home=home, mirror=mirror, progress=False)
    assert isinstance(res, FetchResult)
    assert res.path == home / "data" / "demo" and not res.cached and res.recorded_hashes
    assert res.files == [home / "data" / "demo" / "app.log"]
    assert res.files[0].read_bytes() == LOG
    lock_text = (home / "datasets.lock").read_text()
    lock = json.loads(lock_text)
    # reference: hashlib over the original bytes
    assert lock == {"demo": {"app.log": {"size": len(LOG), "sha256": sha(LOG)}}}
    assert lock_text == json.dumps(lock, indent=2, sort_keys=True) + "\n"
    assert status(entry, home) == "fetched"
    assert verify(entry, home) == {"app.log": "ok"}

    again = fetch(entry, home=home, mirror=mirror, progress=False)
    assert again.cached and not again.recorded_hashes and again.files == res.files


def test_changed_mirror_file_after_lock_is_refused(home: Path, mirror: Path) -> None:
    entry = make_entry("demo", [{"file": "app.log", "mirror": "sys/app.log"}], ["app.log"])
    fetch(entry, home=home, mirror=mirror, progress=False)
    (mirror / "sys" / "app.log").write_bytes(LOG + b"tampered line\n")
    changed = sha(LOG + b"tampered line\n")

    # forced refetch: the error names dataset, file, expected and actual hash; the old copy stays intact
    with pytest.raises(DataError) as err:
        fetch(entry, home=home, mirror=mirror, progress=False, force=True)
    msg = str(err.value)
    assert "demo" in msg and "app.log" in msg and f"expected {sha(LOG)}" in msg and changed in msg
    assert (home / "data" / "demo" / "app.log").read_bytes() == LOG
    assert (home / "downloads" / "demo" / "app.log.rejected").read_bytes() == LOG + b"tampered line\n"

    # a fresh machine with the same lock: nothing appears under the final names
    shutil.rmtree(home / "data")
    shutil.rmtree(home / "downloads")
    with pytest.raises(DataError, match="sha256 mismatch"):
        fetch(entry, home=home, mirror=mirror, progress=False)
    assert_nothing_final(home, "demo")
    assert (home / "downloads" / "demo" / "app.log.rejected").exists()
    assert read_lock(home)["demo"]["app.log"]["sha256"] == sha(LOG)


def test_file_url_source(home: Path, tmp_path: Path) -> None:
    src = tmp_path / "elsewhere" / "app.log"
    src.parent.mkdir()
    src.write_bytes(LOG)
    entry = make_entry(
        "demo", [{"file": "app.log", "url": src.as_uri(), "sha256": sha(LOG), "size": len(LOG)}], ["app.log"]
    )
    res = fetch(entry, progress=False)  # home from LOGTRIAL_HOME (set by the `home` fixture)
    assert res.path == home / "data" / "demo"
    assert res.files[0].read_bytes() == LOG and res.recorded_hashes


def test_explicit_mirror_folder_feeds_a_url_source(home: Path, tmp_path: Path) -> None:
    """A pre-downloaded archive in --mirror is used instead of the URL (which is unreachable here)."""
    m = tmp_path / "predownloaded"
    m.mkdir()
    archive = zip_bytes([("top/app.log", LOG), ("top/labels/anomaly.csv", b"id,label\n")])
    (m / "Sys.zip").write_bytes(archive)
    entry = make_entry("sys", [{"file": "Sys.zip", "url": "https://127.0.0.1:9/none/Sys.zip", "unpack": "zip"}],
                       ["app.log"])
    res = fetch(entry, home=home, mirror=m, progress=False)
    # a bare log name also matches inside the archive's single top folder
    assert res.files == [home / "data" / "sys" / "top" / "app.log"]
    assert (home / "data" / "sys" / "top" / "labels" / "anomaly.csv").exists()
    assert read_lock(home)["sys"]["Sys.zip"]["sha256"] == sha(archive)


@pytest.mark.parametrize("mode,unpack", [("w:gz", "tar"), ("w:bz2", "tar"), ("w:xz", "tar"), ("w", "tar")])
def test_tar_all_compressions_match_reference_extraction(home: Path, tmp_path: Path, mode: str, unpack: str) -> None:
    members = [
        tdir("pkg"),
        tfile("pkg/app.log", LOG),
        tfile("pkg/bin/run.sh", b"#!/bin/sh\necho ok\n", 0o755),
        tlink("pkg/current.log", "app.log"),
        tlink("pkg/copy.log", "pkg/app.log", tarfile.LNKTYPE),
    ]
    data = tar_bytes(members, mode)
    m = tmp_path / "m"
    m.mkdir()
    (m / "pkg.tar").write_bytes(data)
    entry = make_entry("pkg", [{"file": "pkg.tar", "mirror": "pkg.tar", "unpack": unpack}], ["pkg/*.log"])
    res = fetch(entry, home=home, mirror=m, progress=False)
    assert [p.name for p in res.files] == ["app.log", "copy.log", "current.log"]
    assert os.stat(res.path / "pkg" / "bin" / "run.sh").st_mode & 0o100
    # reference: Python's tarfile extraction with the PEP 706 "data" filter gives the same tree
    ref = tmp_path / "ref"
    with tarfile.open(fileobj=io.BytesIO(data)) as tf:
        tf.extractall(ref, filter="data")
    assert tree(res.path) == tree(ref)


def test_zip_and_gzip_match_reference_extraction(home: Path, tmp_path: Path) -> None:
    zdata = zip_bytes([("a/", b""), ("a/one.log", LOG), ("a/two.log", log_text(50, seed=1))])
    gdata = gzip.compress(log_text(80, seed=2), mtime=0)
    m = tmp_path / "m"
    m.mkdir()
    (m / "logs.zip").write_bytes(zdata)
    (m / "extra.log.gz").write_bytes(gdata)
    entry = make_entry(
        "mixed",
        [{"file": "logs.zip", "mirror": "logs.zip", "unpack": "zip"},
         {"file": "extra.log.gz", "mirror": "extra.log.gz", "unpack": "gzip"}],
        ["a/one.log", "a/two.log", "extra.log"],
    )
    res = fetch(entry, home=home, mirror=m, progress=False)
    assert [p.relative_to(res.path).as_posix() for p in res.files] == ["a/one.log", "a/two.log", "extra.log"]
    # references: zipfile.extractall and gzip.decompress
    ref = tmp_path / "ref"
    with zipfile.ZipFile(io.BytesIO(zdata)) as zf:
        zf.extractall(ref)
    (ref / "extra.log").write_bytes(gzip.decompress(gdata))
    assert tree(res.path) == tree(ref)


# ---------------------------------------------------------------- bad inputs: size, hash, mirror


def test_wrong_sha256_in_registry(home: Path, mirror: Path) -> None:
    wrong = "0" * 64
    entry = make_entry("demo", [{"file": "app.log", "mirror": "sys/app.log", "sha256": wrong}], ["app.log"])
    with pytest.raises(DataError) as err:
        fetch(entry, home=home, mirror=mirror, progress=False)
    msg = str(err.value)
    assert "app.log" in msg and f"expected {wrong}" in msg and sha(LOG) in msg and ".rejected" in msg
    assert_nothing_final(home, "demo")
    assert not (home / "datasets.lock").exists()
    assert status(entry, home) == "partial"


def test_wrong_size_in_registry(home: Path, mirror: Path) -> None:
    entry = make_entry("demo", [{"file": "app.log", "mirror": "sys/app.log", "size": len(LOG) + 1}], ["app.log"])
    with pytest.raises(DataError) as err:
        fetch(entry, home=home, mirror=mirror, progress=False)
    msg = str(err.value)
    assert "app.log" in msg and f"expected {len(LOG) + 1} bytes" in msg and f"got {len(LOG)} bytes" in msg
    assert_nothing_final(home, "demo")


def test_missing_in_mirror_names_folder_and_file(home: Path, tmp_path: Path) -> None:
    empty = tmp_path / "empty-mirror"
    empty.mkdir()
    entry = make_entry("demo", [{"file": "app.log", "mirror": "sys/app.log"}], ["app.log"])
    with pytest.raises(DataError) as err:
        fetch(entry, home=home, mirror=empty, progress=False)
    msg = str(err.value)
    assert str(empty) in msg and "app.log" in msg and "mirror folder" in msg
    assert_nothing_final(home, "demo")


def test_log_file_missing_after_unpack(home: Path, mirror: Path) -> None:
    entry = make_entry("demo", [{"file": "app.log", "mirror": "sys/app.log"}], ["app.log", "other.log"])
    with pytest.raises(DataError, match=r"expected log file\(s\) \['other.log'\]"):
        fetch(entry, home=home, mirror=mirror, progress=False)
    assert not (home / "data" / "demo").exists()
    assert not (home / "datasets.lock").exists()


def test_corrupt_lock_file_names_line(home: Path, mirror: Path) -> None:
    home.mkdir(parents=True)
    (home / "datasets.lock").write_text('{\n  "demo": {\n  oops\n}\n')
    entry = make_entry("demo", [{"file": "app.log", "mirror": "sys/app.log"}], ["app.log"])
    with pytest.raises(DataError, match=r"datasets.lock: line 3: invalid JSON"):
        fetch(entry, home=home, mirror=mirror, progress=False)


# ---------------------------------------------------------------- bad archives

BIG = log_text(400, seed=3)


def _truncated_gzip() -> tuple[str, bytes, str]:
    data = gzip.compress(BIG, mtime=0)
    return "big.log.gz", data[: len(data) // 2], "gzip"


def _truncated_targz() -> tuple[str, bytes, str]:
    data = tar_bytes([tfile("big.log", BIG), tfile("b.log", LOG)])
    return "logs.tar.gz", data[: int(len(data) * 0.6)], "tar"


def _truncated_tar() -> tuple[str, bytes, str]:
    data = tar_bytes([tfile("big.log", BIG)], "w")
    return "logs.tar", data[: 512 + len(BIG) // 2], "tar"


def _corrupt_zip() -> tuple[str, bytes, str]:
    data = bytearray(zip_bytes([("app.log", LOG)], zipfile.ZIP_STORED))
    i = data.index(LOG[:40]) + 100
    data[i : i + 8] = b"XXXXXXXX"  # damage the stored bytes: the CRC-32 no longer matches
    return "logs.zip", bytes(data), "zip"


def _cut_zip() -> tuple[str, bytes, str]:
    data = zip_bytes([("app.log", LOG)])
    return "logs.zip", data[: len(data) // 2], "zip"


def _zip_dotdot() -> tuple[str, bytes, str]:
    return "logs.zip", zip_bytes([("app.log", LOG), ("../evil.txt", b"pwned\n")]), "zip"


def _tar_absolute() -> tuple[str, bytes, str]:
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), tfile("/tmp/evil_abs.txt", b"pwned\n")]), "tar"


def _tar_dotdot() -> tuple[str, bytes, str]:
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), tfile("sub/../../evil.txt", b"pwned\n")]), "tar"


def _tar_symlink_escape() -> tuple[str, bytes, str]:
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), tlink("evil_link", "../../outside")]), "tar"


def _tar_symlink_absolute() -> tuple[str, bytes, str]:
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), tlink("evil_link", "/etc")]), "tar"


def _tar_symlink_then_write() -> tuple[str, bytes, str]:
    return "logs.tar.gz", tar_bytes([tlink("evil_dir", ".."), tfile("evil_dir/evil.txt", b"pwned\n")]), "tar"


def _tar_deferred_symlink() -> tuple[str, bytes, str]:
    # "b" looks inside while "a" does not exist yet; once "a" -> "." exists, "b" resolves to ../evil
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), tlink("b", "a/../evil"), tlink("a", ".")]), "tar"


def _tar_hardlink_escape() -> tuple[str, bytes, str]:
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), tlink("evil_hard", "../outside.txt", tarfile.LNKTYPE)]), "tar"


def _tar_device() -> tuple[str, bytes, str]:
    info = tarfile.TarInfo("evil_null")
    info.type, info.devmajor, info.devminor = tarfile.CHRTYPE, 1, 3
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), (info, None)]), "tar"


def _tar_fifo() -> tuple[str, bytes, str]:
    info = tarfile.TarInfo("evil_fifo")
    info.type = tarfile.FIFOTYPE
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), (info, None)]), "tar"


def _tar_over_cap() -> tuple[str, bytes, str]:
    return "logs.tar.gz", tar_bytes([tfile("app.log", LOG), tfile("huge.log", b"x" * 200_000)]), "tar"


def _zip_over_cap() -> tuple[str, bytes, str]:
    return "logs.zip", zip_bytes([("app.log", LOG), ("huge.log", b"x" * 200_000)]), "zip"


def _gzip_bomb() -> tuple[str, bytes, str]:
    return "app.log.gz", gzip.compress(b"\0" * 3_000_000, mtime=0), "gzip"


CAP = 150_000  # size cap used for the bad-archive cases (all good members are far below it)

# case → (builder, words the message must contain besides the archive name)
BAD: dict[str, tuple[Callable[[], tuple[str, bytes, str]], list[str]]] = {
    "truncated_gzip": (_truncated_gzip, ["truncated or corrupt", "expected a complete"]),
    "truncated_targz": (_truncated_targz, ["truncated or corrupt", "expected a complete"]),
    "truncated_tar": (_truncated_tar, ["big.log", "truncated or corrupt", "expected a complete"]),
    "corrupt_zip": (_corrupt_zip, ["app.log", "truncated or corrupt", "expected a complete"]),
    "cut_zip": (_cut_zip, ["not a readable zip archive", "expected a zip file"]),
    "zip_dotdot": (_zip_dotdot, ["../evil.txt", "'..' component refused", "expected a path inside"]),
    "tar_absolute": (_tar_absolute, ["/tmp/evil_abs.txt", "absolute path refused", "expected a path relative"]),
    "tar_dotdot": (_tar_dotdot, ["sub/../../evil.txt", "'..' component refused", "expected a path inside"]),
    "tar_symlink_escape": (_tar_symlink_escape, ["evil_link", "leaves the target", "expected a target inside"]),
    "tar_symlink_absolute": (_tar_symlink_absolute, ["evil_link", "absolute path", "expected a target inside"]),
    "tar_symlink_then_write": (_tar_symlink_then_write, ["evil_dir", "leaves the target", "expected a target inside"]),
    "tar_deferred_symlink": (_tar_deferred_symlink, ["'b'", "resolves outside", "expected a target inside"]),
    "tar_hardlink_escape": (_tar_hardlink_escape, ["evil_hard", "leaves the target", "expected a file inside"]),
    "tar_device": (_tar_device, ["evil_null", "device or fifo refused", "expected files and folders"]),
    "tar_fifo": (_tar_fifo, ["evil_fifo", "device or fifo refused", "expected files and folders"]),
    "tar_over_cap": (_tar_over_cap, ["huge.log", "size cap", f"expected at most {CAP} bytes"]),
    "zip_over_cap": (_zip_over_cap, ["huge.log", "size cap", f"expected at most {CAP} bytes"]),
    "gzip_bomb": (_gzip_bomb, ["app.log", "decompressed data exceeds the size cap", f"expected at most {CAP}"]),
}


def _escapees(root: Path) -> list[Path]:
    return [p for p in root.rglob("*evil*") if "mirror" not in p.parts and not p.name.endswith(".rejected")]


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_archive_is_refused_and_leaves_nothing(case: str, home: Path, tmp_path: Path) -> None:
    build, words = BAD[case]
    fname, data, unpack = build()
    m = tmp_path / "mirror"
    m.mkdir()
    (m / fname).write_bytes(data)
    entry = make_entry("bad", [{"file": fname, "mirror": fname, "unpack": unpack}], ["**/*.log"])
    with pytest.raises(DataError) as err:
        fetch(entry, home=home, mirror=m, progress=False, size_cap=CAP)
    msg = str(err.value)
    assert fname in msg, msg
    for word in words:
        assert word in msg, (word, msg)
    assert_nothing_final(home, "bad")
    assert (home / "downloads" / "bad" / f"{fname}.rejected").read_bytes() == data
    assert not (home / "datasets.lock").exists()
    assert _escapees(tmp_path) == []
    assert not Path("/tmp/evil_abs.txt").exists()


# Cases where the PEP 706 "data" filter must also refuse (its exception classes are the reference).
TAR_REFERENCE = {
    "truncated_targz": (tarfile.ReadError, EOFError),
    "truncated_tar": (tarfile.ReadError, EOFError),
    "tar_dotdot": (tarfile.OutsideDestinationError,),
    "tar_symlink_escape": (tarfile.LinkOutsideDestinationError,),
    "tar_symlink_absolute": (tarfile.AbsoluteLinkError,),
    "tar_symlink_then_write": (tarfile.LinkOutsideDestinationError,),
    "tar_hardlink_escape": (tarfile.LinkOutsideDestinationError,),
    "tar_device": (tarfile.SpecialFileError,),
    "tar_fifo": (tarfile.SpecialFileError,),
}


@pytest.mark.parametrize("case", sorted(TAR_REFERENCE))
def test_tar_refusals_agree_with_pep706_data_filter(case: str, tmp_path: Path) -> None:
    fname, data, _ = BAD[case][0]()
    archive = tmp_path / fname
    archive.write_bytes(data)
    with pytest.raises(DataError):
        unpack_archive(archive, tmp_path / "ours", "tar", CAP)
    # reference: Python's tarfile with filter="data" (PEP 706) refuses the same archive
    with pytest.raises(TAR_REFERENCE[case]):
        with tarfile.open(archive) as tf:
            tf.extractall(tmp_path / "ref", filter="data")


def test_where_we_are_stricter_than_the_data_filter(tmp_path: Path) -> None:
    """Two refusals go beyond PEP 706; the reference extraction shows why each is still wanted."""
    # absolute member names: the data filter strips the leading "/" and extracts; we refuse outright
    fname, data, _ = _tar_absolute()
    with tarfile.open(fileobj=io.BytesIO(data)) as tf:
        tf.extractall(tmp_path / "ref_abs", filter="data")
    assert (tmp_path / "ref_abs" / "tmp" / "evil_abs.txt").exists()
    # a link that looks inside when written but resolves outside once a later link exists:
    # the data filter lets it through and the result points outside the destination
    fname, data, _ = _tar_deferred_symlink()
    ref = tmp_path / "ref_deferred"
    with tarfile.open(fileobj=io.BytesIO(data)) as tf:
        tf.extractall(ref, filter="data")
    assert not os.path.realpath(ref / "b").startswith(str(ref.resolve()) + os.sep)
    archive = tmp_path / fname
    archive.write_bytes(data)
    with pytest.raises(DataError, match="resolves outside"):
        unpack_archive(archive, tmp_path / "ours", "tar", CAP)


# ---------------------------------------------------------------- http(s) with resume


class _RangeHandler(http.server.BaseHTTPRequestHandler):
    """Serves one payload; honours `Range: bytes=N-`; can cut the first response after some bytes."""

    payload: bytes = b""
    cut_first_after: int | None = None
    honour_range: bool = True
    seen: list[dict[str, str | None]] = []

    def log_message(self, *args: object) -> None:
        return

    def do_GET(self) -> None:  # noqa: N802 - name required by BaseHTTPRequestHandler
        cls = type(self)
        rng = self.headers.get("Range")
        cls.seen.append({"path": self.path, "range": rng})
        if self.path != "/files/data.tar.gz":
            self.send_error(404, "not found")
            return
        total = len(cls.payload)
        start = 0
        if rng and cls.honour_range and rng.startswith("bytes=") and rng.endswith("-"):
            start = int(rng[6:-1])
            if start >= total:
                self.send_response(416)
                self.send_header("Content-Range", f"bytes */{total}")
                self.send_header("Content-Length", "0")
                self.end_headers()
                return
            self.send_response(206)
            self.send_header("Content-Range", f"bytes {start}-{total - 1}/{total}")
        else:
            self.send_response(200)
        self.send_header("Content-Length", str(total - start))
        self.send_header("Content-Type", "application/octet-stream")
        self.end_headers()
        body = cls.payload[start:]
        if cls.cut_first_after is not None:
            body = body[: cls.cut_first_after]
            cls.cut_first_after = None
            self.close_connection = True
        self.wfile.write(body)
        self.wfile.flush()


@pytest.fixture()
def server() -> Iterator[tuple[str, type[_RangeHandler]]]:
    """A loopback HTTP server in a thread (127.0.0.1 only), stopped after the test."""
    handler = type("Handler", (_RangeHandler,), {"seen": [], "cut_first_after": None, "honour_range": True})
    httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=httpd.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{httpd.server_address[1]}", handler
    finally:
        httpd.shutdown()
        httpd.server_close()
        thread.join(timeout=5)


ARCHIVE = tar_bytes([tfile("node/app.log", log_text(3000, seed=4)), tfile("node/other.log", LOG)])


def test_http_download_resumes_from_part_file(home: Path, server: tuple[str, type[_RangeHandler]]) -> None:
    base, handler = server
    handler.payload = ARCHIVE
    cut = len(ARCHIVE) // 3
    handler.cut_first_after = cut
    entry = make_entry(
        "web", [{"file": "data.tar.gz", "url": f"{base}/files/data.tar.gz", "unpack": "tar"}], ["app.log"]
    )
    with pytest.raises(DataError) as err:
        fetch(entry, home=home, progress=False, timeout=10)
    msg = str(err.value)
    assert "interrupted" in msg and f"after {cut} of {len(ARCHIVE)} bytes" in msg and "resume" in msg
    part = home / "downloads" / "web" / "data.tar.gz.part"
    assert part.read_bytes() == ARCHIVE[:cut]
    assert_nothing_final(home, "web")
    assert status(entry, home) == "partial"

    res = fetch(entry, home=home, progress=False, timeout=10)
    # RFC 9110 range request: the second request asked only for the missing tail
    assert [s["range"] for s in handler.seen] == [None, f"bytes={cut}-"]
    download = home / "downloads" / "web" / "data.tar.gz"
    assert download.read_bytes() == ARCHIVE and not part.exists()
    # reference: hashlib over the served bytes
    assert read_lock(home)["web"]["data.tar.gz"] == {"size": len(ARCHIVE), "sha256": sha(ARCHIVE)}
    assert res.files == [res.path / "node" / "app.log"]
    assert res.files[0].read_bytes() == log_text(3000, seed=4)


def test_http_server_ignoring_range_restarts_cleanly(home: Path, server: tuple[str, type[_RangeHandler]]) -> None:
    base, handler = server
    handler.payload = ARCHIVE
    handler.honour_range = False
    part = home / "downloads" / "web" / "data.tar.gz.part"
    part.parent.mkdir(parents=True)
    part.write_bytes(b"stale bytes from an older attempt")
    entry = make_entry("web", [{"file": "data.tar.gz", "url": f"{base}/files/data.tar.gz", "unpack": "tar",
                                "sha256": sha(ARCHIVE)}], ["app.log"])
    fetch(entry, home=home, progress=False, timeout=10)
    assert handler.seen[0]["range"] == "bytes=33-"
    assert (home / "downloads" / "web" / "data.tar.gz").read_bytes() == ARCHIVE


def test_http_complete_part_answered_416_is_verified(home: Path, server: tuple[str, type[_RangeHandler]]) -> None:
    base, handler = server
    handler.payload = ARCHIVE
    part = home / "downloads" / "web" / "data.tar.gz.part"
    part.parent.mkdir(parents=True)
    part.write_bytes(ARCHIVE)
    entry = make_entry("web", [{"file": "data.tar.gz", "url": f"{base}/files/data.tar.gz", "unpack": "tar"}],
                       ["app.log"])
    res = fetch(entry, home=home, progress=False, timeout=10)
    assert [s["range"] for s in handler.seen] == [f"bytes={len(ARCHIVE)}-"]
    assert res.files[0].name == "app.log"


def test_http_error_is_clear(home: Path, server: tuple[str, type[_RangeHandler]]) -> None:
    base, _ = server
    entry = make_entry("web", [{"file": "x.tar.gz", "url": f"{base}/files/missing.tar.gz", "unpack": "tar"}],
                       ["app.log"])
    with pytest.raises(DataError, match=r"missing.tar.gz: download failed: HTTP 404"):
        fetch(entry, home=home, progress=False, timeout=10)
    assert_nothing_final(home, "web")


# ---------------------------------------------------------------- real logs


def test_fetch_bgl_2k_from_shared_mirror(home: Path, loghub_dir: Path) -> None:
    entry = load_registry()["bgl-2k"]
    res = fetch(entry, home=home, mirror=loghub_dir, progress=False)
    original = (loghub_dir / "BGL" / "BGL_2k.log").read_bytes()
    got = res.files[0].read_bytes()
    # reference: hashlib over the original sample; Loghub's 2k samples have 2,000 lines
    assert hashlib.sha256(got).hexdigest() == hashlib.sha256(original).hexdigest()
    assert read_lock(home)["bgl-2k"]["BGL_2k.log"]["sha256"] == hashlib.sha256(original).hexdigest()
    assert len(got.splitlines()) == 2000
    assert log_files(entry, res.path) == res.files
    assert verify(entry, home) == {"BGL_2k.log": "ok", "BGL_2k.log_structured.csv": "ok",
                                   "BGL_2k.log_templates.csv": "ok", "BGL_templates.csv": "ok"}
    assert fetch(entry, home=home, mirror=loghub_dir, progress=False).cached


def _fetch_in_child(args: tuple) -> str:
    entry_doc, home, mirror_dir_ = args
    entry = Entry.model_validate(entry_doc)
    return str(fetch(entry, home=Path(home), mirror=Path(mirror_dir_), progress=False).path)


def test_concurrent_fetches_of_one_dataset_take_turns(tmp_path: Path, mirror: Path) -> None:
    import multiprocessing

    entry = make_entry("demo", [{"file": "app.log", "mirror": "sys/app.log"}], ["app.log"])
    home = tmp_path / "home"
    with multiprocessing.get_context("spawn").Pool(3) as pool:
        paths = pool.map(_fetch_in_child, [(entry.model_dump(mode="json"), str(home), str(mirror))] * 3)
    assert len(set(paths)) == 1
    assert (Path(paths[0]) / "app.log").read_bytes() == LOG
    assert read_lock(home)["demo"]["app.log"]["sha256"] == sha(LOG)


def test_flat_mirror_folder_from_the_environment(tmp_path: Path, monkeypatch) -> None:
    flat = tmp_path / "flat"
    flat.mkdir()
    (flat / "app.log").write_bytes(LOG)
    entry = make_entry("web", [{"file": "app.log", "url": "https://example.invalid/app.log"}], ["app.log"])
    monkeypatch.setenv("LOGTRIAL_MIRROR", str(flat))
    res = fetch(entry, home=tmp_path / "home", progress=False)
    assert (res.path / "app.log").read_bytes() == LOG


def test_two_sources_may_not_provide_the_same_file(tmp_path: Path) -> None:
    m = tmp_path / "m"
    (m / "a").mkdir(parents=True)
    (m / "b").mkdir(parents=True)
    (m / "a" / "app.log").write_bytes(LOG)
    (m / "b" / "app.log").write_bytes(LOG + b"more\n")
    entry = make_entry("dup", [{"file": "app.log", "mirror": "a/app.log"}, {"file": "app.log", "mirror": "b/app.log"}],
                       ["app.log"])
    with pytest.raises(DataError, match="already provided by another source"):
        fetch(entry, home=tmp_path / "home", mirror=m, progress=False)
    assert not (tmp_path / "home" / "data" / "dup").exists()
