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


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class Source(_Strict):
    """One file to acquire: from a URL (https://, file://), a base address plus a path, or a mirror folder."""

    file: str
    url: str | None = None
    base: str | None = None
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
        if self.base is not None and self.mirror is None:
            raise ValueError(f"`base: {self.base}` needs `mirror`, the file's path under the base address")
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

        if v.strip().lstrip("+-").replace(".", "", 1).isdigit():
            raise ValueError(f"{v!r} has no unit; write a duration with its unit such as '60s' or '1h'")
        try:
            td = pd.Timedelta(v)
        except (ValueError, TypeError):
            raise ValueError(f"expected a duration such as '1h', got {v!r}") from None
        if td < pd.Timedelta(0):
            raise ValueError(f"must not be negative, got {v!r}")
        return v

    @field_validator("file")
    @classmethod
    def _inside(cls, v: str | None) -> str | None:
        return inside_folder(v)

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

    @field_validator("file", "templates")
    @classmethod
    def _inside(cls, v: str | None) -> str | None:
        return inside_folder(v)


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


def inside_folder(path: str | None) -> str | None:
    """A data path of an entry, refused unless it is relative and stays inside the dataset folder."""
    if path is None:
        return None
    parts = path.replace("\\", "/").split("/")
    if not path or path.startswith(("/", "\\", "~")) or re.match(r"^[A-Za-z]:", path) or ".." in parts:
        raise ValueError(f"{path!r} must be a relative path inside the dataset folder (no '..', not absolute)")
    return path

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

    @field_validator("normal", "abnormal", "file")
    @classmethod
    def _inside(cls, v: str | None) -> str | None:
        return inside_folder(v)

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


def _field_hint(name: str) -> str:
    """' (did you mean `x`?)' when an unknown registry field is close to a known one."""
    import difflib

    known = {f for model in (Entry, Source, LineFormat, Labels, Miner, Truth, Timestamp, Grouping, Tag)
             for f in model.model_fields}
    close = difflib.get_close_matches(name, sorted(known), n=1, cutoff=0.7)
    return f" (did you mean `{close[0]}`?)" if close else ""


def _describe(err: ValidationError) -> str:
    parts = []
    for e in err.errors():
        loc = ".".join(str(x) for x in e["loc"]) or "(entry)"
        msg = e["msg"].removeprefix("Value error, ")
        if e["type"] == "missing":
            msg = "required field is missing"
        elif e["type"] == "extra_forbidden":
            msg = "unknown field" + _field_hint(str(e["loc"][-1]))
        parts.append(f"{loc}: {msg}")
    return "; ".join(parts)


class _UniqueKeyLoader(yaml.SafeLoader):
    """Safe YAML loader that refuses a key repeated in one mapping (YAML would keep the last silently)."""

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict:  # type: ignore[override]
        seen: dict[Any, int] = {}
        # Merge keys (`<<: *anchor`) may be overridden by the mapping's own keys: only those are checked.
        own = [k for k, _ in node.value if k.tag != "tag:yaml.org,2002:merge"]
        self.flatten_mapping(node)
        for key_node in own:
            key = self.construct_object(key_node, deep=True)
            try:
                first = seen.get(key)
            except TypeError:
                continue  # an unhashable key fails in the base constructor with its own message
            if first is not None:
                raise yaml.constructor.ConstructorError(
                    None, None, f"duplicate key {key!r} (first at line {first}); each key may appear once",
                    key_node.start_mark)
            seen[key] = key_node.start_mark.line + 1
        return super().construct_mapping(node, deep=deep)


def read_yaml(path: Path) -> Any:
    """Parse a YAML file safely, turning syntax errors into a ConfigError with file and line."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: file not found") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: not valid UTF-8 text (byte {exc.start})") from None
    try:
        return yaml.load(text, Loader=_UniqueKeyLoader)  # noqa: S506 - a SafeLoader subclass
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


USER_REGISTRY = "registry.yaml"


def user_registry_path(home: Path | None = None) -> Path:
    """The registry file that `logtrial ingest --name` writes under the data home."""
    return Path(home if home is not None else home_dir()) / USER_REGISTRY


def load_registry(paths: list[Path] | None = None) -> dict[str, Entry]:
    """Load the built-in registry, the data home's user registry (if any) and extra registry files."""
    return _load_files(_registry_files(paths))


