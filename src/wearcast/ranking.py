"""The ranked list of in-service units and the fleet failure forecast.

Point estimates come from the main fitted model; stability intervals and the
model-uncertainty part of the forecast come from bootstrap refits
(:mod:`wearcast.resample`). ``docs/outputs.md`` describes every column of
``ranked_units.csv`` and ``fleet_forecast.csv`` and every key of
``summary.json``.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast._poisson_binomial import EXACT_VARIANCE_LIMIT, count_pmf, pmf_quantile
from wearcast.exceptions import ConfigError, ModelError
from wearcast.lifetable import FLEET, group_labels, group_members
from wearcast.resample import INTERVAL, RefitSummary, current_units, plain_number, risk_ranks

#: Days per year used for ``age_years``.
DAYS_PER_YEAR = 365.25
#: How many drivers are named per unit.
N_DRIVERS = 3
RANKED_FILE = "ranked_units.csv"
FORECAST_FILE = "fleet_forecast.csv"
SUMMARY_FILE = "summary.json"


@dataclass(frozen=True)
class RankedList:
    """``ranked_units`` (one row per in-service unit, by rank), ``fleet_forecast``
    (one row per group and horizon) and ``summary`` (JSON-able dict)."""

    ranked_units: pd.DataFrame
    fleet_forecast: pd.DataFrame
    summary: dict


def main_probability_column(ranked: pd.DataFrame) -> str | None:
    """The ``p_fail_<h>d`` column of the longest horizon in a ranked list (None if none)."""
    cols = [c for c in ranked.columns if c.startswith("p_fail_") and c.endswith("d") and c.count("_") == 2]
    return max(cols, key=lambda c: float(c[len("p_fail_"):-1])) if cols else None


def probability_column(h) -> str:
    """The ranked list's column of P(fail within ``h`` days): ``p_fail_90d``."""
    return f"p_fail_{float(h):g}d"


def describe_drivers(contributions: pd.DataFrame, X: pd.DataFrame, categorical: Sequence[str],
                     n_drivers: int = N_DRIVERS) -> list[list[str]]:
    """Plain-words drivers per unit: ``"<covariate> <high|low|level> (<signed contribution>)"``.

    ``contributions``: (n, p) signed contributions to log risk; ``X``: the
    units' covariates (n, ...). A numeric value is "high" or "low" against the
    fleet median (the in-service units' median), "at median" when equal and
    "missing" when absent; a categorical covariate shows its level. The
    largest ``|contribution|`` comes first; contributions that round to 0.00
    are left out. Returns ``n`` lists of up to ``n_drivers`` strings.
    """
    C = contributions.to_numpy(dtype=float)
    names = [str(c) for c in contributions.columns]
    words = []
    for name in names:
        if name not in X.columns:
            words.append(np.full(len(X), ""))
            continue
        col = X[name]
        if name in categorical or not pd.api.types.is_numeric_dtype(col):
            values = col.astype(object)
            words.append(np.where(values.isna(), "missing", values.astype(str)).astype(object))
            continue
        v = col.to_numpy(dtype=float)
        median = np.nanmedian(v) if np.isfinite(v).any() else np.nan
        word = np.where(v > median, "high", np.where(v < median, "low", "at median")).astype(object)
        word[~np.isfinite(v)] = "missing"
        words.append(word)
    order = np.argsort(-np.abs(C), axis=1, kind="stable")[:, :n_drivers]
    out = []
    for i in range(len(C)):
        texts = []
        for j in order[i]:
            c = C[i, j]
            if not np.isfinite(c) or round(abs(c), 2) == 0:
                continue
            word = words[j][i]
            label = f"{names[j]} {word}" if word else names[j]
            texts.append(f"{label} ({c:+.2f})")
        out.append(texts)
    return out


def _interval_columns(frame, name, point, refits, col) -> None:
    frame[name] = point
    if refits is None:
        frame[f"{name}_low"] = np.nan
        frame[f"{name}_high"] = np.nan
    else:
        frame[f"{name}_low"] = refits.p_low[:, col]
        frame[f"{name}_high"] = refits.p_high[:, col]


