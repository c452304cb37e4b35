"""Two-stage composition: stage one flags anomalous windows, stage two decides which of them look like failures.

``two_stage`` is the published form: both stages are autoencoders (``seq_ae`` over event
sequences and ``density_ae`` over event frequencies); stage one learns the windows reported
healthy, stage two the same architectures learns the windows reported failing, and there is
no classifier. ``two_stage_supervised`` keeps the variant whose second stage is a classifier
(pca + density_ae gated into logistic regression). ``combine: stage1_only`` or
``stage2_only`` turns either into its ablation (only that stage is fitted).
"""

from __future__ import annotations

import hashlib
import json
from collections import OrderedDict
from typing import Any, ClassVar, Literal

import numpy as np
from logtrial.detectors.base import Detector, DetectorParams
from logtrial.detectors.catalogue import create_member, members
from logtrial.errors import ConfigError
from logtrial.windowing.windows import WindowSet
from pydantic import BaseModel, ConfigDict, Field, model_validator

STAGES = ("stage1", "stage2")
COMPOSITE_NAMES = ("two_stage", "two_stage_supervised")


class MemberSpec(BaseModel):
    """One member of a stage: a registered detector name and its parameters."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    name: str
    params: dict[str, Any] = Field(default_factory=dict)

    @model_validator(mode="before")
    @classmethod
    def _known(cls, raw: Any) -> Any:
        """Check the member exists and its params validate; store its full (canonical) params."""
        if not isinstance(raw, dict) or not isinstance(raw.get("name"), str):
            raise ValueError("expected a mapping {name: <detector>, params: {...}}")
        name = raw["name"]
        if name in COMPOSITE_NAMES:
            raise ValueError(f"a two-stage member cannot itself be a composite ({name})")
        known = members(reserved=COMPOSITE_NAMES)
        if name not in known:
            raise ValueError(f"unknown detector '{name}'; known: {', '.join(sorted(known))}")
        params = raw.get("params") or {}
        if not isinstance(params, dict):
            raise ValueError(f"params of member '{name}' must be a mapping")
        try:
            det = create_member(name, params, seed=0, reserved=COMPOSITE_NAMES)
        except ConfigError as exc:
            raise ValueError(str(exc)) from None
        return {**raw, "params": det.params.model_dump(mode="json")}


def _autoencoders() -> tuple[MemberSpec, ...]:
    """The published members of either stage: a sequence and a density autoencoder."""
    return (MemberSpec(name="seq_ae"), MemberSpec(name="density_ae"))


class TwoStageParams(DetectorParams):
    """Members of both stages and how their scores are combined (defaults: the published autoencoder form)."""

    stage1: tuple[MemberSpec, ...] = Field(
        default_factory=_autoencoders, min_length=1, description="anomaly detectors trained on healthy windows"
    )
    stage2: tuple[MemberSpec, ...] = Field(
        default_factory=_autoencoders, min_length=1,
        description="failure detectors: unsupervised ones trained on failing windows, classifiers on labelled ones"
    )
    combine: Literal["gated", "product", "stage2_only", "stage1_only"] = Field(
        "gated", description="how the stage ranks make the final score (see TwoStage); *_only are the ablations"
    )
    gate_quantile: float = Field(0.9, gt=0.0, lt=1.0, description="stage-one rank quantile above which a window is flagged")


class TwoStageSupervisedParams(TwoStageParams):
    """The supervised variant's defaults: pca + density_ae in stage one, logistic regression in stage two."""

    stage1: tuple[MemberSpec, ...] = Field(
        default_factory=lambda: (MemberSpec(name="pca"), MemberSpec(name="density_ae")), min_length=1,
        description="anomaly detectors trained on healthy windows"
    )
    stage2: tuple[MemberSpec, ...] = Field(
        default_factory=lambda: (MemberSpec(name="logistic"),), min_length=1,
        description="failure detectors: classifiers on labelled windows, unsupervised ones on failing windows"
    )


# Fitted members shared between compositions that differ only in how stages combine (a composition and its
# ablations, run one after the other in the same process): same member, params, seed and training windows
# give the same fit, so it is done once. Kept small; scores of the same windows are shared the same way.
_MEMBER_CACHE: OrderedDict[str, tuple[Detector, np.ndarray, float]] = OrderedDict()
_SCORE_CACHE: OrderedDict[str, np.ndarray] = OrderedDict()
CACHE_SIZE = 48


