"""Failure probability over a window with the readings in force (pure functions on arrays).

An episode that spans several rows (start/stop data) changes covariates along
the way. The chance it fails within ``h`` days of its entry, given the
readings it actually had, is ``1 - exp(-Σ_r ΔH_r)`` where the sum runs over
its rows ``r`` and ``ΔH_r = H(end_r | x_r) - H(entry_r | x_r)`` is the
cumulative hazard the model gives row ``r``'s covariates over the part of the
row inside the window, ``end_r = min(exit_r, episode entry + h)``. The
episode's last row is carried to the window's end (``end = entry + h``): the
last reading is held past a suspension or a failure, as the ranked list
holds it, so the probability covers the whole window and can be set against
the censoring-aware observed share. With one row per episode this is the
usual conditional probability from the entry age.
"""

from __future__ import annotations

import numpy as np


def window_ends(row_entry: np.ndarray, row_exit: np.ndarray, episode_entry: np.ndarray,
                horizon_days: float, last_row: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(end ages, inside)`` of each row's part inside its episode's window.

    Shapes (n_rows,); ``episode_entry`` is the entry age of each row's episode,
    ``last_row`` whether the row is its episode's last (carried to the window's
    end). ``inside`` is False for rows that start at or after the window's end.
    """
    row_entry = np.asarray(row_entry, float)
    window_end = np.asarray(episode_entry, float) + float(horizon_days)
    ends = np.where(np.asarray(last_row, bool), window_end, np.minimum(np.asarray(row_exit, float), window_end))
    return ends, row_entry < ends


def in_force_probability(h_start: np.ndarray, h_end: np.ndarray, inside: np.ndarray, episode: np.ndarray,
                         n_episodes: int) -> np.ndarray:
    """``1 - exp(-Σ ΔH)`` per episode, shape (n_episodes,).

    Per row (n_rows,): ``h_start``/``h_end`` cumulative hazards at the row's
    entry and window end, ``inside`` whether the row counts, ``episode`` the
    episode index (0 … n_episodes-1). Negative increments (a model whose
    cumulative hazard is not monotone between grid ages) count as 0.
    """
    increment = np.where(np.asarray(inside, bool), np.maximum(np.asarray(h_end, float) - np.asarray(h_start, float),
                                                              0.0), 0.0)
    total = np.bincount(np.asarray(episode, np.int64), weights=increment, minlength=int(n_episodes))
    return np.clip(-np.expm1(-total), 0.0, 1.0)
