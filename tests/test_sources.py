"""Public sources and pinned checksums: the Loghub samples fetched over HTTP, tested without internet.

A copy of the shared sample folder is served by a loopback HTTP server (127.0.0.1
only) at the same relative paths as the public repository; the registry's base
address is pointed at it through its environment variable (LOGTRIAL_LOGHUB_URL).
External reference for every checksum: hashlib over the published files in the
shared sample folder.
"""

from __future__ import annotations

import hashlib
import http.server
import shutil
import socket
import threading
from pathlib import Path
from typing import Iterator

import pytest
from logtrial.cli import main
from logtrial.data.acquire import fetch, fetch_many, read_lock
from logtrial.data.registry import (
    SessionEntry,
    base_addresses,
    load_groups,
    load_registry,
    mirror_dir,
    mirror_folder,
    select_entries,
)
from logtrial.errors import ConfigError, DataError

SYSTEM_OF = {"bgl-2k": "BGL", "hdfs-2k": "HDFS", "apache-2k": "Apache"}


def sha(data: bytes) -> str:
    """Reference sha256 (hashlib) of some bytes."""
    return hashlib.sha256(data).hexdigest()


class _FolderHandler(http.server.BaseHTTPRequestHandler):
    """Serves files of a folder at their relative paths; honours `Range: bytes=N-`; can cut one response."""

    root: Path = Path(".")
    cut: dict[str, int] = {}
    seen: list[tuple[str, str | None]] = []

    def log_message(self, *args: object) -> None:
        return

    def do_GET(self) -> None:  # noqa: N802 - name required by BaseHTTPRequestHandler
        cls = type(self)
        rng = self.headers.get("Range")
        cls.seen.append((self.path, rng))
        path = cls.root / self.path.lstrip("/")
        if ".." in Path(self.path).parts or not path.is_file():
            self.send_error(404, "Not Found")
            return
        data = path.read_bytes()
        start = int(rng[6:-1]) if rng and rng.startswith("bytes=") and rng.endswith("-") else 0
        if start >= len(data) > 0:
            self.send_response(416)
            self.send_header("Content-Range", f"bytes */{len(data)}")
            self.send_header("Content-Length", "0")
            self.end_headers()
            return
        self.send_response(206 if start else 200)
        if start:
            self.send_header("Content-Range", f"bytes {start}-{len(data) - 1}/{len(data)}")
        self.send_header("Content-Length", str(len(data) - start))
        self.end_headers()
        body = data[start:]
        if self.path in cls.cut:
            body = body[: cls.cut.pop(self.path)]  # the connection drops part-way, once
            self.close_connection = True
        self.wfile.write(body)
        self.wfile.flush()


@pytest.fixture()
def served(loghub_dir: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, home: Path
           ) -> Iterator[tuple[Path, type[_FolderHandler]]]:
    """A copy of the sample folder served on 127.0.0.1; the registry's `loghub` base points at it; no mirror."""
    root = tmp_path / "served"
    shutil.copytree(loghub_dir, root)
    for p in root.rglob("*"):
        p.chmod(0o755 if p.is_dir() else 0o644)  # the shared copy is read-only; tests alter theirs
    handler = type("Handler", (_FolderHandler,), {"root": root, "cut": {}, "seen": []})
    httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=httpd.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    thread.start()
    monkeypatch.setenv("LOGTRIAL_LOGHUB_URL", f"http://127.0.0.1:{httpd.server_address[1]}/")
    monkeypatch.delenv("LOGTRIAL_MIRROR", raising=False)
    try:
        yield root, handler
    finally:
        httpd.shutdown()
        httpd.server_close()
        thread.join(timeout=5)


# ---------------------------------------------------------------- registry: sources and pins


