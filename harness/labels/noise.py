"""Noise replay: turn true incidents into the reported incidents a ticket system would hold.

A noise spec (YAML or dict) composes five independent stages, applied in this
order: ``drop`` → ``decoys`` → ``delay`` → ``end_jitter`` → ``spurious``.

- ``drop``: each incident goes unreported with probability ``p``; ``per_kind`` and
  ``per_mode`` override it (``per_mode`` wins over ``per_kind``, which wins over ``p``).
- ``decoys``: each non-failure ('other') incident is filed as a failure with
  probability ``share``; without decoys, 'other' incidents stay 'other'.
- ``delay``: the reported start moves later by a draw from ``dist``: ``fixed``
  (``value``), ``uniform`` (``low``..``high``, default 0..2 days, common practice
  for ticket lag), ``exponential`` (``mean``, default 12h, capped at ``max``,
  default 2 days) or ``empirical`` (``values``, drawn with replacement). A report
  end never precedes its start: ``end = max(end, delayed start)``.
- ``end_jitter``: the reported end moves by a draw from ``normal`` (sd ``scale``)
  or ``uniform`` (±``scale``), never before the reported start.
- ``spurious``: tickets with no incident behind them, Poisson with ``per_day``
  expected tickets over the given span, uniform over the given entities and time,
  each lasting ``duration`` (default 1h), kind failure.

A spec may also carry ``axis``: the noise kind it varies when it was produced by a
sweep (see :func:`expand_sweep`), so that reports can group settings by kind.

Every stage draws from its own stream derived from the seed, and draws are made
for every true incident before any is dropped, so a stage's outcome for an
incident does not depend on other stages' settings: with the same seed, a larger
drop probability drops a superset. Replayed labels are meant for training and
validation only; test scoring uses the truth.
"""

from __future__ import annotations

from collections.abc import Sequence
from copy import deepcopy
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import yaml
from logtrial.errors import ConfigError
from logtrial.labels.incidents import INCIDENT_COLUMNS, KINDS, from_ns, times_ns, validate_incidents
from logtrial.windowing.windows import parse_duration

DELAY_DISTS = ("fixed", "uniform", "exponential", "empirical")
JITTER_DISTS = ("normal", "uniform")
_STAGES = ("drop", "decoys", "delay", "end_jitter", "spurious")
# Noise kinds a sweep can vary on their own, and "joint" (all of them scaled together).
SWEEP_KINDS = (*_STAGES, "joint")
# The unit of each kind's level, as reports print it.
LEVEL_UNITS = {"drop": "share unreported", "decoys": "share of non-failures filed as failures",
               "delay": "mean delay (hours)", "end_jitter": "end error scale (hours)",
               "spurious": "spurious tickets per day", "joint": "fraction of the joint setting"}


@dataclass(frozen=True)
class DropSpec:
    """Probability that an incident is never reported, overall, per kind and per failure mode."""

    p: float = 0.0
    per_kind: dict[str, float] = field(default_factory=dict)
    per_mode: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class DelaySpec:
    """Distribution of the lag between an incident's start and its report."""

    dist: str = "uniform"
    value: pd.Timedelta = pd.Timedelta(0)
    low: pd.Timedelta = pd.Timedelta(0)
    high: pd.Timedelta = pd.Timedelta(days=2)
    mean: pd.Timedelta = pd.Timedelta(hours=12)
    max: pd.Timedelta | None = pd.Timedelta(days=2)
    values: tuple[pd.Timedelta, ...] = ()


@dataclass(frozen=True)
class JitterSpec:
    """Distribution of the error on a reported end time."""

    dist: str = "normal"
    scale: pd.Timedelta = pd.Timedelta(0)


@dataclass(frozen=True)
class SpuriousSpec:
    """Tickets with no incident: expected count per day over the span, and their length."""

    per_day: float = 0.0
    duration: pd.Timedelta = pd.Timedelta(hours=1)