def windows_digest(windows: WindowSet, labels: np.ndarray | None = None) -> str:
    """Hash of a window set's counts, sequences and (optional) labels."""
    h = hashlib.sha256()
    c = windows.counts.tocsr()
    for a in (c.data, c.indices, c.indptr, windows.seq_values, windows.seq_offsets,
              np.asarray([windows.vocab_size]), labels if labels is not None else np.zeros(0)):
        h.update(np.ascontiguousarray(a).tobytes())
    return h.hexdigest()


def _remember(cache: OrderedDict, key: str, value) -> None:
    cache[key] = value
    cache.move_to_end(key)
    while len(cache) > CACHE_SIZE:
        cache.popitem(last=False)


def ecdf_rank(reference_sorted: np.ndarray, scores: np.ndarray, rel_tol: float = 1e-5) -> np.ndarray:
    """Mid-rank of each score within a sorted reference sample, in [0, 1].

    Values within ``rel_tol`` (relative, at least absolute 1e-12) count as ties: a member's
    score for a window may differ in its last bits with the batch it is computed in (BLAS
    kernels vary with the batch size), and that must not move the window's rank.
    """
    n = len(reference_sorted)
    scores = np.asarray(scores, dtype=np.float64)
    tol = np.maximum(np.abs(scores) * rel_tol, 1e-12)
    lo = np.searchsorted(reference_sorted, scores - tol, side="left")
    hi = np.searchsorted(reference_sorted, scores + tol, side="right")
    return (lo + hi) / (2.0 * n)