def _check_refits(refits: RefitSummary, ids, horizons, rank_h, groups) -> None:
    if not np.array_equal(np.asarray(refits.unit_ids).astype(str), ids):
        raise ModelError("the refits were computed for other in-service units; rerun bootstrap_refits on this table.")
    if tuple(float(h) for h in refits.horizons_days) != horizons or float(refits.rank_horizon_days) != rank_h:
        raise ModelError(
            f"the refits use horizons {list(refits.horizons_days)} ranked at {refits.rank_horizon_days} days, "
            f"not {list(horizons)} ranked at {rank_h:g}; rerun bootstrap_refits with the same horizons."
        )
    if tuple(refits.groups) != tuple(groups):
        raise ModelError("the refits were summarised for other groups; pass the same group_by to bootstrap_refits.")


def rank_units(
    table,
    model,
    refits: RefitSummary | None,
    horizons_days: Sequence[float],
    top_k: int,
    stable_share: float,
    group_by: Sequence[str] = (),
    *,
    rank_horizon_days: float | None = None,
) -> RankedList:
    """Rank the in-service units of ``table`` by P(fail within the ranking horizon).

    ``model``: the fitted main model. ``refits``: the summary of bootstrap
    refits of that model (``None``: no intervals; interval columns are empty
    and the forecast interval is chance only). ``horizons_days``: days;
    ranking uses ``rank_horizon_days`` (default the longest). ``top_k`` and
    ``stable_share``: a unit's top-k place is stable when it is in the top
    ``top_k`` in at least ``stable_share`` of refits. ``group_by``: columns for
    per-group forecasts.
    """
    horizons = tuple(float(h) for h in horizons_days)
    if not horizons:
        raise ConfigError("[ranking] horizons_days is empty; list at least one horizon in days.")
    rank_h = max(horizons) if rank_horizon_days is None else float(rank_horizon_days)
    if rank_h not in horizons:
        raise ConfigError(f"ranking horizon {rank_h:g} days is not one of horizons_days {list(horizons_days)}.")
    if not 0 < stable_share <= 1:
        raise ConfigError(f"[ranking] stable_share must be in (0, 1]; got {stable_share}.")
    rows, ids, ages = current_units(table)
    groupings = group_labels(rows, group_by)
    members = group_members(groupings, len(ids))
    group_keys = [key for key, _ in members]
    if refits is not None:
        _check_refits(refits, ids, horizons, rank_h, group_keys)
    X = rows.loc[:, list(table.covariates)]
    p = np.asarray(model.fail_probabilities(X, ages, horizons), float)
    rank_col = horizons.index(rank_h)
    ranks = risk_ranks(p[:, rank_col])

    units = pd.DataFrame({"unit_id": ids})
    for col, labels in groupings:
        units[col] = labels
    units["age_days"] = ages
    units["age_years"] = ages / DAYS_PER_YEAR
    oldest_failure = oldest_failure_age(table)
    units["beyond_record_age"] = ages + max(horizons) > oldest_failure
    for j, h in enumerate(horizons):
        _interval_columns(units, probability_column(h), p[:, j], refits, j)
    units["rank"] = ranks
    share_col, stable_col = f"top{top_k}_share", f"top{top_k}_stable"
    if refits is None:
        for col in ("rank_low", "rank_high"):
            units[col] = pd.array([pd.NA] * len(ids), dtype="Int64")
        units[share_col] = np.nan
        units[stable_col] = pd.array([pd.NA] * len(ids), dtype="boolean")
    else:
        units["rank_low"] = pd.array(refits.rank_low, dtype="Int64")
        units["rank_high"] = pd.array(refits.rank_high, dtype="Int64")
        units[share_col] = refits.top_share
        units[stable_col] = refits.top_share >= stable_share
    drivers_note = "signed contributions to log relative risk"
    try:
        contributions = model.contributions(X)
        texts = describe_drivers(contributions, X, table.categorical)
    except NotImplementedError:
        texts, drivers_note = [[] for _ in ids], None
    for d in range(N_DRIVERS):
        units[f"driver_{d + 1}"] = [t[d] if d < len(t) else "" for t in texts]
    units = units.sort_values("rank", kind="stable").reset_index(drop=True)

    forecast = fleet_forecast(p, members, horizons, refits)
    summary = _summary(table, model, refits, horizons, rank_h, top_k, stable_share, units, forecast,
                       drivers_note)
    summary.update(oldest_failure_age_days=plain_number(oldest_failure),
                   units_beyond_record_age=int(units["beyond_record_age"].sum()),
                   units_older_than_record_age=int((ages > oldest_failure).sum()))
    return RankedList(units, forecast, summary)


