"""Label-noise tolerance: how much of each noise kind a detector stands, with intervals, pictures and sentences.

Reads the run records of an experiment whose ``noise:`` holds sweeps (settings that
carry an ``axis``: the noise kind they vary) and a clean setting. For each detector
and noise kind it finds

- the *tolerated level*: the highest swept level up to which the detector's figure
  (by default the share of failures predicted, at the alarm budget) stays within
  ``drop`` of its clean value at every level;
- for detectors that read labels, the *crossover level*: the lowest level at which
  the detector falls below the best detector that reads no labels at that level.

Intervals come from resampling seeds (with replacement) and, within each run, the
failures behind its share (a binomial draw at the run's share and failure count).
A detector's levels share the random numbers of a resample, as if the same failures
were redrawn for every level (run records keep counts, not which failure was
predicted); different detectors are resampled independently.
"""

from __future__ import annotations

import base64
import html
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from logtrial.errors import ConfigError
from logtrial.output.png import png_bytes

# Shares of failures: the figures a binomial resample over failures applies to.
SHARE_METRICS = {"recall_predicted": "failures predicted", "recall_detected_or_predicted": "failures caught"}
DEFAULTS = {"metric": "recall_predicted", "drop": 0.1, "budget": None, "resamples": 1000, "ci_level": 0.9,
            "highlight": 3, "seed": 0}
KIND_ORDER = ("drop", "decoys", "delay", "end_jitter", "spurious", "joint")
FAMILIES = {"all": "detectors that read no labels", "healthy": "detectors trained on windows reported healthy",
            "labelled": "detectors trained on labels"}


def tolerance_settings(raw: object) -> dict:
    """Validate the experiment's ``tolerance:`` block (metric, drop, budget, resamples, ci_level, highlight)."""
    raw = {} if raw is None else raw
    if not isinstance(raw, dict):
        raise ConfigError(f"tolerance: expected a mapping like {{drop: 0.1, budget: 5}}, got {raw!r}")
    unknown = sorted(set(raw) - set(DEFAULTS))
    if unknown:
        raise ConfigError(f"tolerance.{unknown[0]}: unknown field (allowed: {sorted(DEFAULTS)})")
    out = {**DEFAULTS, **raw}
    if out["metric"] not in SHARE_METRICS:
        raise ConfigError(f"tolerance.metric: expected one of {sorted(SHARE_METRICS)}, got {out['metric']!r}")
    d = out["drop"]
    if isinstance(d, bool) or not isinstance(d, (int, float)) or not 0 <= d < 1:
        raise ConfigError(f"tolerance.drop: expected the allowed loss as a share in [0, 1), got {d!r}")
    b = out["budget"]
    if b is not None and (isinstance(b, bool) or not isinstance(b, (int, float)) or b <= 0):
        raise ConfigError(f"tolerance.budget: expected alarms per week per 100 entities (> 0) or null, got {b!r}")
    for key, lo in (("resamples", 50), ("highlight", 1)):
        v = out[key]
        if isinstance(v, bool) or not isinstance(v, int) or v < lo:
            raise ConfigError(f"tolerance.{key}: expected a whole number >= {lo}, got {v!r}")
    c = out["ci_level"]
    if isinstance(c, bool) or not isinstance(c, (int, float)) or not 0 < c < 1:
        raise ConfigError(f"tolerance.ci_level: expected a number between 0 and 1, got {c!r}")
    if isinstance(out["seed"], bool) or not isinstance(out["seed"], int):
        raise ConfigError(f"tolerance.seed: expected a whole number, got {out['seed']!r}")
    return out


def budget_key(budget: float | None) -> str | None:
    """The key of a budget in a run record's ``at_budget``."""
    return None if budget is None else format(budget, "g")


def at_budget(rec: dict, key: str | None) -> dict:
    """A run's figures at an alarm budget; the threshold policy's when the record has no such budget."""
    return rec.get("at_budget", {}).get(key, rec)["metrics"]


def _first_budget(records: list[dict]) -> str | None:
    """The smallest budget the records carry, or None."""
    keys = {k for r in records for k in (r.get("at_budget") or {})}
    return min(keys, key=float) if keys else None


