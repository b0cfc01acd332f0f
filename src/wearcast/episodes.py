"""Episodes (what cross-validation scores) and unit-grouped folds of a life table.

An *episode* is a run of rows of one life that ends in a failure or at the
life's last row; it starts at the first row of the life or right after the
previous failure. See :mod:`wearcast.validation` for how they are scored.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from wearcast.exceptions import ConfigError
from wearcast.lifetable import LifeTable

# -- what is scored ------------------------------------------------------------------
@dataclass(frozen=True)
class Episodes:
    """Scored episodes of a life table; every array has shape (n_episodes,).

    ``rows``: position of the episode's last row in the table (its covariates
    are used); ``entry``/``exit``: ages in days; ``event``: ends in a failure;
    ``unit_id``/``life``: whose episode it is.
    """

    rows: np.ndarray
    entry: np.ndarray
    exit: np.ndarray
    event: np.ndarray
    unit_id: np.ndarray
    life: np.ndarray

    def __len__(self) -> int:
        return len(self.rows)

    def subset(self, mask: np.ndarray) -> "Episodes":
        return Episodes(*(getattr(self, f)[mask] for f in ("rows", "entry", "exit", "event", "unit_id", "life")))


def _episode_starts(f: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """``(order, starts)``: rows sorted by unit, life and entry, and where each episode starts in that order."""
    order = np.lexsort((f["entry_age"].to_numpy(), f["life"].to_numpy(), f["unit_id"].to_numpy()))
    unit = f["unit_id"].to_numpy()[order]
    life = f["life"].to_numpy()[order]
    failed = f["failed"].to_numpy(bool)[order]
    starts = np.ones(len(order), bool)
    starts[1:] = (unit[1:] != unit[:-1]) | (life[1:] != life[:-1]) | failed[:-1]
    return order, starts


def row_episodes(table: LifeTable) -> np.ndarray:
    """The episode (position in :func:`score_episodes`) of every row, shape (n_rows,)."""
    order, starts = _episode_starts(table.frame)
    out = np.empty(len(order), np.int64)
    out[order] = np.cumsum(starts) - 1
    return out


def score_episodes(table: LifeTable) -> Episodes:
    """One scored row per episode of ``table`` (see the module docstring)."""
    f = table.frame
    if len(f) == 0:
        empty = np.zeros(0)
        return Episodes(empty.astype(np.int64), empty, empty, empty.astype(bool), empty.astype(object), empty)
    order, starts = _episode_starts(f)
    unit = f["unit_id"].to_numpy()[order]
    life = f["life"].to_numpy()[order]
    failed = f["failed"].to_numpy(bool)[order]
    first = np.flatnonzero(starts)
    last = np.concatenate([first[1:] - 1, [len(order) - 1]])
    rows = order[last]
    return Episodes(
        rows=rows,
        entry=f["entry_age"].to_numpy(float)[order[first]],
        exit=f["exit_age"].to_numpy(float)[rows],
        event=failed[last],
        unit_id=unit[last].astype(str),
        life=life[last],
    )


# -- folds ---------------------------------------------------------------------------
def grouped_folds(table: LifeTable, k: int, seed: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """``k`` (train_rows, test_rows) pairs of row positions; all rows of a unit share a fold.

    Units are shuffled by ``seed`` and dealt round-robin, so fold sizes differ
    by at most one unit. Raises :class:`ConfigError` when there are fewer units than folds.
    """
    codes = table.unit_codes()
    n_units = int(codes.max()) + 1 if len(codes) else 0
    if k < 2 or n_units < k:
        raise ConfigError(
            f"cannot make {k} unit-grouped folds from {n_units} units; set [validation] folds "
            f"between 2 and {max(2, n_units)}."
        )
    fold_of_unit = np.empty(n_units, dtype=np.int64)
    fold_of_unit[np.random.default_rng(seed).permutation(n_units)] = np.arange(n_units) % k
    fold = fold_of_unit[codes]
    return [(np.flatnonzero(fold != i), np.flatnonzero(fold == i)) for i in range(k)]


def has_start_stop(table: LifeTable) -> bool:
    """Whether some episode of ``table`` spans more than one row (covariates change within a life)."""
    return len(score_episodes(table)) < table.n_rows


def choice_concordance(start_stop: bool) -> tuple[str, str]:
    """``(column, words)`` of the C that ranks models: the time-dependent C on
    start/stop data, the truncation-aware C on the last row otherwise."""
    if start_stop:
        return "c_time_dependent", TIME_DEPENDENT_WORDS
    return "c_truncation", TRUNCATION_WORDS


TIME_DEPENDENT_WORDS = "time-dependent truncation-aware C (readings in force at each failure)"
TRUNCATION_WORDS = "truncation-aware C (one row per unit)"


def split_fold(table: LifeTable, episodes: Episodes, train_rows: np.ndarray, test_rows: np.ndarray):
    """``(training table, held-out episodes, training episodes)`` of one fold."""
    in_test = np.zeros(table.n_rows, bool)
    in_test[test_rows] = True
    return (table.take_rows(train_rows), episodes.subset(in_test[episodes.rows]),
            episodes.subset(~in_test[episodes.rows]))
