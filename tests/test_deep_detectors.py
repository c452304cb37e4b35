"""Deep detectors (next-event LSTM, sequence and density autoencoders) and their shared training loop."""

from __future__ import annotations

import importlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
from conftest import windows_from_counts
from logtrial.detectors.density_autoencoder import DensityAutoencoder, frequencies, per_event_loss
from logtrial.detectors.next_event import NextEventLSTM
from logtrial.detectors.registry import create
from logtrial.detectors.seq_autoencoder import SequenceAutoencoder
from logtrial.detectors.torch_train import (
    THREADS_ENV,
    TorchParams,
    evaluate_loss,
    histories,
    load_weights,
    ragged_chunks,
    save_weights,
    torch_session,
    train,
    unique_rows,
)
from logtrial.windowing.windows import WindowSet
from sklearn.feature_extraction.text import TfidfTransformer
from sklearn.metrics import roc_auc_score


def _ragged(seed: int, n: int = 40, vocab: int = 7) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    lens = rng.integers(0, 12, n)
    lens[3] = 0
    offsets = np.r_[0, np.cumsum(lens)].astype(np.int64)
    return rng.integers(0, vocab, offsets[-1]).astype(np.int32), offsets


def windows_from_sequences(seqs: list[np.ndarray], vocab: int) -> WindowSet:
    """A WindowSet holding exactly the given event sequences (counts follow the sequences)."""
    lens = np.array([len(s) for s in seqs], dtype=np.int64)
    values = np.concatenate(seqs).astype(np.int32) if len(seqs) else np.zeros(0, np.int32)
    counts = np.zeros((len(seqs), vocab), dtype=np.int64)
    np.add.at(counts, (np.repeat(np.arange(len(seqs)), lens), values), 1)
    ws = windows_from_counts(counts)
    ws.seq_values = values
    ws.seq_offsets = np.r_[0, np.cumsum(lens)].astype(np.int64)
    return ws


# ----- batching from ragged sequences ------------------------------------------------------------


def test_histories_match_direct_slicing() -> None:
    # reference (common practice): slice each window's sequence directly and left-pad the history
    values, offsets = _ragged(1)
    hist, target, owner = histories(values, offsets, 4, pad=99)
    rows = []
    for w in range(len(offsets) - 1):
        seq = list(values[offsets[w] : offsets[w + 1]])
        for t, ev in enumerate(seq):
            before = seq[max(0, t - 4) : t]
            rows.append(([99] * (4 - len(before)) + before, ev, w))
    assert hist.tolist() == [r[0] for r in rows]
    assert target.tolist() == [r[1] for r in rows]
    assert owner.tolist() == [r[2] for r in rows]


def test_chunks_match_direct_slicing() -> None:
    # reference (common practice): consecutive slices of length L of each window's sequence
    values, offsets = _ragged(2)
    mat, lens, owner = ragged_chunks(values, offsets, 5, pad=-1)
    expected = []
    for w in range(len(offsets) - 1):
        seq = list(values[offsets[w] : offsets[w + 1]])
        for lo in range(0, len(seq), 5):
            part = seq[lo : lo + 5]
            expected.append((part + [-1] * (5 - len(part)), len(part), w))
    assert mat.tolist() == [e[0] for e in expected]
    assert lens.tolist() == [e[1] for e in expected]
    assert owner.tolist() == [e[2] for e in expected]


def test_unique_rows_matches_numpy() -> None:
    # reference library: numpy.unique(axis=0)
    rng = np.random.default_rng(3)
    mat = rng.integers(0, 3, (500, 4))
    rows, inverse, counts = unique_rows(mat)
    ref_rows, ref_counts = np.unique(mat, axis=0, return_counts=True)
    assert sorted(map(tuple, rows.tolist())) == sorted(map(tuple, ref_rows.tolist()))
    np.testing.assert_array_equal(rows[inverse], mat)
    assert sorted(counts.tolist()) == sorted(ref_counts.tolist())