def _trains_on(detector: dict) -> str:
    """What a configured detector trains on ('all', 'healthy', 'labelled'), or 'unknown'."""
    from logtrial.detectors.registry import create

    try:
        return str(create(detector["name"], detector.get("params") or {}, seed=0).trains_on)
    except Exception:  # noqa: BLE001 - a detector that no longer loads is still reported, as 'unknown'
        return "unknown"


def run_rows(records: list[dict], settings: dict) -> pd.DataFrame:
    """One row per finished swept or clean run: detector, family, noise kind, level, seed, value, failures."""
    key = budget_key(settings["budget"]) or _first_budget(records)
    families: dict[str, str] = {}
    rows = []
    for r in records:
        if r.get("status") != "finished":
            continue
        noise = r["config"]["noise"]
        axis = noise.get("axis")
        clean = not any(noise.get(s) for s in ("drop", "decoys", "delay", "end_jitter", "spurious"))
        if axis is None and not clean:
            continue
        det = r["config"]["detector"]
        label = det.get("label") or det["name"]
        if label not in families:
            families[label] = _trains_on(det)
        m = at_budget(r, key)
        value = m.get(settings["metric"])
        cfg = r["config"]
        context = " ".join(str(x) for x in (cfg.get("dataset", ""), _flat(cfg.get("windows")), _flat(cfg.get("task")),
                                             _flat(cfg.get("vocabulary"))) if x)
        rows.append({"context": context, "detector": label, "family": families[label], "axis": axis or "", "level":
                     0.0 if axis is None else float(noise.get("level") or 0.0), "seed": int(r["config"]["seed"]),
                     "value": np.nan if value is None else float(value), "failures": int(m.get("failures") or 0)})
    return pd.DataFrame(rows, columns=["context", "detector", "family", "axis", "level", "seed", "value", "failures"])


def _flat(d: object) -> str:
    """A config mapping as 'k=v k=v' (empty for none)."""
    return " ".join(f"{k}={v}" for k, v in d.items()) if isinstance(d, dict) else ("" if d is None else str(d))


def _contexts(rows: pd.DataFrame) -> list[tuple[str, pd.DataFrame]]:
    """Rows split by dataset, windows, task and vocabulary: each is compared only within itself."""
    return [(c, g) for c, g in rows.groupby("context", sort=True)
            if (g["axis"] != "").any() and (g["axis"] == "").any()]


@dataclass
class Curves:
    """Per detector and noise kind: levels (0 first), the observed curve and its resampled curves."""

    levels: dict[str, np.ndarray]
    observed: dict[tuple[str, str], np.ndarray]
    resampled: dict[tuple[str, str], np.ndarray]  # (resamples x levels)
    families: dict[str, str]
    detectors: list[str]


def resample_curves(rows: pd.DataFrame, settings: dict, order: list[str] | None = None) -> Curves:
    """Mean-over-seeds curves of each detector along each noise kind, observed and resampled."""
    from scipy.stats import binom

    clean = rows[rows["axis"] == ""]
    kinds = sorted(set(rows["axis"]) - {""}, key=lambda a: (KIND_ORDER.index(_kind(a)), a))
    seeds = np.array(sorted(rows["seed"].unique()))
    dets = list(dict.fromkeys([*(order or []), *rows["detector"]]))
    dets = [d for d in dets if d in set(rows["detector"])]
    rng = np.random.default_rng(settings["seed"])
    n_b = settings["resamples"]
    draw = rng.integers(0, len(seeds), size=(n_b, len(seeds)))  # seeds resampled with replacement
    # One uniform per resample, seed and detector, common to the levels of a kind: a detector's levels are
    # compared on the same resample of failures; different detectors are resampled independently.
    u_of = {d: rng.random((n_b, len(seeds))) for d in dets}
    levels, observed, resampled = {}, {}, {}
    for kind in kinds:
        lv = np.r_[0.0, np.sort(rows.loc[rows["axis"] == kind, "level"].unique())]
        levels[kind] = lv
        for det in dets:
            part = pd.concat([clean[clean["detector"] == det], rows[(rows["axis"] == kind) & (rows["detector"] == det)]])
            p = np.full((len(lv), len(seeds)), np.nan)
            n = np.zeros((len(lv), len(seeds)), dtype=np.int64)
            li = np.searchsorted(lv, part["level"].to_numpy())
            si = np.searchsorted(seeds, part["seed"].to_numpy())
            p[li, si] = part["value"].to_numpy()
            n[li, si] = part["failures"].to_numpy()
            with np.errstate(all="ignore"):
                observed[(det, kind)] = np.nanmean(p, axis=1) if np.isfinite(p).any() else np.full(len(lv), np.nan)
                k = binom.ppf(u_of[det][:, None, :], n[None], np.nan_to_num(p)[None])  # (B, levels, seeds)
                share = np.where((n[None] > 0) & np.isfinite(p)[None], k / np.maximum(n[None], 1), np.nan)
                picked = np.take_along_axis(share, draw[:, None, :].repeat(len(lv), axis=1), axis=2)
                resampled[(det, kind)] = np.nanmean(picked, axis=2)
    families = rows.drop_duplicates("detector").set_index("detector")["family"].to_dict()
    return Curves(levels, observed, resampled, families, dets)


