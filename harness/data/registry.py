"""Registry: load and validate dataset entries from datasets.yaml and user registry files."""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import Any, Literal

import yaml
from logtrial.errors import ConfigError
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

REPO_ROOT = Path(__file__).resolve().parents[2]
DEFAULT_REGISTRY = REPO_ROOT / "datasets.yaml"
DEFAULT_MIRROR = Path("../shared/datasets/loghub-2k")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class Source(_Strict):
    """One file to acquire: from a URL (https://, file://) or a path inside a mirror folder."""

    file: str
    url: str | None = None
    mirror: str | None = None
    size: int | None = Field(default=None, ge=0)
    sha256: str | None = None
    unpack: Literal["none", "zip", "tar", "gzip"] = "none"

    @field_validator("file")
    @classmethod
    def _plain_name(cls, v: str) -> str:
        if not v or "/" in v or "\\" in v or v in (".", ".."):
            raise ValueError(f"must be a plain file name without folders, got {v!r}")
        return v

    @field_validator("sha256")
    @classmethod
    def _hex64(cls, v: str | None) -> str | None:
        if v is not None and not re.fullmatch(r"[0-9a-f]{64}", v):
            raise ValueError("must be 64 lower-case hex digits")
        return v

    @field_validator("url")
    @classmethod
    def _scheme(cls, v: str | None) -> str | None:
        if v is not None and not v.startswith(("https://", "http://", "file://")):
            raise ValueError(f"must start with https://, http:// or file://, got {v!r}")
        return v

    @model_validator(mode="after")
    def _one_origin(self) -> "Source":
        if self.url is None and self.mirror is None:
            raise ValueError("needs `url` or `mirror`")
        return self


class Timestamp(_Strict):
    """How to turn header fields into a UTC timestamp."""

    fields: list[str] = Field(min_length=1)
    format: str | None = None
    unit: Literal["s", "ms", "us", "ns"] | None = None
    default_year: int | None = None
    tz: str = "UTC"

    @field_validator("tz")
    @classmethod
    def _known_zone(cls, v: str) -> str:
        import zoneinfo

        try:
            zoneinfo.ZoneInfo(v)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"unknown time zone {v!r} (expected an IANA name such as 'UTC' or 'Europe/Berlin')") \
                from None
        return v

    @model_validator(mode="after")
    def _format_or_unit(self) -> "Timestamp":
        if (self.format is None) == (self.unit is None):
            raise ValueError("give exactly one of `format` (strftime pattern) or `unit` (epoch s/ms/us/ns)")
        return self


class Grouping(_Strict):
    """Session key of a line: a header field, or a pattern searched in the content or file path."""

    field: str | None = None
    pattern: str | None = None
    path: str | None = None

    @model_validator(mode="after")
    def _exactly_one(self) -> "Grouping":
        given = [x for x in (self.field, self.pattern, self.path) if x is not None]
        if len(given) != 1:
            raise ValueError("give exactly one of `field`, `pattern` or `path`")
        for rx in (self.pattern, self.path):
            if rx is not None:
                _compile(rx)
        return self


class Tag(_Strict):
    """Inline alert tag: a header field whose value `normal` means no alert."""

    field: str
    normal: str = "-"


class LineFormat(_Strict):
    """Line format: a regular expression with named groups plus field roles."""

    regex: str
    timestamp: Timestamp | None = None
    entity: str | None = None
    group: Grouping | None = None
    tag: Tag | None = None
    encoding: str = "utf-8"

    @field_validator("encoding")
    @classmethod
    def _line_encoding(cls, v: str) -> str:
        import codecs

        try:
            codecs.lookup(v)
        except LookupError:
            raise ValueError(f"unknown encoding {v!r}") from None
        if "\n".encode(v) != b"\n":
            raise ValueError(f"encoding {v!r} does not write a newline as the byte 0x0A; "
                             "convert the file to UTF-8 first (e.g. with iconv)")
        return v

    @model_validator(mode="after")
    def _groups_exist(self) -> "LineFormat":
        rx = _compile(self.regex)
        names = set(rx.groupindex)
        if "content" not in names:
            raise ValueError("regex must have a named group `content` (the message the miner reads)")
        wanted = list(self.timestamp.fields) if self.timestamp else []
        wanted += [x for x in (self.entity,) if x]
        if self.group and self.group.field:
            wanted.append(self.group.field)
        if self.tag:
            wanted.append(self.tag.field)
        missing = [w for w in wanted if w not in names]
        if missing:
            raise ValueError(f"regex has no named group(s) {missing}; it has {sorted(names)}")
        return self

    def compiled(self) -> re.Pattern[str]:
        """The compiled line regex."""
        return _compile(self.regex)


