"""Concordance counting with delayed entry (pure functions on arrays).

A pair ``(i, j)`` is *comparable* when ``i`` failed at ``t_i`` and ``j`` was in
the risk set at ``t_i`` (``entry_j < t_i <= exit_j``) without failing at
``t_i`` itself. Without delayed entry this is exactly the pair set of Harrell's
C as scikit-survival counts it (``t_j > t_i``, or ``t_j == t_i`` with ``j``
censored). The pair is concordant when ``risk_i > risk_j``; equal risks count
one half.

For every failure the counts "rows at risk with a lower / equal risk" are 2-D
dominance counts. Because ``entry_j >= t`` implies ``exit_j >= t``, the risk
set is a difference of two nested sets::

    #{entry_j < t <= exit_j, r_j < r} = #{exit_j >= t, r_j < r} - #{entry_j >= t, r_j < r}

and each term is answered for all failures at once by a merge-sort tree built
with ``numpy.sort`` level by level: O(n log² n) time, O(n) memory per level.
"""

from __future__ import annotations

import numpy as np


def count_points_below(
    point_x: np.ndarray,
    point_y: np.ndarray,
    query_x: np.ndarray,
    query_y: np.ndarray,
    *,
    strict_x: bool = False,
) -> np.ndarray:
    """For each query ``q``: ``#{j : x_j >= qx, y_j < qy}`` (``x_j > qx`` if ``strict_x``).

    ``point_y`` and ``query_y`` are non-negative integers (ranks); ``point_x``
    and ``query_x`` floats. Shapes: points (n,), queries (m,). Returns int64 (m,).
    """
    point_x = np.asarray(point_x, float)
    point_y = np.asarray(point_y, np.int64)
    query_x = np.asarray(query_x, float)
    query_y = np.asarray(query_y, np.int64)
    n = len(point_x)
    if n == 0 or len(query_x) == 0:
        return np.zeros(len(query_x), dtype=np.int64)
    order = np.argsort(point_x, kind="mergesort")
    x_sorted = point_x[order]
    y_by_x = point_y[order]
    # points *excluded* by the x condition form a prefix of the x-sorted order
    prefix = np.searchsorted(x_sorted, query_x, side="right" if strict_x else "left").astype(np.int64)
    total_below = np.searchsorted(np.sort(y_by_x), query_y, side="left").astype(np.int64)
    return total_below - _prefix_count_below(y_by_x, prefix, query_y)


def _prefix_count_below(values: np.ndarray, prefix: np.ndarray, threshold: np.ndarray) -> np.ndarray:
    """``#{k < prefix_q : values_k < threshold_q}`` for every query (merge-sort tree).

    The prefix ``[0, p)`` splits into at most one aligned block of size ``2**L``
    per bit ``L`` of ``p``. At level ``L`` every block is sorted by giving each
    value the key ``block * span + value`` and sorting once; one
    ``searchsorted`` then counts inside the block for all queries together.
    """
    n = len(values)
    span = np.int64(max(int(values.max(initial=0)), int(threshold.max(initial=0))) + 1)
    positions = np.arange(n, dtype=np.int64)
    counts = np.zeros(len(prefix), dtype=np.int64)
    level = 0
    while (1 << level) <= n:
        size = np.int64(1 << level)
        uses_block = ((prefix >> level) & 1).astype(bool)
        if uses_block.any():
            keys = np.sort((positions >> level) * span + values)
            block = (prefix[uses_block] >> (level + 1)) << 1  # aligned block index at this level
            found = np.searchsorted(keys, block * span + threshold[uses_block], side="left")
            counts[uses_block] += found - block * size
        level += 1
    return counts


def truncated_concordance_counts(
    entry: np.ndarray, exit: np.ndarray, event: np.ndarray, risk: np.ndarray
) -> dict:
    """Concordant, discordant and tied-risk pair counts with delayed entry.

    Arrays of shape (n,): ``entry``/``exit`` ages (days), ``event`` (bool),
    ``risk`` (higher = expected to fail sooner). Risks are tied only when equal.
    Returns a dict with ``concordant``, ``discordant``, ``tied_risk``,
    ``comparable`` (int) and ``c`` (float; NaN when no pair is comparable).
    """
    entry = np.asarray(entry, float)
    exit = np.asarray(exit, float)
    event = np.asarray(event, bool)
    risk = np.asarray(risk, float)
    if not (len(entry) == len(exit) == len(event) == len(risk)):
        raise ValueError("entry, exit, event and risk must have the same length")
    if np.isnan(risk).any():
        raise ValueError("risk scores contain NaN; score every row before computing concordance")
    _, rank = np.unique(risk, return_inverse=True)
    rank = rank.astype(np.int64).ravel()
    top = np.int64(rank.max(initial=-1) + 1)
    fail_time = exit[event]
    fail_rank = rank[event]
    m = len(fail_time)
    # three thresholds per failure: below, below-or-equal, everything
    q_x = np.tile(fail_time, 3)
    q_y = np.concatenate([fail_rank, fail_rank + 1, np.full(m, top)])
    at_exit = count_points_below(exit, rank, q_x, q_y)
    entered_later = count_points_below(entry, rank, q_x, q_y)
    # failures at exactly t (including i itself) are not comparable with i
    ev_x, ev_y = exit[event], rank[event]
    tied_fail = count_points_below(ev_x, ev_y, q_x, q_y) - count_points_below(ev_x, ev_y, q_x, q_y, strict_x=True)
    counts = (at_exit - entered_later - tied_fail).reshape(3, m)
    below, below_or_equal, comparable = counts.sum(axis=1)
    concordant = int(below)
    tied = int(below_or_equal - below)
    comparable = int(comparable)
    discordant = comparable - concordant - tied
    c = (concordant + 0.5 * tied) / comparable if comparable > 0 else float("nan")
    return {
        "c": float(c),
        "concordant": concordant,
        "discordant": int(discordant),
        "tied_risk": tied,
        "comparable": comparable,
    }
