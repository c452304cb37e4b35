"""Each baseline checked against a reference outside the project (library, published formula, paper)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import windows_from_counts
from logtrial.detectors.features import idf_weights
from logtrial.detectors.pca import PCADetector, q_statistic
from logtrial.detectors.registry import create
from scipy.stats import norm
from sklearn.cluster import AgglomerativeClustering
from sklearn.decomposition import PCA
from sklearn.feature_extraction.text import TfidfTransformer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import adjusted_rand_score
from sklearn.metrics.pairwise import cosine_distances
from sklearn.tree import DecisionTreeClassifier


def _sparse_counts(seed: int, n: int = 400, m: int = 20) -> np.ndarray:
    """Session-like counts: each event present in only some windows, with correlated groups."""
    rng = np.random.default_rng(seed)
    latent = rng.poisson(1.5, size=(n, 4))
    mix = rng.integers(0, 3, size=(4, m))
    counts = latent @ mix + rng.poisson(0.3, size=(n, m))
    counts[rng.random((n, m)) < 0.3] = 0
    return counts


# ----- shared features ----------------------------------------------------------------------


def test_idf_matches_scikit_learn_unsmoothed_idf() -> None:
    # scikit-learn TfidfTransformer(smooth_idf=False) defines idf = ln(N / df) + 1
    counts = _sparse_counts(0)
    counts[:, 3] = 0  # an event never seen gets log N (as rare as one seen once), see features.idf_weights
    ours = idf_weights(windows_from_counts(counts).counts)
    ref = TfidfTransformer(smooth_idf=False).fit(np.delete(counts, 3, axis=1)).idf_ - 1.0
    np.testing.assert_allclose(np.delete(ours, 3), ref, rtol=1e-12)
    assert ours[3] == pytest.approx(np.log(len(counts)))


# ----- PCA (Xu et al., SOSP 2009) -----------------------------------------------------------


def test_pca_spe_equals_scikit_learn_pca() -> None:
    train, test = _sparse_counts(1), _sparse_counts(2, n=150)
    ws_train, ws_test = windows_from_counts(train), windows_from_counts(test)
    det = PCADetector({"variance": 0.95}, seed=0).fit(ws_train)
    # independent computation: idf from the training windows, then scikit-learn's PCA
    idf = np.log(len(train) / (train > 0).sum(axis=0))
    ref = PCA(n_components=0.95, svd_solver="full").fit(train * idf)
    assert det.n_components_ == ref.n_components_
    y = test * idf
    recon = ref.inverse_transform(ref.transform(y))
    spe = ((y - recon) ** 2).sum(axis=1)
    np.testing.assert_allclose(det.score(ws_test), spe, rtol=1e-8, atol=1e-9)


def test_q_statistic_matches_published_formula_worked_example() -> None:
    # Jackson & Mudholkar (1979), eq. for Q_alpha; worked example with residual eigenvalues 2, 1, 0.5, alpha 0.05
    lam = np.array([2.0, 1.0, 0.5])
    phi1, phi2, phi3 = lam.sum(), (lam**2).sum(), (lam**3).sum()  # 3.5, 5.25, 9.125
    h0 = 1 - 2 * phi1 * phi3 / (3 * phi2**2)
    c = norm.ppf(0.95)
    expected = phi1 * (c * np.sqrt(2 * phi2 * h0**2) / phi1 + 1 + phi2 * h0 * (h0 - 1) / phi1**2) ** (1 / h0)
    assert q_statistic(lam, 0.05) == pytest.approx(expected, rel=1e-12)
    assert phi1 == 3.5 and phi2 == 5.25 and phi3 == 9.125
    assert 0 < h0 < 1


def test_q_threshold_has_nominal_false_alarm_rate_on_gaussian_data() -> None:
    # Jackson & Mudholkar's approximation: for Gaussian data, P(SPE > Q_alpha) ~ alpha
    rng = np.random.default_rng(5)
    m, k = 12, 3
    basis = np.linalg.qr(rng.normal(size=(m, m)))[0]
    scales = np.r_[30.0, 20.0, 15.0, np.linspace(3.0, 1.0, m - k)]

    def sample(n: int) -> np.ndarray:
        return 1000.0 + (rng.normal(size=(n, m)) * scales) @ basis.T

    det = PCADetector({"n_components": k, "idf": False}, seed=0).fit(windows_from_counts_float(sample(20_000)))
    spe = det.score(windows_from_counts_float(sample(40_000)))
    for alpha in (0.05, 0.01):
        rate = float((spe > det.q_threshold(alpha)).mean())
        assert rate == pytest.approx(alpha, rel=0.15), (alpha, rate)
    assert det.info()["q_threshold"] == pytest.approx(det.q_threshold(det.params.alpha))


def windows_from_counts_float(values: np.ndarray):
    """Windows whose count matrix holds real values (Gaussian test data), sequences empty."""
    ws = windows_from_counts(np.zeros_like(values, dtype=np.int64))
    ws.counts = sp.csr_matrix(values)
    return ws


# ----- Invariant Mining (Lou et al., USENIX ATC 2010) ---------------------------------------

OPEN, READ, CLOSE, START, NOISE = 0, 1, 2, 3, 4


def _workflow(n: int, seed: int, broken: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Sessions of a file workflow: one 'start', then files each 'open', 'read' x r, 'close'.

    The paper's motivating invariant is that every open is matched by one close; ``broken``
    sessions lose one close (a crash mid-file).
    """
    rng = np.random.default_rng(seed)
    files = rng.integers(1, 5, size=n)
    counts = np.zeros((n, 6), dtype=np.int64)
    counts[:, START] = 1
    counts[:, OPEN] = files
    counts[:, CLOSE] = files
    counts[:, READ] = files * rng.integers(1, 6, size=n)
    counts[:, NOISE] = rng.poisson(2.0, size=n)
    bad = np.zeros(n, dtype=bool)
    bad[rng.choice(n, broken, replace=False)] = True
    counts[bad, CLOSE] -= 1
    return counts, bad