@dataclass(frozen=True)
class NoiseSpec:
    """A composable label-noise spec with a short name and numeric level for reports."""

    name: str = "clean"
    level: float | None = None
    drop: DropSpec | None = None
    decoys: float = 0.0
    delay: DelaySpec | None = None
    end_jitter: JitterSpec | None = None
    spurious: SpuriousSpec | None = None
    axis: str | None = None
    raw: dict = field(default_factory=dict, compare=False)

    def is_clean(self) -> bool:
        """True when the spec changes nothing."""
        drop_none = self.drop is None or (
            self.drop.p == 0 and not any(self.drop.per_kind.values()) and not any(self.drop.per_mode.values())
        )
        delay_none = self.delay is None or _delay_is_zero(self.delay)
        jitter_none = self.end_jitter is None or self.end_jitter.scale == pd.Timedelta(0)
        spur_none = self.spurious is None or self.spurious.per_day == 0
        return drop_none and self.decoys == 0 and delay_none and jitter_none and spur_none


def _delay_is_zero(d: DelaySpec) -> bool:
    """True when a delay spec always draws zero."""
    zero = pd.Timedelta(0)
    if d.dist == "fixed":
        return d.value == zero
    if d.dist == "uniform":
        return d.high == zero
    if d.dist == "exponential":
        return d.mean == zero or d.max == zero
    return all(v == zero for v in d.values)


def load_noise(source: dict | str | Path | NoiseSpec | None) -> NoiseSpec:
    """Load and validate a noise spec from a dict, a YAML file, or None (clean); ConfigError names the field."""
    if source is None:
        return NoiseSpec()
    if isinstance(source, NoiseSpec):
        return source
    where = "noise"
    if isinstance(source, (str, Path)):
        path = Path(source)
        try:
            data = yaml.safe_load(path.read_text())
        except OSError as exc:
            raise ConfigError(f"{path}: cannot read noise spec: {exc}") from exc
        except yaml.YAMLError as exc:
            raise ConfigError(f"{path}: invalid YAML: {exc}") from exc
        # A file written by `logtrial fit-noise` holds the entry under `noise` and the fit's facts under `fit`.
        if isinstance(data, dict) and "noise" in data and set(data) <= {"noise", "fit"}:
            data = data["noise"]
        try:
            return _parse(data or {}, where)
        except ConfigError as exc:
            raise ConfigError(f"{path}: {exc}") from exc
    return _parse(source, where)


def _parse(data: object, where: str) -> NoiseSpec:
    """Validate a noise mapping."""
    if not isinstance(data, dict):
        raise ConfigError(f"{where}: expected a mapping, got {type(data).__name__}")
    allowed = {"name", "level", "axis", *_STAGES}
    unknown = sorted(set(data) - allowed)
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: {sorted(allowed)})")
    level = data.get("level")
    if level is not None and (isinstance(level, bool) or not isinstance(level, (int, float))):
        raise ConfigError(f"{where}.level: expected a number, got {level!r}")
    drop = None if data.get("drop") is None else _parse_drop(data["drop"], f"{where}.drop")
    decoys = 0.0
    if data.get("decoys") is not None:
        d = data["decoys"]
        if isinstance(d, dict):
            _only(d, {"share"}, f"{where}.decoys")
            decoys = _prob(d.get("share", 0.0), f"{where}.decoys.share")
        else:
            decoys = _prob(d, f"{where}.decoys")
    delay = None if data.get("delay") is None else _parse_delay(data["delay"], f"{where}.delay")
    jitter = None if data.get("end_jitter") is None else _parse_jitter(data["end_jitter"], f"{where}.end_jitter")
    spurious = None if data.get("spurious") is None else _parse_spurious(data["spurious"], f"{where}.spurious")
    axis = data.get("axis")
    if axis is not None and (not isinstance(axis, str) or axis.split(":", 1)[0] not in SWEEP_KINDS):
        raise ConfigError(f"{where}.axis: unknown noise kind {axis!r} (allowed: {list(SWEEP_KINDS)}, "
                          "optionally followed by ':' and the sweep's prefix)")
    spec = NoiseSpec(
        name="",
        level=None if level is None else float(level),
        drop=drop,
        decoys=decoys,
        delay=delay,
        end_jitter=jitter,
        spurious=spurious,
        axis=axis,
        raw=deepcopy(data),
    )
    name = data.get("name")
    if name is None:
        name = "clean" if spec.is_clean() else _auto_name(data)
    elif not isinstance(name, str) or not name.strip():
        raise ConfigError(f"{where}.name: expected a non-empty string, got {name!r}")
    return NoiseSpec(**{**spec.__dict__, "name": name})


