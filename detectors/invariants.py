"""Invariant Mining (Lou et al., USENIX ATC 2010): sparse integer relations between event counts."""

from __future__ import annotations

from itertools import combinations
from math import gcd
from typing import Any, ClassVar

import numpy as np
import scipy.sparse as sp
from logtrial.detectors.base import Detector, DetectorParams
from logtrial.detectors.features import document_frequency
from logtrial.windowing.windows import WindowSet
from pydantic import Field


class InvariantParams(DetectorParams):
    """Search limits and acceptance rule of Invariant Mining."""

    support_ratio: float = Field(0.98, gt=0.5, le=1.0, description="share of training windows an invariant must hold on")
    max_support: int = Field(3, ge=1, le=5, description="most events one invariant may involve")
    max_coefficient: int = Field(3, ge=1, le=20, description="largest absolute integer coefficient")
    max_events: int = Field(40, ge=1, description="candidate events, most frequent first")
    max_combinations: int = Field(20_000, ge=1, description="cap on event combinations examined")
    max_invariants: int = Field(500, ge=1, description="stop after this many invariants")
    max_windows: int = Field(50_000, ge=10, description="training windows sampled (seeded) for the search")
    constant: bool = Field(True, description="allow a constant term (x_a - x_b = c); else relations equal 0")
    rank_tol: float = Field(1e-9, gt=0.0, lt=1.0, description="relative eigenvalue below which a direction is null")


def integer_relation(vector: np.ndarray, max_coefficient: int, tol: float = 0.05) -> np.ndarray | None:
    """Smallest integer vector parallel to ``vector`` with all entries non-zero, or None."""
    v = np.asarray(vector, dtype=np.float64)
    mags = np.abs(v)
    if mags.max() == 0 or mags.min() < 0.05 * mags.max():
        return None
    base = v / mags.min()
    for mult in range(1, max_coefficient + 1):
        cand = base * mult
        rounded = np.rint(cand)
        if np.max(np.abs(cand - rounded)) <= tol * mult and np.max(np.abs(rounded)) <= max_coefficient:
            ints = rounded.astype(np.int64)
            g = 0
            for c in ints:
                g = gcd(g, int(abs(c)))
            ints //= max(g, 1)
            if ints[np.flatnonzero(ints)[0]] < 0:
                ints = -ints
            return ints
    return None


