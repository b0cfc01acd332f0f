"""Planned replacement ages per group from the life statistics and two costs.

For each row of :func:`wearcast.lifestats.life_statistics` (the fleet, then each
group) with a Weibull fit, the age at which replacing a still-working unit by
plan minimises the long-run cost per day, against replacing only at failure
(:mod:`wearcast._age_replacement`; Barlow and Proschan 1965). The costs are the
config's ``[costs]``: ``planned_replacement`` and ``failure`` in one unit (money,
crew hours; only their ratio matters). A failure's cost should include its
consequences (lost service, repairs to other equipment, call-outs).

This is a fleet-average policy: it ignores each unit's condition and covariates
(the ranked list has those) and safety consequences that a cost cannot carry.
It supports, and never replaces, inspections, manufacturer instructions, local
codes and licensed engineering judgement.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast._age_replacement import best_replacement_age
from wearcast.exceptions import ConfigError
from wearcast.lifestats import NO_WEIBULL, whole_days

REPLACEMENT_FILE = "replacement_ages.csv"
COLUMNS = ["group_by", "group", "weibull_shape", "weibull_scale_days", "best_age_days", "age_low_days",
           "age_high_days", "cost_per_year_at_best", "cost_per_year_run_to_failure", "saving", "wear_out_clear",
           "reading"]
REPAIR_READING = ("renewal = \"repair\": failures are repaired, not replaced, so the age-replacement model "
                  "(each replacement starts a new life) does not apply")


def check_costs(cost_planned: float | None, cost_failure: float | None, source: str = "config") -> bool:
    """True when both costs are set (and valid); False when neither is; ConfigError otherwise."""
    if cost_planned is None and cost_failure is None:
        return False
    if cost_planned is None or cost_failure is None:
        raise ConfigError(f"{source}: [costs] needs both planned_replacement and failure (in the same unit), "
                          "or neither.")
    if not (cost_planned > 0 and cost_failure > 0):
        raise ConfigError(f"{source}: [costs] planned_replacement and failure must be positive; got "
                          f"{cost_planned} and {cost_failure}.")
    return True


def replacement_ages(stats: pd.DataFrame, cost_planned: float, cost_failure: float,
                     renewal: str = "replace") -> pd.DataFrame:
    """One row per row of ``stats``: the best planned replacement age and what it saves.

    Ages in days; costs per year (365.25 days) in the config's cost unit;
    ``saving``: share of the run-to-failure cost per year saved at the best age;
    ``age_low_days``/``age_high_days``: ages costing within 5 % of the best.
    ``wear_out_clear``: the Weibull shape's lower bound is above 1 (the records show wear-out).
    ``reading``: why there is no age when there is none. With ``renewal = "repair"`` no
    age is given (a repair does not start a new life).
    """
    check_costs(cost_planned, cost_failure)
    records = []
    for row in stats.itertuples(index=False):
        shape, scale = float(getattr(row, "weibull_shape", np.nan)), float(getattr(row, "weibull_scale_days", np.nan))
        shape_low = float(getattr(row, "weibull_shape_low", np.nan))
        record = {"group_by": row.group_by, "group": row.group, "weibull_shape": shape, "weibull_scale_days": scale,
                  "wear_out_clear": bool(shape_low > 1.0)}
        if renewal == "repair":
            records.append(record | {"reading": REPAIR_READING})
            continue
        if not (np.isfinite(shape) and np.isfinite(scale)):
            records.append(record | {"reading": NO_WEIBULL})
            continue
        best = best_replacement_age(shape, scale, cost_planned, cost_failure)
        if np.isfinite(best["age"]) and not record["wear_out_clear"]:
            reading = ("pays only if the failure rate truly rises with age: the Weibull shape's bounds include 1, "
                       "so the records do not show wear-out clearly")
        elif np.isfinite(best["age"]):
            reading = "a planned replacement at this age pays"
        elif shape <= 1.0:
            reading = "failure rate not rising with age (Weibull shape <= 1): planned replacement does not pay"
        elif cost_failure <= cost_planned:
            reading = "a failure costs no more than a planned replacement: replace at failure"
        else:
            reading = "no age where planned replacement pays within 20 scale lengths"
        records.append(record | {
            "best_age_days": best["age"], "age_low_days": best["age_low"], "age_high_days": best["age_high"],
            "cost_per_year_at_best": best["cost_rate"] * 365.25,
            "cost_per_year_run_to_failure": best["run_to_failure_rate"] * 365.25,
            "saving": best["saving"], "reading": reading})
    return pd.DataFrame.from_records(records, columns=COLUMNS)


def fleet_headline(ages: pd.DataFrame) -> dict:
    """The whole fleet's row (the first) as plain values for the check summary."""
    fleet = ages.iloc[0]
    out = {key: None if pd.isna(fleet[col]) else round(float(fleet[col]), 3)
           for key, col in (("fleet_best_replacement_age_days", "best_age_days"),
                            ("fleet_replacement_age_low_days", "age_low_days"),
                            ("fleet_replacement_age_high_days", "age_high_days"),
                            ("fleet_replacement_saving", "saving"))}
    return out | {"fleet_replacement_reading": fleet["reading"], "fleet_wear_out_clear": bool(fleet["wear_out_clear"])}


def write_replacement_ages(frame: pd.DataFrame, out_dir: str | Path) -> Path:
    """Write ``replacement_ages.csv`` atomically (ages as whole days); return its path."""
    return _atomic.write_csv(Path(out_dir) / REPLACEMENT_FILE, whole_days(frame))


__all__ = ["REPLACEMENT_FILE", "check_costs", "fleet_headline", "replacement_ages", "write_replacement_ages"]