def _auto_name(data: dict) -> str:
    """A short readable name from the stages present."""
    parts = []
    for stage in _STAGES:
        if data.get(stage) is None:
            continue
        v = data[stage]
        if isinstance(v, dict):
            inner = ",".join(f"{k}={v[k]}" for k in sorted(v) if not isinstance(v[k], (dict, list)))
            parts.append(f"{stage}({inner})")
        else:
            parts.append(f"{stage}={v}")
    return " ".join(parts)


def _only(d: dict, allowed: set[str], where: str) -> None:
    """Reject unknown keys in a stage mapping."""
    unknown = sorted(set(d) - allowed)
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}: unknown field (allowed: {sorted(allowed)})")


def _prob(value: object, where: str) -> float:
    """A probability in [0, 1] or ConfigError naming the field."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ConfigError(f"{where}: expected a number between 0 and 1, got {value!r}")
    if not 0.0 <= float(value) <= 1.0:
        raise ConfigError(f"{where}: must be between 0 and 1, got {value}")
    return float(value)


def _nonneg_duration(value: object, where: str) -> pd.Timedelta:
    """A non-negative duration or ConfigError naming the field."""
    td = parse_duration(value, where)
    if td < pd.Timedelta(0):
        raise ConfigError(f"{where}: must not be negative, got {td}")
    return td


def _parse_drop(d: object, where: str) -> DropSpec:
    """Validate the drop stage (a number is shorthand for p)."""
    if not isinstance(d, dict):
        return DropSpec(p=_prob(d, f"{where}.p"))
    _only(d, {"p", "per_kind", "per_mode"}, where)
    per_kind = d.get("per_kind") or {}
    per_mode = d.get("per_mode") or {}
    for name, m in (("per_kind", per_kind), ("per_mode", per_mode)):
        if not isinstance(m, dict):
            raise ConfigError(f"{where}.{name}: expected a mapping, got {type(m).__name__}")
    for k in per_kind:
        if k not in KINDS:
            raise ConfigError(f"{where}.per_kind.{k}: unknown kind (allowed: {list(KINDS)})")
    return DropSpec(
        p=_prob(d.get("p", 0.0), f"{where}.p"),
        per_kind={str(k): _prob(v, f"{where}.per_kind.{k}") for k, v in per_kind.items()},
        per_mode={str(k): _prob(v, f"{where}.per_mode.{k}") for k, v in per_mode.items()},
    )


def _parse_delay(d: object, where: str) -> DelaySpec:
    """Validate the delay stage (a duration is shorthand for a fixed delay)."""
    if not isinstance(d, dict):
        return DelaySpec(dist="fixed", value=_nonneg_duration(d, where))
    _only(d, {"dist", "value", "low", "high", "mean", "max", "values"}, where)
    dist = d.get("dist", "uniform")
    if dist not in DELAY_DISTS:
        raise ConfigError(f"{where}.dist: unknown distribution {dist!r} (allowed: {list(DELAY_DISTS)})")
    base = DelaySpec(dist=dist)
    if dist == "fixed":
        if "value" not in d:
            raise ConfigError(f"{where}.value: required for a fixed delay")
        return DelaySpec(dist=dist, value=_nonneg_duration(d["value"], f"{where}.value"))
    if dist == "uniform":
        low = _nonneg_duration(d.get("low", base.low), f"{where}.low")
        high = _nonneg_duration(d.get("high", base.high), f"{where}.high")
        if high < low:
            raise ConfigError(f"{where}.high: must be at least low ({low}), got {high}")
        return DelaySpec(dist=dist, low=low, high=high)
    if dist == "exponential":
        mean = _nonneg_duration(d.get("mean", base.mean), f"{where}.mean")
        cap = d.get("max", base.max)
        cap = None if cap is None else _nonneg_duration(cap, f"{where}.max")
        return DelaySpec(dist=dist, mean=mean, max=cap)
    values = d.get("values")
    if not isinstance(values, list) or not values:
        raise ConfigError(f"{where}.values: expected a non-empty list of durations for an empirical delay")
    return DelaySpec(dist=dist, values=tuple(_nonneg_duration(v, f"{where}.values[{i}]") for i, v in enumerate(values)))


def _parse_jitter(d: object, where: str) -> JitterSpec:
    """Validate the end-jitter stage (a duration is shorthand for a normal scale)."""
    if not isinstance(d, dict):
        return JitterSpec(scale=_nonneg_duration(d, where))
    _only(d, {"dist", "scale"}, where)
    dist = d.get("dist", "normal")
    if dist not in JITTER_DISTS:
        raise ConfigError(f"{where}.dist: unknown distribution {dist!r} (allowed: {list(JITTER_DISTS)})")
    if "scale" not in d:
        raise ConfigError(f"{where}.scale: required")
    return JitterSpec(dist=dist, scale=_nonneg_duration(d["scale"], f"{where}.scale"))


def _parse_spurious(d: object, where: str) -> SpuriousSpec:
    """Validate the spurious-ticket stage (a number is shorthand for per_day)."""
    if not isinstance(d, dict):
        d = {"per_day": d}
    _only(d, {"per_day", "duration"}, where)
    rate = d.get("per_day", 0.0)
    if isinstance(rate, bool) or not isinstance(rate, (int, float)) or rate < 0:
        raise ConfigError(f"{where}.per_day: expected a non-negative number, got {rate!r}")
    duration = _nonneg_duration(d.get("duration", "1h"), f"{where}.duration")
    return SpuriousSpec(per_day=float(rate), duration=duration)


def noise_levels(base: dict, field: str, values: Sequence[object]) -> list[NoiseSpec]:
    """A family of specs that differ only in one dotted field (e.g. 'drop.p'), for robustness curves."""
    if not isinstance(field, str) or not field:
        raise ConfigError(f"noise_levels.field: expected a dotted field name, got {field!r}")
    specs = []
    for value in values:
        data = deepcopy(base or {})
        node = data
        parts = field.split(".")
        for part in parts[:-1]:
            child = node.get(part)
            if child is None:
                child = {}
            elif not isinstance(child, dict):
                raise ConfigError(f"noise.{'.'.join(parts[: parts.index(part) + 1])}: expected a mapping to set {field}")
            node[part] = child
            node = child
        node[parts[-1]] = value
        data["name"] = f"{field}={value}"
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            data["level"] = float(value)
        specs.append(load_noise(data))
    return specs


_SWEEP_FIELDS = {"sweep", "values", "range", "dist", "base", "at", "prefix"}
_DURATION_KINDS = ("delay", "end_jitter")


def expand_sweep(entry: dict, where: str = "noise") -> list[dict]:
    """The named noise mappings of one ``{sweep: KIND, values: [...] | range: [start, stop, step]}`` entry.

    Each level becomes one mapping with ``name`` (e.g. ``drop=0.3``), ``level`` (the
    swept number: a share, hours for delay and end jitter, tickets per day for
    spurious, a fraction for joint) and ``axis`` (the kind). ``base`` holds other
    noise stages fixed under every level; ``dist`` picks the delay (fixed, uniform,
    exponential; level = mean) or end-jitter (normal, uniform) distribution; a
    ``joint`` sweep scales every stage of ``at`` (the noise at level 1) by the level.
    """
    if not isinstance(entry, dict) or "sweep" not in entry:
        raise ConfigError(f"{where}: expected a mapping with `sweep: KIND`")
    _only(entry, _SWEEP_FIELDS, where)
    kind = entry["sweep"]
    if kind not in SWEEP_KINDS:
        raise ConfigError(f"{where}.sweep: unknown noise kind {kind!r} (allowed: {list(SWEEP_KINDS)})")
    if ("values" in entry) == ("range" in entry):
        raise ConfigError(f"{where}: give exactly one of `values: [...]` or `range: [start, stop, step]`")
    levels = _sweep_levels(entry, kind, where)
    base = entry.get("base") or {}
    if not isinstance(base, dict):
        raise ConfigError(f"{where}.base: expected a noise mapping, got {type(base).__name__}")
    _only(base, set(_STAGES), f"{where}.base")
    if kind in base:
        raise ConfigError(f"{where}.base.{kind}: the swept kind cannot also be held fixed in base")
    if kind == "joint":
        at = entry.get("at")
        if not isinstance(at, dict) or not at:
            raise ConfigError(f"{where}.at: a joint sweep needs the noise at level 1, e.g. "
                              "{drop: 0.5, decoys: 0.3, delay: 1d, end_jitter: 6h}")
        _only(at, set(_STAGES), f"{where}.at")
    elif "at" in entry:
        raise ConfigError(f"{where}.at: only a joint sweep takes `at`")
    dist = entry.get("dist")
    if dist is not None and kind not in (*_DURATION_KINDS, "joint"):
        raise ConfigError(f"{where}.dist: only delay, end_jitter and joint sweeps take a distribution")
    prefix = entry.get("prefix", kind)
    if not isinstance(prefix, str) or not prefix:
        raise ConfigError(f"{where}.prefix: expected a non-empty string, got {prefix!r}")
    out = []
    for level in levels:
        stages = _joint_stages(entry["at"], level, dist, f"{where}.at") if kind == "joint" else {
            kind: _stage_at(kind, level, dist, where)}
        data = {**deepcopy(base), **stages, "name": f"{prefix}={_level_text(kind, level)}",
                "level": float(level), "axis": kind if prefix == kind else f"{kind}:{prefix}"}
        load_noise(data)  # validate now, so the error names the sweep
        out.append(data)
    return out


def _sweep_levels(entry: dict, kind: str, where: str) -> list[float]:
    """The swept levels as numbers (hours for durations), ascending and distinct."""
    def number(v: object, at: str) -> float:
        if kind in _DURATION_KINDS:
            return _nonneg_duration(v, at) / pd.Timedelta(hours=1)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or v < 0:
            raise ConfigError(f"{at}: expected a non-negative number, got {v!r}")
        if kind in ("drop", "decoys", "joint") and v > 1:
            raise ConfigError(f"{at}: a {kind} level is a share between 0 and 1, got {v}")
        return float(v)

    if "values" in entry:
        raw = entry["values"]
        if not isinstance(raw, list) or not raw:
            raise ConfigError(f"{where}.values: expected a non-empty list of levels")
        levels = [number(v, f"{where}.values[{i}]") for i, v in enumerate(raw)]
    else:
        raw = entry["range"]
        if not isinstance(raw, list) or len(raw) != 3:
            raise ConfigError(f"{where}.range: expected [start, stop, step], got {raw!r}")
        start, stop, step = (number(v, f"{where}.range[{i}]") for i, v in enumerate(raw))
        if step <= 0 or stop < start:
            raise ConfigError(f"{where}.range: expected start <= stop and a positive step, got {raw!r}")
        count = int(np.floor((stop - start) / step + 1e-9)) + 1
        if count > 100:
            raise ConfigError(f"{where}.range: {count} levels; at most 100 per sweep")
        levels = [round(start + i * step, 10) for i in range(count)]
    if len(set(levels)) != len(levels):
        raise ConfigError(f"{where}: levels repeat: {levels}")
    return sorted(levels)


def _level_text(kind: str, level: float) -> str:
    """A level as it appears in a setting's name."""
    return f"{level:g}h" if kind in _DURATION_KINDS else f"{level:g}"