def test_every_entry_has_a_public_source(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("LOGTRIAL_LOGHUB_URL", raising=False)
    reg = load_registry()
    assert base_addresses() == {"loghub": "https://raw.githubusercontent.com/logpai/loghub/master"}
    for name, entry in reg.items():
        if entry.generator is not None:
            continue  # built-in simulation: generated, nothing to fetch
        if isinstance(entry, SessionEntry):
            continue  # preprocessed session files are read from a folder of the user's (no download)
        assert entry.sources, name
        for src in entry.sources:
            assert src.url and src.url.startswith("https://"), (name, src.file)
    bgl = reg["bgl-2k"].sources[0]
    assert bgl.url == "https://raw.githubusercontent.com/logpai/loghub/master/BGL/BGL_2k.log"


def test_every_sample_file_is_pinned_to_the_published_bytes(loghub_dir: Path) -> None:
    reg = load_registry()
    samples = load_groups()["samples"]
    assert len(samples) == 16 and all(n.endswith("-2k") for n in samples)
    covered = set()
    for name in samples:
        for src in reg[name].sources:
            assert src.base == "loghub" and src.size is not None and src.sha256 is not None, (name, src.file)
            data = (loghub_dir / src.mirror).read_bytes()
            # reference: hashlib over the published file
            assert (src.size, src.sha256) == (len(data), sha(data)), (name, src.file)
            covered.add(src.mirror)
    # the repository layout: every file of every system folder is a pinned source
    published = {p.relative_to(loghub_dir).as_posix() for p in loghub_dir.glob("*/*") if p.is_file()}
    assert covered == published
    assert all(any(f.endswith(s) for f in covered) for s in ("_2k.log", "_structured.csv", "_templates.csv"))


def test_base_address_follows_its_environment_variable(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("LOGTRIAL_LOGHUB_URL", "http://127.0.0.1:8/copy/")
    assert load_registry()["hdfs-2k"].sources[1].url == "http://127.0.0.1:8/copy/HDFS/HDFS_2k.log_structured.csv"
    monkeypatch.setenv("LOGTRIAL_LOGHUB_URL", "ftp://example.invalid/x")
    with pytest.raises(ConfigError, match=r"environment variable LOGTRIAL_LOGHUB_URL: expected an address"):
        load_registry()


def _registry(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "extra.yaml"
    path.write_text(text)
    return path


ENTRY = "    system: X\n    logs: [a.log]\n    format: {regex: '^(?P<content>.*)$'}\n"


@pytest.mark.parametrize(
    ("text", "needle"),
    [
        ("datasets:\n  mine:\n    sources: [{file: a.log, base: nowhere, mirror: a.log}]\n" + ENTRY,
         r"dataset 'mine': sources.0.base: unknown base 'nowhere'"),
        ("datasets:\n  mine:\n    sources: [{file: a.log, base: loghub, url: 'https://x.org/a'}]\n" + ENTRY,
         r"needs `mirror`, the file's path under the base address"),
        ("datasets:\n  mine:\n    sources: [{file: a.log, base: loghub, mirror: a.log, url: 'https://x.org/a'}]\n"
         + ENTRY, r"dataset 'mine': sources.0: give `url` or `base`, not both"),
        ("bases:\n  mine: {url: 'gopher://x'}\ndatasets: {}\n", r"bases.mine.url: expected an address"),
        ("bases:\n  mine: {url: 'https://x.org', envvar: X}\ndatasets: {}\n", r"bases.mine: expected \{url"),
        ("bases:\n  mine: {url: 'https://x.org', env: 'lower case'}\ndatasets: {}\n",
         r"bases.mine.env: expected an environment variable name"),
    ],
)
def test_bad_base_settings_name_file_and_field(tmp_path: Path, text: str, needle: str) -> None:
    path = _registry(tmp_path, text)
    with pytest.raises(ConfigError, match=needle) as err:
        load_registry([path])
    assert str(path) in str(err.value)


@pytest.mark.parametrize(
    ("groups", "needle"),
    [
        ("groups:\n  mine: [bgl-2k, nope]\n", r"groups.mine: unknown dataset\(s\) \['nope'\]"),
        ("groups:\n  bgl: [bgl-2k]\n", r"groups.bgl: the name is already a dataset"),
        ("groups:\n  mine: []\n", r"groups.mine: expected a non-empty list"),
    ],
)
def test_bad_groups_are_refused(tmp_path: Path, groups: str, needle: str) -> None:
    path = _registry(tmp_path, groups + "datasets: {}\n")
    with pytest.raises(ConfigError, match=needle):
        load_groups([path])


def test_select_entries_expands_groups_once_and_suggests_names() -> None:
    reg, groups = load_registry(), load_groups()
    chosen = select_entries(["bgl-2k", "samples", "bgl"], reg, groups)
    assert [e.name for e in chosen][:2] == ["bgl-2k", "android-2k"] and len(chosen) == 17
    with pytest.raises(ConfigError, match=r"unknown dataset or group 'sampels'.*Did you mean: samples"):
        select_entries(["sampels"], reg, groups)


def test_no_default_mirror_folder(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("LOGTRIAL_MIRROR", raising=False)
    assert mirror_folder() is None
    with pytest.raises(ConfigError, match=r"no mirror folder set: pass --mirror DIR or set LOGTRIAL_MIRROR"):
        mirror_dir()
    monkeypatch.setenv("LOGTRIAL_MIRROR", "/some/where")
    assert mirror_folder() == Path("/some/where") and mirror_dir("/else") == Path("/else")


def test_mirror_only_source_without_a_mirror_folder_says_what_to_set(
        home: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("LOGTRIAL_MIRROR", raising=False)
    path = _registry(tmp_path, "datasets:\n  mine:\n    sources: [{file: a.log, mirror: sub/a.log}]\n" + ENTRY)
    with pytest.raises(DataError, match=r"a.log has no download address and no mirror folder is set.*sub/a.log"):
        fetch(load_registry([path])["mine"], home=home, progress=False)


# ---------------------------------------------------------------- fetching over the loopback server


def test_fetch_several_over_http_matches_the_pins(served, home: Path, loghub_dir: Path, capsys) -> None:
    root, handler = served
    assert main(["fetch", "bgl-2k", "hdfs-2k"]) == 0
    out = capsys.readouterr().out
    assert "bgl-2k: fetched and verified:" in out and "hdfs-2k: fetched and" in out
    assert "4 of 4 file(s) match their pinned sha256" in out
    assert "2 fetched, 0 failed" in out and "trust on first use" not in out
    asked = sorted(p for p, _ in handler.seen)
    assert asked == sorted("/" + s.mirror for n in ("bgl-2k", "hdfs-2k") for s in load_registry()[n].sources)
    lock = read_lock(home)
    for name in ("bgl-2k", "hdfs-2k"):
        for src in load_registry()[name].sources:
            published = (loghub_dir / src.mirror).read_bytes()
            assert (home / "data" / name / src.file).read_bytes() == published
            assert lock[name][src.file] == {"size": len(published), "sha256": sha(published)}
    # a second run finds them present and asks the server for nothing
    handler.seen.clear()
    assert main(["fetch", "hdfs-2k", "bgl-2k"]) == 0
    out = capsys.readouterr().out
    assert "hdfs-2k: already present" in out and "bgl-2k: already present" in out and "2 present" in out
    assert handler.seen == []


def test_mirror_folder_is_the_offline_path(served, home: Path, loghub_dir: Path, capsys) -> None:
    _, handler = served
    assert main(["fetch", "apache-2k", "--mirror", str(loghub_dir)]) == 0
    assert handler.seen == []  # nothing downloaded
    assert "apache-2k: fetched and verified:" in capsys.readouterr().out


def test_interrupted_download_resumes(served, home: Path, loghub_dir: Path) -> None:
    _, handler = served
    entry = load_registry()["bgl-2k"]
    size = entry.sources[0].size
    cut = size // 3
    handler.cut["/BGL/BGL_2k.log"] = cut
    with pytest.raises(DataError, match=rf"interrupted after {cut} of {size} bytes.*run the fetch again to resume"):
        fetch(entry, home=home, progress=False, timeout=10)
    part = home / "downloads" / "bgl-2k" / "BGL_2k.log.part"
    assert part.stat().st_size == cut and not (home / "data" / "bgl-2k").exists()

    handler.seen.clear()
    res = fetch(entry, home=home, progress=False, timeout=10)
    # RFC 9110 range request: only the missing tail of the log was asked for
    assert ("/BGL/BGL_2k.log", f"bytes={cut}-") in handler.seen
    assert not part.exists()
    published = (loghub_dir / "BGL" / "BGL_2k.log").read_bytes()
    assert sha(res.files[0].read_bytes()) == entry.sources[0].sha256 == sha(published)


def test_changed_published_file_is_refused(served, home: Path, capsys) -> None:
    root, _ = served
    served_log = root / "BGL" / "BGL_2k.log"
    changed = served_log.read_bytes().replace(b"KERNDTLB", b"KERNDTLX", 1)
    served_log.write_bytes(changed)
    pinned = load_registry()["bgl-2k"].sources[0].sha256
    assert main(["fetch", "bgl-2k"]) == 1
    captured = capsys.readouterr()
    msg = captured.out
    assert f"sha256 mismatch: expected {pinned} (from registry), got {sha(changed)}" in msg
    assert "run the fetch again" in msg and "replace that copy with the published file" in msg
    assert (home / "downloads" / "bgl-2k" / "BGL_2k.log.rejected").read_bytes() == changed
    assert not (home / "data" / "bgl-2k").exists()
    assert "1 of 1 dataset(s) failed: bgl-2k" in captured.err


def test_missing_file_is_a_404_for_that_entry_only(served, home: Path, capsys) -> None:
    root, _ = served
    (root / "HDFS" / "HDFS_2k.log").unlink()
    assert main(["fetch", "hdfs-2k", "bgl-2k"]) == 1
    out = capsys.readouterr().out
    line = next(x for x in out.splitlines() if x.startswith("hdfs-2k:"))
    assert line.startswith("hdfs-2k: failed:") and "/HDFS/HDFS_2k.log: download failed: HTTP 404" in line
    assert "bgl-2k: fetched and verified:" in out and "1 fetched, 1 failed" in out
    assert (home / "data" / "bgl-2k" / "BGL_2k.log").is_file() and not (home / "data" / "hdfs-2k").exists()


def test_no_network_fails_with_what_to_do(home: Path, monkeypatch: pytest.MonkeyPatch, capsys) -> None:
    # A loopback port with nobody listening stands in for a machine without internet.
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    monkeypatch.setenv("LOGTRIAL_LOGHUB_URL", f"http://127.0.0.1:{port}")
    monkeypatch.delenv("LOGTRIAL_MIRROR", raising=False)
    assert main(["fetch", "bgl-2k"]) == 1
    out = capsys.readouterr().out
    assert out.startswith(f"bgl-2k: failed: http://127.0.0.1:{port}/BGL/BGL_2k.log: cannot connect")
    assert "check the internet connection" in out and "LOGTRIAL_MIRROR" in out and "--mirror DIR" in out


def test_group_fetch_reports_every_entry(served, home: Path, capsys) -> None:
    root, _ = served
    (root / "Mac" / "Mac_2k.log_templates.csv").unlink()
    assert main(["fetch", "samples", "radar-relay"]) == 1
    out = capsys.readouterr().out.splitlines()
    names = set(load_groups()["samples"]) | {"radar-relay"}
    states = {line.split(": ")[0]: line.split(": ")[1].split()[0].strip(",") for line in out
              if line.split(": ")[0] in names}
    assert set(states) == names
    assert states["mac-2k"] == "failed" and states["radar-relay"] == "skipped"
    assert sum(v == "fetched" for v in states.values()) == 15
    assert out[-1] == "15 fetched, 1 skipped, 1 failed"


def test_unpinned_source_is_recorded_on_first_use(served, home: Path, tmp_path: Path, capsys) -> None:
    root, _ = served
    port_url = load_registry()["bgl-2k"].sources[0].url.rsplit("/BGL/", 1)[0]
    extra = _registry(tmp_path, "datasets:\n  full:\n    sources: [{file: a.log, url: '" + port_url
                      + "/Apache/Apache_2k.log'}]\n" + ENTRY)
    assert main(["fetch", "full", "--registry", str(extra)]) == 0
    out = capsys.readouterr().out
    assert "full: fetched and verified:" in out and "no pinned checksums" in out
    assert "no pinned checksum for a.log: this first fetch recorded size and sha256" in out
    assert "(trust on first use)" in out
    data = (root / "Apache" / "Apache_2k.log").read_bytes()
    assert read_lock(home)["full"]["a.log"] == {"size": len(data), "sha256": sha(data)}
    # the recorded value now guards later fetches
    (root / "Apache" / "Apache_2k.log").write_bytes(data + b"one more line\n")
    assert fetch_many([load_registry([extra])["full"]], home=home, progress=False)[0].state == "present"
    with pytest.raises(DataError, match=r"sha256 mismatch: expected [0-9a-f]{64} \(from datasets.lock\).*"
                                        r"recorded by the first fetch \(trust on first use\).*remove dataset 'full'"):
        fetch(load_registry([extra])["full"], home=home, progress=False, force=True)
