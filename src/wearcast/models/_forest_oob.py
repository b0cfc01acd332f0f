"""Bootstrap draws and out-of-bag (OOB) bookkeeping (pure functions on arrays).

A tree's bootstrap is regenerated from its seed, so the fitted forest needs
no (n_trees, n_units) in-bag matrix: :func:`bootstrap_draw` called with the
same seed gives the same counts.

OOB risk of a life = average, over only the trees whose bootstrap did not draw
its unit, of the tree's risk at the life's last row (risk = the leaf's
cumulative hazard summed over the grid ages). OOB concordance is Harrell's C
on (last exit age, failed at last exit, OOB risk), counted by wearcast's
O(n log² n) concordance kernel (:mod:`wearcast._metrics_concordance`, with no
entry ages): the pairs and counts of scikit-survival's
``concordance_index_censored`` except that risks tie only when exactly equal
(scikit-survival: within 1e-8). It ignores delayed entry in the pairing, like
the peer libraries' OOB scores. Above ``MAX_SCORED_LIVES`` lives it is
computed on a fixed random subset of that many lives (drawn from the forest's
seed) to bound the cost of the checkpoints.
"""

from __future__ import annotations

import numpy as np
from sksurv.metrics import concordance_index_censored

from wearcast._metrics_concordance import truncated_concordance_counts
from wearcast.lifetable import unit_draw

MAX_SCORED_LIVES = 10_000


def bootstrap_draw(seed: int, n_units: int) -> tuple[np.ndarray, int]:
    """``(counts, tree_seed)`` for one tree.

    ``counts`` (n_units,) int32: how many times each unit was drawn (n_units
    draws with replacement; 0 = out of bag). ``tree_seed`` seeds the tree's
    random predictor subsets.
    """
    rng = np.random.default_rng(seed)
    counts = unit_draw(n_units, rng).astype(np.int32)
    return counts, int(rng.integers(0, 2**31 - 1))


def last_rows_of_lives(unit_codes: np.ndarray, life: np.ndarray, exit: np.ndarray) -> np.ndarray:
    """Row position of each (unit, life)'s last interval, shape (n_lives,)."""
    order = np.lexsort((exit, life, unit_codes))
    u, l = unit_codes[order], life[order]
    last = np.ones(len(order), bool)
    last[:-1] = (u[1:] != u[:-1]) | (l[1:] != l[:-1])
    return np.sort(order[last])


def checkpoints(n_trees: int, n_points: int = 10) -> np.ndarray:
    """Tree counts (1..n_trees, increasing, n_trees included) where OOB C is recorded."""
    points = np.unique(np.round(np.geomspace(1, max(n_trees, 1), n_points)).astype(int))
    return points[(points >= 1) & (points <= n_trees)]


def harrell_c(event: np.ndarray, time: np.ndarray, risk: np.ndarray) -> float:
    """Harrell's C (scikit-survival); NaN when no pair can be compared."""
    scored = np.isfinite(risk)
    if scored.sum() < 2 or not np.asarray(event, bool)[scored].any():
        return float("nan")
    try:
        return float(concordance_index_censored(
            np.asarray(event, bool)[scored], np.asarray(time, float)[scored], np.asarray(risk, float)[scored]
        )[0])
    except ValueError:  # no comparable pairs
        return float("nan")


def fast_harrell_c(event: np.ndarray, time: np.ndarray, risk: np.ndarray) -> float:
    """Harrell's C over the lives with a finite risk, shape (n,) each; NaN when no
    pair can be compared. Risks tie only when exactly equal."""
    scored = np.isfinite(risk)
    event, time = np.asarray(event, bool)[scored], np.asarray(time, float)[scored]
    if len(time) < 2 or not event.any():
        return float("nan")
    return truncated_concordance_counts(np.full(len(time), -np.inf), time, event, np.asarray(risk, float)[scored])["c"]


class OOBAccumulator:
    """Running OOB sums for the lives, with the C-versus-trees curve.

    ``event``/``time`` (n_lives,) outcomes of the lives; ``unit_of_life``
    (n_lives,) unit code; ``scored`` row positions of the lives used for C.
    """

    def __init__(self, event, time, unit_of_life, n_trees: int, scored: np.ndarray):
        self.event = np.asarray(event, bool)
        self.time = np.asarray(time, float)
        self.unit_of_life = np.asarray(unit_of_life)
        self.total = np.zeros(len(self.event))
        self.count = np.zeros(len(self.event), dtype=np.int64)
        self.scored = scored
        self.marks = set(checkpoints(n_trees).tolist())
        self.curve: list[tuple[int, float, int]] = []
        self.trees_seen = 0

    def add(self, tree_risk: np.ndarray, counts: np.ndarray) -> None:
        """Add one tree: ``tree_risk`` (n_lives,) its risk per life; ``counts`` its draw."""
        out_of_bag = counts[self.unit_of_life] == 0
        self.total[out_of_bag] += tree_risk[out_of_bag]
        self.count[out_of_bag] += 1
        self.trees_seen += 1
        if self.trees_seen in self.marks:
            risk = self.risk()[self.scored]
            c = fast_harrell_c(self.event[self.scored], self.time[self.scored], risk)
            self.curve.append((self.trees_seen, c, int(np.isfinite(risk).sum())))

    def risk(self) -> np.ndarray:
        """OOB risk per life, shape (n_lives,); NaN for lives never out of bag."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.count > 0, self.total / np.maximum(self.count, 1), np.nan)
