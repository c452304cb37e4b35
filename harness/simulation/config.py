"""Scenario configuration of the simulated fleet: validated fields, defaults and the cache key."""

from __future__ import annotations

import hashlib
import json
from datetime import datetime, timezone
from pathlib import Path

from logtrial.errors import ConfigError
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

GENERATOR_VERSION = "2"
FAILURE_MODES = ("disk_wear", "uplink_degradation", "memory_leak", "cooling_fault")
MS_HOUR = 3_600_000
MS_MIN = 60_000
MS_DAY = 86_400_000


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Failures(_Strict):
    """Failure process: rate, mode mix, precursor lead time and visibility."""

    rate_per_node_year: float = Field(3.0, ge=0)
    mode_mix: dict[str, float] = Field(default_factory=lambda: {m: 1.0 for m in FAILURE_MODES})
    lead_time_hours: tuple[float, float] = (2.0, 336.0)
    precursor_visibility: float = Field(0.8, ge=0, le=1)
    precursor_peak_per_hour: float = Field(4.0, gt=0)

    @field_validator("mode_mix")
    @classmethod
    def _known_modes(cls, v: dict[str, float]) -> dict[str, float]:
        for key, weight in v.items():
            if key not in FAILURE_MODES:
                raise ValueError(f"unknown failure mode '{key}' (known: {', '.join(FAILURE_MODES)})")
            if not weight >= 0:
                raise ValueError(f"weight of '{key}' must be >= 0, got {weight}")
        if sum(v.values()) <= 0:
            raise ValueError("at least one mode needs a positive weight")
        return {m: float(v.get(m, 0.0)) for m in FAILURE_MODES}

    @field_validator("lead_time_hours")
    @classmethod
    def _ordered(cls, v: tuple[float, float]) -> tuple[float, float]:
        lo, hi = v
        if not lo > 0:
            raise ValueError(f"minimum lead time must be > 0 hours, got {lo}")
        if lo > hi:
            raise ValueError(f"range is reversed: minimum {lo} > maximum {hi} (expected [min, max])")
        return (float(lo), float(hi))


class Anomalies(_Strict):
    """Non-failure anomalies and how much their lines resemble failure precursors."""

    decoy_similarity: float = Field(0.5, ge=0, le=1)
    maintenance_per_node_year: float = Field(4.0, ge=0)
    power_dips_per_year: float = Field(10.0, ge=0)
    firmware_rollouts_per_year: float = Field(6.0, ge=0)
    network_blips_per_node_year: float = Field(12.0, ge=0)


class Drift(_Strict):
    """Slow drift over the months: firmware roll-outs reword routine messages and the background mix shifts.

    Off by default. When on, the k-th firmware roll-out brings the k-th reworded form of a
    routine message (``VARIANTS`` in scenario.py, in order, while they last): a node writes
    the new form for a share ``variant_share`` of those lines from the moment it boots the
    new firmware. The weights of the background messages move linearly from their start
    values towards a reshuffled set, reaching ``mix_shift`` of the way at the scenario end.
    """

    enabled: bool = False
    variant_share: float = Field(0.9, ge=0, le=1)
    mix_shift: float = Field(0.8, ge=0, le=1)


class Scenario(_Strict):
    """A simulated fleet: size, duration, traffic, failures and anomalies (all seeded)."""

    seed: int = Field(7, ge=0)
    start: datetime = datetime(2026, 1, 5, tzinfo=timezone.utc)
    days: float = Field(120.0, gt=0, le=36500)
    nodes: int = Field(40, ge=1, le=9999)
    line_rate: float = Field(4.0, ge=0)  # routine lines per node-hour (health checks and incidents on top)
    health_period_minutes: float = Field(60.0, ge=1, le=10080)
    daily_cycle: float = Field(0.5, ge=0, le=1)
    failures: Failures = Field(default_factory=Failures)
    anomalies: Anomalies = Field(default_factory=Anomalies)
    drift: Drift = Field(default_factory=Drift)

    @field_validator("start")
    @classmethod
    def _utc(cls, v: datetime) -> datetime:
        if v.tzinfo is None:
            return v.replace(tzinfo=timezone.utc)
        return v.astimezone(timezone.utc)

    @model_validator(mode="after")
    def _whole_ms(self) -> "Scenario":
        if self.start.microsecond % 1000:
            raise ValueError("start: must be a whole number of milliseconds")
        return self

    @property
    def start_ms(self) -> int:
        """Scenario start, ms since the Unix epoch."""
        return int(self.start.timestamp() * 1000)

    @property
    def end_ms(self) -> int:
        """Scenario end (exclusive), ms since the Unix epoch."""
        return self.start_ms + int(round(self.days * MS_DAY))

    def canonical(self) -> dict:
        """JSON-able form (what scenario.yaml holds)."""
        return self.model_dump(mode="json")

    def key(self) -> str:
        """Hash of the scenario and generator version (cache key)."""
        text = json.dumps({"generator": GENERATOR_VERSION, "scenario": self.canonical()}, sort_keys=True)
        return hashlib.sha256(text.encode()).hexdigest()


def _describe(err: ValidationError) -> str:
    """Validation errors as 'field: problem' phrases."""
    parts = []
    for e in err.errors():
        loc = ".".join(str(x) for x in e["loc"] if x != "[key]") or "(scenario)"
        msg = e["msg"].removeprefix("Value error, ")
        if e["type"] == "extra_forbidden":
            parts.append(f"unknown field '{loc}'")
            continue
        got = e.get("input")
        suffix = "" if isinstance(got, (dict, list)) or got is None else f" (got {got!r})"
        parts.append(f"field '{loc}': {msg}{suffix}")
    return "; ".join(parts)


def load_scenario(source: str | Path | dict | None = None) -> Scenario:
    """Validated scenario from a YAML file, a dict, or the defaults (None)."""
    if source is None:
        return Scenario()
    if isinstance(source, Scenario):
        return source
    if isinstance(source, dict):
        raw, origin = source, "scenario"
    else:
        from logtrial.data.registry import read_yaml

        origin = str(source)
        raw = read_yaml(Path(source))
        if raw is None:
            raw = {}
    if not isinstance(raw, dict):
        raise ConfigError(f"{origin}: expected a mapping of scenario fields, got {type(raw).__name__}")
    try:
        return Scenario.model_validate(raw)
    except ValidationError as exc:
        raise ConfigError(f"{origin}: {_describe(exc)}") from None
