"""Audited incidents -> the noise a team's ticket system really adds, as a noise entry an experiment can use.

An audit file is a CSV with one row per audited incident:

- ``id``: unique incident id;
- ``kind``: the true kind, ``failure`` or ``other`` (maintenance and other non-failures);
- ``true_start``, ``true_end``: when it really began and ended (ISO 8601, UTC when no offset);
- ``reported``: whether a ticket was filed at all (yes/no, true/false, 1/0);
- ``reported_start``, ``reported_end``: the ticket's times (blank when not reported);
- optional ``reported_kind``: what the ticket called it (``failure`` / ``other``). Without
  it every ticket is taken as filed as a failure (an audit of failure tickets);
- optional ``entity``: the node (not used by the fit).

The fit follows the stages of :mod:`logtrial.labels.noise`: the drop share (per kind)
and the decoy share with Wilson intervals, the delay (reported minus true start) as an
exponential with an exact chi-square interval on its mean and a Kolmogorov-Smirnov
goodness of fit, or as the empirical distribution, and the end jitter as a centred
normal with a chi-square interval on its scale. Spurious tickets are not fitted: an
audit samples incidents, not a span of time.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import yaml
from logtrial.errors import ConfigError, DataError
from logtrial.labels.incidents import KINDS

REQUIRED = ("id", "kind", "true_start", "true_end", "reported", "reported_start", "reported_end")
OPTIONAL = ("reported_kind", "entity")
_YES = {"yes", "y", "true", "1"}
_NO = {"no", "n", "false", "0"}
DELAY_CHOICES = ("auto", "exponential", "empirical")
MIN_REPORTED = 10  # reported incidents below which no delay distribution is fitted (common practice)


@dataclass
class Audit:
    """A validated audit: true kind, reported flag, times as int64 ns, reported kind."""

    path: Path
    ids: np.ndarray
    kind: np.ndarray
    reported: np.ndarray
    true_start: np.ndarray
    true_end: np.ndarray
    reported_start: np.ndarray
    reported_end: np.ndarray
    reported_kind: np.ndarray
    has_reported_kind: bool


@dataclass
class AuditFit:
    """Fitted noise parameters with intervals, the noise entry they make, and the delay sample."""

    noise: dict
    facts: dict
    delays_h: np.ndarray = field(default_factory=lambda: np.zeros(0))


def _fail(path: Path, line: int, column: str, msg: str, count: int = 1) -> DataError:
    """A DataError naming the file, the line and the field."""
    more = f" ({count - 1} more line(s) like it)" if count > 1 else ""
    return DataError(f"{path}: line {line}, field {column}: {msg}{more}")


def _first(path: Path, bad: np.ndarray, column: str, msg: str, values: pd.Series | None = None) -> None:
    """Raise for the first flagged row (line numbers count the header as line 1)."""
    idx = np.flatnonzero(bad)
    if len(idx):
        i = int(idx[0])
        shown = f" (got {values.iloc[i]!r})" if values is not None else ""
        raise _fail(path, i + 2, column, msg + shown, len(idx))


def _times(path: Path, df: pd.DataFrame, column: str, required: np.ndarray) -> np.ndarray:
    """A timestamp column as int64 ns (blank allowed where not required); DataError names the first bad line."""
    text = df[column].str.strip()
    blank = text == ""
    _first(path, blank.to_numpy() & required, column, "a timestamp is required here")
    parsed = pd.to_datetime(text.where(~blank), utc=True, errors="coerce", format="ISO8601")
    _first(path, (~blank & parsed.isna()).to_numpy(), column, "expected an ISO 8601 timestamp", text)
    return parsed.to_numpy(dtype="datetime64[ns]").view(np.int64)


def read_audit(path: str | Path) -> Audit:
    """Read and validate an audit CSV; DataError names the file, line and field of the first problem."""
    path = Path(path)
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except FileNotFoundError as exc:
        raise ConfigError(f"{path}: audit file not found") from exc
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise DataError(f"{path}: line 1: not a readable CSV audit file: {exc}") from exc
    df.columns = [str(c).strip() for c in df.columns]
    missing = [c for c in REQUIRED if c not in df.columns]
    if missing:
        raise _fail(path, 1, missing[0], f"missing column (the header needs {', '.join(REQUIRED)}; "
                    f"optional {', '.join(OPTIONAL)})")
    if df.empty:
        raise DataError(f"{path}: line 2: the audit holds no incidents")
    ids = df["id"].str.strip()
    _first(path, (ids == "").to_numpy(), "id", "an incident id is required")
    _first(path, ids.duplicated().to_numpy(), "id", "id repeats an earlier line", ids)
    kind = df["kind"].str.strip().str.lower()
    _first(path, ~kind.isin(KINDS).to_numpy(), "kind", f"unknown kind, expected one of {list(KINDS)}", df["kind"])
    flag = df["reported"].str.strip().str.lower()
    _first(path, ~flag.isin(_YES | _NO).to_numpy(), "reported", "expected yes or no", df["reported"])
    reported = flag.isin(_YES).to_numpy()
    t0 = _times(path, df, "true_start", np.ones(len(df), bool))
    t1 = _times(path, df, "true_end", np.ones(len(df), bool))
    _first(path, t1 < t0, "true_end", "ends before true_start", df["true_end"])
    r0 = _times(path, df, "reported_start", reported)
    r1 = _times(path, df, "reported_end", reported)
    _first(path, reported & (r0 < t0), "reported_start", "reported before the true start", df["reported_start"])
    _first(path, reported & (r1 < r0), "reported_end", "ends before reported_start", df["reported_end"])
    has_rk = "reported_kind" in df.columns
    rkind = np.where(reported, "failure", "").astype(object)
    if has_rk:
        rk = df["reported_kind"].str.strip().str.lower()
        _first(path, reported & ~rk.isin(KINDS).to_numpy(), "reported_kind",
               f"unknown kind for a reported incident, expected one of {list(KINDS)}", df["reported_kind"])
        rkind = np.where(reported, rk.to_numpy(dtype=object), "").astype(object)
    return Audit(path, ids.to_numpy(dtype=object), kind.to_numpy(dtype=object), reported, t0, t1, r0, r1, rkind,
                 has_rk)


def wilson(k: int, n: int, level: float) -> tuple[float, float]:
    """Wilson score interval of a share k/n (scipy's binomtest, method 'wilson')."""
    from scipy.stats import binomtest

    if n == 0:
        return (float("nan"), float("nan"))
    ci = binomtest(int(k), int(n)).proportion_ci(confidence_level=level, method="wilson")
    return (float(ci.low), float(ci.high))


def needed_for(k: int, n: int, precision: float, level: float) -> int:
    """About how many audited incidents give a share interval of half-width ``precision`` at the observed share."""
    from scipy.stats import norm

    z = float(norm.ppf(0.5 + level / 2))
    p = (k + z * z / 2) / (n + z * z)  # Wilson's centre: never 0 or 1, so the count is never 0
    return int(math.ceil(z * z * p * (1 - p) / precision**2))


def _hours(ns: np.ndarray) -> np.ndarray:
    return ns.astype(np.float64) / 3.6e12


def _dur(hours: float) -> str:
    """Hours as a duration string the noise parser reads."""
    return f"{hours:.6g}h"


def fit_audit(audit: Audit, level: float = 0.95, precision: float = 0.1, delay: str = "auto",
              name: str | None = None) -> AuditFit:
    """Fit drop, decoy, delay and end-jitter noise to an audit; DataError when it is too small for ``precision``."""
    from scipy import stats

    if not 0 < level < 1:
        raise ConfigError(f"fit-noise --level: expected a number between 0 and 1, got {level}")
    if not 0 < precision < 0.5:
        raise ConfigError(f"fit-noise --precision: expected a half-width between 0 and 0.5, got {precision}")
    if delay not in DELAY_CHOICES:
        raise ConfigError(f"fit-noise --delay: expected one of {list(DELAY_CHOICES)}, got {delay!r}")
    fail = audit.kind == "failure"
    n_f, k_f = int(fail.sum()), int((fail & ~audit.reported).sum())
    if n_f == 0:
        raise DataError(f"{audit.path}: no incident of kind 'failure': the drop share of failures cannot be fitted")
    need = needed_for(k_f, n_f, precision, level)
    if n_f < need:
        raise DataError(
            f"{audit.path}: too small to fit: {n_f} audited failures; a drop share near {k_f / n_f:.2f} needs about "
            f"{need} failures for an interval of ±{precision:g} at {level:.0%} (audit more incidents, or pass a "
            f"larger --precision)")
    facts: dict = {"audit": str(audit.path), "incidents": int(len(audit.ids)), "failures": n_f, "level": level}
    lo, hi = wilson(k_f, n_f, level)
    facts["drop_failure"] = {"share": k_f / n_f, "interval": [lo, hi], "unreported": k_f, "of": n_f}
    drop: dict = {"p": round(k_f / n_f, 6)}
    other = audit.kind == "other"
    n_o, k_o = int(other.sum()), int((other & ~audit.reported).sum())
    if n_o:
        lo, hi = wilson(k_o, n_o, level)
        facts["drop_other"] = {"share": k_o / n_o, "interval": [lo, hi], "unreported": k_o, "of": n_o}
        drop["per_kind"] = {"failure": round(k_f / n_f, 6), "other": round(k_o / n_o, 6)}
    noise: dict = {"name": name or f"fitted-{audit.path.stem}", "drop": drop}

    rep_other = other & audit.reported
    n_ro = int(rep_other.sum())
    if n_ro:
        k_d = int((rep_other & (audit.reported_kind == "failure")).sum())
        lo, hi = wilson(k_d, n_ro, level)
        facts["decoys"] = {"share": k_d / n_ro, "interval": [lo, hi], "filed_as_failure": k_d, "of": n_ro,
                           "from": "reported_kind" if audit.has_reported_kind else
                           "no reported_kind column: every ticket taken as a failure ticket"}
        if hi - lo > 2 * precision:
            facts["decoys"]["warning"] = f"interval wider than ±{precision:g}: few reported non-failures"
        noise["decoys"] = round(k_d / n_ro, 6)

    rep = audit.reported
    d_h = _hours(audit.reported_start[rep] - audit.true_start[rep])
    if len(d_h) >= MIN_REPORTED:
        mean = float(d_h.mean())
        n = len(d_h)
        a = 1 - level
        # Exact interval of an exponential mean: 2 n mean / theta ~ chi-square(2n).
        ci = [2 * n * mean / stats.chi2.ppf(1 - a / 2, 2 * n), 2 * n * mean / stats.chi2.ppf(a / 2, 2 * n)]
        ks = stats.kstest(d_h, stats.expon(scale=mean).cdf) if mean > 0 else None
        facts["delay_hours"] = {"n": n, "mean": mean, "mean_interval_if_exponential": ci,
                                "quantiles": {q: float(np.quantile(d_h, q)) for q in (0.1, 0.5, 0.9)},
                                "ks_exponential": None if ks is None else {"statistic": float(ks.statistic),
                                                                           "p_value": float(ks.pvalue)}}
        use_exp = delay == "exponential" or (delay == "auto" and ks is not None and ks.pvalue >= 0.05)
        if mean == 0:
            noise["delay"] = {"dist": "fixed", "value": "0s"}
        elif use_exp:
            noise["delay"] = {"dist": "exponential", "mean": _dur(mean), "max": None}
        else:
            noise["delay"] = {"dist": "empirical", "values": [_dur(round(h * 60) / 60) for h in np.sort(d_h)]}
        facts["delay_hours"]["chosen"] = noise["delay"]["dist"]
    else:
        facts["delay_hours"] = {"n": int(len(d_h)), "note": f"fewer than {MIN_REPORTED} reported incidents: not fitted"}

    # End error only where the late start did not push the end, and the end was not clipped at the start.
    usable = rep & (audit.reported_start <= audit.true_end) & (audit.reported_end > audit.reported_start)
    j_h = _hours(audit.reported_end[usable] - audit.true_end[usable])
    if len(j_h) >= MIN_REPORTED:
        n = len(j_h)
        ss = float(np.sum(j_h**2))
        a = 1 - level
        scale = math.sqrt(ss / n)  # centred normal: the MLE of the scale
        facts["end_jitter_hours"] = {"n": n, "scale": scale, "mean_error": float(j_h.mean()),
                                     "interval": [math.sqrt(ss / stats.chi2.ppf(1 - a / 2, n)),
                                                  math.sqrt(ss / stats.chi2.ppf(a / 2, n))]}
        if scale > 0:
            noise["end_jitter"] = {"dist": "normal", "scale": _dur(scale)}
    else:
        facts["end_jitter_hours"] = {"n": int(len(j_h)), "note": f"fewer than {MIN_REPORTED} usable ends: not fitted"}
    from logtrial.labels.noise import load_noise

    load_noise(noise)  # what we write must load
    return AuditFit(noise, facts, d_h)


def _plain(o: object) -> object:
    """Facts as plain YAML types."""
    if isinstance(o, dict):
        return {str(k): _plain(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_plain(v) for v in o]
    if isinstance(o, (np.floating, float)):
        return round(float(o), 6)
    if isinstance(o, np.integer):
        return int(o)
    return o


def write_noise_file(fit: AuditFit, out: str | Path) -> Path:
    """Write ``{noise: ..., fit: ...}`` YAML that ``noise: [{file: ...}]`` in an experiment reads as it is."""
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    head = (f"# Noise fitted by `logtrial fit-noise` to {fit.facts['audit']}; use it in an experiment as\n"
            f"#   noise: [{{name: clean}}, {{file: {out.name}}}]\n")
    out.write_text(head + yaml.safe_dump({"noise": fit.noise, "fit": _plain(fit.facts)}, sort_keys=False))
    return out


def delay_figure(fit: AuditFit):
    """Empirical CDF of the audited delays against the fitted exponential, with the KS statistic."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from scipy import stats

    d = np.sort(fit.delays_h)
    fig, ax = plt.subplots(figsize=(5.6, 4))
    ax.step(d, np.arange(1, len(d) + 1) / len(d), where="post", label=f"audit ({len(d)} reported)")
    if len(d) and d.mean() > 0:
        x = np.linspace(0, d.max() * 1.05, 200)
        ks = fit.facts["delay_hours"].get("ks_exponential") or {}
        ax.plot(x, stats.expon(scale=d.mean()).cdf(x), label=f"exponential, mean {d.mean():.3g} h "
                f"(KS {ks.get('statistic', float('nan')):.3f}, p {ks.get('p_value', float('nan')):.3f})")
    ax.set_xlabel("report delay (hours)")
    ax.set_ylabel("share of reported incidents")
    ax.set_title("Report delay: audit against the fitted distribution")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return fig


def summary_lines(fit: AuditFit) -> list[str]:
    """What was fitted, one line per parameter, with intervals."""
    f = fit.facts
    pct = f"{f['level']:.0%}"
    lines = [f"{f['audit']}: {f['incidents']} audited incidents ({f['failures']} failures)"]
    for key, title in (("drop_failure", "failures never reported"), ("drop_other", "non-failures never reported"),
                       ("decoys", "reported non-failures filed as failures")):
        if key in f:
            x = f[key]
            lines.append(f"  {title}: {x['share']:.3f}  [{x['interval'][0]:.3f}, {x['interval'][1]:.3f}] ({pct})")
    d = f["delay_hours"]
    if "mean" in d:
        ks = d["ks_exponential"] or {}
        lines.append(f"  report delay: mean {d['mean']:.2f} h [{d['mean_interval_if_exponential'][0]:.2f}, "
                     f"{d['mean_interval_if_exponential'][1]:.2f}] if exponential; median {d['quantiles'][0.5]:.2f} h; "
                     f"KS vs exponential {ks.get('statistic', float('nan')):.3f} (p {ks.get('p_value', float('nan')):.3f})"
                     f" -> {d['chosen']}")
    else:
        lines.append(f"  report delay: {d['note']}")
    j = f["end_jitter_hours"]
    lines.append(f"  end error: scale {j['scale']:.2f} h [{j['interval'][0]:.2f}, {j['interval'][1]:.2f}], "
                 f"mean {j['mean_error']:+.2f} h" if "scale" in j else f"  end error: {j['note']}")
    return lines


def audit_table(true: pd.DataFrame, reported: pd.DataFrame) -> pd.DataFrame:
    """The audit CSV's rows for true incidents and the tickets a noise replay made of them (matched by true_id)."""
    rep = reported.dropna(subset=["true_id"]).set_index(reported["true_id"].dropna().astype(np.int64))
    hit = true["id"].isin(rep.index).to_numpy()
    r = rep.reindex(true["id"].to_numpy())

    def iso(values) -> pd.Series:
        return pd.Series(pd.DatetimeIndex(values).strftime("%Y-%m-%dT%H:%M:%SZ")).where(pd.notna(values).tolist(), "")

    return pd.DataFrame({
        "id": true["id"].to_numpy(), "entity": true["entity"].astype(str).to_numpy(),
        "kind": true["kind"].astype(str).to_numpy(),
        "true_start": iso(true["start"]).to_numpy(), "true_end": iso(true["end"]).to_numpy(),
        "reported": np.where(hit, "yes", "no"),
        "reported_start": iso(r["start"]).to_numpy(), "reported_end": iso(r["end"]).to_numpy(),
        "reported_kind": np.where(hit, r["kind"].astype(str).to_numpy(), ""),
    })
