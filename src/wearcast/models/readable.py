"""A readable view of any fitted model: one shallow tree fitted to its log risk.

:func:`explain_with_shallow_tree` fits one regression tree (depth 1 to 3) to
the model's log risk scores on a table's rows and prints each leaf as a rule a
planner can read::

    running_hours_per_day > 14.2 and seal_type = packed_gland -> high risk
        (x2.3 the fleet median; share of fleet 12 %)

Beside the rules it prints the *agreement*: Harrell's C of the shallow tree's
scores against the model's own ranking (the model's scores play the part of
the outcome: among row pairs the model orders, the share the summary orders the
same way, summary ties counting one half). It is a summary, not the model:
rankings and probabilities always come from the full model.

Categorical covariates appear as ``name = level`` / ``name != level``; numeric
thresholds are shown to three significant figures; "(or missing)" marks the
side rows with a missing value take. Risk levels compare the leaf's mean log
score with the median over the rows: ``high`` when at least 1.5 times the
median risk, ``low`` when at most 1/1.5 of it, ``average`` otherwise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from sklearn.tree import DecisionTreeRegressor

from wearcast.exceptions import ConfigError, ModelError
from wearcast.models._forest_encode import encode, encoded_names, learn_levels

HIGH_RATIO = 1.5


@dataclass(frozen=True)
class ReadableRule:
    """One leaf: ``conditions`` (text, joined by "and"), ``level`` ("high risk",
    "average risk", "low risk"), ``relative_risk`` (leaf risk / median risk),
    ``share`` (share of the rows given) and ``n_rows``."""

    conditions: tuple[str, ...]
    level: str
    relative_risk: float
    share: float
    n_rows: int

    def text(self) -> str:
        when = " and ".join(self.conditions) if self.conditions else "every unit"
        return (f"{when} -> {self.level} (x{self.relative_risk:.3g} the fleet median; "
                f"share of fleet {100 * self.share:.0f} %)")


@dataclass(frozen=True)
class ReadableTree:
    """Rules (riskiest first), the agreement C with the model, and the leaf of each row."""

    rules: tuple[ReadableRule, ...]
    agreement: float
    depth: int
    model_name: str
    row_rule: np.ndarray  # (n_rows,) index into rules for each row of the table given

    def text(self) -> str:
        lines = [
            f"Readable summary of the {self.model_name} model: a depth-{self.depth} tree fitted to its log risk "
            "scores. It is a summary, not the model; rankings and probabilities come from the full model.",
            f"Agreement with the model's ranking: C = {self.agreement:.3f} (share of unit pairs the summary "
            "orders as the model does; ties in the summary count half).",
        ]
        lines += [f"{k + 1:>2}. {rule.text()}" for k, rule in enumerate(self.rules)]
        return "\n".join(lines)

    __str__ = text


def explain_with_shallow_tree(model, table, depth: int = 3, min_share: float = 0.02) -> ReadableTree:
    """Fit the readable tree to ``model.risk_score(table.X)`` on every row of ``table``.

    ``model``: any fitted :class:`~wearcast.models.base.SurvivalModel`;
    ``table``: a :class:`~wearcast.LifeTable` (for a fleet view, its
    in-service rows: one row per unit). Positive scores are logged; scores
    with zero or negative values are taken as already on the log scale.
    ``min_share``: smallest share of rows a rule may cover.
    """
    if not 1 <= depth <= 3:
        raise ConfigError(f"readable tree depth {depth} is not allowed; use 1, 2 or 3 so the rules stay readable.")
    if table.n_rows < 2:
        raise ModelError("the readable tree needs at least two rows of units to summarise.")
    score = np.asarray(model.risk_score(table.X), float)
    if not np.isfinite(score).all():
        raise ModelError(f"{getattr(model, 'name', 'model')} gave non-finite risk scores; refit the model.")
    log_score = np.log(score) if (score > 0).all() else score
    covariates = tuple(table.covariates)
    levels = learn_levels(table.X, tuple(table.categorical))
    X = encode(table.X, covariates, levels)
    names = encoded_names(covariates, levels)
    min_rows = max(1, math.ceil(min_share * table.n_rows))
    shallow = DecisionTreeRegressor(max_depth=depth, min_samples_leaf=min_rows, random_state=0)
    shallow.fit(X, log_score)
    leaf_of_row = shallow.apply(X)
    has_missing = np.isnan(X).any(axis=0)
    median = float(np.median(log_score))
    rules, leaf_ids = [], []
    for leaf, conditions in _leaf_conditions(shallow.tree_, names, levels, covariates, has_missing):
        rows = leaf_of_row == leaf
        if not rows.any():
            continue
        ratio = math.exp(float(log_score[rows].mean()) - median)
        level = "high risk" if ratio >= HIGH_RATIO else "low risk" if ratio <= 1 / HIGH_RATIO else "average risk"
        rules.append(ReadableRule(tuple(conditions), level, ratio, float(rows.mean()), int(rows.sum())))
        leaf_ids.append(leaf)
    order = np.argsort([-r.relative_risk for r in rules], kind="stable")
    rules = [rules[k] for k in order]
    leaf_ids = [leaf_ids[k] for k in order]
    position = {leaf: k for k, leaf in enumerate(leaf_ids)}
    row_rule = np.array([position[leaf] for leaf in leaf_of_row], dtype=np.int64)
    agreement = ranking_agreement(log_score, shallow.predict(X))
    return ReadableTree(tuple(rules), agreement, depth, getattr(model, "name", type(model).__name__), row_rule)


def ranking_agreement(reference: np.ndarray, summary: np.ndarray) -> float:
    """Harrell's C of ``summary`` against ``reference`` taken as the outcome ranking.

    Over pairs with different ``reference`` values: share where ``summary`` is
    larger for the larger reference, ties in ``summary`` counting one half.
    ``summary`` must take few distinct values (it is a shallow tree's output):
    cost O(n k² log n) for k distinct values. NaN when all references tie.
    """
    reference = np.asarray(reference, float)
    summary = np.asarray(summary, float)
    values = np.unique(summary)
    groups = [np.sort(reference[summary == v]) for v in values]
    concordant = discordant = tied = 0.0
    for a, high in enumerate(groups):
        for low in groups[:a]:  # summary says high > low
            below = np.searchsorted(low, high, side="left").sum()
            above = (len(low) - np.searchsorted(low, high, side="right")).sum()
            concordant += below
            discordant += above
        _, counts = np.unique(high, return_counts=True)
        tied += len(high) * (len(high) - 1) / 2 - (counts * (counts - 1) / 2).sum()
    total = concordant + discordant + tied
    return float((concordant + 0.5 * tied) / total) if total > 0 else float("nan")


def _leaf_conditions(tree, names, levels, covariates, has_missing):
    """Yield ``(leaf node id, [condition text, ...])`` for every leaf, left to right."""
    column_of = {}
    for col in covariates:
        if col in levels:
            for level in levels[col]:
                column_of[f"{col}={level}"] = (col, level)

    def walk(node, path):
        if tree.children_left[node] < 0:
            yield node, _describe(path, column_of, has_missing)
            return
        step = (names[tree.feature[node]], tree.feature[node], float(tree.threshold[node]),
                bool(tree.missing_go_to_left[node]))
        yield from walk(tree.children_left[node], path + [(step, "left")])
        yield from walk(tree.children_right[node], path + [(step, "right")])

    yield from walk(0, [])


def _describe(path, column_of, has_missing) -> list[str]:
    """Merge the splits on one path into one condition per covariate."""
    numeric: dict[str, list] = {}  # name -> [low, high, missing_always_here]
    equal: dict[str, str] = {}
    not_equal: dict[str, list[str]] = {}
    order: list[str] = []
    for (name, feature, threshold, missing_left), side in path:
        missing_here = bool(has_missing[feature]) and (missing_left == (side == "left"))
        if name in column_of:
            col, level = column_of[name]
            if col not in order:
                order.append(col)
            if side == "right":
                equal[col] = level
            else:
                not_equal.setdefault(col, []).append(level)
            continue
        if name not in order:
            order.append(name)
        bounds = numeric.setdefault(name, [-math.inf, math.inf, True])
        if side == "left":
            bounds[1] = min(bounds[1], threshold)
        else:
            bounds[0] = max(bounds[0], threshold)
        bounds[2] = bounds[2] and missing_here
    out = []
    for name in order:
        if name in equal:
            out.append(f"{name} = {equal[name]}")
        elif name in not_equal:
            out.append(" and ".join(f"{name} != {level}" for level in not_equal[name]))
        else:
            low, high, missing = numeric[name]
            if low > -math.inf and high < math.inf:
                text = f"{low:.3g} < {name} <= {high:.3g}"
            elif low > -math.inf:
                text = f"{name} > {low:.3g}"
            else:
                text = f"{name} <= {high:.3g}"
            out.append(text + (" (or missing)" if missing else ""))
    return out