def oldest_failure_age(table) -> float:
    """The oldest age (days) at which a failure is on record in ``table`` (0 without failures).

    Past it every model's hazard rests on its fitted tail (docs/models.md); the
    ranked list flags units whose longest window reaches past it.
    """
    failed = np.asarray(table.event, bool)
    return float(np.asarray(table.exit, float)[failed].max()) if failed.any() else 0.0


def fleet_forecast(p: np.ndarray, members, horizons, refits: RefitSummary | None) -> pd.DataFrame:
    """Expected failures per group and horizon with 5-95 % intervals.

    ``p``: (n, H) main-model probabilities. Chance-only interval: quantiles of
    the Poisson-binomial count given ``p``. Combined interval: quantiles of the
    refits' mixture of Poisson-binomial counts (``refits.count_pmf``). Model-only
    interval: 5-95 % of the refits' expected counts. ``members``: the groups, from
    :func:`wearcast.lifetable.group_members` (the whole fleet first), in the refits' order.
    """
    records = []
    for g, ((column, level), idx) in enumerate(members):
        for j, h in enumerate(horizons):
            pg = p[idx, j]
            chance_low, chance_high = pmf_quantile(count_pmf(pg), INTERVAL)
            record = {"group_by": column, "group": level, "horizon_days": plain_number(h),
                      "units": len(idx), "expected_failures": float(pg.sum()),
                      "chance_only_low": int(chance_low), "chance_only_high": int(chance_high)}
            if refits is None:
                record.update(failures_low=int(chance_low), failures_high=int(chance_high),
                              model_only_low=np.nan, model_only_high=np.nan)
            else:
                low, high = pmf_quantile(refits.count_pmf[g][j], INTERVAL)
                totals = refits.group_expected[:, g, j]
                record.update(failures_low=int(low), failures_high=int(high),
                              model_only_low=float(np.quantile(totals, INTERVAL[0])),
                              model_only_high=float(np.quantile(totals, INTERVAL[1])))
            records.append(record)
    columns = ["group_by", "group", "horizon_days", "units", "expected_failures", "failures_low",
               "failures_high", "chance_only_low", "chance_only_high", "model_only_low", "model_only_high"]
    return pd.DataFrame.from_records(records, columns=columns)


def _round(x, digits: int = 6):
    return None if x is None or not np.isfinite(x) else round(float(x), digits)


def _summary(table, model, refits, horizons, rank_h, top_k, stable_share, units, forecast, drivers_note):
    fleet = forecast[forecast["group_by"] == FLEET[0]]
    by_h = {str(plain_number(h)): row for h, row in zip(horizons, fleet.itertuples(index=False))}
    stable_col = f"top{top_k}_stable"
    return {
        "as_of": None if table.as_of is None else table.as_of.date().isoformat(),
        "model": getattr(model, "name", type(model).__name__),
        "horizons_days": [plain_number(h) for h in horizons],
        "rank_horizon_days": plain_number(rank_h),
        "top_k": int(top_k),
        "stable_share": float(stable_share),
        "interval_quantiles": list(INTERVAL),
        "units_total": int(table.n_units),
        "units_in_service": int(len(units)),
        "failures_in_history": int(table.n_failures),
        "expected_failures": {k: _round(r.expected_failures) for k, r in by_h.items()},
        "expected_failures_interval": {k: [int(r.failures_low), int(r.failures_high)] for k, r in by_h.items()},
        "refits": 0 if refits is None else int(refits.n_refits),
        "seed": None if refits is None else int(refits.seed),
        "refit_fingerprint": None if refits is None else refits.fingerprint,
        "stable_top_k_units": None if refits is None else int(units[stable_col].sum()),
        "drivers": drivers_note,
        "exact_count_variance_limit": EXACT_VARIANCE_LIMIT,
    }


def write_ranking(ranked: RankedList, out_dir) -> dict[str, Path]:
    """Write ``ranked_units.csv``, ``fleet_forecast.csv`` and ``summary.json`` atomically.

    Floats are written with 6 significant digits and JSON keys sorted, so a
    rerun on the same inputs gives byte-identical files. Returns name -> path.
    """
    out_dir = Path(out_dir)
    return {
        "ranked_units": _atomic.write_csv(out_dir / RANKED_FILE, ranked.ranked_units),
        "fleet_forecast": _atomic.write_csv(out_dir / FORECAST_FILE, ranked.fleet_forecast),
        "summary": _atomic.write_json(out_dir / SUMMARY_FILE, ranked.summary),
    }