def _hours(h: float) -> str:
    """Hours as a duration string the noise parser reads."""
    return f"{round(h * 3600)}s"


def _stage_at(kind: str, level: float, dist: str | None, where: str) -> object:
    """One stage's mapping at a level (level = share, hours or tickets per day)."""
    if kind == "drop":
        return {"p": level}
    if kind == "decoys":
        return level
    if kind == "spurious":
        return {"per_day": level}
    if kind == "end_jitter":
        dist = dist or "normal"
        if dist not in JITTER_DISTS:
            raise ConfigError(f"{where}.dist: unknown end-jitter distribution {dist!r} (allowed: {list(JITTER_DISTS)})")
        return {"dist": dist, "scale": _hours(level)}
    dist = dist or "exponential"
    if dist == "fixed":
        return {"dist": "fixed", "value": _hours(level)}
    if dist == "uniform":
        return {"dist": "uniform", "low": "0s", "high": _hours(2 * level)}
    if dist == "exponential":
        return {"dist": "exponential", "mean": _hours(level), "max": None}
    raise ConfigError(f"{where}.dist: a delay sweep's level is its mean: use fixed, uniform or exponential, got {dist!r}")


def _joint_stages(at: dict, level: float, dist: str | None, where: str) -> dict:
    """Every stage of ``at`` scaled by ``level`` (durations by their mean, shares and rates linearly)."""
    out = {}
    for stage, value in at.items():
        if stage in _DURATION_KINDS:
            hours = _nonneg_duration(value, f"{where}.{stage}") / pd.Timedelta(hours=1)
            d = dist if (dist in JITTER_DISTS if stage == "end_jitter" else dist in DELAY_DISTS) else None
            out[stage] = _stage_at(stage, level * hours, d, f"{where}.{stage}")
        else:
            if isinstance(value, bool) or not isinstance(value, (int, float)) or value < 0:
                raise ConfigError(f"{where}.{stage}: expected a number (the level-1 value), got {value!r}")
            if stage != "spurious" and value > 1:
                raise ConfigError(f"{where}.{stage}: must be between 0 and 1, got {value}")
            out[stage] = _stage_at(stage, level * float(value), None, where)
    return out