def test_invariant_mining_recovers_workflow_invariants_and_flags_breaks() -> None:
    train, train_bad = _workflow(2000, seed=1, broken=20)  # 1% broken: below 1 - support_ratio (2%)
    det = create("invariants", {"support_ratio": 0.98}, seed=0).fit(windows_from_counts(train))
    found = det.invariants()
    assert ({OPEN: 1, CLOSE: -1}, 0) in found  # open - close = 0
    assert ({START: 1}, 1) in found  # exactly one start per session
    # nothing involving the independent noise event, nor reads (their count per file varies)
    assert all(NOISE not in rel and READ not in rel for rel, _ in found)
    test, test_bad = _workflow(500, seed=2, broken=40)
    scores = det.score(windows_from_counts(test))
    assert (scores[test_bad] >= 1).all() and (scores[~test_bad] == 0).all()
    extra_start = test[:5].copy()
    extra_start[:, START] = 2
    assert (det.score(windows_from_counts(extra_start)) >= 1).all()


def test_invariant_mining_rejects_relations_below_support() -> None:
    train, _ = _workflow(2000, seed=3, broken=100)  # 5% broken: open = close no longer an invariant at 0.98
    det = create("invariants", {"support_ratio": 0.98}, seed=0).fit(windows_from_counts(train))
    assert all(set(rel) != {OPEN, CLOSE} for rel, _ in det.invariants())
    relaxed = create("invariants", {"support_ratio": 0.9}, seed=0).fit(windows_from_counts(train))
    assert ({OPEN: 1, CLOSE: -1}, 0) in relaxed.invariants()


def test_invariant_mining_finds_integer_ratio() -> None:
    # a relation with a coefficient other than 1: each job writes two records (2 * job - record = 0)
    rng = np.random.default_rng(4)
    jobs = rng.integers(1, 6, size=800)
    counts = np.c_[jobs, 2 * jobs, rng.poisson(3, size=800)]
    det = create("invariants", {}, seed=0).fit(windows_from_counts(counts))
    assert ({0: 2, 1: -1}, 0) in det.invariants()