class Labels(_Strict):
    """Where the truth comes from: none, inline tags, a per-session label file, or an incidents file."""

    scheme: Literal["none", "inline", "sessions", "incidents"] = "none"
    file: str | None = None
    key: str | None = None
    label: str | None = None
    anomalous: str | None = None
    parser: Literal["csv", "application_list", "id_list"] = "csv"
    gap: str = "1h"
    failure_tags: list[str] | None = None
    tag_kinds: dict[str, Literal["failure", "other"]] = Field(default_factory=dict)

    @field_validator("gap")
    @classmethod
    def _duration(cls, v: str) -> str:
        import pandas as pd

        try:
            td = pd.Timedelta(v)
        except (ValueError, TypeError):
            raise ValueError(f"expected a duration such as '1h', got {v!r}") from None
        if td < pd.Timedelta(0):
            raise ValueError(f"must not be negative, got {v!r}")
        return v

    @model_validator(mode="after")
    def _file_when_needed(self) -> "Labels":
        if self.scheme in ("sessions", "incidents") and not self.file:
            raise ValueError(f"scheme `{self.scheme}` needs `file`")
        return self


class Miner(_Strict):
    """Template-miner settings."""

    kind: str = "drain"
    masks: list[str] = Field(default_factory=list)
    similarity: float = Field(default=0.5, gt=0, le=1)
    depth: int = Field(default=4, ge=3)
    max_children: int = Field(default=100, ge=1)

    @field_validator("kind")
    @classmethod
    def _known_kind(cls, v: str) -> str:
        from logtrial.data.mining import MINER_KINDS

        if v not in MINER_KINDS:
            raise ValueError(f"unknown template miner {v!r}; known: {sorted(MINER_KINDS)}")
        return v

    @field_validator("masks")
    @classmethod
    def _masks_compile(cls, v: list[str]) -> list[str]:
        for m in v:
            _compile(m)
        return v


class Truth(_Strict):
    """Ground-truth templates for parse-score: a CSV with one row per line, or per-line ids (.npy) plus a template list."""

    file: str
    templates: str | None = None
    id: str = "EventId"
    template: str = "EventTemplate"
    content: str = "Content"


class Entry(_Strict):
    """One dataset of the registry."""

    name: str
    system: str
    description: str = ""
    licence: str = ""
    citation: str = ""
    sources: list[Source] = Field(default_factory=list)
    logs: list[str] = Field(min_length=1)
    format: LineFormat
    labels: Labels = Field(default_factory=Labels)
    miner: Miner = Field(default_factory=Miner)
    truth: Truth | None = None
    expected: dict[str, float] = Field(default_factory=dict)
    generator: dict[str, Any] | None = None

    @field_validator("logs")
    @classmethod
    def _relative_patterns(cls, v: list[str]) -> list[str]:
        for pattern in v:
            if pattern.startswith(("/", "\\")) or ".." in pattern.replace("\\", "/").split("/"):
                raise ValueError(f"{pattern!r} must be a path or glob pattern inside the dataset folder")
        return v

    @model_validator(mode="after")
    def _has_origin(self) -> "Entry":
        if not self.sources and self.generator is None:
            raise ValueError("needs `sources` (files to fetch) or `generator` (built-in simulation)")
        return self


class SessionFiles(_Strict):
    """Preprocessed session files: one session of event ids per line (normal + abnormal files), or a labelled CSV."""

    folder: str
    folder_env: str | None = None
    normal: str | None = None
    abnormal: str | None = None
    file: str | None = None
    sequence: str = "events"
    label: str = "label"
    anomalous: str = "1"
    key: str | None = None
    first_id: int = Field(1, ge=0, description="the smallest event id in the files (shifted to 0)")
    vocab_size: int | None = Field(None, ge=1, description="distinct event ids; default: the largest id seen + 1")
    order_seed: int = Field(0, description="seed of the order sessions are laid out in (files carry no time)")

    @model_validator(mode="after")
    def _one_layout(self) -> "SessionFiles":
        pair = self.normal is not None and self.abnormal is not None
        if pair == (self.file is not None) or (not pair and (self.normal or self.abnormal)):
            raise ValueError("give either `normal` and `abnormal` (one session per line each) or `file` (a CSV with "
                             "a sequence and a label column)")
        return self

    def resolve(self, name: str) -> Path:
        """The folder holding the files: $folder_env when set, else ``folder`` (relative to the working directory)."""
        raw = os.environ.get(self.folder_env, "") if self.folder_env else ""
        folder = Path(raw or self.folder)
        if not folder.is_absolute() and not folder.exists() and (REPO_ROOT / folder).exists():
            folder = REPO_ROOT / folder
        if not folder.is_dir():
            hint = f" (set {self.folder_env})" if self.folder_env else ""
            raise ConfigError(f"dataset '{name}': sessions.folder {folder} not found{hint}")
        return folder


class SessionEntry(Entry):
    """A dataset of preprocessed sessions (event-id sequences) instead of log lines: no sources, format or miner."""

    logs: list[str] = Field(default_factory=list)
    format: LineFormat | None = None
    sessions: SessionFiles

    @model_validator(mode="after")
    def _has_origin(self) -> "SessionEntry":
        return self


