"""Detector registry: built-in detectors plus plugins from the ``logtrial.detectors`` entry points."""

from __future__ import annotations

import inspect
from importlib.metadata import entry_points
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from detectors.base import Detector, read_saved
from detectors.clustering import LogClustering
from detectors.density_autoencoder import DensityAutoencoder
from detectors.invariants import InvariantMining
from detectors.next_event import NextEventLSTM
from detectors.pca import PCADetector
from detectors.pyod_adapter import PYOD_DETECTORS
from detectors.rate_rule import RateRule
from detectors.seq_autoencoder import SequenceAutoencoder
from detectors.supervised import LogisticDetector, TreeDetector
from detectors.two_stage import TwoStage
from harness.errors import ConfigError

ENTRY_POINT_GROUP = "logtrial.detectors"

BUILTINS: dict[str, type[Detector]] = {
    cls.name: cls
    for cls in (
        RateRule, PCADetector, InvariantMining, LogClustering, *PYOD_DETECTORS, LogisticDetector, TreeDetector,
        NextEventLSTM, SequenceAutoencoder, DensityAutoencoder, TwoStage,
    )
}


def _check_class(obj: Any, origin: str) -> type[Detector]:
    """The object itself when it is a concrete Detector subclass with a valid declaration."""
    if not (inspect.isclass(obj) and issubclass(obj, Detector)) or inspect.isabstract(obj):
        raise ConfigError(f"{origin}: expected a concrete subclass of detectors.base.Detector, got {obj!r}")
    for attr, allowed in (("reads", ("counts", "sequences")), ("trains_on", ("all", "healthy", "labelled"))):
        value = getattr(obj, attr, None)
        if value not in allowed:
            raise ConfigError(f"{origin}: detector attribute '{attr}' is {value!r}, expected one of {list(allowed)}")
    if not isinstance(getattr(obj, "name", None), str) or not obj.name:
        raise ConfigError(f"{origin}: detector attribute 'name' must be a non-empty string")
    return obj


def plugins() -> dict[str, type[Detector]]:
    """Detectors installed by other packages under the ``logtrial.detectors`` entry-point group."""
    found: dict[str, type[Detector]] = {}
    for ep in sorted(entry_points(group=ENTRY_POINT_GROUP), key=lambda e: e.name):
        origin = f"entry point '{ep.name} = {ep.value}' (group {ENTRY_POINT_GROUP})"
        if ep.name in BUILTINS:
            raise ConfigError(f"{origin}: name '{ep.name}' is already a built-in detector")
        try:
            obj = ep.load()
        except Exception as exc:  # a broken plugin is reported by name, not with a bare traceback
            raise ConfigError(f"{origin}: cannot be loaded ({type(exc).__name__}: {exc})") from exc
        cls = _check_class(obj, origin)
        if cls.name != ep.name:
            raise ConfigError(f"{origin}: class declares name '{cls.name}', entry point says '{ep.name}'")
        found[ep.name] = cls
    return found


def available() -> dict[str, type[Detector]]:
    """All detector classes by name: built-ins first, then installed plugins."""
    return {**BUILTINS, **plugins()}


def create(name: str, params: dict[str, Any] | None = None, seed: int = 0, source: str = "experiment") -> Detector:
    """A new detector of the named kind with validated parameters; ``source`` names the config file."""
    known = available()
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


def load(directory: str | Path) -> Detector:
    """A fitted detector read from a folder written by ``Detector.save``, any registered kind."""
    doc = read_saved(directory)
    known = available()
    if doc["name"] not in known:
        raise ConfigError(f"{directory}: field 'name': unknown detector '{doc['name']}'; known: {', '.join(sorted(known))}")
    return known[doc["name"]].from_state(doc["state"], doc["params"], doc["seed"], doc["vocab_size"])
