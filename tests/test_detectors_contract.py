"""The detector contract, checked over every registered detector (built-ins and installed plugins)."""

from __future__ import annotations

import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from conftest import windows_from_counts
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from logtrial.detectors.base import READS, TRAINS_ON, Detector, DetectorError, DetectorParams
from logtrial.detectors.registry import ENTRY_POINT_GROUP, available, create, load
from logtrial.errors import ConfigError

NAMES = sorted(available())
VOCAB = 12
# Deep detectors at small sizes (few units, few epochs, a small step budget): the contract is about behaviour,
# not about how well a model learns, and full sizes would take minutes on a shared CPU.
_TORCH_SMALL = {"epochs": 2, "max_steps": 30, "min_batches": 5, "threads": 1}
_SMALL = {
    "seq_ae": {**_TORCH_SMALL, "embedding": 4, "hidden": 8, "latent": 4, "chunk": 16},
    "density_ae": {**_TORCH_SMALL, "hidden": [8, 4]},
    "next_event": {**_TORCH_SMALL, "embedding": 4, "hidden": 8, "layers": 1},
}
_SMALL_COMPOSITE = {"stage1": [{"name": "seq_ae", "params": _SMALL["seq_ae"]},
                               {"name": "density_ae", "params": _SMALL["density_ae"]}],
                    "stage2": [{"name": "seq_ae", "params": _SMALL["seq_ae"]},
                               {"name": "density_ae", "params": _SMALL["density_ae"]}]}
_SMALL["two_stage"] = _SMALL_COMPOSITE
_SMALL["two_stage_supervised"] = {"stage1": [{"name": "pca"}, {"name": "density_ae", "params": _SMALL["density_ae"]}]}


def small(name: str) -> dict:
    """Parameters that keep a detector quick in the contract tests (empty for the cheap ones)."""
    return dict(_SMALL.get(name, {}))


def _data(seed: int = 3, n: int = 240) -> tuple[np.ndarray, np.ndarray]:
    """Poisson counts with a structured anomaly in the last 10% of windows, and their labels."""
    rng = np.random.default_rng(seed)
    counts = rng.poisson(rng.uniform(0.2, 4.0, VOCAB), size=(n, VOCAB))
    counts[:, 1] = counts[:, 0]
    labels = np.zeros(n, dtype=np.int8)
    bad = n - n // 10
    labels[bad:] = 1
    counts[bad:, 5] += 6
    counts[bad:, 1] = 0
    return counts, labels


def _fitted(name: str, seed: int = 7) -> tuple[Detector, object, np.ndarray]:
    counts, labels = _data()
    ws = windows_from_counts(counts, labels)
    det = create(name, small(name), seed=seed)
    assert det.fit(ws, labels if det.trains_on == "labelled" else None) is det
    return det, ws, labels


def test_builtins_are_registered() -> None:
    # the baselines the project promises (issue D): rule, PCA, IM, LogClustering, five pyod models, two supervised
    expected = {"rate_rule", "pca", "invariants", "log_clustering", "iforest", "ocsvm", "lof", "ecod", "hbos",
                "logistic", "decision_tree"}
    assert expected <= set(NAMES)


@pytest.mark.parametrize("name", NAMES)
def test_declaration(name: str) -> None:
    cls = available()[name]
    assert cls.name == name
    assert cls.reads in READS and cls.trains_on in TRAINS_ON
    assert issubclass(cls.Params, DetectorParams)
    assert cls.__doc__ and cls.__doc__.strip()


@pytest.mark.parametrize("name", NAMES)
def test_fit_score_shapes_and_finite(name: str) -> None:
    det, ws, _ = _fitted(name)
    scores = det.score(ws)
    assert scores.shape == (len(ws),) and scores.dtype == np.float64
    assert np.isfinite(scores).all()
    part = det.score(ws.subset(np.arange(5, 25)))
    assert part.shape == (20,) and np.isfinite(part).all()
    assert det.score(ws.subset(np.arange(0))).shape == (0,)
    assert isinstance(det.info(), dict)


@pytest.mark.parametrize("name", NAMES)
def test_deterministic_given_seed(name: str) -> None:
    a, ws, labels = _fitted(name, seed=11)
    b, _, _ = _fitted(name, seed=11)
    first = a.score(ws)
    np.testing.assert_array_equal(first, b.score(ws))
    a.fit(ws, labels if a.trains_on == "labelled" else None)
    np.testing.assert_array_equal(first, a.score(ws))


