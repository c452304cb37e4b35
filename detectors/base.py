"""The detector contract: what every detector reads, trains on, learns and scores."""

from __future__ import annotations

import json
from abc import ABC, abstractmethod
from pathlib import Path
from typing import Any, ClassVar, Literal

import numpy as np
from logtrial.errors import LogtrialError
from logtrial.windowing.windows import WindowSet
from pydantic import BaseModel, ConfigDict, ValidationError

Reads = Literal["counts", "sequences"]
TrainsOn = Literal["all", "healthy", "labelled"]
READS: tuple[str, ...] = ("counts", "sequences")
TRAINS_ON: tuple[str, ...] = ("all", "healthy", "labelled")

STATE_ARRAYS = "state.npz"
STATE_JSON = "detector.json"


class DetectorError(LogtrialError):
    """A detector could not fit, score, save or load; the message names the detector and the cause."""


class DetectorParams(BaseModel):
    """Base of every detector's parameter model: unknown fields are refused, values are frozen."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class Detector(ABC):
    """One anomaly or failure detector: ``fit`` learns from windows, ``score`` ranks windows.

    Subclasses set the class attributes ``name``, ``reads``, ``trains_on`` and ``Params``
    and implement ``_fit`` and ``_score``. Scores are float64, one per window, higher =
    more anomalous. A detector never chooses a threshold. Subclasses that can be saved
    without pickle set ``supports_state = True`` and implement ``_state``/``_load_state``.
    """

    name: ClassVar[str]
    reads: ClassVar[Reads]
    trains_on: ClassVar[TrainsOn]
    Params: ClassVar[type[DetectorParams]] = DetectorParams
    supports_state: ClassVar[bool] = False

    def __init__(self, params: DetectorParams | dict[str, Any] | None = None, seed: int = 0) -> None:
        if params is None:
            params = self.Params()
        elif isinstance(params, dict):
            try:
                params = self.Params(**params)
            except ValidationError as exc:
                raise DetectorError(f"detector '{self.name}': invalid params: {exc}") from exc
        elif not isinstance(params, self.Params):
            raise DetectorError(
                f"detector '{self.name}': params must be {self.Params.__name__}, got {type(params).__name__}"
            )
        self.params = params
        self.seed = int(seed)
        self.vocab_size: int | None = None

    # ----- public contract -------------------------------------------------------------
    def fit(self, windows: WindowSet, labels: np.ndarray | None = None) -> "Detector":
        """Learn from the windows (and labels, for detectors that train on labels); returns self."""
        self._check_windows(windows, fitted=False)
        if labels is not None:
            labels = np.asarray(labels)
            if labels.shape != (len(windows),):
                raise self.error(f"labels have shape {labels.shape}, expected ({len(windows)},) aligned with windows")
            labels = labels.astype(np.int8, copy=False)
        if self.trains_on == "labelled":
            if labels is None:
                raise self.error("trains on labelled windows but no labels were given")
            used = labels >= 0
            if len(np.unique(labels[used])) < 2:
                found = sorted(int(v) for v in np.unique(labels[used]))
                raise self.error(
                    f"trains on labelled windows and needs both classes, but the labels hold only {found}"
                )
        if len(windows) == 0:
            raise self.error("cannot fit on zero windows")
        self._guarded(self._fit, windows, labels)
        self.vocab_size = int(windows.vocab_size)
        return self

    def score(self, windows: WindowSet) -> np.ndarray:
        """One float64 score per window; higher means more anomalous or more failure-like."""
        self._check_windows(windows, fitted=True)
        if len(windows) == 0:
            return np.zeros(0, dtype=np.float64)
        scores = np.asarray(self._guarded(self._score, windows), dtype=np.float64)
        if scores.shape != (len(windows),):
            raise self.error(f"produced {scores.shape} scores for {len(windows)} windows")
        bad = ~np.isfinite(scores)
        if bad.any():
            raise self.error(f"produced {int(bad.sum())} non-finite scores (first at window {int(np.argmax(bad))})")
        return scores

    def info(self) -> dict[str, Any]:
        """Facts learned in fit worth recording with a run (sizes, reference thresholds)."""
        return {}

    def error(self, cause: str) -> DetectorError:
        """A DetectorError whose message names this detector and the cause."""
        return DetectorError(f"detector '{self.name}': {cause}")

    # ----- save / load without pickle -----------------------------------------------------
    def state(self) -> dict[str, Any]:
        """Learned state as arrays and JSON values, for saving without pickle."""
        if not self.supports_state:
            raise self.error("does not support save/load")
        if self.vocab_size is None:
            raise self.error("is not fitted; nothing to save")
        return self._state()

    @classmethod
    def from_state(
        cls, state: dict[str, Any], params: DetectorParams | dict[str, Any] | None, seed: int, vocab_size: int
    ) -> "Detector":
        """A fitted detector rebuilt from ``state()`` output."""
        if not cls.supports_state:
            raise DetectorError(f"detector '{cls.name}': does not support save/load")
        det = cls(params, seed)
        det._guarded(det._load_state, state)
        det.vocab_size = int(vocab_size)
        return det

    def save(self, directory: str | Path) -> Path:
        """Write the fitted detector to ``directory`` as state.npz plus detector.json."""
        state = self.state()
        arrays = {k: v for k, v in state.items() if isinstance(v, np.ndarray)}
        plain = {k: v for k, v in state.items() if not isinstance(v, np.ndarray)}
        for key, arr in arrays.items():
            if arr.dtype == object:
                raise self.error(f"state array '{key}' has dtype object, which cannot be saved without pickle")
        out = Path(directory)
        out.mkdir(parents=True, exist_ok=True)
        doc = {
            "name": self.name,
            "params": self.params.model_dump(mode="json"),
            "seed": self.seed,
            "vocab_size": self.vocab_size,
            "state": plain,
        }
        tmp_npz = out / (STATE_ARRAYS + ".part")
        tmp_json = out / (STATE_JSON + ".part")
        with open(tmp_npz, "wb") as fh:
            np.savez(fh, **arrays)
        tmp_json.write_text(json.dumps(doc, indent=1, sort_keys=True))
        tmp_npz.replace(out / STATE_ARRAYS)
        tmp_json.replace(out / STATE_JSON)
        return out

    @classmethod
    def load(cls, directory: str | Path) -> "Detector":
        """Read a detector written by ``save`` (arrays loaded with allow_pickle=False)."""
        doc = read_saved(directory)
        if doc["name"] != cls.name:
            raise DetectorError(f"detector '{cls.name}': {directory} holds detector '{doc['name']}'")
        return cls.from_state(doc["state"], doc["params"], doc["seed"], doc["vocab_size"])

    # ----- for subclasses ------------------------------------------------------------------
    @abstractmethod
    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        """Learn; labels are int8 (1, 0, -1 excluded) or None."""

    @abstractmethod
    def _score(self, windows: WindowSet) -> np.ndarray:
        """Scores for windows already checked against the fitted vocabulary."""

    def _state(self) -> dict[str, Any]:
        raise self.error("does not support save/load")

    def _load_state(self, state: dict[str, Any]) -> None:
        raise self.error("does not support save/load")

    # ----- internals -----------------------------------------------------------------------
    def _guarded(self, func: Any, *args: Any) -> Any:
        try:
            return func(*args)
        except DetectorError:
            raise
        except MemoryError as exc:
            raise self.error(f"out of memory: {exc}") from exc
        except Exception as exc:  # any failure inside an implementation is reported by name
            raise self.error(f"{type(exc).__name__}: {exc}") from exc

    def _check_windows(self, windows: WindowSet, fitted: bool) -> None:
        if not isinstance(windows, WindowSet):
            raise self.error(f"expects a WindowSet, got {type(windows).__name__}")
        if windows.counts.shape != (len(windows), windows.vocab_size):
            raise self.error(
                f"count matrix has shape {windows.counts.shape}, expected ({len(windows)}, {windows.vocab_size})"
            )
        if fitted:
            if self.vocab_size is None:
                raise self.error("is not fitted; call fit before score")
            if windows.vocab_size != self.vocab_size:
                raise self.error(
                    f"windows have vocabulary size {windows.vocab_size}, fitted on {self.vocab_size}"
                )


def read_saved(directory: str | Path) -> dict[str, Any]:
    """The JSON document and arrays of a saved detector, merged into one state dict."""
    folder = Path(directory)
    doc_path = folder / STATE_JSON
    npz_path = folder / STATE_ARRAYS
    if not doc_path.is_file() or not npz_path.is_file():
        raise DetectorError(f"{folder}: expected {STATE_JSON} and {STATE_ARRAYS} written by Detector.save")
    try:
        doc = json.loads(doc_path.read_text())
    except json.JSONDecodeError as exc:
        raise DetectorError(f"{doc_path}: line {exc.lineno}: invalid JSON ({exc.msg})") from exc
    for key in ("name", "params", "seed", "vocab_size", "state"):
        if key not in doc:
            raise DetectorError(f"{doc_path}: missing field '{key}'")
    with np.load(npz_path, allow_pickle=False) as npz:
        state = dict(doc["state"])
        state.update({k: npz[k] for k in npz.files})
    doc["state"] = state
    return doc
