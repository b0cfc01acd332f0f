"""Covariates → a float matrix for tree growing (pure functions).

Numeric covariates pass through as float (missing stays NaN). The trees send a
missing value down the side chosen while growing when the split saw missing
values, otherwise to the child that held more training rows (scikit-learn's
rule, kept in ``FlatTree.missing_left``); a unit with no reading yet is thus
scored like most units at each split. A categorical covariate
with levels ``L1..Lk`` (stored, sorted as text) becomes ``k`` indicator
columns named ``"<name>=<level>"``; a level not seen while fitting gives all
zeros, i.e. it goes the "not equal" way at every split on that covariate; so
does a missing category.
One-hot rather than ordinal codes so a split never invents an order among
seal types or makers.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from wearcast.exceptions import DataError


def learn_levels(X: pd.DataFrame, categorical: tuple[str, ...]) -> dict[str, list[str]]:
    """Sorted text levels of each categorical covariate (missing excluded)."""
    levels = {}
    for col in categorical:
        _, uniques = pd.factorize(X[col], use_na_sentinel=True)
        levels[col] = sorted({str(v) for v in uniques})
    return levels


def encoded_names(covariates: tuple[str, ...], levels: dict[str, list[str]]) -> list[str]:
    """Column names of the encoded matrix, in order."""
    names = []
    for col in covariates:
        if col in levels:
            names.extend(f"{col}={level}" for level in levels[col])
        else:
            names.append(col)
    return names


def encode(X: pd.DataFrame, covariates: tuple[str, ...], levels: dict[str, list[str]]) -> np.ndarray:
    """Encoded covariates, shape (n, n_encoded), float32 (what the trees use)."""
    missing = [c for c in covariates if c not in X.columns]
    if missing:
        raise DataError(
            f"covariate(s) {', '.join(missing)} missing from the data given to the forest; "
            f"found {', '.join(map(str, X.columns))}. Pass the same covariate columns as at fit."
        )
    blocks = []
    for col in covariates:
        if col in levels:
            # one-hot through the distinct values (few) rather than row by row
            codes, uniques = pd.factorize(X[col], use_na_sentinel=True)
            position = {level: j for j, level in enumerate(levels[col])}
            column = np.array([position.get(str(v), -1) for v in uniques] + [-1], dtype=np.int64)[codes]
            block = np.zeros((len(X), len(levels[col]) + 1), dtype=np.float32)
            block[np.arange(len(X)), column] = 1.0  # -1 (missing or unseen level) lands in the spare last column
            blocks.append(block[:, :-1])
        else:
            values = pd.to_numeric(X[col], errors="coerce").to_numpy(dtype=np.float64)
            blocks.append(values.astype(np.float32)[:, None])
    if not blocks:
        return np.zeros((len(X), 0), dtype=np.float32)
    return np.ascontiguousarray(np.hstack(blocks), dtype=np.float32)