class TwoStage(Detector):
    """Two stages of any registered detectors, each stage an ensemble averaged on ranks.

    Declares ``trains_on = 'labelled'``: the harness passes the training windows with
    reported labels 1 or 0 (-1 excluded) and the two-stage detector selects per stage:

    - Stage one ("is it anomalous?"): members are fitted on the windows labelled 0
      (healthy by the reported labels); a member that itself trains on labels gets all
      labelled windows with their labels.
    - Stage two ("does it look like a failure?"): members that train on labels get all
      labelled windows; an unsupervised member is fitted on the windows labelled 1
      (failing) and its score is negated, so closeness to failures ranks high.

    Members may read event sequences (``seq_ae``, ``next_event``) or counts: windows carry both.
    With ``combine: stage1_only`` (or ``stage2_only``) only that stage's members are fitted.

    Member ``i`` of stage ``s`` uses seed ``seed + 100 * s + i``. Each member's score is
    turned into a rank in [0, 1] by the mid-rank empirical CDF of its scores on all
    labelled training windows (fixed at fit time, so scoring is independent of the batch),
    and a stage's score is the mean rank of its members: ``r1`` and ``r2``. A window is
    *flagged* when ``r1`` reaches ``gate``, the ``gate_quantile`` of ``r1`` over the
    labelled training windows. Final score by ``combine``:

    - ``gated`` (default): flagged windows score ``1 + r2`` (ordered by stage two, above
      every unflagged window); unflagged windows score ``r1 * r2`` (below 1).
    - ``product``: ``r1 * r2``.
    - ``stage2_only``: ``r2``; ``stage1_only``: ``r1`` (ablations).
    """

    name: ClassVar[str] = "two_stage"
    reads: ClassVar[str] = "sequences"
    trains_on: ClassVar[str] = "labelled"
    Params: ClassVar[type[TwoStageParams]] = TwoStageParams
    supports_state: ClassVar[bool] = True

    def _stages_used(self) -> tuple[int, ...]:
        """Stages whose members make the score: both, or one for the ablations."""
        return {"stage1_only": (1,), "stage2_only": (2,)}.get(self.params.combine, (1, 2))

    def _members(self) -> list[tuple[int, int, Detector]]:
        out = []
        for s, stage in enumerate(STAGES, 1):
            if s not in self._stages_used():
                continue
            for i, spec in enumerate(getattr(self.params, stage)):
                out.append((s, i, create_member(spec.name, spec.params, seed=self.seed + 100 * s + i, source=self.name,
                                             reserved=COMPOSITE_NAMES)))
        return out

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        if labels is None:
            raise self.error("trains on labelled windows but no labels were given")
        used = np.flatnonzero(labels >= 0)
        healthy = np.flatnonzero(labels == 0)
        failing = np.flatnonzero(labels == 1)
        ref_ws = windows.subset(used)
        data_key = windows_digest(ref_ws, labels[used])
        self.members_ = []
        self.member_keys_: list[str | None] = []
        self.refs_: list[np.ndarray] = []
        self.signs_: list[float] = []
        for s, i, det in self._members():
            key = json.dumps([data_key, s, det.name, det.params.model_dump(mode="json"), det.seed])
            if key not in _MEMBER_CACHE:
                sign = 1.0
                if det.trains_on == "labelled":
                    det.fit(ref_ws, labels[used])
                elif s == 1:
                    det.fit(windows.subset(healthy))
                else:
                    det.fit(windows.subset(failing))
                    sign = -1.0
                _remember(_MEMBER_CACHE, key, (det, np.sort(sign * det.score(ref_ws)), sign))
            det, ref, sign = _MEMBER_CACHE[key]
            self.member_keys_.append(key)
            self.members_.append((s, i, det))
            self.signs_.append(sign)
            self.refs_.append(ref)
        r1, _ = self._stage_ranks(ref_ws)
        self.gate_ = float(np.quantile(r1, self.params.gate_quantile))

    def _stage_ranks(self, windows: WindowSet) -> tuple[np.ndarray, np.ndarray]:
        """Mean member rank of stage one and of stage two for each window (0.5 for a stage not fitted)."""
        sums = {1: np.zeros(len(windows)), 2: np.zeros(len(windows))}
        n = {1: 0, 2: 0}
        data_key = windows_digest(windows)
        keys = getattr(self, "member_keys_", [None] * len(self.members_))
        for (s, _, det), ref, sign, member in zip(self.members_, self.refs_, self.signs_, keys):
            if member is None:  # a member read back from disk: not shared
                raw = det.score(windows)
            else:
                key = f"{member}:{data_key}"
                if key not in _SCORE_CACHE:
                    _remember(_SCORE_CACHE, key, det.score(windows))
                raw = _SCORE_CACHE[key]
            sums[s] += ecdf_rank(ref, sign * raw)
            n[s] += 1
        return tuple(sums[s] / n[s] if n[s] else np.full(len(windows), 0.5) for s in (1, 2))

    def _score(self, windows: WindowSet) -> np.ndarray:
        r1, r2 = self._stage_ranks(windows)
        mode = self.params.combine
        if mode == "stage1_only":
            return r1
        if mode == "stage2_only":
            return r2
        if mode == "product":
            return r1 * r2
        return np.where(r1 >= self.gate_, 1.0 + r2, r1 * r2)

    def stage_scores(self, windows: WindowSet) -> dict[str, np.ndarray]:
        """Stage-one and stage-two ranks and the flag of each window (for inspection)."""
        self._check_windows(windows, fitted=True)
        r1, r2 = self._stage_ranks(windows)
        return {"stage1": r1, "stage2": r2, "flagged": r1 >= self.gate_}

    def info(self) -> dict[str, Any]:
        """The gate and each member's own facts."""
        if not hasattr(self, "gate_"):
            return {}
        return {
            "gate": self.gate_,
            "members": [{"stage": s, "name": det.name, "info": det.info()} for s, _, det in self.members_],
        }

    def _state(self) -> dict[str, Any]:
        out: dict[str, Any] = {"gate": self.gate_, "vocab": int(self.vocab_size or 0)}
        for (s, i, det), ref, sign in zip(self.members_, self.refs_, self.signs_):
            if not det.supports_state:
                raise self.error(f"member '{det.name}' of stage {s} does not support save/load")
            key = f"m{s}.{i}."
            out[key + "ref"] = ref
            out[key + "sign"] = sign
            for k, v in det.state().items():
                out[key + "s." + k] = v
        return out

    def _load_state(self, state: dict[str, Any]) -> None:
        vocab = int(state["vocab"])
        self.gate_ = float(state["gate"])
        self.members_, self.refs_, self.signs_ = [], [], []
        for s, i, det in self._members():
            key = f"m{s}.{i}."
            inner = {k[len(key) + 2:]: v for k, v in state.items() if k.startswith(key + "s.")}
            loaded = type(det).from_state(inner, det.params, det.seed, vocab)
            self.members_.append((s, i, loaded))
            self.refs_.append(np.asarray(state[key + "ref"], dtype=np.float64))
            self.signs_.append(float(state[key + "sign"]))


class TwoStageSupervised(TwoStage):
    """The supervised two-stage variant: stage one as in ``two_stage``, stage two a classifier on reported labels.

    Same composition rules as ``two_stage``; only the default members differ (stage one
    ``pca`` + ``density_ae`` on healthy windows, stage two ``logistic`` on all labelled
    windows), so a report can set it beside the published, classifier-free form.
    """

    name: ClassVar[str] = "two_stage_supervised"
    reads: ClassVar[str] = "counts"
    Params: ClassVar[type[TwoStageParams]] = TwoStageSupervisedParams