@pytest.mark.parametrize("name", NAMES)
def test_scores_do_not_depend_on_the_batch(name: str) -> None:
    # a window's score is a function of the fitted model and that window only: one batch, one
    # window at a time and shuffled chunks of uneven size give the same numbers (float32 nets
    # may differ in the last bits between batch sizes, hence the relative tolerance of 1e-6)
    det, ws, _ = _fitted(name)
    whole = det.score(ws)
    probe = np.r_[np.arange(0, len(ws), 9), np.arange(len(ws) - 12, len(ws))]
    singles = np.array([det.score(ws.subset(np.array([i])))[0] for i in probe])
    np.testing.assert_allclose(singles, whole[probe], rtol=1e-6, atol=1e-9)
    order = np.random.default_rng(5).permutation(len(ws))
    chunked = np.empty(len(ws))
    for lo, hi in zip([0, 7, 40, 41, 130], [7, 40, 41, 130, len(ws)]):
        chunked[order[lo:hi]] = det.score(ws.subset(order[lo:hi]))
    np.testing.assert_allclose(chunked, whole, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("name", NAMES)
def test_refuses_wrong_vocabulary(name: str) -> None:
    det, _, _ = _fitted(name)
    other = windows_from_counts(np.ones((4, VOCAB + 3), dtype=np.int64))
    with pytest.raises(DetectorError, match=rf"detector '{name}': windows have vocabulary size {VOCAB + 3}, fitted on {VOCAB}"):
        det.score(other)


@pytest.mark.parametrize("name", NAMES)
def test_unfitted_score_is_refused(name: str) -> None:
    det = create(name, small(name), seed=0)
    with pytest.raises(DetectorError, match=rf"detector '{name}': is not fitted"):
        det.score(windows_from_counts(np.ones((3, VOCAB), dtype=np.int64)))


@pytest.mark.parametrize("name", NAMES)
def test_save_load_without_pickle(name: str, tmp_path: Path) -> None:
    det, ws, _ = _fitted(name)
    if not det.supports_state:
        with pytest.raises(DetectorError, match="does not support save/load"):
            det.save(tmp_path / "model")
        return
    det.save(tmp_path / "model")
    assert sorted(p.name for p in (tmp_path / "model").iterdir()) == ["detector.json", "state.npz"]
    with np.load(tmp_path / "model" / "state.npz", allow_pickle=False) as npz:
        assert all(npz[k].dtype != object for k in npz.files)
    again = load(tmp_path / "model")
    assert type(again) is type(det) and again.params == det.params
    np.testing.assert_array_equal(again.score(ws), det.score(ws))


@pytest.mark.parametrize("name", [n for n in NAMES if available()[n].trains_on == "labelled"])
def test_labelled_detectors_ignore_excluded_and_need_both_classes(name: str) -> None:
    counts, labels = _data()
    ws = windows_from_counts(counts, labels)
    excluded = labels.copy()
    excluded[::7] = -1
    keep = excluded >= 0
    a = create(name, small(name), seed=1).fit(ws, excluded)
    b = create(name, small(name), seed=1).fit(ws.subset(keep), excluded[keep])
    np.testing.assert_allclose(a.score(ws), b.score(ws), rtol=1e-10, atol=1e-12)
    with pytest.raises(DetectorError, match=rf"detector '{name}': .*needs both classes.*\[0\]"):
        create(name, small(name), seed=1).fit(ws, np.where(labels == 1, -1, 0).astype(np.int8))
    with pytest.raises(DetectorError, match=rf"detector '{name}': .*no labels"):
        create(name, small(name), seed=1).fit(ws, None)


@pytest.mark.parametrize("name", [n for n in NAMES if available()[n].trains_on != "labelled"])
def test_unsupervised_detectors_do_not_read_labels(name: str) -> None:
    counts, labels = _data()
    ws = windows_from_counts(counts, labels)
    a = create(name, small(name), seed=2).fit(ws, None).score(ws)
    b = create(name, small(name), seed=2).fit(ws, 1 - labels).score(ws)
    np.testing.assert_array_equal(a, b)


def test_unknown_detector_lists_known_names() -> None:
    with pytest.raises(ConfigError, match=r"exp\.yaml: field 'detector': unknown detector 'pcaa'; known: .*pca"):
        create("pcaa", {}, seed=0, source="exp.yaml")


@pytest.mark.parametrize(
    ("name", "params", "field"),
    [
        ("pca", {"variance": 1.5}, "params.variance"),
        ("pca", {"varience": 0.9}, "params.varience"),
        ("invariants", {"support_ratio": "high"}, "params.support_ratio"),
        ("iforest", {"n_estimators": 0}, "params.n_estimators"),
        ("log_clustering", {"linkage": "ward"}, "params.linkage"),
    ],
)
def test_bad_params_name_detector_and_field(name: str, params: dict, field: str) -> None:
    with pytest.raises(ConfigError, match=rf"exp\.yaml: detector '{name}': field '{field}'"):
        create(name, params, seed=0, source="exp.yaml")


def test_bad_seed_is_a_config_error() -> None:
    with pytest.raises(ConfigError, match="field 'seed'"):
        create("pca", {}, seed="one")  # type: ignore[arg-type]


def test_failure_inside_a_detector_names_it_and_the_cause(make_windows) -> None:
    class Broken(Detector):
        """Fails while fitting."""

        name = "broken"
        reads = "counts"
        trains_on = "all"

        def _fit(self, windows, labels):
            raise ValueError("matrix is singular")

        def _score(self, windows):
            return np.zeros(len(windows))

    with pytest.raises(DetectorError, match=r"detector 'broken': ValueError: matrix is singular"):
        Broken().fit(make_windows(np.ones((3, 2), dtype=np.int64)))


def test_nan_scores_are_refused(make_windows) -> None:
    class Nan(Detector):
        """Returns NaN."""

        name = "nan"
        reads = "counts"
        trains_on = "all"

        def _fit(self, windows, labels):
            return None

        def _score(self, windows):
            return np.full(len(windows), np.nan)

    ws = make_windows(np.ones((3, 2), dtype=np.int64))
    with pytest.raises(DetectorError, match=r"detector 'nan': produced 3 non-finite scores"):
        Nan().fit(ws).score(ws)


# The plugin of DEVELOPERS.md, as shipped in examples/plugin (one source for both).
PLUGIN = (Path(__file__).resolve().parents[1] / "examples" / "plugin" / "my_detectors.py").read_text()


@pytest.fixture()
def plugin_on_path(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A third-party package on sys.path whose metadata declares a logtrial.detectors entry point."""
    (tmp_path / "max_count_plugin.py").write_text(textwrap.dedent(PLUGIN))
    info = tmp_path / "max_count_plugin-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: max-count-plugin\nVersion: 0.1\n")
    (info / "entry_points.txt").write_text(f"[{ENTRY_POINT_GROUP}]\nmax_count = max_count_plugin:MaxCount\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    yield tmp_path
    sys.modules.pop("max_count_plugin", None)


def test_entry_point_plugin_is_found_and_scored(plugin_on_path: Path) -> None:
    # discovery goes through importlib.metadata (the standard entry-point mechanism, PyPA spec)
    assert "max_count" in available()
    det = create("max_count", {"scale": 2.0}, seed=0)
    counts, _ = _data()
    ws = windows_from_counts(counts)
    scores = det.fit(ws).score(ws)
    expected = 2.0 * (counts.max(axis=1) - counts.max(axis=1).mean())
    np.testing.assert_allclose(scores, expected)
    with pytest.raises(ConfigError, match=r"detector 'max_count': field 'params.scale'"):
        create("max_count", {"scale": "big"}, seed=0)


def test_broken_plugin_is_reported_by_entry_point(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    info = tmp_path / "bad_plugin-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: bad-plugin\nVersion: 0.1\n")
    (info / "entry_points.txt").write_text(f"[{ENTRY_POINT_GROUP}]\nghost = no_such_module_here:Ghost\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    with pytest.raises(ConfigError, match=r"entry point 'ghost = no_such_module_here:Ghost'.*cannot be loaded"):
        available()


FAST = ["rate_rule", "pca", "invariants", "log_clustering"]


@settings(max_examples=30, deadline=None)
@given(
    counts=arrays(np.int64, st.tuples(st.integers(2, 30), st.integers(1, 8)), elements=st.integers(0, 50)),
    name=st.sampled_from(FAST),
)
def test_any_count_matrix_scores_finite(counts: np.ndarray, name: str) -> None:
    # property (common practice): any non-negative integer count matrix, including all-zero rows
    # and constant columns, fits and yields one finite score per window
    ws = windows_from_counts(counts)
    scores = create(name, small(name), seed=0).fit(ws).score(ws)
    assert scores.shape == (counts.shape[0],) and np.isfinite(scores).all()