# ----- LogClustering (Lin et al., ICSE 2016) ------------------------------------------------


def test_log_clustering_partition_and_distance_match_scikit_learn() -> None:
    rng = np.random.default_rng(6)
    protos = rng.poisson(2.0, size=(5, 15)) * (rng.random((5, 15)) < 0.4)
    train = protos[rng.integers(0, 5, size=300)] + rng.poisson(0.2, size=(300, 15))
    det = create("log_clustering", {"distance_threshold": 0.4, "linkage": "average"}, seed=0)
    det.fit(windows_from_counts(train))
    # independent: idf + L2 rows, de-duplicated, scikit-learn agglomerative clustering with cosine distance
    idf = np.log(len(train) / (train > 0).sum(axis=0))
    uniq, inv, mult = np.unique(train, axis=0, return_inverse=True, return_counts=True)
    vec = uniq * idf
    vec /= np.linalg.norm(vec, axis=1, keepdims=True)
    ref = AgglomerativeClustering(n_clusters=None, distance_threshold=0.4, metric="cosine", linkage="average")
    ref_labels = ref.fit_predict(vec)
    assert det.info()["clusters"] == ref.n_clusters_
    centroids = np.array([np.average(vec[ref_labels == c], axis=0, weights=mult[ref_labels == c])
                          for c in range(ref.n_clusters_)])
    test = protos[rng.integers(0, 5, size=50)] + rng.poisson(0.5, size=(50, 15))
    tv = test * idf
    expected = cosine_distances(tv, centroids).min(axis=1)
    np.testing.assert_allclose(det.score(windows_from_counts(test)), expected, atol=1e-10)
    # the same partition (up to label names): compare per-window nearest centroid with the reference labels
    ours_nearest = cosine_distances(vec, det.centroids_).argmin(axis=1)
    ref_nearest = cosine_distances(vec, centroids).argmin(axis=1)
    assert adjusted_rand_score(ours_nearest, ref_nearest) == pytest.approx(1.0)


# ----- pyod adapter -------------------------------------------------------------------------

PYOD_CASES = {
    "iforest": ("pyod.models.iforest", "IForest", {"n_estimators": 50}, {"n_estimators": 50, "random_state": 9}),
    "ocsvm": ("pyod.models.ocsvm", "OCSVM", {"nu": 0.2}, {"nu": 0.2}),
    "lof": ("pyod.models.lof", "LOF", {"n_neighbors": 15}, {"n_neighbors": 15}),
    "hbos": ("pyod.models.hbos", "HBOS", {"n_bins": 12}, {"n_bins": 12}),
}


@pytest.mark.parametrize("name", sorted(PYOD_CASES))
def test_pyod_adapter_returns_pyods_own_decision_function(name: str) -> None:
    import importlib

    module, cls_name, ours, theirs = PYOD_CASES[name]
    train, test = _sparse_counts(7, n=500), _sparse_counts(8, n=200)
    det = create(name, ours, seed=9).fit(windows_from_counts(train))
    model = getattr(importlib.import_module(module), cls_name)(**theirs)
    model.fit(np.log1p(train.astype(np.float64)))  # the adapter's documented features: log(1 + count)
    expected = model.decision_function(np.log1p(test.astype(np.float64)))
    np.testing.assert_array_equal(det.score(windows_from_counts(test)), expected)


