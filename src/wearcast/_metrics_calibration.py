"""Kernels for horizon calibration (pure functions on arrays).

Observed failure shares within a horizon come from the product-limit
(Kaplan–Meier) estimator with delayed entry, on the time scale "days since the
prediction age". Its hazard increments ``d(s) / n(s)`` are the Nelson–Aalen
increments of :func:`wearcast.models._hazard.breslow_cumulative_hazard` with
unit risks, so the risk-set rule (``entry < t <= exit``) is shared with the
models.
"""

from __future__ import annotations

import numpy as np

from wearcast.models._hazard import breslow_cumulative_hazard


def failure_share_within(entry: np.ndarray, exit: np.ndarray, event: np.ndarray, horizon_days: float) -> float:
    """``1 - S_KM(horizon)`` with delayed entry; times in days since the prediction age.

    Arrays of shape (n,). Rows with ``exit <= 0`` never enter. Returns NaN for
    an empty group. The estimate stays flat after the last follow-up (the usual
    product-limit convention), so heavily censored groups are uncertain.
    """
    entry = np.maximum(np.asarray(entry, float), 0.0)
    exit = np.asarray(exit, float)
    event = np.asarray(event, bool)
    keep = exit > entry
    if not keep.any():
        return float("nan")
    ages, cumhaz = breslow_cumulative_hazard(entry[keep], exit[keep], event[keep])
    if len(ages) == 0:
        return 0.0
    increments = np.diff(np.concatenate([[0.0], cumhaz]))
    within = ages <= horizon_days
    return float(1.0 - np.prod(1.0 - np.clip(increments[within], 0.0, 1.0)))


def equal_count_groups(predicted: np.ndarray, groups: int) -> np.ndarray:
    """Group label 0..groups-1 per row, by rank of ``predicted`` (ties broken by position)."""
    predicted = np.asarray(predicted, float)
    n = len(predicted)
    groups = max(1, min(int(groups), n))
    order = np.argsort(predicted, kind="mergesort")
    labels = np.empty(n, dtype=np.int64)
    labels[order] = (np.arange(n) * groups) // max(n, 1)
    return labels


def weighted_line(x: np.ndarray, y: np.ndarray, weights: np.ndarray) -> tuple[float, float]:
    """Weighted least-squares ``y = intercept + slope * x``; NaNs when x has no spread."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    w = np.asarray(weights, float)
    ok = np.isfinite(x) & np.isfinite(y) & (w > 0)
    x, y, w = x[ok], y[ok], w[ok]
    if len(x) < 2:
        return float("nan"), float("nan")
    xm = np.average(x, weights=w)
    ym = np.average(y, weights=w)
    sxx = np.sum(w * (x - xm) ** 2)
    if sxx <= 1e-15 * max(1.0, np.sum(w)):
        return float("nan"), float("nan")
    slope = np.sum(w * (x - xm) * (y - ym)) / sxx
    return float(ym - slope * xm), float(slope)
