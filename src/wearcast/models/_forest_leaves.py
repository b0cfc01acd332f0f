"""Leaf cumulative hazards on a bounded age grid (pure functions on arrays).

Each leaf holds the weighted Nelson–Aalen cumulative hazard of its in-bag rows
with delayed entry (a row is at risk at ``t`` when ``entry < t <= exit``),
evaluated exactly at the grid ages. Memory per tree is
``n_leaves * n_grid`` float32 whatever the number of distinct failure ages.

A leaf with few rows at risk at some age would take a hazard of exactly 0
there (or no hazard at all where none of its rows is at risk), so each leaf's
increments are shrunk toward its tree's pooled Nelson–Aalen increments with
the posterior mean of a beta-process prior (Hjort 1990, "Nonparametric Bayes
estimators based on beta processes in models for life history data", Annals
of Statistics 18(3), eq. 4.2 — recalled from memory)::

    dH_leaf(s) = (c dH_pool(s) + d_leaf(s)) / (c + Y_leaf(s))

with ``c`` the prior's weight in units at risk (``prior_units``; 0 gives the
plain Nelson–Aalen estimator). Where the leaf has many rows at risk the data
dominate; where it has none, the leaf follows its tree.

Between grid ages the forest joins the values linearly (:func:`grid_weights`;
0 at age 0); forests saved before that used a right-continuous step.

Speed: everything that does not depend on a tree's bootstrap draw is located
once per fit in a :class:`RiskIndex` (each row's first and last failure age at
risk); a tree then needs only weighted ``bincount`` and ``cumsum`` calls, no
sort (or one compiled pass over its rows, with numba).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

try:  # numba is a declared dependency; without it the NumPy version is used
    from numba import njit
except ImportError:  # pragma: no cover
    njit = None

#: Largest (leaves x failure ages) block of float64 cells held at once per tree.
MAX_BLOCK_CELLS = 1 << 22


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


@dataclass(frozen=True)
class RiskIndex:
    """Rows placed among the ``D`` distinct failure ages; built once per fit.

    ``first`` (n,) int64: index of the first failure age ``> entry``;
    ``stop`` (n,) int64: number of failure ages ``<= exit``. A row is at risk
    at failure age ``k`` exactly when ``first <= k < stop``. ``fail_rows`` (f,)
    rows that failed and ``fail_at`` (f,) their failure-age index.
    ``grid_at`` (m,) index of the last failure age ``<= grid_k`` (-1 before the first).
    """

    n_ages: int
    first: np.ndarray
    stop: np.ndarray
    fail_rows: np.ndarray
    fail_at: np.ndarray
    grid_at: np.ndarray


def risk_index(entry: np.ndarray, exit: np.ndarray, event: np.ndarray, grid: np.ndarray) -> RiskIndex:
    """Locate rows (``entry``/``exit`` days, ``event`` bool, shape (n,)) among the failure ages."""
    entry = np.asarray(entry, float)
    exit = np.asarray(exit, float)
    event = np.asarray(event, bool)
    ages = np.unique(exit[event])
    fail_rows = np.flatnonzero(event)
    return RiskIndex(
        n_ages=len(ages),
        first=np.searchsorted(ages, entry, side="right"),
        stop=np.searchsorted(ages, exit, side="right"),
        fail_rows=fail_rows,
        fail_at=np.searchsorted(ages, exit[fail_rows], side="left"),
        grid_at=np.searchsorted(ages, np.asarray(grid, float), side="right") - 1,
    )


def pooled_cumulative_hazard(index: RiskIndex, weights: np.ndarray) -> np.ndarray:
    """Weighted Nelson–Aalen with delayed entry of all rows, shape (D + 1,):
    entry ``k`` is the cumulative hazard summed over failure ages ``0..k-1``
    (entry 0 is 0). A row's expected failures are ``H[stop] - H[first]``."""
    D = index.n_ages
    w = np.asarray(weights, float)
    at_risk = np.cumsum(np.bincount(index.first, w, D + 1) - np.bincount(index.stop, w, D + 1))[:D]
    deaths = np.bincount(index.fail_at, w[index.fail_rows], D)
    increment = np.divide(deaths, at_risk, out=np.zeros(D), where=deaths > 0)
    return np.concatenate([[0.0], np.cumsum(increment)])


