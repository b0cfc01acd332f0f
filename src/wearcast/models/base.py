"""What every wearcast survival model offers.

Time scale is age in days. A model maps covariates ``X`` (a DataFrame with the
life table's covariate columns) to a cumulative hazard ``H(t | x)``; from it
follow the survival function ``S(t | x) = exp(-H(t | x))`` and the probability
a planner needs, failure within ``h`` days for a unit working at age ``a``::

    P(fail in (a, a + h] | working at a) = 1 - exp(-(H(a + h | x) - H(a | x)))
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from pathlib import Path

import numpy as np
import pandas as pd


def conditional_failure_probability(h_start: np.ndarray, h_end: np.ndarray) -> np.ndarray:
    """``1 - exp(-(h_end - h_start))``, clipped to [0, 1]; shapes broadcast."""
    increment = np.maximum(np.asarray(h_end, float) - np.asarray(h_start, float), 0.0)
    return np.clip(-np.expm1(-increment), 0.0, 1.0)


class SurvivalModel(ABC):
    """Common interface. Subclasses implement ``fit``, ``risk_score`` and
    ``cumulative_hazard_at``; the rest follows."""

    #: Short name used in outputs and bundles ("boosted", "forest", "cox").
    name: str = "model"

    @abstractmethod
    def fit(self, table) -> "SurvivalModel":
        """Fit on a :class:`wearcast.LifeTable`; returns self."""

    @abstractmethod
    def risk_score(self, X: pd.DataFrame) -> np.ndarray:
        """Relative risk, shape (n,); higher means expected to fail sooner."""

    @abstractmethod
    def cumulative_hazard_at(self, X: pd.DataFrame, ages: np.ndarray) -> np.ndarray:
        """``H(age_i | x_i)`` for each row, shape (n,); ``ages`` in days, shape (n,)."""

    def cumulative_hazard(self, X: pd.DataFrame, times: np.ndarray) -> np.ndarray:
        """``H(t_j | x_i)`` on a shared grid, shape (n, m)."""
        times = np.asarray(times, float)
        n = len(X)
        out = np.empty((n, len(times)))
        for j, t in enumerate(times):
            out[:, j] = self.cumulative_hazard_at(X, np.full(n, t))
        return out

    def survival(self, X: pd.DataFrame, times: np.ndarray) -> np.ndarray:
        """``S(t_j | x_i)``, shape (n, m), within [0, 1] and non-increasing in t."""
        return np.exp(-self.cumulative_hazard(X, times))

    def fail_probability(self, X: pd.DataFrame, age: np.ndarray, horizon_days: float) -> np.ndarray:
        """P(fail within ``horizon_days`` | working at ``age``), shape (n,)."""
        age = np.asarray(age, float)
        return conditional_failure_probability(
            self.cumulative_hazard_at(X, age), self.cumulative_hazard_at(X, age + float(horizon_days))
        )

    def fail_probabilities(self, X: pd.DataFrame, age: np.ndarray, horizons_days) -> np.ndarray:
        """:meth:`fail_probability` for several horizons at once, shape (n, H).

        The boosted trees (through ``exp(eta(x)) H0(t)``) and the forest (one
        pass of each unit through its trees) override it to score ``X`` once for
        all horizons; the Cox baseline's scoring is cheap enough as it is.
        """
        return np.column_stack([self.fail_probability(X, age, float(h)) for h in horizons_days])

    def score_units(self, X: pd.DataFrame, age: np.ndarray, horizons_days) -> tuple[np.ndarray, np.ndarray]:
        """``(log relative risk (n,), P(fail within each horizon) (n, H))`` in one call.

        The log risk is ``log_risk(X)`` where the model has one, else the log
        of ``risk_score(X)``.
        """
        if hasattr(self, "log_risk"):
            score = np.asarray(self.log_risk(X), float)
        else:
            score = np.log(np.maximum(np.asarray(self.risk_score(X), float), np.finfo(float).tiny))
        return score, self.fail_probabilities(X, age, horizons_days)

    def fit_resampled(self, table, rng: np.random.Generator, cache: dict | None = None) -> "SurvivalModel":
        """Fit on one bootstrap of whole units drawn from ``rng``; returns self.

        The default fits the table of copied units
        (:meth:`LifeTable.bootstrap_units`); a model that takes case weights
        may fit the same draw as weights (:meth:`LifeTable.bootstrap_weights`)
        instead, which is the same resample on fewer rows. ``cache``: a dict
        the caller keeps across refits of the same ``table``, where a model
        may keep work that depends on the table alone (results never depend
        on whether it is given).
        """
        return self.fit(table.bootstrap_units(rng))

    def contributions(self, X: pd.DataFrame) -> pd.DataFrame:
        """Signed contribution of each covariate to the log-risk score, shape (n, p).

        Columns are the covariate names; rows add up (with a bias term the model
        may keep apart) to ``log risk``. Models without drivers raise
        ``NotImplementedError``.
        """
        raise NotImplementedError(f"{type(self).__name__} does not give per-unit drivers")

    def unfitted_copy(self, seed: int) -> "SurvivalModel":
        """A fresh, unfitted model with the same settings and a new seed.

        Choices tuned during ``fit`` (for example the number of boosted trees
        picked by cross-validation) are fixed in the copy, so bootstrap refits
        measure sampling variability, not re-tuning.
        """
        raise NotImplementedError(f"{type(self).__name__} cannot be refitted yet")

    def save(self, folder: Path) -> list[Path]:  # pragma: no cover - each model overrides
        """Write data files describing the fitted model into ``folder``; return them."""
        raise NotImplementedError(f"{type(self).__name__} cannot be saved yet")
