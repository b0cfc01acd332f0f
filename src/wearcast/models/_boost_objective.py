"""What LightGBM needs to boost the Cox partial likelihood with delayed entry.

Pure pieces, no model state:

* :func:`cox_objective` wraps the kernel's gradient and diagonal Hessian as a
  LightGBM custom objective (``fobj(raw_scores, dataset) -> (grad, hess)``),
  with per-tree subsampling of whole units;
* :func:`heldout_loss_per_event` scores raw predictions on a held-out fold's
  own risk sets;
* :func:`grouped_folds` assigns whole units to cross-validation folds;
* :func:`encode_covariates` turns a covariate frame into the float matrix the
  booster sees (categoricals as integer codes of stored levels, NaN missing).

Risk sets follow the life-table rule: a row is at risk at age ``t`` when
``entry_age < t <= exit_age`` (ages in days).
"""

from __future__ import annotations

from typing import Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from wearcast.models._cox_kernels import RiskSets, cox_gradient_hessian, cox_loss

#: Floor on a row's Hessian handed to LightGBM. Rows that are never at risk at a
#: failure age have an exact Hessian of zero; a tiny floor keeps leaf values
#: -G / H finite without moving any leaf that holds real information.
HESSIAN_FLOOR = 1e-12


def cox_objective(
    risk_sets: RiskSets,
    *,
    subsample: float = 1.0,
    unit_codes: np.ndarray | None = None,
    seed: int = 0,
) -> Callable[[np.ndarray, object], tuple[np.ndarray, np.ndarray]]:
    """LightGBM custom objective for one training set.

    ``risk_sets`` comes from :func:`prepare_risk_sets` on that training set's
    rows, in the same order as the LightGBM ``Dataset``. The returned callable
    takes the current raw scores (log relative risk ``eta``, shape (n,)) and
    returns ``(grad, hess)``, both shape (n,), float32 (LightGBM's gradient
    type).

    Stochastic boosting by units: with ``subsample < 1`` each call (one per
    tree) keeps every unit (``unit_codes`` (n,), whole histories) with
    probability ``subsample`` and sets the gradient and Hessian of the other
    units' rows to zero, so they add nothing to the tree's split gains or leaf
    values. The draws come from ``numpy.random.default_rng(seed)``, one per
    call, so a fit is reproducible from its seed.
    """
    if not 0 < subsample <= 1:
        raise ValueError(f"subsample must be in (0, 1]; got {subsample}")
    if subsample < 1:
        if unit_codes is None or np.shape(unit_codes) != (risk_sets.n,):
            raise ValueError(f"subsample < 1 needs unit_codes of shape ({risk_sets.n},)")
        codes = np.asarray(unit_codes)
        n_units = int(codes.max()) + 1 if codes.size else 0
        rng = np.random.default_rng(seed)

    def objective(raw_scores: np.ndarray, _dataset: object) -> tuple[np.ndarray, np.ndarray]:
        # float32, LightGBM's gradient type: it takes the arrays without a copy
        grad, hess = cox_gradient_hessian(risk_sets, np.asarray(raw_scores, dtype=float), np.float32)
        hess = np.maximum(hess, HESSIAN_FLOOR, out=hess)
        if subsample < 1:
            kept = (rng.random(n_units) < subsample)[codes]
            grad *= kept  # in place: rows of units left out become 0
            hess *= kept
        return grad, hess

    return objective


def heldout_loss_per_event(risk_sets: RiskSets, raw_scores: np.ndarray) -> float:
    """Negative log partial likelihood per (weighted) failure on a held-out set.

    The held-out rows form their own risk sets (``risk_sets`` prepared from
    them alone), so the value does not depend on the training rows. Returns
    NaN when the set holds no failure.
    """
    events = risk_sets.event_weight
    if events <= 0:
        return float("nan")
    return cox_loss(risk_sets, np.asarray(raw_scores, dtype=float)) / events


def grouped_folds(unit_codes: np.ndarray, n_folds: int, rng: np.random.Generator) -> np.ndarray:
    """Fold number (0..n_folds-1) for every row, whole units kept together.

    ``unit_codes``: integer code per row, shape (n,) (``LifeTable.unit_codes``).
    Units are shuffled with ``rng`` and dealt round-robin, so fold sizes in
    units differ by at most one. Raises ``ValueError`` with fewer units than
    folds.
    """
    unit_codes = np.asarray(unit_codes)
    units = np.unique(unit_codes)
    if n_folds < 2:
        raise ValueError(f"cross-validation needs at least 2 folds; got {n_folds}")
    if units.size < n_folds:
        raise ValueError(f"{units.size} units cannot fill {n_folds} folds; use fewer folds")
    shuffled = units[rng.permutation(units.size)]
    fold_of_unit = np.empty(units.size, dtype=np.int64)
    fold_of_unit[np.searchsorted(units, shuffled)] = np.arange(units.size) % n_folds
    return fold_of_unit[np.searchsorted(units, unit_codes)]


def category_levels(X: pd.DataFrame, categorical: Sequence[str]) -> dict[str, list[str]]:
    """Levels of each categorical covariate, as text, in a fixed order.

    Levels are kept as strings so a reloaded model matches them whether the
    caller passes the original dtype or text read back from CSV.
    """
    levels = {}
    for col in categorical:
        series = X[col]
        if isinstance(series.dtype, pd.CategoricalDtype):
            values = [str(v) for v in series.cat.categories]
        else:
            values = sorted({str(v) for v in series.dropna()})
        levels[col] = list(dict.fromkeys(values))
    return levels


def encode_covariates(
    X: pd.DataFrame, covariates: Sequence[str], levels: Mapping[str, Sequence[str]]
) -> np.ndarray:
    """Float matrix, shape (n, p), columns in ``covariates`` order.

    Categorical columns (keys of ``levels``) become the position of their text
    in the stored levels; missing values and levels unseen in training become
    NaN, which LightGBM sends down its learned missing-value branch. Numeric
    columns are cast to float (NaN stays NaN).
    """
    missing = [c for c in covariates if c not in X.columns]
    if missing:
        raise KeyError(
            f"covariate column(s) {', '.join(missing)} missing from the data to predict; "
            f"the model was fitted on {', '.join(covariates)}"
        )
    out = np.empty((len(X), len(covariates)), dtype=np.float64)
    for j, col in enumerate(covariates):
        series = X[col]
        if col in levels:
            # map each distinct value's text once, then every row by its code (no per-row Python work)
            cats = series if isinstance(series.dtype, pd.CategoricalDtype) else series.astype("category")
            position = pd.Index(list(levels[col])).get_indexer([str(c) for c in cats.cat.categories])
            row_codes = cats.cat.codes.to_numpy()
            codes = np.where(row_codes >= 0, position[row_codes], -1).astype(np.float64)
            codes[codes < 0] = np.nan
            out[:, j] = codes
        else:
            out[:, j] = pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    return out
