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
    """Grow one tree on the rows with positive weight.

    ``X`` float32 (n, p); ``entry``/``exit`` days (n,); ``event`` bool (n,);
    ``weights`` (n,) bootstrap multiplicities (0 = out of bag). Returns the
    pruned, flattened tree.
    """
    rows = np.flatnonzero(weights > 0)
    X_in, w_in, ev_in = X[rows], weights[rows].astype(float), event[rows]
    residual = martingale_residuals(entry[rows], exit[rows], ev_in, w_in)
    failure_share = max(float(np.average(ev_in, weights=w_in)), 1e-12)
    min_rows = max(1, min(len(rows), math.ceil(min_events / failure_share)))
    if max_depth <= 0 or ev_in.sum() == 0 or X.shape[1] == 0:
        return _single_leaf()
    regressor = DecisionTreeRegressor(
        max_depth=max_depth,
        min_samples_leaf=min_rows,
        max_features=max_features,
        random_state=random_state,
    )
    regressor.fit(X_in, residual, sample_weight=w_in)
    return prune_by_events(regressor.tree_, regressor.apply(X_in), ev_in * w_in, min_events)


def _single_leaf() -> FlatTree:
    return FlatTree(
        feature=np.array([-1], np.int32), threshold=np.array([0.0]),
        left=np.array([-1], np.int32), right=np.array([-1], np.int32),
        missing_left=np.array([False]), leaf=np.array([0], np.int32),
    )


def prune_by_events(tree, node_of_row: np.ndarray, row_events: np.ndarray, min_events: float) -> FlatTree:
    """Cut splits leaving fewer than ``min_events`` failures on a side; flatten.

    ``tree`` is a fitted scikit-learn ``Tree``; ``node_of_row`` (n,) the leaf
    each in-bag row reached; ``row_events`` (n,) weighted failures per row.
    """
    left, right = tree.children_left, tree.children_right
    n_nodes = tree.node_count
    events = np.bincount(node_of_row, weights=row_events, minlength=n_nodes)
    # children have larger ids than parents in scikit-learn's depth-first build,
    # so one reverse pass adds each subtree's failures into its root
    for node in range(n_nodes - 1, -1, -1):
        if left[node] >= 0:
            events[node] = events[left[node]] + events[right[node]]
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
            n_leaves += 1
    return FlatTree(
        feature=np.array(new_feature, np.int32), threshold=np.array(new_threshold, np.float64),
        left=np.array(new_left, np.int32), right=np.array(new_right, np.int32),
        missing_left=np.array(new_missing, bool), leaf=np.array(new_leaf, np.int32),
    )


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
