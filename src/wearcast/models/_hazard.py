"""Cumulative-hazard kernels with delayed entry (pure functions on arrays).

Risk set at age ``t``: rows with ``entry < t <= exit``. With all risk weights
equal to one the estimator below is Nelson–Aalen; with ``risk = exp(eta)`` it is
Breslow's estimator of the Cox baseline cumulative hazard:

    H0(t) = sum over failure ages s <= t of  d(s) / sum_{i at risk at s} w_i * risk_i

where ``d(s)`` is the (weighted) number of failures at ``s``.
"""

from __future__ import annotations

import numpy as np


def breslow_cumulative_hazard(
    entry: np.ndarray,
    exit: np.ndarray,
    event: np.ndarray,
    risk: np.ndarray | None = None,
    weights: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Cumulative hazard at each distinct failure age.

    Parameters: arrays of shape (n,): ``entry``/``exit`` ages (days),
    ``event`` (bool), ``risk`` (relative risk, default 1), ``weights`` (case
    weights, default 1). Returns ``(ages, cumhaz)``, both shape (k,), ``ages``
    increasing. O(n log n): two sorted cumulative sums, no loop over units.
    """
    entry = np.asarray(entry, float)
    exit = np.asarray(exit, float)
    event = np.asarray(event, bool)
    n = len(exit)
    risk = np.ones(n) if risk is None else np.asarray(risk, float)
    weights = np.ones(n) if weights is None else np.asarray(weights, float)
    wr = weights * risk
    ages = np.unique(exit[event])
    if len(ages) == 0:
        return ages, np.zeros(0)
    # sum of w*r over rows with exit >= t  minus rows with entry >= t
    order_exit = np.argsort(exit, kind="mergesort")
    exit_sorted = exit[order_exit]
    tail_exit = np.concatenate([np.cumsum(wr[order_exit][::-1])[::-1], [0.0]])
    order_entry = np.argsort(entry, kind="mergesort")
    entry_sorted = entry[order_entry]
    tail_entry = np.concatenate([np.cumsum(wr[order_entry][::-1])[::-1], [0.0]])
    at_risk = (
        tail_exit[np.searchsorted(exit_sorted, ages, side="left")]
        - tail_entry[np.searchsorted(entry_sorted, ages, side="left")]
    )
    deaths = np.bincount(
        np.searchsorted(ages, exit[event]), weights=weights[event], minlength=len(ages)
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        increments = np.where(at_risk > 0, deaths / np.where(at_risk > 0, at_risk, 1.0), 0.0)
    return ages, np.cumsum(increments)


def step_at(ages: np.ndarray, cumhaz: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Evaluate a right-continuous step function (0 before the first age)."""
    idx = np.searchsorted(np.asarray(ages, float), np.asarray(query, float), side="right")
    padded = np.concatenate([[0.0], np.asarray(cumhaz, float)])
    return padded[idx]


def linear_at(ages: np.ndarray, cumhaz: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Cumulative hazard joined linearly between failure ages: 0 at age 0, equal
    to the step function at every failure age, flat after the last one.

    The step estimate puts all hazard on the observed failure ages, so the
    probability of failing within a short window that holds no past failure age
    would be exactly zero. Spreading each jump evenly over the gap before it is
    the usual remedy (a piecewise-constant hazard between failure ages).
    """
    knots = np.concatenate([[0.0], np.asarray(ages, float)])
    values = np.concatenate([[0.0], np.asarray(cumhaz, float)])
    q = np.asarray(query, float)
    return np.where(q <= 0, 0.0, np.interp(q, knots, values))
