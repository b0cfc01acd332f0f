"""Product-limit (Kaplan–Meier) survival with delayed entry, and reading ages off it.

Pure functions on arrays of life-table rows. Ages are days. A row is at risk
at age ``t`` when ``entry < t <= exit`` (delayed entry), as everywhere in
wearcast, so a unit installed before records began only counts from the age
it entered the records.
"""

from __future__ import annotations

import numpy as np
from scipy.stats import norm

from wearcast.models._hazard import breslow_cumulative_hazard


def at_risk_counts(entry: np.ndarray, exit: np.ndarray, ages: np.ndarray) -> np.ndarray:
    """Number of rows with ``entry < t <= exit`` at each ``t`` in ``ages``, shape (m,)."""
    entry_sorted = np.sort(np.asarray(entry, float))
    exit_sorted = np.sort(np.asarray(exit, float))
    ages = np.asarray(ages, float)
    entered = np.searchsorted(entry_sorted, ages, side="left")  # entry < t
    left = np.searchsorted(exit_sorted, ages, side="left")  # exit < t
    return (entered - left).astype(np.int64)


def product_limit_survival(entry, exit, event, level: float = 0.95) -> dict[str, np.ndarray]:
    """Kaplan–Meier survival with delayed entry, at each distinct failure age.

    Returns a dict of arrays of shape (k,): ``age`` (days, increasing),
    ``survival``, ``low``/``high`` (pointwise two-sided band at ``level``,
    exponential Greenwood on log(-log S), the form lifelines reports),
    ``at_risk``, ``failures``. With delayed entry the curve is conditional on
    surviving to the earliest entry age in the data.
    """
    entry = np.asarray(entry, float)
    exit = np.asarray(exit, float)
    event = np.asarray(event, bool)
    z = float(norm.ppf(0.5 + level / 2.0))
    ages, cumhaz = breslow_cumulative_hazard(entry, exit, event)
    if len(ages) == 0:
        empty = np.zeros(0)
        return {"age": empty, "survival": empty, "low": empty, "high": empty,
                "at_risk": empty.astype(np.int64), "failures": empty.astype(np.int64)}
    increments = np.diff(np.concatenate([[0.0], cumhaz]))  # d / n at each age
    survival = np.cumprod(np.clip(1.0 - increments, 0.0, 1.0))
    at_risk = at_risk_counts(entry, exit, ages)
    failures = np.bincount(np.searchsorted(ages, exit[event]), minlength=len(ages))
    with np.errstate(divide="ignore", invalid="ignore"):
        greenwood = np.cumsum(np.where(at_risk > failures,
                                       failures / (at_risk * (at_risk - failures)), 0.0))
        log_s = np.log(survival)
        spread = z * np.sqrt(greenwood) / np.abs(log_s)
        low = np.where(survival > 0, survival ** np.exp(spread), 0.0)
        high = np.where(survival > 0, survival ** np.exp(-spread), 0.0)
    # where S == 1 there is no spread to show
    low = np.where(np.isfinite(low), low, survival)
    high = np.where(np.isfinite(high), high, survival)
    return {"age": ages, "survival": survival, "low": low, "high": high,
            "at_risk": at_risk, "failures": failures}


def age_at_survival(ages: np.ndarray, survival: np.ndarray, q: float) -> float:
    """First age at which the step curve ``survival`` is at or below ``q``; NaN if it never is.

    The convention of lifelines' ``qth_survival_time`` (the curve is right-continuous, so
    that age is where the step down happens).
    """
    below = np.flatnonzero(np.asarray(survival, float) <= q)
    return float(np.asarray(ages, float)[below[0]]) if len(below) else float("nan")
