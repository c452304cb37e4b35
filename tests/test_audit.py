"""Noise fitted to audited incidents: recovery of known noise, refusal of small audits, bad files, the CLI."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from logtrial.cli import main
from logtrial.errors import DataError
from logtrial.labels.audit import audit_table, fit_audit, needed_for, read_audit
from logtrial.labels.incidents import make_incidents
from logtrial.labels.noise import load_noise, replay

ROOT = Path(__file__).resolve().parents[1]
HOUR = 3_600_000_000_000
TRUE = {"drop": 0.25, "decoys": 0.4, "delay_h": 6.0, "jitter_h": 2.0}
SPEC = {"drop": {"p": TRUE["drop"]}, "decoys": TRUE["decoys"],
        "delay": {"dist": "exponential", "mean": "6h", "max": None},
        "end_jitter": {"dist": "normal", "scale": "2h"}}


def _incidents(n: int, seed: int, other_share: float = 0.25) -> pd.DataFrame:
    """True incidents lasting 2 to 5 days, so a late start or a jittered end is never clipped."""
    rng = np.random.default_rng(seed)
    start = 1_767_225_600 * 10**9 + np.sort(rng.integers(0, 200 * 24, n)) * HOUR
    end = start + rng.integers(48, 120, n) * HOUR
    kind = np.where(rng.random(n) < other_share, "other", "failure").astype(object)
    return make_incidents(np.arange(1, n + 1), np.full(n, "relay-01", dtype=object), start, end, kind)


def _audit_file(tmp_path: Path, n: int, seed: int, spec: dict = SPEC) -> Path:
    true = _incidents(n, seed)
    path = tmp_path / f"audit-{seed}.csv"
    audit_table(true, replay(true, spec, seed=seed)).to_csv(path, index=False)
    return path


def test_recovered_parameters_fall_in_their_intervals_at_the_nominal_rate(tmp_path: Path) -> None:
    # Replayed noise of known parameters, fitted back over many seeds: each 95 % interval must hold the
    # true value in about 95 % of the seeds (a Monte Carlo check of coverage; 200 seeds give a standard
    # error of about 0.015). Point estimates are compared with scipy's own estimators (reference library).
    from scipy import stats

    seeds = range(200)
    hits = {k: 0 for k in TRUE}
    for seed in seeds:
        fit = fit_audit(read_audit(_audit_file(tmp_path, 240, seed)), level=0.95, delay="exponential")
        f = fit.facts
        hits["drop"] += f["drop_failure"]["interval"][0] <= TRUE["drop"] <= f["drop_failure"]["interval"][1]
        hits["decoys"] += f["decoys"]["interval"][0] <= TRUE["decoys"] <= f["decoys"]["interval"][1]
        lo, hi = f["delay_hours"]["mean_interval_if_exponential"]
        hits["delay_h"] += lo <= TRUE["delay_h"] <= hi
        lo, hi = f["end_jitter_hours"]["interval"]
        hits["jitter_h"] += lo <= TRUE["jitter_h"] <= hi
        if seed < 5:
            _, scale = stats.expon.fit(fit.delays_h, floc=0)  # scipy's MLE of the exponential mean
            assert abs(scale - f["delay_hours"]["mean"]) < 1e-9
            k, n = f["drop_failure"]["unreported"], f["drop_failure"]["of"]
            ci = stats.binomtest(k, n).proportion_ci(0.95, method="wilson")
            assert f["drop_failure"]["interval"] == pytest.approx([ci.low, ci.high])
            written = load_noise(fit.noise).delay.mean  # the entry is written to six significant figures
            assert abs(written - pd.Timedelta(hours=f["delay_hours"]["mean"])) < pd.Timedelta(seconds=1)
    coverage = {k: v / len(seeds) for k, v in hits.items()}
    print("coverage of 95 % intervals over", len(seeds), "seeds:", coverage)
    assert all(0.9 <= c <= 0.99 for c in coverage.values()), coverage


def test_jitter_scale_matches_scipy_normal_fit(tmp_path: Path) -> None:
    # A centred normal: scipy's norm.fit with the location fixed at 0 gives the same scale (reference library).
    from scipy import stats

    a = read_audit(_audit_file(tmp_path, 400, 7))
    fit = fit_audit(a)
    rep = a.reported & (a.reported_start <= a.true_end) & (a.reported_end > a.reported_start)
    j = (a.reported_end[rep] - a.true_end[rep]) / HOUR
    assert fit.facts["end_jitter_hours"]["scale"] == pytest.approx(stats.norm.fit(j, floc=0)[1])


def test_auto_delay_keeps_an_empirical_distribution_when_ks_rejects_exponential(tmp_path: Path) -> None:
    spec = {**SPEC, "delay": {"dist": "fixed", "value": "5h"}}
    fit = fit_audit(read_audit(_audit_file(tmp_path, 300, 3, spec)))
    assert fit.noise["delay"]["dist"] == "empirical"
    assert fit.facts["delay_hours"]["ks_exponential"]["p_value"] < 0.05
    assert {pd.Timedelta(v) for v in fit.noise["delay"]["values"]} == {pd.Timedelta(hours=5)}


def test_too_small_audit_is_refused_with_the_count_it_needs(tmp_path: Path) -> None:
    path = _audit_file(tmp_path, 30, 1)
    with pytest.raises(DataError, match=r"too small to fit: \d+ audited failures; .* needs about (\d+) failures"):
        fit_audit(read_audit(path), precision=0.1)
    # The stated count is what a normal-approximation interval needs: z^2 p (1 - p) / h^2 at p = 0.5 is 96.04.
    assert needed_for(50, 100, 0.1, 0.95) == 97
    assert fit_audit(read_audit(path), precision=0.3).facts["failures"] > 0


def test_example_audit_and_cli_write_a_noise_entry_an_experiment_reads(tmp_path: Path, capsys) -> None:
    out = tmp_path / "noise.yaml"
    assert main(["fit-noise", str(ROOT / "examples" / "audit.csv"), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "failures never reported" in text and "report delay" in text
    assert (tmp_path / "noise.delay.png").stat().st_size > 1000
    spec = load_noise(out)
    assert spec.name == "fitted-audit" and 0 < spec.drop.p < 1 and spec.delay is not None
    doc = yaml.safe_load(out.read_text())
    assert doc["fit"]["incidents"] == 160


def _write(tmp_path: Path, rows: list[str], header: str | None = None) -> Path:
    head = header or "id,kind,true_start,true_end,reported,reported_start,reported_end,reported_kind"
    path = tmp_path / "bad.csv"
    path.write_text("\n".join([head, *rows]) + "\n")
    return path


GOOD = "1,failure,2026-01-01T00:00:00Z,2026-01-01T05:00:00Z,yes,2026-01-01T02:00:00Z,2026-01-01T06:00:00Z,failure"


@pytest.mark.parametrize("rows, header, needle", [
    ([GOOD], "id,kind,true_start,reported,reported_start,reported_end",
     "line 1, field true_end: missing column"),
    ([GOOD, "2,failure,2026-01-02T00:00:00Z,2026-01-02T05:00:00Z,yes,2026-01-01T23:00:00Z,2026-01-02T06:00:00Z,failure"],
     None, "line 3, field reported_start: reported before the true start"),
    ([GOOD, "2,outage,2026-01-02T00:00:00Z,2026-01-02T05:00:00Z,no,,,"], None,
     "line 3, field kind: unknown kind, expected one of ['failure', 'other'] (got 'outage')"),
    ([GOOD, "2,failure,yesterday,2026-01-02T05:00:00Z,no,,,"], None, "line 3, field true_start: expected an ISO 8601"),
    ([GOOD, "2,failure,2026-01-02T00:00:00Z,2026-01-02T05:00:00Z,maybe,,,"], None, "line 3, field reported: expected yes or no"),
    ([GOOD, "2,failure,2026-01-02T00:00:00Z,2026-01-02T05:00:00Z,yes,,,failure"], None,
     "line 3, field reported_start: a timestamp is required"),
    ([GOOD, GOOD], None, "line 3, field id: id repeats"),
    ([GOOD, "2,other,2026-01-02T00:00:00Z,2026-01-02T05:00:00Z,yes,2026-01-02T01:00:00Z,2026-01-02T06:00:00Z,fault"],
     None, "line 3, field reported_kind: unknown kind"),
])
def test_bad_audit_files_name_file_line_and_field(tmp_path: Path, rows: list[str], header: str | None,
                                                   needle: str, capsys) -> None:
    path = _write(tmp_path, rows, header)
    with pytest.raises(DataError) as err:
        read_audit(path)
    assert str(err.value).startswith(f"{path}: ") and needle in str(err.value)
    assert main(["fit-noise", str(path), "--out", str(tmp_path / "n.yaml")]) == 1
    assert needle in capsys.readouterr().err


def test_missing_audit_file_is_a_configuration_error(tmp_path: Path, capsys) -> None:
    assert main(["fit-noise", str(tmp_path / "nope.csv"), "--out", str(tmp_path / "n.yaml")]) == 2
    assert "audit file not found" in capsys.readouterr().err


def test_without_reported_kind_every_ticket_counts_as_a_failure_ticket(tmp_path: Path) -> None:
    # Replay semantics: a non-failure that was not dropped and filed as a failure is a decoy. An audit of
    # failure tickets alone therefore fits decoys = 1 and the drop share of non-failures from the audit.
    table = pd.read_csv(ROOT / "examples" / "audit.csv", dtype=str, keep_default_na=False)
    tickets = table[(table["reported"] == "no") | (table["reported_kind"] == "failure") | (table["kind"] == "failure")]
    path = tmp_path / "tickets.csv"
    tickets.drop(columns=["reported_kind"]).to_csv(path, index=False)
    fit = fit_audit(read_audit(path))
    assert fit.noise["decoys"] == 1.0 and "no reported_kind column" in fit.facts["decoys"]["from"]
    assert fit.noise["drop"]["per_kind"]["other"] == pytest.approx(fit.facts["drop_other"]["share"], abs=1e-6)