def _compile(rx: str) -> re.Pattern[str]:
    try:
        return re.compile(rx)
    except re.error as exc:
        raise ValueError(f"invalid regular expression {rx!r}: {exc}") from None


def _describe(err: ValidationError) -> str:
    parts = []
    for e in err.errors():
        loc = ".".join(str(x) for x in e["loc"]) or "(entry)"
        msg = e["msg"].removeprefix("Value error, ")
        if e["type"] == "missing":
            msg = "required field is missing"
        elif e["type"] == "extra_forbidden":
            msg = "unknown field"
        parts.append(f"{loc}: {msg}")
    return "; ".join(parts)


def read_yaml(path: Path) -> Any:
    """Parse a YAML file safely, turning syntax errors into a ConfigError with file and line."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: file not found") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: not valid UTF-8 text (byte {exc.start})") from None
    try:
        return yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark else ""
        problem = getattr(exc, "problem", None) or str(exc)
        raise ConfigError(f"{path}: {where}invalid YAML ({problem})") from None


def parse_entry(name: str, raw: Any, origin: str, defaults: dict | None = None) -> Entry:
    """Validate one registry entry, naming the file, entry and field on error."""
    if not isinstance(raw, dict):
        raise ConfigError(f"{origin}: dataset '{name}': expected a mapping of fields, got {type(raw).__name__}")
    data = {**(defaults or {}), **raw, "name": name}
    try:
        return (SessionEntry if "sessions" in raw else Entry).model_validate(data)
    except ValidationError as exc:
        raise ConfigError(f"{origin}: dataset '{name}': {_describe(exc)}") from None


def load_registry(paths: list[Path] | None = None) -> dict[str, Entry]:
    """Load the built-in registry plus any user registry files (later files override names)."""
    files = [Path(os.environ.get("LOGTRIAL_REGISTRY", DEFAULT_REGISTRY))] + [Path(p) for p in paths or []]
    entries: dict[str, Entry] = {}
    for path in files:
        doc = read_yaml(path)
        if not isinstance(doc, dict) or not isinstance(doc.get("datasets"), dict):
            raise ConfigError(f"{path}: expected a top-level mapping `datasets:` of entries")
        defaults = doc.get("defaults") or {}
        if not isinstance(defaults, dict):
            raise ConfigError(f"{path}: `defaults` must be a mapping")
        for name, raw in doc["datasets"].items():
            if not re.fullmatch(r"[a-z0-9][a-z0-9._-]*", str(name)):
                raise ConfigError(f"{path}: dataset name {name!r} must be lower-case letters, digits, '.', '_' or '-'")
            entries[str(name)] = parse_entry(str(name), raw, str(path), defaults)
    return entries


def get_entry(name: str, registry: dict[str, Entry]) -> Entry:
    """Look up a dataset by name with a helpful error listing close names."""
    if name in registry:
        return registry[name]
    import difflib

    close = difflib.get_close_matches(name, list(registry), n=3)
    hint = f" Did you mean: {', '.join(close)}?" if close else " Run `logtrial datasets` to list them."
    raise ConfigError(f"unknown dataset '{name}'.{hint}")


def format_from_file(path: Path) -> LineFormat:
    """Load a stand-alone line-format YAML file (the `format:` block of an entry, plus optional miner)."""
    doc = read_yaml(path)
    if not isinstance(doc, dict):
        raise ConfigError(f"{path}: expected a mapping with at least `regex`")
    body = {k: v for k, v in doc.items() if k != "miner"}
    try:
        return LineFormat.model_validate(body)
    except ValidationError as exc:
        raise ConfigError(f"{path}: {_describe(exc)}") from None


def miner_from_file(path: Path) -> Miner:
    """Template-miner settings of a stand-alone format file (defaults when absent)."""
    doc = read_yaml(path) or {}
    try:
        return Miner.model_validate(doc.get("miner") or {})
    except ValidationError as exc:
        raise ConfigError(f"{path}: miner: {_describe(exc)}") from None


def mirror_dir(explicit: str | Path | None = None) -> Path:
    """The mirror folder: --mirror, else LOGTRIAL_MIRROR, else ../shared/datasets/loghub-2k."""
    if explicit:
        return Path(explicit)
    env = os.environ.get("LOGTRIAL_MIRROR")
    if env:
        return Path(env)
    for base in (Path.cwd(), REPO_ROOT):
        cand = (base / DEFAULT_MIRROR).resolve()
        if cand.is_dir():
            return cand
    return (REPO_ROOT / DEFAULT_MIRROR).resolve()


def home_dir() -> Path:
    """Where fetched data, caches and the lock file live: LOGTRIAL_HOME or ~/.cache/logtrial."""
    env = os.environ.get("LOGTRIAL_HOME")
    return Path(env) if env else Path.home() / ".cache" / "logtrial"