def _tolerated(curves: np.ndarray, levels: np.ndarray, drop: float) -> tuple[np.ndarray, np.ndarray]:
    """Per curve (rows) the highest level up to which every level stays within ``drop`` of level 0; censored flag."""
    c = np.atleast_2d(curves)
    ok = (c[:, :1] - c) <= drop + 1e-12  # NaN compares False: an undefined figure is not tolerated
    run = np.cumprod(ok[:, 1:], axis=1).sum(axis=1) if c.shape[1] > 1 else np.zeros(len(c), dtype=int)
    return levels[run], run == len(levels) - 1


def _crossover(curves: np.ndarray, best: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """Per curve the lowest level at which it falls below ``best``; NaN when it never does."""
    below = np.atleast_2d(curves) < np.atleast_2d(best) - 1e-12
    first = np.argmax(below, axis=1).astype(float)
    first[~below.any(axis=1)] = np.nan
    return np.where(np.isnan(first), np.nan, levels[np.nan_to_num(first).astype(int)])


def tolerance_table(curves: Curves, settings: dict) -> pd.DataFrame:
    """Per detector and noise kind: clean and worst value, tolerated level and crossover level with intervals."""
    alpha = (1 - settings["ci_level"]) / 2
    out = []
    for kind, lv in curves.levels.items():
        free = [d for d in curves.detectors if curves.families.get(d) == "all"]
        best_obs = best_res = None
        if free:
            best_obs = np.nanmax(np.vstack([curves.observed[(d, kind)] for d in free]), axis=0)
            best_res = np.nanmax(np.stack([curves.resampled[(d, kind)] for d in free]), axis=0)
        for det in curves.detectors:
            obs, res = curves.observed[(det, kind)], curves.resampled[(det, kind)]
            tol, cens = _tolerated(obs, lv, settings["drop"])
            tol_b, _ = _tolerated(res, lv, settings["drop"])
            loss = obs[0] - obs
            worst = int(np.nanargmax(loss)) if np.isfinite(loss).any() else 0
            row = {"detector": det, "family": curves.families.get(det, "unknown"), "noise": kind,
                   "clean": obs[0], "at_highest": obs[-1], "highest_level": lv[-1],
                   "worst_loss": loss[worst], "worst_level": lv[worst],
                   "tolerated": tol[0], "tolerated_low": np.quantile(tol_b, alpha, method="inverted_cdf"),
                   "tolerated_high": np.quantile(tol_b, 1 - alpha, method="inverted_cdf"), "tolerated_censored": bool(cens[0])}
            if best_obs is not None and row["family"] != "all":
                cross_b = _crossover(res, best_res, lv)
                row["crossover"] = _crossover(obs, best_obs, lv)[0]
                # Resamples that never cross sit above the highest level: count them there for the interval.
                filled = np.where(np.isnan(cross_b), np.inf, cross_b)
                row["crossover_low"] = float(np.quantile(filled, alpha, method="inverted_cdf"))
                row["crossover_high"] = float(np.quantile(filled, 1 - alpha, method="inverted_cdf"))
            out.append(row)
    return pd.DataFrame(out)


def _kind(axis: str) -> str:
    """The noise kind of a sweep axis ('drop', or 'drop:late-drop' for a renamed sweep)."""
    return axis.split(":", 1)[0]


def _lvl(kind: str, v: float) -> str:
    """A level with its unit."""
    kind = _kind(kind)
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "never"
    if math.isinf(v):
        return "beyond"
    return f"{v:g}h" if kind in ("delay", "end_jitter") else f"{v:g}"


def table_text(table: pd.DataFrame, metric_title: str) -> pd.DataFrame:
    """The tolerance table as people read it (levels with units, intervals in brackets)."""
    def at(kind: str, v: float) -> str:
        return "clean" if v == 0 else _lvl(kind, v)

    rows = []
    for r in table.itertuples(index=False):
        k = r.noise
        tol = at(k, r.tolerated) + ("+" if r.tolerated_censored else "")
        row = {"detector": r.detector, "reads labels": "no" if r.family == "all" else "yes", "noise kind": k,
               f"{metric_title}, clean": f"{r.clean:.2f}",
               "at the highest level": f"{r.at_highest:.2f} at {_lvl(k, r.highest_level)}",
               "tolerated up to": f"{tol} [{at(k, r.tolerated_low)}, {at(k, r.tolerated_high)}]"}
        cross = getattr(r, "crossover", float("nan"))
        if r.family == "all" or pd.isna(getattr(r, "crossover_low", float("nan"))):
            row["falls below best label-free at"] = "–"
        else:
            point = "not within the sweep" if pd.isna(cross) else ("already clean" if cross == 0 else at(k, cross))
            row["falls below best label-free at"] = f"{point} [{at(k, r.crossover_low)}, {at(k, r.crossover_high)}]"
        rows.append(row)
    return pd.DataFrame(rows)


def heat_map(curves: Curves, metric_title: str):
    """Detector by noise kind: the loss against the clean value at each swept level, one panel per kind."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    kinds = list(curves.levels)
    loss = {k: np.vstack([curves.observed[(d, k)][0] - curves.observed[(d, k)] for d in curves.detectors])
            for k in kinds}
    vmax = max(0.05, float(np.nanmax(np.abs(np.hstack(list(loss.values()))))))
    widths = [max(2, len(curves.levels[k])) for k in kinds]
    fig, axes = plt.subplots(1, len(kinds), figsize=(1.1 * sum(widths) + 2.5, 0.45 * len(curves.detectors) + 2),
                             squeeze=False, gridspec_kw={"width_ratios": widths})
    for ax, k in zip(axes[0], kinds):
        im = ax.imshow(loss[k], cmap="RdBu_r", vmin=-vmax, vmax=vmax, aspect="auto")
        ax.set_xticks(range(len(curves.levels[k])), [_lvl(k, v) for v in curves.levels[k]], rotation=45, fontsize=8)
        ax.set_yticks(range(len(curves.detectors)), curves.detectors if ax is axes[0][0] else [""] * len(curves.detectors))
        ax.set_title(k, fontsize=10)
        for (i, j), v in np.ndenumerate(loss[k]):
            if np.isfinite(v):
                ax.text(j, i, f"{v:.2f}", ha="center", va="center", fontsize=7,
                        color="white" if abs(v) > 0.6 * vmax else "black")
    fig.colorbar(im, ax=axes[0].tolist(), shrink=0.8, label=f"loss in {metric_title} vs clean")
    fig.suptitle(f"Loss in {metric_title} at each noise level (red: worse than clean; mean over seeds)")
    return fig


def degradation_curves(curves: Curves, settings: dict, metric_title: str):
    """Figure against level per noise kind with resampled intervals; the best few in colour, the rest grey."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    kinds = list(curves.levels)
    alpha = (1 - settings["ci_level"]) / 2
    ncols = min(3, len(kinds))
    nrows = -(-len(kinds) // ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(4.6 * ncols, 3.7 * nrows), squeeze=False, sharey=True)
    # The best few over every kind (mean of their curves), with one colour each in every panel.
    with np.errstate(all="ignore"):
        score = {d: np.nanmean(np.hstack([curves.observed[(d, k)] for k in kinds])) for d in curves.detectors}
    best = sorted(curves.detectors, key=lambda d: -np.nan_to_num(score[d], nan=-1))[: settings["highlight"]]
    colours = dict(zip(best, plt.get_cmap("tab10").colors))
    free = [d for d in curves.detectors if curves.families.get(d) == "all"]
    for ax, k in zip(axes.ravel(), kinds):
        lv = curves.levels[k]
        for d in curves.detectors:
            top = d in best
            ax.plot(lv, curves.observed[(d, k)], marker="o", ms=3, lw=2 if top else 0.8,
                    color=colours.get(d, "0.65"), label=d if top else None, zorder=3 if top else 1)
            if top:
                res = curves.resampled[(d, k)]
                with np.errstate(all="ignore"):
                    lo, hi = np.nanquantile(res, alpha, axis=0), np.nanquantile(res, 1 - alpha, axis=0)
                ax.fill_between(lv, lo, hi, color=colours[d], alpha=0.13)
        if free:
            ax.plot(lv, np.nanmax(np.vstack([curves.observed[(d, k)] for d in free]), axis=0), ls="--", color="k",
                    lw=1, label="best label-free", zorder=4)
        ax.set_title(k)
        ax.set_xlabel(_unit(k))
        ax.grid(alpha=0.3)
    for ax in axes.ravel()[len(kinds):]:
        ax.set_visible(False)
    for row in axes:
        row[0].set_ylabel(metric_title)
    axes[0][0].legend(fontsize=7)
    grey = [d for d in curves.detectors if d not in best]
    fig.suptitle(f"{metric_title} against each noise kind: best {len(best)} in colour with their "
                 f"{settings['ci_level']:.0%} interval over seeds and failures"
                 + (f"; grey: {', '.join(grey)}" if grey else ""), fontsize=10)
    fig.tight_layout()
    return fig


def _unit(kind: str) -> str:
    from logtrial.labels.noise import LEVEL_UNITS

    return LEVEL_UNITS.get(_kind(kind), "level")


def sentences(table: pd.DataFrame, settings: dict, metric_title: str) -> list[str]:
    """One plain sentence per detector family: which noise kinds cost its worst-hit member more than the tolerance."""
    out = []
    for fam in ("labelled", "healthy", "all", "unknown"):
        t = table[table["family"] == fam]
        if t.empty:
            continue
        names = ", ".join(dict.fromkeys(t["detector"]))
        who = FAMILIES.get(fam, "detectors of unknown training")
        worst = t.loc[t.groupby("noise", sort=False)["worst_loss"].idxmax().dropna()]
        worst = worst.sort_values("worst_loss", ascending=False)
        hurt = worst[worst["worst_loss"] > settings["drop"]]
        calm = worst[~(worst["worst_loss"] > settings["drop"])]
        most = max(0.0, float(calm["worst_loss"].max())) if len(calm) else 0.0
        if hurt.empty:
            out.append(f"The {who} ({names}) are not measurably sensitive to any swept noise: none loses more than "
                       f"{most:.2f} of {metric_title} at any level, within the stated tolerance of "
                       f"{settings['drop']:g}.")
            continue
        parts = [f"{r.noise} ({r.detector} loses {r.worst_loss:.2f} at {_lvl(r.noise, r.worst_level)}, "
                 + ("tolerating none of it)" if r.tolerated == 0 else f"tolerating up to {_lvl(r.noise, r.tolerated)})")
                 for r in hurt.itertuples()]
        text = f"The {who} ({names}) are sensitive to " + ", ".join(parts)
        text += f"; {', '.join(calm['noise'])} cost them at most {most:.2f}." if len(calm) else "."
        out.append(text)
    return out


def noise_sentences(records: list[dict], tolerance: dict | None = None, order: list[str] | None = None) -> list[str]:
    """Per detector family, one sentence on which label noise it is sensitive to (empty without sweeps)."""
    settings = tolerance_settings(tolerance)
    parts = _contexts(run_rows(records, settings))
    out = []
    for context, rows in parts:
        table = tolerance_table(resample_curves(rows, settings, order), settings)
        said = sentences(table, settings, SHARE_METRICS[settings["metric"]])
        out += [f"{context}: {x}" for x in said] if len(parts) > 1 else said
    return out


@dataclass
class Section:
    """A report section: Markdown lines, an HTML fragment and the PNGs it shows."""

    markdown: list[str] = field(default_factory=list)
    html: str = ""
    pngs: dict[str, bytes] = field(default_factory=dict)


def _markdown(table: pd.DataFrame) -> str:
    """A Markdown pipe table."""
    lines = ["| " + " | ".join(table.columns) + " |", "|" + "|".join("---" for _ in table.columns) + "|"]
    return "\n".join(lines + ["| " + " | ".join(str(v) for v in row) + " |" for row in table.itertuples(index=False)])


def tolerance_section(records: list[dict], output: Path, tolerance: dict | None = None,
                      order: list[str] | None = None) -> Section:
    """The noise-tolerance section of a report (writes tolerance.csv and its PNGs); empty without a sweep."""
    settings = tolerance_settings(tolerance)
    parts = _contexts(run_rows(records, settings))
    if not parts:
        return Section()
    title = SHARE_METRICS[settings["metric"]]
    key = budget_key(settings["budget"]) or _first_budget(records)
    where = f"at the budget of {key} alarms per week per 100 entities" if key else "at the experiment's threshold"
    intro = (f"Tolerated level: the highest swept level up to which {title} ({where}) stays within "
             f"{settings['drop']:g} of its clean value at every level (`+`: still within at the highest level). "
             f"Falls below: the lowest level at which a detector that reads labels predicts fewer failures than the "
             f"best detector that reads none. Brackets: {settings['ci_level']:.0%} interval over "
             f"{settings['resamples']} resamples of seeds and of the failures behind each share.")
    failed = [r for r in records if r.get("status") == "failed" and r.get("config", {}).get("noise", {}).get("axis")]
    if failed:
        intro += (f" {len(failed)} swept run(s) failed and are left out of their level's mean (for instance a "
                  f"detector trained on labels whose reported labels held no failure); see the run records.")
    md = ["## Label-noise tolerance", "", intro, ""]
    page = "<h2>Label-noise tolerance</h2><p>" + html.escape(intro) + "</p>"
    pngs: dict[str, bytes] = {}
    tables = []
    for i, (context, rows) in enumerate(parts):
        curves = resample_curves(rows, settings, order)
        table = tolerance_table(curves, settings)
        tables.append(table.assign(context=context))
        text = table_text(table, title)
        said = sentences(table, settings, title)
        tag = "" if len(parts) == 1 else f"_{i + 1}"
        names = {f"noise_heatmap{tag}.png": png_bytes(heat_map(curves, title)),
                 f"noise_curves{tag}.png": png_bytes(degradation_curves(curves, settings, title))}
        pngs.update(names)
        size = f"{context}: " if len(parts) > 1 else ""
        size += f"{rows['seed'].nunique()} seeds, about {int(rows['failures'].median())} failures per run."
        md += [f"*{size}*", "", _markdown(text), "", *[f"- {x}" for x in said], ""]
        md += [f"![{n.removesuffix('.png').replace('_', ' ')}]({n})\n" for n in names]
        page += (f"<p><em>{html.escape(size)}</em></p>" + text.to_html(index=False) + "<ul>"
                 + "".join(f"<li>{html.escape(x)}</li>" for x in said) + "</ul>"
                 + "".join(f'<figure><img alt="{html.escape(n)}" src="data:image/png;base64,'
                           f'{base64.b64encode(b).decode()}"></figure>' for n, b in names.items()))
    pd.concat(tables).to_csv(Path(output) / "tolerance.csv", index=False, float_format="%.6g")
    for name, blob in pngs.items():
        (Path(output) / name).write_bytes(blob)
    return Section(md, page, pngs)
