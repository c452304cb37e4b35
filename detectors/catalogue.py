"""Catalogue of single detectors: the built-in ones plus plugins from the ``logtrial.detectors`` entry points.

Composite detectors (``two_stage``) build their members from this catalogue; the full
registry (``logtrial.detectors.registry``) adds the composites on top of it.
"""

from __future__ import annotations

import inspect
from importlib.metadata import entry_points
from typing import Any, Iterable

from logtrial.detectors.base import Detector
from logtrial.detectors.clustering import LogClustering
from logtrial.detectors.density_autoencoder import DensityAutoencoder
from logtrial.detectors.invariants import InvariantMining
from logtrial.detectors.next_event import NextEventLSTM
from logtrial.detectors.pca import PCADetector
from logtrial.detectors.pyod_adapter import PYOD_DETECTORS
from logtrial.detectors.rate_rule import RateRule
from logtrial.detectors.seq_autoencoder import SequenceAutoencoder
from logtrial.detectors.supervised import LogisticDetector, TreeDetector
from logtrial.errors import ConfigError
from pydantic import ValidationError

ENTRY_POINT_GROUP = "logtrial.detectors"

SINGLE: dict[str, type[Detector]] = {
    cls.name: cls
    for cls in (
        RateRule, PCADetector, InvariantMining, LogClustering, *PYOD_DETECTORS, LogisticDetector, TreeDetector,
        NextEventLSTM, SequenceAutoencoder, DensityAutoencoder,
    )
}


def check_class(obj: Any, origin: str) -> type[Detector]:
    """The object itself when it is a concrete Detector subclass with a valid declaration."""
    if not (inspect.isclass(obj) and issubclass(obj, Detector)) or inspect.isabstract(obj):
        raise ConfigError(f"{origin}: expected a concrete subclass of logtrial.detectors.base.Detector, got {obj!r}")
    for attr, allowed in (("reads", ("counts", "sequences")), ("trains_on", ("all", "healthy", "labelled"))):
        value = getattr(obj, attr, None)
        if value not in allowed:
            raise ConfigError(f"{origin}: detector attribute '{attr}' is {value!r}, expected one of {list(allowed)}")
    if not isinstance(getattr(obj, "name", None), str) or not obj.name:
        raise ConfigError(f"{origin}: detector attribute 'name' must be a non-empty string")
    return obj


def plugins(reserved: Iterable[str] = ()) -> dict[str, type[Detector]]:
    """Detectors installed by other packages under the ``logtrial.detectors`` entry-point group."""
    taken = set(SINGLE) | set(reserved)
    found: dict[str, type[Detector]] = {}
    for ep in sorted(entry_points(group=ENTRY_POINT_GROUP), key=lambda e: e.name):
        origin = f"entry point '{ep.name} = {ep.value}' (group {ENTRY_POINT_GROUP})"
        if ep.name in taken:
            raise ConfigError(f"{origin}: name '{ep.name}' is already a built-in detector")
        try:
            obj = ep.load()
        except Exception as exc:  # a broken plugin is reported by name, not with a bare traceback
            raise ConfigError(f"{origin}: cannot be loaded ({type(exc).__name__}: {exc})") from exc
        cls = check_class(obj, origin)
        if cls.name != ep.name:
            raise ConfigError(f"{origin}: class declares name '{cls.name}', entry point says '{ep.name}'")
        found[ep.name] = cls
    return found


def instantiate(known: dict[str, type[Detector]], name: str, params: dict[str, Any] | None, seed: int,
                source: str) -> Detector:
    """A new detector of the named kind from ``known`` with validated parameters; ``source`` names the config."""
    if name not in known:
        raise ConfigError(f"{source}: field 'detector': unknown detector '{name}'; known: {', '.join(sorted(known))}")
    cls = known[name]
    if params is not None and not isinstance(params, dict):
        raise ConfigError(f"{source}: detector '{name}': field 'params' must be a mapping, got {type(params).__name__}")
    if isinstance(seed, bool) or not isinstance(seed, int):
        raise ConfigError(f"{source}: detector '{name}': field 'seed' must be an integer, got {seed!r}")
    try:
        validated = cls.Params(**(params or {}))
    except ValidationError as exc:
        problems = "; ".join(
            f"field 'params.{'.'.join(str(p) for p in err['loc'])}': {err['msg']}" for err in exc.errors()
        )
        raise ConfigError(f"{source}: detector '{name}': {problems}") from exc
    return cls(validated, seed)


def members(reserved: Iterable[str] = ()) -> dict[str, type[Detector]]:
    """Single detectors by name that a composite may use: built-ins, then installed plugins."""
    return {**SINGLE, **plugins(reserved)}


def create_member(name: str, params: dict[str, Any] | None = None, seed: int = 0,
                  source: str = "two_stage member", reserved: Iterable[str] = ()) -> Detector:
    """A new single detector (built-in or plugin) with validated parameters."""
    return instantiate(members(reserved), name, params, seed, source)
