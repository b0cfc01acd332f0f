"""Growing one survival tree (pure functions on arrays).

Split rule: least-squares regression splits on the martingale residuals of the
delayed-entry null model (Therneau, Grambsch and Fleming 1990, Biometrika
77:147–160; LeBlanc and Crowley 1992, JASA 87:457–467 use the same one-step
idea for relative-risk trees)::

    M_i = failed_i - (H0(exit_i) - H0(entry_i))

with ``H0`` the weighted Nelson–Aalen estimate with delayed entry on the tree's
bootstrap sample. A row's residual is observed minus expected failures over its
own ``(entry, exit]`` interval, so a late-entering unit is only charged for the
ages it was watched. The regression tree is scikit-learn's compiled
``DecisionTreeRegressor`` (``max_features`` gives the √p random subset).

Minimum failures per leaf: the regressor is first limited by
``min_samples_leaf = ceil(min_events / failure share of rows)`` (the row count
that holds ``min_events`` failures on average), then every split is checked
top-down: a split is kept only when each side holds at least ``min_events``
weighted failures; otherwise the node becomes a leaf and everything below it
is cut.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from sklearn.tree import DecisionTreeRegressor

from wearcast.models._hazard import breslow_cumulative_hazard, step_at


def martingale_residuals(
    entry: np.ndarray, exit: np.ndarray, event: np.ndarray, weights: np.ndarray | None = None
) -> np.ndarray:
    """``event - (H0(exit) - H0(entry))`` per row, shape (n,).

    ``H0`` is the (weighted) Nelson–Aalen cumulative hazard with delayed entry.
    """
    ages, cumhaz = breslow_cumulative_hazard(entry, exit, event, weights=weights)
    expected = step_at(ages, cumhaz, exit) - step_at(ages, cumhaz, entry)
    return np.asarray(event, float) - expected


@dataclass(frozen=True)
class FlatTree:
    """A grown tree as arrays, one entry per node (shape (n_nodes,)).

    ``feature`` (int32, -1 at a leaf), ``threshold`` (float64: go left when
    ``x <= threshold``), ``left``/``right`` (int32 child node, -1 at a leaf),
    ``missing_left`` (bool: a missing value goes left), ``leaf`` (int32 leaf
    number 0..n_leaves-1, -1 at an internal node).
    """

    feature: np.ndarray
    threshold: np.ndarray
    left: np.ndarray
    right: np.ndarray
    missing_left: np.ndarray
    leaf: np.ndarray

    @property
    def n_leaves(self) -> int:
        return int((self.leaf >= 0).sum())


def episodes(
    unit_codes: np.ndarray, life: np.ndarray, exit: np.ndarray, event: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Group rows into episodes: the rows of one unit's life up to and including
    a failure (a life under repair holds several episodes).

    Returns ``(episode, last_row)``: ``episode`` (n,) int64 episode number of
    each row; ``last_row`` (n_episodes,) the row closing each episode (its
    failure, or the life's last row). Every failure closes an episode, so a
    tree grown on the closing rows keeps each failure with its episode.
    """
    order = np.lexsort((exit, life, unit_codes))
    u, l, ev = unit_codes[order], life[order], np.asarray(event, bool)[order]
    starts = np.ones(len(order), bool)
    starts[1:] = (u[1:] != u[:-1]) | (l[1:] != l[:-1]) | ev[:-1]
    episode = np.empty(len(order), np.int64)
    episode[order] = np.cumsum(starts) - 1
    closes = np.ones(len(order), bool)
    closes[:-1] = starts[1:]
    return episode, order[closes]


def grow_on_points(
    X: np.ndarray,
    residual: np.ndarray,
    weights: np.ndarray,
    events: np.ndarray,
    *,
    max_features,
    max_depth: int,
    min_events: int,
    random_state: int,
):
    """Grow one pruned tree on growing points (rows or episodes) with positive weight.

    ``X`` float32 (k, p) covariates of the points; ``residual`` (k,) their
    martingale residuals (summed over an episode's rows); ``weights`` (k,)
    bootstrap multiplicities; ``events`` (k,) failures per point (unweighted).
    Returns ``(tree, regressor, node_to_leaf)``: the flattened pruned tree, the
    fitted scikit-learn regressor (None for a single leaf) and, per regressor
    node, the pruned tree's leaf that covers it (used to route many rows with
    the regressor's compiled ``apply``).
    """
    failure_share = max(float(np.average(events, weights=weights)), 1e-12)
    min_rows = max(1, min(len(weights), math.ceil(min_events / failure_share)))
    if max_depth <= 0 or events.sum() == 0 or X.shape[1] == 0:
        return _single_leaf(), None, np.zeros(1, np.int64)
    regressor = DecisionTreeRegressor(
        max_depth=max_depth,
        min_samples_leaf=min_rows,
        max_features=max_features,
        random_state=random_state,
    )
    regressor.fit(X, residual, sample_weight=weights)
    tree, node_to_leaf = prune_by_events(regressor.tree_, regressor.apply(X), events * weights, min_events)
    return tree, regressor, node_to_leaf


