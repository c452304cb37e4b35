"""Bootstrap intervals of incident-level figures, resampling failures or entities.

:func:`bootstrap_ci` resamples failures (``unit='incident'``) or entities with
their failures and alarms (``unit='entity'``) and returns a percentile interval.
"""

from __future__ import annotations

from typing import Callable

import numpy as np
from logtrial.errors import ConfigError, MetricError
from logtrial.evaluation.alarms import IncidentReport, summarise_weighted

ALARM_ONLY = ("false_alarms", "nonfailure_alarms", "alarms", "alarms_per_week_per_100_entities")
UNITS = ("incident", "entity")



def _alarm_kind_counts(report: "IncidentReport") -> tuple[np.ndarray, np.ndarray]:
    """Per alarm its kind code (0 false, 1 non-failure, 2 true) and its entity's unit index."""
    a = report.alarms
    match = a["match"].to_numpy(dtype=object)
    code = np.where(match == "false", 0, np.where(match == "nonfailure", 1, 2))
    ent_idx = _entity_index(report, a["entity"].to_numpy(dtype=object))
    return code, ent_idx


def _entity_index(report: "IncidentReport", names: np.ndarray) -> np.ndarray:
    """Index of each name in ``report.entity_names`` (-1 for fleet-wide / unknown)."""
    lookup = {name: i for i, name in enumerate(report.entity_names)}
    return np.array([lookup.get(str(n), -1) for n in names], dtype=np.int64) if len(names) else np.zeros(0, np.int64)


def _resample_indices(n_units: int, n: int, seed: int) -> np.ndarray:
    """(n x n_units) unit indices drawn with replacement."""
    rng = np.random.default_rng(seed)
    return rng.integers(0, n_units, size=(n, n_units))


def _counts_from_indices(idx: np.ndarray, n_units: int) -> np.ndarray:
    """(n x n_units) how often each unit was drawn in each resample."""
    n = idx.shape[0]
    flat = (idx + (np.arange(n) * n_units)[:, None]).ravel()
    return np.bincount(flat, minlength=n * n_units).reshape(n, n_units)


def _rows_of_units(unit_of_row: np.ndarray, draw: np.ndarray, n_units: int) -> np.ndarray:
    """Row positions belonging to each drawn unit, in draw order, repeated as often as drawn."""
    known = np.flatnonzero(unit_of_row >= 0)
    order = known[np.argsort(unit_of_row[known], kind="stable")]
    size = np.bincount(unit_of_row[known], minlength=n_units)
    first = np.r_[0, np.cumsum(size)[:-1]]
    take = size[draw]
    offsets = np.repeat(first[draw] - np.r_[0, np.cumsum(take)[:-1]], take)
    return order[offsets + np.arange(int(take.sum()))]


def _resampled_report(report: "IncidentReport", unit: str, draw: np.ndarray) -> "IncidentReport":
    """A report whose failures (and for entities, alarms) are the drawn units, repeated as drawn."""
    if unit == "incident":
        failures = report.failures.iloc[draw].reset_index(drop=True)
        alarms = report.alarms
    else:
        f_idx = _entity_index(report, report.failures["entity"].to_numpy(dtype=object))
        a_idx = _entity_index(report, report.alarms["entity"].to_numpy(dtype=object))
        n_units = len(report.entity_names)
        f_rows = np.concatenate([np.flatnonzero(f_idx < 0), _rows_of_units(f_idx, draw, n_units)])
        failures = report.failures.iloc[f_rows].reset_index(drop=True)
        alarms = report.alarms.iloc[_rows_of_units(a_idx, draw, n_units)].reset_index(drop=True)
    return IncidentReport(
        failures=failures,
        alarms=alarms,
        n_entities=report.n_entities,
        span=report.span,
        entity_names=report.entity_names,
        horizon=report.horizon,
        cooldown=report.cooldown,
        threshold=report.threshold,
        alarm_span=report.alarm_span,
    )


def bootstrap_ci(
    report: "IncidentReport",
    metric: str | Callable[["IncidentReport"], float],
    unit: str = "incident",
    n: int = 1000,
    level: float = 0.95,
    seed: int = 0,
) -> tuple[float, float]:
    """Percentile bootstrap interval of an incident-level figure, resampling failures or entities.

    ``metric`` is a key of ``report.summary()`` (computed vectorised) or a function
    of a resampled report. With ``unit='incident'`` failures are drawn with
    replacement and alarms stay as they are (so figures about alarms alone are
    refused); with ``unit='entity'`` entities are drawn with their failures and
    alarms, and fleet-wide failures are kept in every resample. Resamples where
    the figure is undefined (NaN, e.g. no failure drawn) are left out.
    """
    if unit not in UNITS:
        raise ConfigError(f"bootstrap.unit: must be one of {list(UNITS)}, got {unit!r}")
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise ConfigError(f"bootstrap.n: expected a positive integer, got {n!r}")
    if not (0.0 < float(level) < 1.0):
        raise ConfigError(f"bootstrap.level: must lie strictly between 0 and 1, got {level!r}")
    if isinstance(metric, str):
        known = list(report.summary())
        if metric not in known:
            raise ConfigError(f"bootstrap.metric: unknown figure {metric!r} (known: {known})")
        if unit == "incident" and metric in ALARM_ONLY:
            raise ConfigError(
                f"bootstrap.metric: {metric!r} depends on alarms only and does not vary over incidents; use unit='entity'"
            )
    n_units = len(report.failures) if unit == "incident" else len(report.entity_names)
    if n_units == 0:
        raise MetricError(f"bootstrap over {unit} units needs at least one unit, the report has none")
    draws = _resample_indices(n_units, int(n), seed)
    if callable(metric):
        values = np.array([float(metric(_resampled_report(report, unit, d))) for d in draws])
    else:
        values = _vectorised_values(report, metric, unit, draws, n_units)
    values = values[~np.isnan(values)]
    if len(values) == 0:
        return float("nan"), float("nan")
    alpha = (1.0 - float(level)) / 2.0
    lo, hi = np.quantile(values, [alpha, 1.0 - alpha], method="inverted_cdf")
    return float(lo), float(hi)


def _vectorised_values(report: "IncidentReport", metric: str, unit: str, draws: np.ndarray, n_units: int) -> np.ndarray:
    """The named figure for every resample at once."""
    counts = _counts_from_indices(draws, n_units).astype(np.float64)
    code, a_ent = _alarm_kind_counts(report)
    if unit == "incident":
        wf = counts
        kinds = np.bincount(code, minlength=3).astype(np.float64)
        wa = np.broadcast_to(kinds, (len(draws), 3))
    else:
        f_ent = _entity_index(report, report.failures["entity"].to_numpy(dtype=object))
        ones = np.ones((len(draws), 1))
        wf = np.where(f_ent[None, :] >= 0, counts[:, np.maximum(f_ent, 0)], ones) if len(f_ent) else counts[:, :0]
        per_entity = np.zeros((n_units, 3))
        known = a_ent >= 0
        np.add.at(per_entity, (a_ent[known], code[known]), 1.0)
        wa = counts @ per_entity
    return np.asarray(summarise_weighted(report, wf, wa)[metric], dtype=np.float64)