@dataclass(frozen=True)
class GroupTerms:
    """The at-risk starts and stops of groups of rows sharing one weight (an
    episode's rows share its unit's bootstrap count), with the stop of one row
    and the start of the next row at the same failure-age index cancelled;
    built once per fit. Contiguous rows ``(a, b], (b, c]`` leave two terms.

    ``group`` (t,), ``at`` (t,) failure-age index in 0..D, ``sign`` (t,) float
    net count (+ for starts, - for stops); ``fail_group`` (f,) group of each
    failed row of the index.
    """

    group: np.ndarray
    at: np.ndarray
    sign: np.ndarray
    fail_group: np.ndarray


def group_terms(index: RiskIndex, group_of_row: np.ndarray) -> GroupTerms:
    """Net start/stop terms per group; ``group_of_row`` (n,) int64 group numbers."""
    span = np.int64(index.n_ages + 1)
    group_of_row = np.asarray(group_of_row, np.int64)
    keys = np.concatenate([group_of_row * span + index.first, group_of_row * span + index.stop])
    signs = np.concatenate([np.ones(len(group_of_row)), -np.ones(len(group_of_row))])
    unique, where = np.unique(keys, return_inverse=True)
    net = np.bincount(where.ravel(), signs, len(unique))
    keep = net != 0
    return GroupTerms(unique[keep] // span, unique[keep] % span, net[keep], group_of_row[index.fail_rows])


def pooled_hazard_of_groups(
    index: RiskIndex, terms: GroupTerms, group_weights: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`pooled_cumulative_hazard` from group terms, and each group's expected failures.

    ``group_weights`` (n_groups,) the weight every row of a group carries.
    Returns ``(H, expected)``: ``H`` (D + 1,) as in :func:`pooled_cumulative_hazard`;
    ``expected`` (n_groups,) the sum over the group's rows of ``H[stop] - H[first]``.
    """
    D = index.n_ages
    w = np.asarray(group_weights, float)
    at_risk = np.cumsum(np.bincount(terms.at, terms.sign * w[terms.group], D + 1))[:D]
    deaths = np.bincount(index.fail_at, w[terms.fail_group], D)
    increment = np.divide(deaths, at_risk, out=np.zeros(D), where=deaths > 0)
    H = np.concatenate([[0.0], np.cumsum(increment)])
    expected = -np.bincount(terms.group, terms.sign * H[terms.at], len(w))
    return H, expected


def pooled_increments(index: RiskIndex, weights: np.ndarray) -> np.ndarray:
    """The jumps of :func:`pooled_cumulative_hazard`, shape (D,)."""
    return np.diff(pooled_cumulative_hazard(index, weights))


def _leaf_hazards_loop(first, stop, leaf, w, fail_rows, fail_at, grid_at, n_ages, n_leaves, block,
                       prior, prior_units, out):
    # the NumPy version below, row by row: the same additions in the same order
    m = grid_at.size
    hazard_of_age = np.empty(n_ages)
    for lo in range(0, n_leaves, block):
        hi = min(n_leaves, lo + block)
        starts = np.zeros((hi - lo, n_ages + 1))
        stops = np.zeros((hi - lo, n_ages + 1))
        deaths = np.zeros((hi - lo, n_ages))
        for i in range(leaf.size):
            wi = w[i]
            if wi > 0 and lo <= leaf[i] < hi:
                starts[leaf[i] - lo, first[i]] += wi
                stops[leaf[i] - lo, stop[i]] += wi
        for j in range(fail_rows.size):
            r = fail_rows[j]
            if w[r] > 0 and lo <= leaf[r] < hi:
                deaths[leaf[r] - lo, fail_at[j]] += w[r]
        for a in range(hi - lo):
            at_risk = 0.0
            hazard = 0.0
            for d in range(n_ages):
                at_risk += starts[a, d] - stops[a, d]
                if prior_units > 0:
                    hazard += (deaths[a, d] + prior_units * prior[d]) / (at_risk + prior_units)
                elif deaths[a, d] > 0:
                    hazard += deaths[a, d] / at_risk
                hazard_of_age[d] = hazard
            for g in range(m):
                out[lo + a, g] = hazard_of_age[grid_at[g]] if grid_at[g] >= 0 else 0.0


_leaf_hazards_compiled = njit(cache=True, nogil=True)(_leaf_hazards_loop) if njit is not None else None


def _prior(index: RiskIndex, prior_increments, prior_units: float) -> tuple[np.ndarray, float]:
    if prior_units < 0:
        raise ValueError(f"prior_units must be >= 0; got {prior_units}")
    if prior_units == 0 or prior_increments is None:
        return np.zeros(index.n_ages), 0.0
    prior_increments = np.asarray(prior_increments, float)
    if prior_increments.shape != (index.n_ages,):
        raise ValueError(f"prior_increments must have shape ({index.n_ages},); got {prior_increments.shape}")
    return prior_increments, float(prior_units)


def leaf_hazards_indexed(index: RiskIndex, leaf: np.ndarray, n_leaves: int, weights: np.ndarray,
                         prior_increments: np.ndarray | None = None, prior_units: float = 0.0) -> np.ndarray:
    """Nelson–Aalen with delayed entry per leaf at the grid ages, float32 (n_leaves, m).

    ``leaf`` (n,) leaf number of each row; ``weights`` (n,) case weights (0 =
    not in this tree's sample); ``prior_increments`` (D,) the hazard jumps the
    leaves are shrunk toward with weight ``prior_units`` (module docstring;
    none when 0). Leaves are done in blocks of at most
    ``MAX_BLOCK_CELLS`` (leaf, failure age) cells: at-risk counts are a cumulative
    sum of +w at ``first`` and -w at ``stop`` per leaf. Runs compiled (numba,
    without the GIL, so forest threads run side by side) when numba is
    installed; :func:`leaf_hazards_numpy` is the same in NumPy.
    """
    D, m = index.n_ages, len(index.grid_at)
    out = np.zeros((n_leaves, m), np.float32)
    if D == 0 or m == 0 or n_leaves == 0:
        return out
    if _leaf_hazards_compiled is None:
        return leaf_hazards_numpy(index, leaf, n_leaves, weights, prior_increments, prior_units)
    prior, c = _prior(index, prior_increments, prior_units)
    _leaf_hazards_compiled(index.first, index.stop, np.asarray(leaf, np.int64), np.asarray(weights, float),
                           index.fail_rows, index.fail_at, index.grid_at, D, n_leaves,
                           max(1, MAX_BLOCK_CELLS // (D + 1)), prior, c, out)
    return out


def leaf_hazards_numpy(index: RiskIndex, leaf: np.ndarray, n_leaves: int, weights: np.ndarray,
                       prior_increments: np.ndarray | None = None, prior_units: float = 0.0) -> np.ndarray:
    """:func:`leaf_hazards_indexed` with NumPy only (the reference for the compiled loop)."""
    D, m = index.n_ages, len(index.grid_at)
    out = np.zeros((n_leaves, m), np.float32)
    if D == 0 or m == 0 or n_leaves == 0:
        return out
    prior, c = _prior(index, prior_increments, prior_units)
    w = np.asarray(weights, float)
    leaf = np.asarray(leaf, np.int64)
    used = w > 0
    fail_leaf, fail_w = leaf[index.fail_rows], w[index.fail_rows]
    columns = np.maximum(index.grid_at, 0)
    before = index.grid_at < 0
    block = max(1, MAX_BLOCK_CELLS // (D + 1))
    for lo in range(0, n_leaves, block):
        hi = min(n_leaves, lo + block)
        rows = used if (lo == 0 and hi == n_leaves) else used & (leaf >= lo) & (leaf < hi)
        rows = np.flatnonzero(rows)
        k = hi - lo
        base = (leaf[rows] - lo) * (D + 1)
        cells = k * (D + 1)
        diff = (np.bincount(base + index.first[rows], w[rows], cells)
                - np.bincount(base + index.stop[rows], w[rows], cells))
        at_risk = np.cumsum(diff.reshape(k, D + 1), axis=1)[:, :D]
        in_block = (fail_leaf >= lo) & (fail_leaf < hi) & (fail_w > 0)
        deaths = np.bincount((fail_leaf[in_block] - lo) * D + index.fail_at[in_block], fail_w[in_block], k * D)
        deaths = deaths.reshape(k, D)  # (bincount gives int64 zeros when a block holds no failure)
        if c > 0:
            hazard = np.cumsum((deaths + c * prior) / (at_risk + c), axis=1)
        else:
            hazard = np.cumsum(np.divide(deaths, at_risk, out=np.zeros((k, D)), where=deaths > 0), axis=1)
        values = hazard[:, columns]
        values[:, before] = 0.0
        out[lo:hi] = values
    return out


def leaf_hazards_on_grid(
    leaf: np.ndarray,
    n_leaves: int,
    entry: np.ndarray,
    exit: np.ndarray,
    event: np.ndarray,
    weights: np.ndarray,
    grid: np.ndarray,
    prior_units: float = 0.0,
) -> np.ndarray:
    """Nelson–Aalen with delayed entry per leaf at the grid ages.

    ``leaf`` (n,) leaf number of each row; ``entry``/``exit`` (n,) days;
    ``event`` (n,) bool; ``weights`` (n,) case weights (0 rows are ignored);
    ``grid`` (m,) increasing ages. Returns float32 (n_leaves, m) with
    ``H_leaf(grid_k) = sum over failure ages s <= grid_k of d(s) / Y(s)``,
    ``Y(s)`` the weighted count of the leaf's rows with ``entry < s <= exit``.
    With ``prior_units`` > 0 the leaves are shrunk toward the pooled
    Nelson–Aalen of all the rows. One-off form of
    :func:`leaf_hazards_indexed` (builds the index first).
    """
    keep = np.asarray(weights) > 0
    index = risk_index(np.asarray(entry)[keep], np.asarray(exit)[keep], np.asarray(event, bool)[keep], grid)
    w = np.asarray(weights, float)[keep]
    prior = pooled_increments(index, w) if prior_units > 0 else None
    return leaf_hazards_indexed(index, np.asarray(leaf)[keep], n_leaves, w, prior, prior_units)


def grid_column(grid: np.ndarray, ages: np.ndarray) -> np.ndarray:
    """Column of the last grid age ``<= age`` for each age; -1 before the grid."""
    return np.searchsorted(grid, np.asarray(ages, float), side="right") - 1


def grid_weights(grid: np.ndarray, ages: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Linear interpolation between grid ages: ``H(age) = (1 - f) H[lo] + f H[hi]``.

    Returns ``(lo, hi, f)`` of the shape of ``ages``: column indices into a
    hazard table with a column of zeros prepended at age 0 (so index 0 is age
    0 and grid column ``k`` is index ``k + 1``), and the weight ``f`` in
    [0, 1]. Ages at or past the last grid age take the last column (``f = 0``).
    """
    grid = np.asarray(grid, float)
    knots = np.concatenate([[0.0], grid])
    ages = np.clip(np.asarray(ages, float), 0.0, knots[-1])
    hi = np.clip(np.searchsorted(knots, ages, side="left"), 1, len(knots) - 1)
    lo = hi - 1
    width = knots[hi] - knots[lo]
    f = np.divide(ages - knots[lo], width, out=np.ones(ages.shape), where=width > 0)
    at_end = ages >= knots[-1]
    return np.where(at_end, len(knots) - 1, lo), np.where(at_end, len(knots) - 1, hi), np.where(at_end, 0.0, f)


def leaf_tail_ratio(leaf_hazard: np.ndarray, pooled_on_grid: np.ndarray, from_column: int,
                    to_column: int = -1) -> np.ndarray:
    """Each leaf's hazard relative to its tree's over the ages the tail was fitted on, shape (n_leaves,).

    ``leaf_hazard`` (n_leaves, m) and ``pooled_on_grid`` (m,) cumulative
    hazards on the grid; the ratio is of their rise from grid column
    ``from_column`` (-1: from age 0) to ``to_column`` (the tail's anchor); 1
    where the tree's pooled hazard does not rise there.
    """
    leaf_hazard = np.asarray(leaf_hazard, float)
    start_leaf = leaf_hazard[:, from_column] if from_column >= 0 else 0.0
    start_pool = pooled_on_grid[from_column] if from_column >= 0 else 0.0
    rise = float(pooled_on_grid[to_column] - start_pool)
    if not rise > 0:
        return np.ones(leaf_hazard.shape[0])
    return np.maximum(leaf_hazard[:, to_column] - start_leaf, 0.0) / rise