# ----- training loop -----------------------------------------------------------------------------


def _mse(model: torch.nn.Module, batch: tuple[torch.Tensor, ...]) -> torch.Tensor:
    x, y = batch
    return ((model(x).squeeze(1) - y) ** 2).mean()


def _linear_data(seed: int, target: float) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(200, 3, generator=g)
    return x, torch.full((200,), target)


def test_training_is_seeded_and_restores_the_best_epoch() -> None:
    params = TorchParams(epochs=6, batch_size=16, lr=0.05, patience=10)
    data, val = _linear_data(0, 1.0), _linear_data(1, 1.0)

    def fit(seed: int) -> tuple[torch.nn.Module, object]:
        with torch_session(seed, 1):
            model = torch.nn.Linear(3, 1)
            return model, train(model, _mse, data, val, params, seed)

    a, log_a = fit(5)
    b, _ = fit(5)
    c, _ = fit(6)
    for pa, pb in zip(a.parameters(), b.parameters()):
        assert torch.equal(pa, pb)
    assert any(not torch.equal(pa, pc) for pa, pc in zip(a.parameters(), c.parameters()))
    assert log_a.val_loss[log_a.best_epoch - 1] == min(log_a.val_loss)
    assert evaluate_loss(a, _mse, val, 64) == pytest.approx(min(log_a.val_loss), rel=1e-5)


def test_early_stopping_on_validation_loss() -> None:
    # validation targets are the opposite of the training targets, so every epoch after the
    # first makes validation worse: training stops after `patience` more epochs (common practice)
    params = TorchParams(epochs=50, batch_size=20, lr=0.05, patience=3)
    with torch_session(0, 1):
        model = torch.nn.Linear(3, 1)
        log = train(model, _mse, _linear_data(0, 1.0), _linear_data(1, -1.0), params, 0)
    assert log.epochs_run == log.best_epoch + 3 < 50


def test_thread_count_from_param_or_env(monkeypatch: pytest.MonkeyPatch) -> None:
    before = torch.get_num_threads()
    with torch_session(0, 1):
        assert torch.get_num_threads() == 1
    assert torch.get_num_threads() == before
    monkeypatch.setenv(THREADS_ENV, "1")
    with torch_session(0, None):
        assert torch.get_num_threads() == 1
    monkeypatch.setenv(THREADS_ENV, "many")
    with pytest.raises(ValueError, match=THREADS_ENV):
        with torch_session(0, None):
            pass


def test_weights_round_trip_and_refuse_pickled_objects(tmp_path: Path) -> None:
    # torch.load(weights_only=True) loads tensors only and refuses arbitrary pickled objects
    # (PyTorch serialization documentation)
    model = torch.nn.LSTM(4, 3)
    path = save_weights(model, tmp_path / "m.pt")
    other = torch.nn.LSTM(4, 3)
    load_weights(other, path)
    for pa, pb in zip(model.parameters(), other.parameters()):
        assert torch.equal(pa, pb)
    torch.save({"weight": torch.zeros(1), "payload": Path("x")}, tmp_path / "evil.pt")
    with pytest.raises(Exception, match="[Ww]eights only"):
        load_weights(other, tmp_path / "evil.pt")


# ----- next-event LSTM (DeepLog) ---------------------------------------------------------------------

# Execution paths of a made-up service: each program has its own first event and shares
# middle events with others, so the next event is fixed by the last three or four events.
PROGRAMS = ([0, 5, 6, 7, 1], [2, 5, 6, 8, 1], [3, 6, 5, 7, 9], [4, 9, 5, 6, 10])
GRAMMAR_VOCAB = 11