class InvariantMining(Detector):
    """Mine sparse integer invariants sum_i a_i x_i = c over event counts; score = violations.

    Following Lou et al. (USENIX ATC 2010): the dimension of the invariant space is
    estimated from the spectrum of the training count matrix (eigenvalues below
    ``rank_tol`` times the largest) and reported in ``info()``. Events absent from at
    least ``support_ratio`` of the training windows (including events never seen) satisfy
    the one-event invariant x_e = 0 (zero columns lie in the null space); they are kept
    as such "zero invariants" and left out of the search, where any relation among them
    would hold trivially on their zeros. The other events, most frequent first up to
    ``max_events``, are searched in combinations of 1..``max_support``, smallest first.
    For each combination the null direction (the smallest eigenvector of the
    combination's covariance, or of its raw second moments without a constant) is
    scaled to small integers; the relation is kept when it holds exactly on at least
    ``support_ratio`` of the training windows (the constant c is the most common value).
    Combinations that contain an invariant already found are skipped. The paper stops
    the search once the estimated dimension is reached; here the estimate does not stop
    it, because the windows allowed to violate an invariant (up to 1 - support_ratio)
    hide it from the spectrum. The search ends when ``max_invariants`` are found or
    ``max_combinations`` have been examined. Score = number of violated invariants.
    """

    name: ClassVar[str] = "invariants"
    reads: ClassVar[str] = "counts"
    trains_on: ClassVar[str] = "all"
    Params: ClassVar[type[InvariantParams]] = InvariantParams
    supports_state: ClassVar[bool] = True

    def _fit(self, windows: WindowSet, labels: np.ndarray | None) -> None:
        p = self.params
        counts = sp.csr_matrix(windows.counts)
        n = counts.shape[0]
        if n > p.max_windows:
            rng = np.random.default_rng(self.seed)
            counts = counts[np.sort(rng.choice(n, p.max_windows, replace=False))]
            n = p.max_windows
        df = document_frequency(counts) / n
        eligible = np.flatnonzero(df > 1.0 - p.support_ratio)
        # an event absent from at least support_ratio of the windows satisfies x_e = 0: a zero invariant
        self.zero_events_ = np.flatnonzero(df <= 1.0 - p.support_ratio)
        order = np.argsort(-df[eligible], kind="stable")
        cand = np.sort(eligible[order[: p.max_events]])
        self.candidates_ = cand
        rows, weights = np.unique(counts[:, cand].toarray().astype(np.int64), axis=0, return_counts=True)
        w = weights.astype(np.float64)
        total = w.sum()
        mean = (w @ rows) / total
        centred = rows - mean if p.constant else rows.astype(np.float64)
        gram = (centred * w[:, None]).T @ centred / total
        self.rank_estimate_ = self._null_dimension(gram) + len(self.zero_events_)
        found_events: list[tuple[int, ...]] = []
        found_coefs: list[np.ndarray] = []
        found_targets: list[int] = []
        tried = 0
        done = False
        for size in range(1, p.max_support + 1):
            for combo in combinations(range(len(cand)), size):
                if tried >= p.max_combinations or len(found_events) >= p.max_invariants:
                    done = True
                    break
                members = set(combo)
                if any(set(prev) <= members for prev in found_events):
                    continue
                tried += 1
                idx = list(combo)
                sub = gram[np.ix_(idx, idx)]
                _, vec = np.linalg.eigh(sub)
                coefs = integer_relation(vec[:, 0], p.max_coefficient)
                if coefs is None:
                    continue
                resid = rows[:, idx] @ coefs
                if p.constant:
                    values, first = np.unique(resid, return_inverse=True)
                    mass = np.bincount(first, weights=w)
                    target = int(values[np.argmax(mass)])
                    held = mass.max() / total
                else:
                    target = 0
                    held = w[resid == 0].sum() / total
                if held >= p.support_ratio:
                    found_events.append(combo)
                    found_coefs.append(coefs)
                    found_targets.append(target)
            if done:
                break
        self.combinations_tried_ = tried
        width = p.max_support
        ev = np.full((len(found_events), width), -1, dtype=np.int64)
        co = np.zeros((len(found_events), width), dtype=np.int64)
        for i, (combo, coefs) in enumerate(zip(found_events, found_coefs)):
            ev[i, : len(combo)] = cand[list(combo)]
            co[i, : len(combo)] = coefs
        self.inv_events_ = ev
        self.inv_coefs_ = co
        self.inv_targets_ = np.asarray(found_targets, dtype=np.int64)

    def _null_dimension(self, gram: np.ndarray) -> int:
        if gram.size == 0:
            return 0
        eig = np.linalg.eigvalsh(gram)
        top = eig.max()
        if top <= 0:
            return int(gram.shape[0])
        return int((eig <= self.params.rank_tol * top).sum())

    def invariants(self) -> list[tuple[dict[int, int], int]]:
        """The mined invariants as ({event id: coefficient}, constant) pairs."""
        out = []
        for ev, co, target in zip(self.inv_events_, self.inv_coefs_, self.inv_targets_):
            keep = ev >= 0
            out.append(({int(e): int(c) for e, c in zip(ev[keep], co[keep])}, int(target)))
        out.extend(({int(e): 1}, 0) for e in self.zero_events_)
        return out

    def relation_matrix(self, vocab_size: int) -> sp.csr_matrix:
        """Vocabulary x invariants matrix of integer coefficients."""
        k = len(self.inv_targets_)
        r, c = np.nonzero(self.inv_events_ >= 0)
        return sp.csr_matrix(
            (self.inv_coefs_[r, c].astype(np.float64), (self.inv_events_[r, c], r)),
            shape=(vocab_size, k),
        )

    def violations(self, windows: WindowSet) -> np.ndarray:
        """Boolean windows x invariants matrix: True where the invariant does not hold."""
        self._check_windows(windows, fitted=True)
        return self._violations(windows)

    def _violations(self, windows: WindowSet) -> np.ndarray:
        counts = sp.csr_matrix(windows.counts, dtype=np.float64)
        zero = counts[:, self.zero_events_].toarray() != 0
        if len(self.inv_targets_) == 0:
            return zero
        values = (counts @ self.relation_matrix(windows.vocab_size)).toarray()
        return np.c_[np.rint(values).astype(np.int64) != self.inv_targets_[None, :], zero]

    def _score(self, windows: WindowSet) -> np.ndarray:
        counts = sp.csr_matrix(windows.counts, dtype=np.float64)
        counts.eliminate_zeros()
        present = counts.copy()
        present.data[:] = 1.0
        is_zero = np.zeros(windows.vocab_size)
        is_zero[self.zero_events_] = 1.0
        broken_zero = present @ is_zero
        if len(self.inv_targets_) == 0:
            return broken_zero
        values = (counts @ self.relation_matrix(windows.vocab_size)).toarray()
        broken = (np.rint(values).astype(np.int64) != self.inv_targets_[None, :]).sum(axis=1)
        return broken + broken_zero

    def info(self) -> dict[str, Any]:
        """Estimated invariant-space dimension, invariants found and combinations tried."""
        if self.vocab_size is None:
            return {}
        return {
            "invariant_dimension_estimate": int(self.rank_estimate_),
            "invariants": int(len(self.inv_targets_)),
            "candidate_events": int(len(self.candidates_)),
            "zero_invariants": int(len(self.zero_events_)),
            "combinations_tried": int(self.combinations_tried_),
        }

    def _state(self) -> dict[str, Any]:
        return {
            "inv_events": self.inv_events_,
            "inv_coefs": self.inv_coefs_,
            "inv_targets": self.inv_targets_,
            "candidates": self.candidates_,
            "zero_events": self.zero_events_,
            "rank_estimate": int(self.rank_estimate_),
            "combinations_tried": int(self.combinations_tried_),
        }

    def _load_state(self, state: dict[str, Any]) -> None:
        self.inv_events_ = np.asarray(state["inv_events"], dtype=np.int64).reshape(-1, self.params.max_support)
        self.inv_coefs_ = np.asarray(state["inv_coefs"], dtype=np.int64).reshape(-1, self.params.max_support)
        self.inv_targets_ = np.asarray(state["inv_targets"], dtype=np.int64)
        self.candidates_ = np.asarray(state["candidates"], dtype=np.int64)
        self.zero_events_ = np.asarray(state["zero_events"], dtype=np.int64)
        self.rank_estimate_ = int(state["rank_estimate"])
        self.combinations_tried_ = int(state["combinations_tried"])