def test_ecod_scores_against_training_distributions_only() -> None:
    # ECOD as published (Li et al., TKDE 2022, Algorithm 1): per feature, left and right tail
    # probabilities from the empirical CDF, -log summed over features into O_left, O_right and
    # O_auto (left tail where the training skewness is negative), score = the largest of the three.
    # Computed here directly, one window at a time, with the training windows only (plus the window
    # itself, so no probability is zero) and scipy's skewness.
    from scipy.stats import skew

    train, test = _sparse_counts(7, n=300), _sparse_counts(8, n=60)
    det = create("ecod", {}, seed=9).fit(windows_from_counts(train))
    xt, xs = np.log1p(train.astype(np.float64)), np.log1p(test.astype(np.float64))
    n = len(xt)
    left_skew = np.nan_to_num(skew(xt, axis=0)) < 0
    expected = []
    for x in xs:
        f_left = ((xt <= x).sum(axis=0) + 1) / (n + 1)
        f_right = ((xt >= x).sum(axis=0) + 1) / (n + 1)
        o_left, o_right = -np.log(f_left).sum(), -np.log(f_right).sum()
        o_auto = -np.log(np.where(left_skew, f_left, f_right)).sum()
        expected.append(max(o_left, o_right, o_auto))
    scores = det.score(windows_from_counts(test))
    np.testing.assert_allclose(scores, expected, rtol=1e-12)
    # pyod's ECOD refits its CDFs on training + the scored batch; scored one window at a time its
    # tail probabilities equal ours, and its per-feature maximum bounds the paper's score from above
    from pyod.models.ecod import ECOD

    ref = ECOD().fit(xt)
    singles = np.array([ref.decision_function(x[None, :])[0] for x in xs])
    assert (singles >= scores - 1e-9).all()
    # and ours does not move with the batch: the first ten windows alone score the same
    np.testing.assert_array_equal(det.score(windows_from_counts(test[:10])), scores[:10])


# ----- supervised references ------------------------------------------------------------------


def _labelled(seed: int) -> tuple[np.ndarray, np.ndarray]:
    counts = _sparse_counts(seed, n=500)
    labels = (counts[:, 2] + counts[:, 7] > np.quantile(counts[:, 2] + counts[:, 7], 0.85)).astype(np.int8)
    return counts, labels


def test_logistic_equals_scikit_learn_predict_proba() -> None:
    counts, labels = _labelled(10)
    test = _sparse_counts(11, n=100)
    det = create("logistic", {"C": 0.5}, seed=0).fit(windows_from_counts(counts), labels)
    ref = LogisticRegression(C=0.5, max_iter=1000, class_weight="balanced", random_state=0)
    ref.fit(np.log1p(counts), labels)
    np.testing.assert_allclose(det.score(windows_from_counts(test)), ref.predict_proba(np.log1p(test))[:, 1], rtol=1e-6)


def test_decision_tree_equals_scikit_learn_predict_proba() -> None:
    counts, labels = _labelled(12)
    test = _sparse_counts(13, n=300)
    det = create("decision_tree", {"max_depth": 6}, seed=3).fit(windows_from_counts(counts), labels)
    ref = DecisionTreeClassifier(max_depth=6, class_weight="balanced", random_state=3)
    ref.fit(np.log1p(counts), labels)
    np.testing.assert_allclose(det.score(windows_from_counts(test)), ref.predict_proba(np.log1p(test))[:, 1], rtol=1e-12)


# ----- event-rate rule (common practice) ----------------------------------------------------


def test_rate_rule_z_scores_match_pandas() -> None:
    import pandas as pd

    rng = np.random.default_rng(14)
    train = rng.poisson([5.0, 2.0, 8.0, 0.5], size=(300, 4))
    train = np.c_[train, np.zeros(300, dtype=np.int64)]  # event 4 never seen in training
    train[:2, 3] = 0
    det = create("rate_rule", {"rare_fraction": 0.0, "min_std": 0.1}, seed=0).fit(windows_from_counts(train))
    test = np.array([[5, 2, 8, 0, 0], [20, 2, 8, 0, 0], [5, 2, 8, 0, 1], [0, 0, 0, 0, 0]])
    # reference: population mean / std (ddof=0) from pandas, largest positive z over events and total volume
    frame = pd.DataFrame(train)
    z = (pd.DataFrame(test) - frame.mean()) / frame.std(ddof=0).clip(lower=0.1)
    total = frame.sum(axis=1)
    z_total = (test.sum(axis=1) - total.mean()) / max(total.std(ddof=0), 0.1)
    spike = np.maximum(z.max(axis=1).to_numpy(), z_total).clip(min=0)
    expected = spike + np.array([0, 0, 10.0, 0])  # one never-seen event adds new_weight = 10
    np.testing.assert_allclose(det.score(windows_from_counts(test)), expected, rtol=1e-10)