def _grammar_sequences(rng: np.random.Generator, n: int, programs: int = 6) -> tuple[list[np.ndarray], np.ndarray]:
    """Sequences of randomly chosen programs, and per event whether it starts a program (not predictable)."""
    seqs, starts = [], []
    for _ in range(n):
        picks = rng.integers(0, len(PROGRAMS), programs)
        seqs.append(np.concatenate([PROGRAMS[i] for i in picks]))
        starts.append(np.concatenate([[True] + [False] * (len(PROGRAMS[i]) - 1) for i in picks]))
    return seqs, np.concatenate(starts)


def test_next_event_lstm_learns_a_deterministic_grammar_and_flags_breaks() -> None:
    # DeepLog (Du et al., CCS 2017, Sec. 3.1): the model learns the normal execution paths; an
    # event outside the top-g predictions is anomalous. Here g = 1 for a deterministic grammar.
    rng = np.random.default_rng(0)
    train_seqs, _ = _grammar_sequences(rng, 300)
    train_ws = windows_from_sequences(train_seqs, GRAMMAR_VOCAB)
    det = create("next_event", {"history": 4, "top_g": 1, "hidden": 32, "threads": 1}, seed=1).fit(train_ws)
    normal, starts = _grammar_sequences(rng, 100)
    values = np.concatenate(normal)
    hist, target, _ = histories(values, np.r_[0, np.cumsum([len(s) for s in normal])], 4, GRAMMAR_VOCAB)
    accuracy = float(np.mean(det.predict_next(hist[~starts]) == target[~starts]))
    assert accuracy >= 0.99
    # break each held-out sequence: swap two different neighbouring events inside one program
    offsets = np.r_[0, np.cumsum([len(s) for s in normal])]
    broken = []
    for i, seq in enumerate(normal):
        st = starts[offsets[i] : offsets[i + 1]]
        inside = np.flatnonzero(~st[:-1] & ~st[1:] & (seq[:-1] != seq[1:]))
        pos = rng.choice(inside)
        bad = seq.copy()
        bad[[pos, pos + 1]] = bad[[pos + 1, pos]]
        broken.append(bad)
    s_norm = det.score(windows_from_sequences(normal, GRAMMAR_VOCAB))
    s_bad = det.score(windows_from_sequences(broken, GRAMMAR_VOCAB))
    # paired: the break adds a miss (program starts stay unpredictable, so compare each sequence with itself)
    assert np.mean(s_bad > s_norm) >= 0.95
    assert s_bad.mean() > s_norm.mean() + 0.9 / len(normal[0])
    counts = create("next_event", {**det.params.model_dump(), "score": "count"}, seed=1).fit(train_ws)
    lens = np.array([len(s) for s in broken], dtype=np.float64)
    np.testing.assert_allclose(counts.score(windows_from_sequences(broken, GRAMMAR_VOCAB)) / lens, s_bad)


# ----- the simulated scenario ---------------------------------------------------------------------

CLEAR_SCENARIO = {
    "seed": 3, "nodes": 12, "days": 30,
    "failures": {"rate_per_node_year": 12.0, "lead_time_hours": [6, 48], "precursor_visibility": 1.0,
                 "precursor_peak_per_hour": 8.0},
    "anomalies": {"decoy_similarity": 0.0},
}


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> tuple[WindowSet, np.ndarray, np.ndarray, np.ndarray]:
    """Node-hour windows of a small simulated fleet: windows, predict-24h labels, train and test positions."""
    try:
        sim_mod = importlib.import_module("logtrial.simulation.simulate")
        reg = importlib.import_module("logtrial.data.registry")
        from logtrial.data.ingest import ingest_files
        from logtrial.labels.incidents import read_incidents
        from logtrial.windowing.splits import chronological_split
        from logtrial.windowing.windows import label_windows, time_windows
    except ImportError as exc:
        pytest.skip(f"simulated-scenario checks need the simulator and ingest ({exc})")
    out = tmp_path_factory.mktemp("deep-scenario")
    sim = sim_mod.generate(sim_mod.load_scenario(CLEAR_SCENARIO), out / "sim")
    fmt = reg.LineFormat(regex=sim_mod.LINE_REGEX, timestamp={"fields": ["ts"], "format": "%Y-%m-%dT%H:%M:%S.%fZ"},
                         entity="host")
    res = ingest_files("radar-relay", [sim.log_path], fmt, reg.Miner(**sim_mod.RECOMMENDED_MINER), out / "tables",
                       progress=False)
    ws = time_windows(pd.read_parquet(res.events), int(res.manifest["templates"]), pd.Timedelta("1h"))
    labels = label_windows(ws, read_incidents(sim.incidents_path), "predict", pd.Timedelta("24h"))
    split = chronological_split(ws, (0.5, 0.2, 0.3), None, pd.Timedelta("24h"))
    train_rows = split.train[labels[split.train] == 0]
    test_rows = split.test[labels[split.test] >= 0]
    return ws, labels, train_rows, test_rows