def _draw_delay(d: DelaySpec, rng: np.random.Generator, n: int) -> np.ndarray:
    """n delays in nanoseconds."""
    if d.dist == "fixed":
        return np.full(n, d.value.value, dtype=np.int64)
    if d.dist == "uniform":
        return rng.integers(d.low.value, d.high.value, size=n, endpoint=True, dtype=np.int64)
    if d.dist == "exponential":
        x = rng.exponential(float(d.mean.value), size=n)
        if d.max is not None:
            x = np.minimum(x, float(d.max.value))
        return np.round(x).astype(np.int64)
    vals = np.array([v.value for v in d.values], dtype=np.int64)
    return vals[rng.integers(0, len(vals), size=n)]


def replay(
    incidents: pd.DataFrame,
    spec: NoiseSpec | dict | None,
    seed: int,
    span: tuple[pd.Timestamp, pd.Timestamp] | None = None,
    entities: Sequence[str] | None = None,
) -> pd.DataFrame:
    """Reported incidents (id, entity, start, end, kind, true_id, extras) from true ones under a noise spec."""
    spec = load_noise(spec)
    validate_incidents(incidents)
    n = len(incidents)
    streams = [np.random.default_rng(s) for s in np.random.SeedSequence(int(seed)).spawn(len(_STAGES))]
    rng_drop, rng_decoy, rng_delay, rng_jitter, rng_spur = streams

    kind = incidents["kind"].astype(str).to_numpy(dtype=object)
    start = times_ns(incidents["start"])
    end = times_ns(incidents["end"])

    keep = np.ones(n, dtype=bool)
    u_drop = rng_drop.random(n)
    if spec.drop is not None:
        p = np.full(n, spec.drop.p)
        for k, pk in spec.drop.per_kind.items():
            p[kind == k] = pk
        if spec.drop.per_mode and "mode" in incidents.columns:
            mode = incidents["mode"].fillna("").astype(str).to_numpy(dtype=object)
            for m, pm in spec.drop.per_mode.items():
                p[mode == m] = pm
        keep = u_drop >= p

    u_decoy = rng_decoy.random(n)
    new_kind = kind.copy()
    if spec.decoys > 0:
        new_kind[(kind == "other") & (u_decoy < spec.decoys)] = "failure"

    new_start = start.copy()
    if spec.delay is not None:
        new_start = start + _draw_delay(spec.delay, rng_delay, n)
    new_end = np.maximum(end, new_start)

    if spec.end_jitter is not None and spec.end_jitter.scale.value > 0:
        s = float(spec.end_jitter.scale.value)
        if spec.end_jitter.dist == "normal":
            j = rng_jitter.normal(0.0, s, size=n)
        else:
            j = rng_jitter.uniform(-s, s, size=n)
        new_end = np.maximum(new_end + np.round(j).astype(np.int64), new_start)

    extras = [c for c in incidents.columns if c not in INCIDENT_COLUMNS and c != "true_id"]
    out = pd.DataFrame(
        {
            "id": incidents["id"].to_numpy(dtype=np.int64)[keep],
            "entity": incidents["entity"].fillna("").astype(str).to_numpy(dtype=object)[keep],
            "start": from_ns(new_start[keep]),
            "end": from_ns(new_end[keep]),
            "kind": new_kind[keep],
            "true_id": pd.array(incidents["id"].to_numpy(dtype=np.int64)[keep], dtype="Int64"),
        }
    )
    kept_rows = np.flatnonzero(keep)
    for c in extras:
        out[c] = incidents[c].iloc[kept_rows].reset_index(drop=True)

    if spec.spurious is not None and spec.spurious.per_day > 0:
        out = pd.concat([out, _spurious(spec.spurious, rng_spur, incidents, span, entities, extras)], ignore_index=True)
    out["entity"] = out["entity"].astype("str")
    out["kind"] = out["kind"].astype("str")
    out["true_id"] = out["true_id"].astype("Int64")
    return out.reset_index(drop=True)


