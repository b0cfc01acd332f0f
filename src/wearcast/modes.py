"""Expected failures by failure mode, for spares and crews.

The models predict when a unit fails, not how. The count of each mode among
the coming failures is forecast by splitting each in-service unit's
P(fail within h) by the mix of modes recorded on failures of units like it:
unit ``i`` fails within ``h`` by mode ``m`` with probability ``p_i * s_m(i)``.
This is exact when each mode's hazard is a fixed share of the unit's total
hazard (the cumulative incidence of mode ``m`` is then ``s_m`` times the
probability of failure; competing risks with proportional cause-specific
hazards, see Kalbfleisch and Prentice 2002, *The Statistical Analysis of
Failure Time Data*, 2nd ed., ch. 8). :func:`mode_mix_by_age` checks the part
of that assumption the records can show: whether the mix shifts with age.

* ``s_m(i)``: with ``by`` unset, the fleet's mix: failures of mode ``m`` over
  all failures in the life table. With ``by`` (a column such as the seal
  type), each level's own mix shrunk toward the fleet's:
  ``(n_lm + w f_m) / (n_l + w)``, ``w = prior_failures`` (additive smoothing
  toward the fleet mix; a level with few failures keeps close to the fleet
  mix, common practice). Failures without a recorded mode form their own
  mode, ``(not recorded)``, so the unknown share stays visible.
* Interval: given the probabilities, unit failures are independent, so the
  count of mode ``m`` in a group is Poisson-binomial with the probabilities
  ``p_i s_m(i)`` (the same law as the fleet count, :mod:`wearcast._poisson_binomial`).
  It is the chance-only interval: it leaves out model uncertainty and the
  uncertainty of the mix itself.
"""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd
from scipy.stats import chi2_contingency

from wearcast import _atomic
from wearcast._poisson_binomial import count_pmf, pmf_quantile
from wearcast.exceptions import ConfigError
from wearcast.lifetable import group_labels, group_members, level_labels
from wearcast.ranking import probability_column
from wearcast.resample import INTERVAL, plain_number

MODE_FORECAST_FILE = "mode_forecast.csv"
NOT_RECORDED = "(not recorded)"
#: More levels than this in ``modes_by`` is a mistake (a measurement, not a grouping).
MAX_MODE_LEVELS = 50
_SHARE_COLUMNS = ["level", "mode", "failures", "share"]


def clean_modes(values: pd.Series) -> pd.Series:
    """Failure-mode text as recorded, ``(not recorded)`` where blank."""
    modes = values.fillna("").astype(str).str.strip()
    return modes.where(modes != "", NOT_RECORDED)


def _failure_modes(frame: pd.DataFrame) -> pd.Series:
    return clean_modes(frame.loc[frame["failed"].astype(bool), "mode"])


def check_modes_by(frame: pd.DataFrame, by: str | None, prior_failures: float = 10.0) -> None:
    """Raise :class:`ConfigError` when ``[ranking] modes_by`` / ``mode_prior_failures`` cannot work."""
    if prior_failures < 0:
        raise ConfigError(f"[ranking] mode_prior_failures must be 0 or more; got {prior_failures}.")
    if by is None:
        return
    if by not in frame.columns:
        raise ConfigError(
            f"[ranking] modes_by names {by!r}, which is not a column of the life table "
            f"({', '.join(map(str, frame.columns))}). Name a register column or covariate, or remove the key."
        )
    n_levels = frame[by].nunique(dropna=True)
    if n_levels > MAX_MODE_LEVELS:
        raise ConfigError(
            f"[ranking] modes_by names {by!r}, which has {n_levels} distinct values; name a grouping column "
            f"with a few levels (a seal type, a maker; at most {MAX_MODE_LEVELS}), or remove the key."
        )


def mode_shares(table, by: str | None = None, prior_failures: float = 10.0) -> pd.DataFrame:
    """The fleet's mode mix, then the mix per level of ``by``.

    Columns: ``level`` (empty, None, on the fleet's rows), ``mode``,
    ``failures`` (recorded), ``share``. Modes are ordered by their fleet
    count, most frequent first. Empty when no failure has a recorded mode
    (there is then no mix to split by).
    """
    frame = table.frame
    check_modes_by(frame, by, prior_failures)
    modes = _failure_modes(frame)
    if (modes == NOT_RECORDED).all():
        return pd.DataFrame(columns=_SHARE_COLUMNS)
    fleet_counts = modes.value_counts()
    order = sorted(fleet_counts.index, key=lambda m: (-fleet_counts[m], m))
    fleet_share = (fleet_counts / fleet_counts.sum()).reindex(order)
    records = [{"level": None, "mode": m, "failures": int(fleet_counts[m]), "share": float(fleet_share[m])}
               for m in order]
    if by is not None:
        levels = level_labels(frame.loc[modes.index, by])
        for level in sorted(set(level_labels(frame[by]))):
            counts = modes[levels == level].value_counts().reindex(order, fill_value=0)
            n = float(counts.sum())
            weight = prior_failures if n + prior_failures > 0 else 1.0
            shares = (counts + weight * fleet_share) / (n + weight)
            records += [{"level": level, "mode": m, "failures": int(counts[m]), "share": float(shares[m])}
                        for m in order]
    return pd.DataFrame.from_records(records, columns=_SHARE_COLUMNS)