def test_sequence_autoencoder_reconstructs_normal_better_than_failing(scenario) -> None:
    # Measured on this scenario (seeds 1, 2): mean loss 1.2 (normal) vs 3.0 (24 h before a
    # failure), AUROC 0.83-0.84; the floor below is a sanity bound (common practice: 0.5 = random)
    ws, labels, train_rows, test_rows = scenario
    det = create("seq_ae", {"threads": 1}, seed=1).fit(ws.subset(train_rows))
    scores = det.score(ws.subset(test_rows))
    failing = labels[test_rows] == 1
    assert failing.sum() >= 50
    assert scores[~failing].mean() < scores[failing].mean()
    assert roc_auc_score(failing, scores) > 0.7


def test_density_autoencoder_matches_pyod_autoencoder(scenario) -> None:
    # reference library: pyod's AutoEncoder (pyod 2.x/3.x torch implementation) on the same
    # frequency vectors, same layer sizes, epochs and batch size, its own defaults otherwise
    # (standardised inputs, batch norm, dropout). Measured: ours 0.875 / 0.870, pyod 0.868 / 0.865.
    from pyod.models.auto_encoder import AutoEncoder

    ws, labels, train_rows, test_rows = scenario
    y = labels[test_rows] == 1
    x_train, x_test = frequencies(ws.counts[train_rows]), frequencies(ws.counts[test_rows])
    for seed in (1, 2):
        ours = create("density_ae", {"hidden": [64, 32], "epochs": 10, "batch_size": 32, "loss": "mse",
                                     "weights": "none", "sum_penalty": 0.0, "threads": 1}, seed=seed)
        auc_ours = roc_auc_score(y, ours.fit(ws.subset(train_rows)).score(ws.subset(test_rows)))
        with torch_session(seed, 1):
            ref = AutoEncoder(hidden_neuron_list=[64, 32], epoch_num=10, batch_size=32, random_state=seed, verbose=0)
            ref.fit(x_train)
            auc_ref = roc_auc_score(y, ref.decision_function(x_test))
        assert abs(auc_ours - auc_ref) <= 0.05, (seed, auc_ours, auc_ref)


def test_log_cosh_and_idf_weights_match_references() -> None:
    # numpy: log(cosh(e)); scikit-learn TfidfTransformer(smooth_idf=False).idf_ = log(N / df) + 1
    err = torch.linspace(-30, 30, 121, dtype=torch.float64)
    got = per_event_loss(err, torch.zeros_like(err), "log_cosh").numpy()
    small = np.abs(err.numpy()) < 20
    np.testing.assert_allclose(got[small], np.log(np.cosh(err.numpy()[small])), atol=1e-12)
    np.testing.assert_allclose(got[~small], np.abs(err.numpy()[~small]) - np.log(2.0), rtol=1e-12)
    rng = np.random.default_rng(4)
    counts = rng.poisson([5.0, 2.0, 0.05, 0.3, 1.0], size=(300, 5))
    ws = windows_from_counts(counts)
    det = create("density_ae", {"weights": "idf", "epochs": 1, "threads": 1}, seed=0).fit(ws)
    ref = TfidfTransformer(smooth_idf=False).fit(counts).idf_ - 1.0
    np.testing.assert_allclose(det.event_weight_, ref / ref.mean(), rtol=1e-5)
    assert det.event_weight_[2] == det.event_weight_.max()


