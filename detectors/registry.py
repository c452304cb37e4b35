"""Detector registry: single detectors from the catalogue (built-ins and plugins) plus composites."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from logtrial.detectors.base import Detector, read_saved
from logtrial.detectors.catalogue import ENTRY_POINT_GROUP, SINGLE, instantiate
from logtrial.detectors.catalogue import plugins as _plugins
from logtrial.detectors.two_stage import TwoStage, TwoStageSupervised
from logtrial.errors import ConfigError

__all__ = ["ENTRY_POINT_GROUP", "BUILTINS", "plugins", "available", "create", "load"]

COMPOSITES: dict[str, type[Detector]] = {TwoStage.name: TwoStage, TwoStageSupervised.name: TwoStageSupervised}
BUILTINS: dict[str, type[Detector]] = {**SINGLE, **COMPOSITES}


def plugins() -> dict[str, type[Detector]]:
    """Detectors installed by other packages under the ``logtrial.detectors`` entry-point group."""
    return _plugins(reserved=BUILTINS)


def available() -> dict[str, type[Detector]]:
    """All detector classes by name: built-ins first, then installed plugins."""
    return {**BUILTINS, **plugins()}


def create(name: str, params: dict[str, Any] | None = None, seed: int = 0, source: str = "experiment") -> Detector:
    """A new detector of the named kind with validated parameters; ``source`` names the config file."""
    return instantiate(available(), name, params, seed, source)


def load(directory: str | Path) -> Detector:
    """A fitted detector read from a folder written by ``Detector.save``, any registered kind."""
    doc = read_saved(directory)
    known = available()
    if doc["name"] not in known:
        raise ConfigError(f"{directory}: field 'name': unknown detector '{doc['name']}'; known: {', '.join(sorted(known))}")
    return known[doc["name"]].from_state(doc["state"], doc["params"], doc["seed"], doc["vocab_size"])