def _load_files(files: list[Path]) -> dict[str, Entry]:
    """Entries of several registry files; a later file's entry replaces an earlier one of the same name."""
    entries: dict[str, Entry] = {}
    bases: dict[str, str] = {}
    for path in files:
        doc = read_yaml(path)
        if not isinstance(doc, dict) or not isinstance(doc.get("datasets"), dict):
            raise ConfigError(f"{path}: expected a top-level mapping `datasets:` of entries")
        defaults = doc.get("defaults") or {}
        if not isinstance(defaults, dict):
            raise ConfigError(f"{path}: `defaults` must be a mapping")
        bases.update(_read_bases(doc, path))
        for name, raw in doc["datasets"].items():
            if not re.fullmatch(r"[a-z0-9][a-z0-9._-]*", str(name)):
                raise ConfigError(f"{path}: dataset name {name!r} must be lower-case letters, digits, '.', '_' or '-'")
            entries[str(name)] = _resolve_base(parse_entry(str(name), raw, str(path), defaults), bases, path)
    return entries


def _registry_files(paths: list[Path] | None) -> list[Path]:
    """The built-in registry, the data home's user registry when it exists, then the given files."""
    files = [Path(os.environ.get("LOGTRIAL_REGISTRY", DEFAULT_REGISTRY))]
    user = user_registry_path()
    if user.is_file():
        files.append(user)
    return files + [Path(p) for p in paths or []]