def _spurious(
    sp_spec: SpuriousSpec,
    rng: np.random.Generator,
    incidents: pd.DataFrame,
    span: tuple[pd.Timestamp, pd.Timestamp] | None,
    entities: Sequence[str] | None,
    extras: list[str],
) -> pd.DataFrame:
    """Tickets with no incident behind them, spread uniformly over span and entities."""
    if span is None or entities is None or len(entities) == 0:
        raise ConfigError("noise.spurious: replay needs span=(start, end) and a non-empty entities list")
    t0, t1 = times_ns(pd.DatetimeIndex([pd.Timestamp(span[0]), pd.Timestamp(span[1])]))
    if t1 <= t0:
        raise ConfigError(f"noise.spurious: span end must be after span start, got {span}")
    days = (t1 - t0) / 86_400e9
    count = int(rng.poisson(sp_spec.per_day * days))
    starts = rng.integers(t0, t1, size=count, dtype=np.int64)
    ents = np.asarray(list(entities), dtype=object)[rng.integers(0, len(entities), size=count)]
    first_id = int(incidents["id"].max()) + 1 if len(incidents) else 0
    df = pd.DataFrame(
        {
            "id": np.arange(first_id, first_id + count, dtype=np.int64),
            "entity": ents,
            "start": from_ns(starts),
            "end": from_ns(starts + sp_spec.duration.value),
            "kind": np.full(count, "failure", dtype=object),
            "true_id": pd.array([pd.NA] * count, dtype="Int64"),
        }
    )
    for c in extras:
        df[c] = pd.Series([None] * count, dtype=incidents[c].dtype if count else object)
    return df