def test_sum_penalty_keeps_reconstructions_summing_to_one(scenario) -> None:
    # direction check (common practice): the penalty term pulls sum(recon) towards 1
    ws, _, train_rows, test_rows = scenario
    sub = ws.subset(test_rows[:2000])
    x = torch.from_numpy(frequencies(sub.counts))
    gaps = []
    for penalty in (0.0, 10.0):
        det = create("density_ae", {"sum_penalty": penalty, "threads": 1, "epochs": 10}, seed=3)
        det.fit(ws.subset(train_rows))
        with torch.no_grad():
            gaps.append(float((det.net_(x).sum(dim=1) - 1.0).abs().mean()))
    assert gaps[1] < gaps[0]


def test_declarations() -> None:
    # the papers' settings (from memory): DeepLog h = 10, g = 9, two LSTM layers of 64 units
    p = NextEventLSTM.Params()
    assert (p.history, p.top_g, p.layers, p.hidden) == (10, 9, 2, 64)
    for cls in (NextEventLSTM, SequenceAutoencoder, DensityAutoencoder):
        assert cls.trains_on == "healthy" and cls.supports_state
    assert NextEventLSTM.reads == SequenceAutoencoder.reads == "sequences"
    assert DensityAutoencoder.reads == "counts"


def test_step_budget_bounds_a_fit_and_is_recorded(monkeypatch) -> None:
    # 200 examples in batches of 20 = 10 steps per pass; 50 epochs would be 500 steps, the budget allows 23
    params = TorchParams(epochs=50, batch_size=20, lr=0.01, patience=50, min_batches=1, max_steps=23)
    with torch_session(0, 1):
        model = torch.nn.Linear(3, 1)
        log = train(model, _mse, _linear_data(0, 1.0), _linear_data(1, 1.0), params, 0)
    assert log.steps == 23 and log.budget_hit and log.epochs_run == 3
    assert log.examples == 23 * 20
    unbounded = TorchParams(epochs=2, batch_size=20, min_batches=1, max_steps=None)
    with torch_session(0, 1):
        log = train(torch.nn.Linear(3, 1), _mse, _linear_data(0, 1.0), None, unbounded, 0)
    assert log.steps == 20 and not log.budget_hit


def test_plain_epoch_lines_when_output_is_not_a_terminal(monkeypatch, capsys) -> None:
    import logtrial.detectors.torch_train as tt

    monkeypatch.delenv(tt.PROGRESS_ENV, raising=False)
    monkeypatch.setattr(tt, "show_progress", lambda: False)  # not a terminal: no bar
    monkeypatch.setattr(tt, "PLAIN_EVERY_S", 0.0)
    params = TorchParams(epochs=3, batch_size=50, min_batches=1, patience=5)
    with torch_session(0, 1):
        train(torch.nn.Linear(3, 1), _mse, _linear_data(0, 1.0), _linear_data(1, 1.0), params, 0, what="probe")
    lines = [ln for ln in capsys.readouterr().err.splitlines() if "probe: epoch" in ln]
    assert [ln.split(",")[0].strip() for ln in lines] == ["probe: epoch 1/3", "probe: epoch 2/3", "probe: epoch 3/3"]
    monkeypatch.setenv(tt.PROGRESS_ENV, "0")
    with torch_session(0, 1):
        train(torch.nn.Linear(3, 1), _mse, _linear_data(0, 1.0), None, params, 0, what="probe")
    assert "probe: epoch" not in capsys.readouterr().err
