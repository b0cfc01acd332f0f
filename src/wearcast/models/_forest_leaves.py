"""Leaf cumulative hazards on a bounded age grid (pure functions on arrays).

Each leaf holds the weighted Nelson–Aalen cumulative hazard of its in-bag rows
with delayed entry (a row is at risk at ``t`` when ``entry < t <= exit``),
evaluated exactly at the grid ages. Memory per tree is
``n_leaves * n_grid`` float32 whatever the number of distinct failure ages.

Between grid ages the forest uses a right-continuous step: ``H(t)`` is the
value at the last grid age ``<= t`` (0 before the first grid age, the last
value after the last). With the grid equal to all distinct failure ages this
is the exact Nelson–Aalen step function.
"""

from __future__ import annotations

import numpy as np


def failure_age_grid(exit: np.ndarray, event: np.ndarray, max_points: int) -> np.ndarray:
    """Grid ages (days), shape (m,), increasing, ``m <= max_points``.

    All distinct failure ages when there are at most ``max_points`` of them;
    otherwise ``max_points`` quantiles of the failure ages (first and last
    failure age included), duplicates removed.
    """
    failures = np.unique(np.asarray(exit, float)[np.asarray(event, bool)])
    if len(failures) <= max_points:
        return failures
    probs = np.linspace(0.0, 1.0, max_points)
    grid = np.quantile(np.asarray(exit, float)[np.asarray(event, bool)], probs, method="inverted_cdf")
    return np.unique(grid)


def leaf_hazards_on_grid(
    leaf: np.ndarray,
    n_leaves: int,
    entry: np.ndarray,
    exit: np.ndarray,
    event: np.ndarray,
    weights: np.ndarray,
    grid: np.ndarray,
) -> np.ndarray:
    """Nelson–Aalen with delayed entry per leaf at the grid ages.

    ``leaf`` (n,) leaf number of each row; ``entry``/``exit`` (n,) days;
    ``event`` (n,) bool; ``weights`` (n,) case weights (0 rows are ignored);
    ``grid`` (m,) increasing ages. Returns float32 (n_leaves, m) with
    ``H_leaf(grid_k) = sum over failure ages s <= grid_k of d(s) / Y(s)``,
    ``Y(s)`` the weighted count of the leaf's rows with ``entry < s <= exit``.
    All leaves at once: at-risk counts come from searchsorted on
    (leaf, age-rank) keys, no loop over leaves.
    """
    keep = np.asarray(weights) > 0
    leaf = np.asarray(leaf, np.int64)[keep]
    entry = np.asarray(entry, float)[keep]
    exit = np.asarray(exit, float)[keep]
    event = np.asarray(event, bool)[keep]
    w = np.asarray(weights, float)[keep]
    out = np.zeros((n_leaves, len(grid)), dtype=np.float64)
    if not event.any() or len(grid) == 0:
        return out.astype(np.float32)
    ages = np.unique(np.concatenate([entry, exit]))
    span = len(ages) + 1
    entry_key = leaf * span + np.searchsorted(ages, entry)
    exit_key = leaf * span + np.searchsorted(ages, exit)
    fail_key = exit_key[event]
    # weighted count of rows with exit key >= (leaf, s) minus rows with entry
    # key >= (leaf, s): rows of later leaves appear in both and cancel, rows of
    # earlier leaves in neither, leaving the leaf's rows with entry < s <= exit
    at_risk = _tail_sum(exit_key, w, fail_key) - _tail_sum(entry_key, w, fail_key)
    increment = w[event] / np.where(at_risk > 0, at_risk, np.inf)
    # a failure at s adds to every grid age >= s
    column = np.searchsorted(grid, exit[event], side="left")
    inside = column < len(grid)
    np.add.at(out, (leaf[event][inside], column[inside]), increment[inside])
    return np.cumsum(out, axis=1).astype(np.float32)


def _tail_sum(keys: np.ndarray, w: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Sum of ``w`` over keys ``>= query``, shape of ``query``."""
    order = np.argsort(keys, kind="mergesort")
    tail = np.concatenate([np.cumsum(w[order][::-1])[::-1], [0.0]])
    return tail[np.searchsorted(keys[order], query, side="left")]


def grid_column(grid: np.ndarray, ages: np.ndarray) -> np.ndarray:
    """Column of the last grid age ``<= age`` for each age; -1 before the grid."""
    return np.searchsorted(grid, np.asarray(ages, float), side="right") - 1