def route(regressor, node_to_leaf: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Pruned-tree leaf (n,) of each row of ``X`` (float32 (n, p), C order) via the
    regressor's compiled ``apply``; gives the same leaves as :func:`apply_tree`."""
    if regressor is None:
        return np.zeros(len(X), np.int64)
    return node_to_leaf[regressor.apply(X, check_input=False)]


def grow_tree(
    X: np.ndarray,
    entry: np.ndarray,
    exit: np.ndarray,
    event: np.ndarray,
    weights: np.ndarray,
    *,
    max_features,
    max_depth: int,
    min_events: int,
    random_state: int,
) -> FlatTree:
    """Grow one tree on the rows with positive weight (each row its own growing point).

    ``X`` float32 (n, p); ``entry``/``exit`` days (n,); ``event`` bool (n,);
    ``weights`` (n,) bootstrap multiplicities (0 = out of bag). Returns the
    pruned, flattened tree.
    """
    rows = np.flatnonzero(weights > 0)
    w_in, ev_in = weights[rows].astype(float), np.asarray(event, bool)[rows]
    residual = martingale_residuals(entry[rows], exit[rows], ev_in, w_in)
    return grow_on_points(np.ascontiguousarray(X[rows], np.float32), residual, w_in, ev_in.astype(float),
                          max_features=max_features, max_depth=max_depth, min_events=min_events,
                          random_state=random_state)[0]


def _single_leaf() -> FlatTree:
    return FlatTree(
        feature=np.array([-1], np.int32), threshold=np.array([0.0]),
        left=np.array([-1], np.int32), right=np.array([-1], np.int32),
        missing_left=np.array([False]), leaf=np.array([0], np.int32),
    )


def prune_by_events(tree, node_of_row: np.ndarray, row_events: np.ndarray,
                    min_events: float) -> tuple[FlatTree, np.ndarray]:
    """Cut splits leaving fewer than ``min_events`` failures on a side; flatten.

    ``tree`` is a fitted scikit-learn ``Tree``; ``node_of_row`` (n,) the leaf
    each in-bag row reached; ``row_events`` (n,) weighted failures per row.
    Returns the flat tree and ``node_to_leaf`` (n_nodes,) int64: the pruned
    leaf covering each scikit-learn node.
    """
    left, right = tree.children_left, tree.children_right
    n_nodes = tree.node_count
    events = np.bincount(node_of_row, weights=row_events, minlength=n_nodes)
    # children have larger ids than parents in scikit-learn's depth-first build,
    # so one reverse pass adds each subtree's failures into its root
    for node in range(n_nodes - 1, -1, -1):
        if left[node] >= 0:
            events[node] = events[left[node]] + events[right[node]]
    node_to_leaf = np.full(n_nodes, -1, np.int64)
    new_feature, new_threshold, new_left, new_right, new_missing, new_leaf = [], [], [], [], [], []
    n_leaves = 0
    stack = [(0, -1, False)]  # (old node, new parent, is right child)
    while stack:
        old, parent, is_right = stack.pop()
        new = len(new_feature)
        if parent >= 0:
            (new_right if is_right else new_left)[parent] = new
        keep_split = left[old] >= 0 and min(events[left[old]], events[right[old]]) >= min_events
        if keep_split:
            new_feature.append(int(tree.feature[old]))
            new_threshold.append(float(tree.threshold[old]))
            new_missing.append(bool(tree.missing_go_to_left[old]))
            new_leaf.append(-1)
            new_left.append(-1)
            new_right.append(-1)
            stack.append((right[old], new, True))
            stack.append((left[old], new, False))
        else:
            new_feature.append(-1)
            new_threshold.append(0.0)
            new_missing.append(False)
            new_leaf.append(n_leaves)
            new_left.append(-1)
            new_right.append(-1)
            node_to_leaf[old] = n_leaves
            n_leaves += 1
    # nodes below a cut inherit their cut ancestor's leaf (parents precede children)
    for node in range(n_nodes):
        if node_to_leaf[node] >= 0 and left[node] >= 0:
            node_to_leaf[left[node]] = node_to_leaf[right[node]] = node_to_leaf[node]
    flat = FlatTree(
        feature=np.array(new_feature, np.int32), threshold=np.array(new_threshold, np.float64),
        left=np.array(new_left, np.int32), right=np.array(new_right, np.int32),
        missing_left=np.array(new_missing, bool), leaf=np.array(new_leaf, np.int32),
    )
    return flat, node_to_leaf


def apply_tree(tree: FlatTree, X: np.ndarray) -> np.ndarray:
    """Leaf number (0..n_leaves-1) each row of ``X`` (n, p) reaches, shape (n,).

    Vectorized: all rows step down one level at a time.
    """
    node = np.zeros(len(X), dtype=np.int32)
    active = np.flatnonzero(tree.left[node] >= 0)
    while len(active):
        current = node[active]
        x = X[active, tree.feature[current]]
        go_left = np.where(np.isnan(x), tree.missing_left[current], x <= tree.threshold[current])
        node[active] = np.where(go_left, tree.left[current], tree.right[current])
        active = active[tree.left[node[active]] >= 0]
    return tree.leaf[node]