def _read_bases(doc: dict, path: Path) -> dict[str, str]:
    """A registry file's `bases:` → name → base address (its env variable, when set, overrides the URL)."""
    raw = doc.get("bases") or {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{path}: `bases` must be a mapping of name → {{url, env}}")
    out: dict[str, str] = {}
    for name, spec in raw.items():
        if not isinstance(spec, dict) or not isinstance(spec.get("url"), str) or set(spec) - {"url", "env"}:
            raise ConfigError(f"{path}: bases.{name}: expected {{url: https://..., env: VARIABLE}} (env optional)")
        env = spec.get("env")
        if env is not None and not re.fullmatch(r"[A-Z_][A-Z0-9_]*", str(env)):
            raise ConfigError(f"{path}: bases.{name}.env: expected an environment variable name, got {env!r}")
        overridden = bool(env and os.environ.get(env))
        url = os.environ[env] if overridden else spec["url"]
        where = f"environment variable {env}" if overridden else f"{path}: bases.{name}.url"
        if not url.startswith(("https://", "http://", "file://")):
            raise ConfigError(f"{where}: expected an address starting with https://, http:// or file://, got {url!r}")
        out[str(name)] = url.rstrip("/")
    return out


def _resolve_base(entry: Entry, bases: dict[str, str], path: Path) -> Entry:
    """Give each source with a `base` its download URL: base address + '/' + its `mirror` path."""
    from urllib.parse import quote

    for i, src in enumerate(entry.sources):
        if src.base is None:
            continue
        if src.url is not None:
            raise ConfigError(f"{path}: dataset '{entry.name}': sources.{i}: give `url` or `base`, not both")
        if src.base not in bases:
            known = ", ".join(sorted(bases)) or "none defined"
            raise ConfigError(f"{path}: dataset '{entry.name}': sources.{i}.base: unknown base {src.base!r} "
                              f"(known: {known}; define it under top-level `bases:`)")
        src.url = f"{bases[src.base]}/{quote(str(src.mirror).lstrip('/'))}"
    return entry


def base_addresses(paths: list[Path] | None = None) -> dict[str, str]:
    """The registry's base addresses after environment overrides: name → URL."""
    out: dict[str, str] = {}
    for path in _registry_files(paths):
        doc = read_yaml(path)
        if isinstance(doc, dict):
            out.update(_read_bases(doc, path))
    return out


def load_groups(paths: list[Path] | None = None) -> dict[str, list[str]]:
    """Named groups of datasets from the registry files' `groups:` (e.g. `samples`): name → dataset names."""
    entries = load_registry(paths)
    groups: dict[str, list[str]] = {}
    for path in _registry_files(paths):
        doc = read_yaml(path)
        raw = doc.get("groups") or {} if isinstance(doc, dict) else {}
        if not isinstance(raw, dict):
            raise ConfigError(f"{path}: `groups` must be a mapping of group name → list of dataset names")
        for name, members in raw.items():
            if not isinstance(members, list) or not members or not all(isinstance(m, str) for m in members):
                raise ConfigError(f"{path}: groups.{name}: expected a non-empty list of dataset names")
            if name in entries:
                raise ConfigError(f"{path}: groups.{name}: the name is already a dataset; pick another group name")
            unknown = [m for m in members if m not in entries]
            if unknown:
                raise ConfigError(f"{path}: groups.{name}: unknown dataset(s) {unknown}")
            groups[str(name)] = list(dict.fromkeys(members))
    return groups


def select_entries(names: list[str], registry: dict[str, Entry], groups: dict[str, list[str]]) -> list[Entry]:
    """Dataset entries named by dataset or group names, in order and without repeats."""
    chosen: dict[str, Entry] = {}
    for name in names:
        if name in registry:
            chosen.setdefault(name, registry[name])
        elif name in groups:
            for member in groups[name]:
                chosen.setdefault(member, registry[member])
        else:
            import difflib

            close = difflib.get_close_matches(name, list(registry) + list(groups), n=3)
            hint = f" Did you mean: {', '.join(close)}?" if close else ""
            known = ", ".join(sorted(groups)) or "none"
            raise ConfigError(f"unknown dataset or group '{name}'.{hint} Groups: {known}; "
                              "run `logtrial datasets` to list the datasets.")
    return list(chosen.values())


def register_local(name: str, log: Path, format_file: Path, incidents: Path | None = None,
                   home: Path | None = None, fields: tuple[str, str, str, str] = (
                       "--name", "--file", "--format", "--incidents"),
                   how: str = "`logtrial ingest --name`") -> tuple[Entry, Path]:
    """Write (or replace) a user registry entry for local files so experiments can name it; return it and the file.

    ``fields`` names the options (or YAML fields) the values came from, for error messages;
    the registry file is left untouched when the entry is already there unchanged.
    """
    if not isinstance(name, str) or not re.fullmatch(r"[a-z0-9][a-z0-9._-]*", name) or name in (".", ".."):
        raise ConfigError(f"{fields[0]} {name!r}: expected lower-case letters, digits, '.', '_' or '-' "
                          "(starting with a letter or digit)")
    builtin = load_registry_file(Path(os.environ.get("LOGTRIAL_REGISTRY", DEFAULT_REGISTRY)))
    if name in builtin:
        raise ConfigError(f"{fields[0]} {name!r}: a built-in dataset has that name; choose another")
    for what, p in zip(fields[1:], (log, format_file, incidents)):
        if p is not None and not Path(p).is_file():
            raise ConfigError(f"{what} {p}: file not found")
    fmt = format_from_file(Path(format_file))
    miner = miner_from_file(Path(format_file))
    log = Path(log).resolve()
    log_name = log.name if log.name != "incidents.csv" else f"log-{log.name}"
    raw: dict[str, Any] = {
        "system": f"{name} (local files)",
        "description": f"registered by {how} from {log}",
        "sources": [{"file": log_name, "url": log.as_uri()}],
        "logs": [log_name],
        "format": fmt.model_dump(mode="json", exclude_defaults=True),
        "miner": miner.model_dump(mode="json", exclude_defaults=True),
    }
    if incidents is not None:
        raw["sources"].append({"file": "incidents.csv", "url": Path(incidents).resolve().as_uri()})
        raw["labels"] = {"scheme": "incidents", "file": "incidents.csv"}
    path = user_registry_path(home)
    doc = read_yaml(path) if path.is_file() else None
    doc = doc if isinstance(doc, dict) and isinstance(doc.get("datasets"), dict) else {"datasets": {}}
    entry = parse_entry(name, raw, str(path))
    if doc["datasets"].get(name) == raw:
        return entry, path
    doc["datasets"][name] = raw
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    tmp.write_text("# Written by logtrial (ingest --name, inline experiment datasets): local datasets.\n"
                   + yaml.safe_dump(doc, sort_keys=False, allow_unicode=True), encoding="utf-8")
    os.replace(tmp, path)
    return entry, path


def load_registry_file(path: Path) -> dict[str, Entry]:
    """The entries of one registry file."""
    return _load_files([Path(path)])


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


def mirror_folder(explicit: str | Path | None = None) -> Path | None:
    """The mirror folder for offline work: --mirror, else LOGTRIAL_MIRROR, else none (download instead)."""
    if explicit:
        return Path(explicit)
    env = os.environ.get("LOGTRIAL_MIRROR")
    return Path(env) if env else None


def mirror_dir(explicit: str | Path | None = None) -> Path:
    """The mirror folder that must be set: --mirror or LOGTRIAL_MIRROR (ConfigError when neither is)."""
    folder = mirror_folder(explicit)
    if folder is None:
        raise ConfigError("no mirror folder set: pass --mirror DIR or set LOGTRIAL_MIRROR to a folder laid out "
                          "like the Loghub repository (e.g. BGL/BGL_2k.log)")
    return folder


def home_dir() -> Path:
    """Where fetched data, caches and the lock file live: LOGTRIAL_HOME or ~/.cache/logtrial."""
    env = os.environ.get("LOGTRIAL_HOME")
    return Path(env) if env else Path.home() / ".cache" / "logtrial"