def mode_forecast(units: pd.DataFrame, horizons_days: Sequence[float], shares: pd.DataFrame,
                  by: str | None = None, group_by: Sequence[str] = ()) -> pd.DataFrame:
    """Expected failures of each mode per group and horizon, with the chance-only 5-95 % interval.

    ``units``: one row per in-service unit with ``p_fail_<h>d`` for each
    horizon, the ``group_by`` columns and, when ``by`` is set, that column
    (as in ``ranked_units.csv``). ``shares``: :func:`mode_shares`. Columns:
    ``group_by``, ``group``, ``horizon_days``, ``mode``, ``expected_failures``,
    ``chance_only_low``, ``chance_only_high``, ``mode_share`` (the mode's part
    of the group's expected failures).
    """
    columns = ["group_by", "group", "horizon_days", "mode", "expected_failures", "chance_only_low",
               "chance_only_high", "mode_share"]
    if shares.empty or units.empty:
        return pd.DataFrame(columns=columns)
    is_fleet = shares["level"].isna()
    order = list(shares.loc[is_fleet, "mode"])
    fleet_mix = shares.loc[is_fleet].set_index("mode")["share"].reindex(order).to_numpy(float)
    if by is None:
        s = np.tile(fleet_mix, (len(units), 1))
    else:
        if by not in units.columns:
            raise ConfigError(f"[ranking] modes_by names {by!r}, which the in-service units do not carry.")
        by_level = shares.loc[~is_fleet].pivot(index="level", columns="mode", values="share").reindex(columns=order)
        s = by_level.reindex(level_labels(units[by])).to_numpy(float)
        s[np.isnan(s).any(axis=1)] = fleet_mix  # a level with no record
    members = group_members(group_labels(units, group_by), len(units))
    records = []
    for (column, level), idx in members:
        for h in horizons_days:
            p = units[probability_column(h)].to_numpy(float)[idx]
            total = float(p.sum())
            for k, mode in enumerate(order):
                pm = p * s[idx, k]
                low, high = pmf_quantile(count_pmf(pm), INTERVAL)
                expected = float(pm.sum())
                records.append({"group_by": column, "group": level, "horizon_days": plain_number(h), "mode": mode,
                                "expected_failures": expected, "chance_only_low": int(low),
                                "chance_only_high": int(high),
                                "mode_share": expected / total if total > 0 else float("nan")})
    return pd.DataFrame.from_records(records, columns=columns)


def forecast_for_units(table, units: pd.DataFrame, horizons_days: Sequence[float], shares: pd.DataFrame,
                       by: str | None = None, group_by: Sequence[str] = ()) -> pd.DataFrame:
    """:func:`mode_forecast` for ``units`` of ``table`` (with their ``p_fail_<h>d``; the in-service
    units, by ``unit_id`` or else in the order of ``table.in_service()``), taking the ``by``
    column from the units' open rows when ``units`` lacks it."""
    if by is not None and by not in units.columns:
        open_rows = table.in_service().frame
        if "unit_id" in units.columns:
            by_unit = pd.Series(open_rows[by].to_numpy(), index=open_rows["unit_id"].astype(str).to_numpy())
            units = units.assign(**{by: by_unit.reindex(units["unit_id"].astype(str)).to_numpy()})
        else:
            units = units.assign(**{by: open_rows[by].to_numpy()})
    return mode_forecast(units, horizons_days, shares, by=by, group_by=group_by)


def mode_mix_by_age(table, n_bands: int = 3) -> dict:
    """Does the mode mix shift with age? Chi-square test of mode against age band of the failure.

    Failures are cut into up to ``n_bands`` equal-count age bands (fewer with
    fewer than 20 failures a band, or when many failures share an age).
    Returns ``{"p_value", "bands", "failures", "statement"}``; ``p_value`` is
    None when fewer than two bands or two modes can be formed.
    """
    frame = table.frame
    modes = _failure_modes(frame)
    ages = frame.loc[modes.index, "exit_age"].to_numpy(float)
    wanted = min(n_bands, max(len(modes) // 20, 1))
    band = np.zeros(len(ages), int)
    if wanted >= 2:
        edges = np.unique(np.quantile(ages, np.linspace(0, 1, wanted + 1)[1:-1]))
        band = np.searchsorted(edges, ages, side="right")
    bands = len(np.unique(band))
    if modes.nunique() < 2 or bands < 2:
        return {"p_value": None, "bands": int(bands), "failures": int(len(modes)),
                "statement": "Too few recorded failures (or failure ages) to check whether the mode mix "
                             "changes with age."}
    crosstab = pd.crosstab(band, modes.to_numpy())
    p_value = float(chi2_contingency(crosstab.to_numpy())[1])
    if p_value < 0.01:
        statement = (f"The mode mix differs between younger and older failures (chi-square p = {p_value:.3g}); "
                     "the forecast by mode assumes one mix at every age, so read it as rough.")
    elif p_value < 0.1:
        statement = (f"Some sign that the mode mix changes with age (chi-square p = {p_value:.2g}, {bands} age "
                     "bands); the forecast by mode assumes one mix at every age, so read it as approximate.")
    else:
        statement = (f"No clear shift of the mode mix with age in the records (chi-square p = {p_value:.2g}, "
                     f"{bands} age bands).")
    return {"p_value": p_value, "bands": int(bands), "failures": int(len(modes)), "statement": statement}


def write_mode_forecast(frame: pd.DataFrame, out_dir: str | Path) -> Path:
    """Write ``mode_forecast.csv`` atomically; return its path."""
    return _atomic.write_csv(Path(out_dir) / MODE_FORECAST_FILE, frame)


__all__ = ["MODE_FORECAST_FILE", "NOT_RECORDED", "check_modes_by", "clean_modes", "mode_shares", "mode_forecast",
           "forecast_for_units", "mode_mix_by_age", "write_mode_forecast"]
