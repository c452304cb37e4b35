"""Transforms of window-by-event count matrices shared by the count-based detectors."""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

DENSE_CELL_LIMIT = 400_000_000  # 3.2 GB of float64; beyond this a dense copy is refused


def document_frequency(counts: sp.csr_matrix) -> np.ndarray:
    """Number of windows in which each event occurs at least once."""
    return np.bincount(counts.indices[counts.data != 0], minlength=counts.shape[1]).astype(np.int64)


def idf_weights(counts: sp.csr_matrix, unseen: float | None = None) -> np.ndarray:
    """Inverse document frequency log(N / df) per event; ``unseen`` (default log N) for df = 0."""
    n = counts.shape[0]
    df = document_frequency(counts)
    out = np.full(counts.shape[1], np.log(n) if unseen is None else unseen, dtype=np.float64)
    seen = df > 0
    out[seen] = np.log(n / df[seen])
    return out


def scale_columns(counts: sp.spmatrix, weights: np.ndarray) -> sp.csr_matrix:
    """Counts with each event column multiplied by its weight (float64, sparse)."""
    return sp.csr_matrix(counts, dtype=np.float64) @ sp.diags(np.asarray(weights, dtype=np.float64))


def l2_normalise_rows(x: sp.spmatrix | np.ndarray) -> sp.csr_matrix | np.ndarray:
    """Rows scaled to unit Euclidean length; all-zero rows stay zero."""
    if sp.issparse(x):
        m = sp.csr_matrix(x, dtype=np.float64)
        norms = np.sqrt(np.asarray(m.multiply(m).sum(axis=1)).ravel())
        inv = np.divide(1.0, norms, out=np.zeros_like(norms), where=norms > 0)
        return sp.diags(inv) @ m
    arr = np.asarray(x, dtype=np.float64)
    norms = np.linalg.norm(arr, axis=1, keepdims=True)
    return np.divide(arr, norms, out=np.zeros_like(arr), where=norms > 0)


def log1p_counts(counts: sp.spmatrix) -> sp.csr_matrix:
    """log(1 + count) per cell, keeping the matrix sparse."""
    m = sp.csr_matrix(counts, dtype=np.float64, copy=True)
    np.log1p(m.data, out=m.data)
    return m


def dense(x: sp.spmatrix | np.ndarray, what: str = "count matrix") -> np.ndarray:
    """A dense float64 copy, refused with a clear message when it would not fit in memory."""
    rows, cols = x.shape
    if rows * cols > DENSE_CELL_LIMIT:
        raise MemoryError(
            f"{what} of {rows} x {cols} is too large to make dense "
            f"(limit {DENSE_CELL_LIMIT} cells); reduce the vocabulary or the number of windows"
        )
    if sp.issparse(x):
        return x.toarray().astype(np.float64, copy=False)
    return np.asarray(x, dtype=np.float64)
