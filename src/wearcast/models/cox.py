"""The Cox proportional-hazards baseline model (lifelines), with delayed entry.

Coefficients come from lifelines' ``CoxPHFitter`` (Efron ties, a small ridge
penalizer, ``entry_col`` for late entry). lifelines' own
``baseline_cumulative_hazard_`` does not use ``entry_col`` (its risk sets count
late-entering units from age 0, which biases predicted probabilities low when
many units entered late), so the baseline is rebuilt here with
:class:`wearcast.models.baseline.BaselineHazard` over the ``(entry, exit]``
risk sets. Without late entry both agree.

Scores: ``eta = (z - mean) . beta`` where ``z`` is the design row (numeric
covariates as they are, categoricals one-hot with the first level dropped) and
``mean`` the training mean of the design; :meth:`CoxBaseline.risk_score`
returns ``exp(eta)`` (lifelines' ``predict_partial_hazard``), and
``H(a | x) = H0(a) exp(eta)``. Nothing is standardised by wearcast (lifelines
standardises internally and reports coefficients on the original scale).

Missing values (a unit with no reading yet): a missing or non-finite value is
scored at the fleet average of its design column(s), i.e. ``z_j = mean_j``,
so that covariate adds nothing to the unit's log relative risk (its driver is
0). While fitting, ``mean_j`` is the mean over the rows that have a value and
missing rows are filled with it before lifelines sees the design; a missing
category gets each level column's share. The model never stops for them.

Convergence: lifelines' Newton steps start at step size 0.95; when lifelines
warns that they did not converge, the fit is retried once with
:data:`RETRY_STEP_SIZE`, and if that fails too :class:`CoxConvergenceError`
is raised: diverged coefficients are never kept.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast.exceptions import BundleError, CoxConvergenceError, ModelError
from wearcast.models.base import SurvivalModel
from wearcast.models.baseline import BaselineHazard

_FILE = "cox.json"
_FORMAT = "wearcast.cox"
_VERSION = 1

#: lifelines' first step size (its default) and the smaller one a non-converged fit is retried with.
FIRST_STEP_SIZE = 0.95
RETRY_STEP_SIZE = 0.2
#: lifelines' ConvergenceWarning texts that mean the Newton iterations did not reach the maximum.
_NOT_CONVERGED = ("failed to converge", "suspiciously close to 0", "norm(delta) is still high")


class CoxBaseline(SurvivalModel):
    """Cox model with a delayed-entry Breslow baseline.

    Parameters: ``penalizer`` (ridge strength passed to lifelines, default
    0.01; 0 gives the plain partial-likelihood fit), ``baseline_ties``
    ("breslow", lifelines' and scikit-survival's choice, or "efron"),
    ``seed`` (kept for :meth:`unfitted_copy`; the fit is deterministic).
    """

    name = "cox"

    def __init__(self, penalizer: float = 0.01, *, baseline_ties: str = "breslow", seed: int = 0):
        if not (np.isfinite(penalizer) and penalizer >= 0):
            raise ValueError(f"penalizer must be a finite number >= 0; got {penalizer!r}")
        if baseline_ties not in ("breslow", "efron"):
            raise ValueError(f"baseline_ties must be 'breslow' or 'efron'; got {baseline_ties!r}")
        self.penalizer = float(penalizer)
        self.baseline_ties = baseline_ties
        self.seed = int(seed)
        self.covariates: list[str] = []
        self.levels: dict[str, list[str]] = {}  # categorical -> levels; the first is the reference
        self.design_columns: list[str] = []
        self.constant_columns: list[str] = []  # design columns with one value in training (coefficient 0)
        self.coefficients = np.zeros(0)  # (p,) per design column
        self.means = np.zeros(0)  # (p,) training means of the design
        self.baseline: BaselineHazard | None = None
        self.log_likelihood: float | None = None

    # -- design ---------------------------------------------------------------
    def _encode(self, X: pd.DataFrame, *, learn: bool) -> np.ndarray:
        """Design matrix (n, p) in covariate order: numbers as they are, a categorical as one
        0/1 column per level except the first (the reference). Missing values are filled
        with the column's fleet average (learned here when ``learn``, else ``self.means``)."""
        missing = [c for c in self.covariates if c not in X.columns]
        if missing:
            raise ModelError(
                f"cox: covariate column(s) {', '.join(missing)} missing from the data to score; "
                f"the model was fitted with {', '.join(self.covariates)}."
            )
        blocks, names, gaps = [], [], []
        for col in self.covariates:
            values = X[col]
            if col in self.levels:
                bad = values.isna().to_numpy()
                text = values.astype(str).to_numpy(dtype=object)
                known = set(self.levels[col])
                unseen = sorted(set(pd.unique(text[~bad])) - known)
                if unseen and not learn:
                    warnings.warn(
                        f"cox: covariate {col} has level(s) {', '.join(unseen)} not seen in training; "
                        f"they are scored as the reference level {self.levels[col][0]!r}.",
                        stacklevel=3,
                    )
                for level in self.levels[col][1:]:
                    blocks.append((text == level).astype(float))
                    names.append(f"{col}={level}")
                    gaps.append(bad)
            else:
                numeric = pd.to_numeric(values, errors="coerce").to_numpy(float)
                blocks.append(numeric)
                names.append(col)
                gaps.append(~np.isfinite(numeric))
        if learn:
            self.design_columns = names
        if not blocks:
            return np.zeros((len(X), 0))
        Z = np.column_stack(blocks)
        gap = np.column_stack(gaps)
        if gap.any():
            fill = _observed_means(Z, gap) if learn else self.means
            Z = np.where(gap, fill[None, :], Z)
        return Z

    def _learn_levels(self, X: pd.DataFrame, categorical) -> None:
        """Remember each categorical covariate's levels that occur in the data
        (pandas category order, else sorted). Unused categories of a subset
        (a fold, a bootstrap sample) would give all-zero columns, so they are left out."""
        self.levels = {}
        for col in self.covariates:
            values = X[col]
            if isinstance(values.dtype, pd.CategoricalDtype):
                present = set(values.dropna().unique())
                self.levels[col] = [str(c) for c in values.cat.categories if c in present]
            elif col in categorical or values.dtype == object:
                self.levels[col] = sorted({str(v) for v in values.dropna()})

    def _eta(self, X: pd.DataFrame) -> np.ndarray:
        self._check_fitted()
        Z = self._encode(X, learn=False)
        return (Z - self.means) @ self.coefficients

    def _check_fitted(self) -> None:
        if self.baseline is None:
            raise ModelError("cox: the model is not fitted yet; call fit(table) first.")

    # -- fitting --------------------------------------------------------------
    def fit(self, table) -> "CoxBaseline":
        """Fit on a :class:`wearcast.LifeTable` (rows ``(entry_age, exit_age]``, days)."""
        entry, exit, event = table.entry, table.exit, table.event
        if not event.any():
            raise ModelError(
                f"cox: the life table has no failures among its {len(exit)} rows, so there is nothing "
                "to fit. Check the failure log was read (column mapping, date range)."
            )
        self.covariates = list(table.covariates)
        self._learn_levels(table.X, set(table.categorical))
        Z = self._encode(table.X, learn=True)
        self.means = Z.mean(axis=0) if Z.shape[1] else np.zeros(0)
        # A column constant in this table (a covariate with one value in a fold or a
        # bootstrap sample) carries no information and breaks lifelines'
        # standardisation: it gets coefficient 0 and is reported, not fitted.
        spread = Z.max(axis=0) - Z.min(axis=0) if Z.shape[1] else np.zeros(0)
        varying = spread > 0
        self.constant_columns = [n for n, v in zip(self.design_columns, varying) if not v]
        if self.constant_columns:
            warnings.warn(
                f"cox: design column(s) {', '.join(self.constant_columns)} take one value in this life "
                "table; their coefficient is set to 0.",
                stacklevel=2,
            )
        self.coefficients = np.zeros(Z.shape[1])
        self.log_likelihood = None
        if varying.any():
            fitted = self._fit_lifelines(Z[:, varying], entry, exit, event)
            self.coefficients[varying] = fitted.params_.to_numpy(float)
            self.log_likelihood = float(fitted.log_likelihood_)
        eta = (Z - self.means) @ self.coefficients
        self.baseline = BaselineHazard.estimate(entry, exit, event, eta, ties=self.baseline_ties,
                                               interpolation="linear")
        return self

    def _fit_lifelines(self, Z: np.ndarray, entry, exit, event):
        """lifelines' fit of the design ``Z``; retried once with a smaller Newton step when
        lifelines warns that it did not converge. Raises :class:`CoxConvergenceError` when
        the retry does not converge either."""
        names = [n for n in self.design_columns if n not in self.constant_columns]
        frame = pd.DataFrame(Z, columns=names)
        frame["_entry"], frame["_exit"], frame["_event"] = entry, exit, event.astype(int)
        first = self._fit_once(frame, names, FIRST_STEP_SIZE)
        if first[1] is None:
            return first[0]
        second = self._fit_once(frame, names, RETRY_STEP_SIZE)
        if second[1] is None:
            return second[0]
        raise CoxConvergenceError(
            f"cox: lifelines' fit did not converge at step size {FIRST_STEP_SIZE:g}, nor when retried at "
            f"{RETRY_STEP_SIZE:g} (lifelines: {second[1]}); its coefficients are not used. Look for a covariate "
            f"among {', '.join(names)} with extreme values or one that nearly separates failed from "
            f"running units, or use a larger penalizer (now {self.penalizer:g})."
        )

    def _fit_once(self, frame: pd.DataFrame, names: list[str], step_size: float):
        """``(fitter, None)`` after a converged fit, ``(None, reason)`` after one lifelines
        halted or warned did not converge."""
        from lifelines import CoxPHFitter
        from lifelines.exceptions import ConvergenceError, ConvergenceWarning

        fitter = CoxPHFitter(penalizer=self.penalizer)
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", ConvergenceWarning)
                # lifelines warns about late entry to suggest what we do anyway
                warnings.filterwarnings("ignore", message=".*entry.*")
                fitter.fit(
                    frame,
                    duration_col="_exit",
                    event_col="_event",
                    entry_col="_entry",
                    # lifelines' default stopping rule leaves ~4e-5 on the
                    # Stanford heart data; a tighter one costs a Newton step or two
                    fit_options={"precision": 1e-10, "step_size": step_size},
                )
        except (ConvergenceError, np.linalg.LinAlgError) as exc:
            return None, f"{type(exc).__name__}: {str(exc).splitlines()[0].split('. Please')[0]}"
        except ValueError as exc:
            raise ModelError(
                f"cox: lifelines could not fit the model ({type(exc).__name__}: {str(exc).splitlines()[0]}). "
                f"Try a larger penalizer (now {self.penalizer}) or drop nearly collinear covariates "
                f"among {', '.join(names)}."
            ) from exc
        reasons = [str(w.message).split(". ")[0].strip().rstrip(".") for w in caught
                   if issubclass(w.category, ConvergenceWarning)
                   and any(key in str(w.message) for key in _NOT_CONVERGED)]
        for w in caught:  # pass on what lifelines said besides convergence
            if not issubclass(w.category, ConvergenceWarning):
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        if reasons or not np.isfinite(fitter.log_likelihood_) or not np.isfinite(fitter.params_).all():
            return None, reasons[0] if reasons else "lifelines returned non-finite values"
        return fitter, None

    # -- predictions ----------------------------------------------------------
    @property
    def max_age(self) -> float:
        """Last failure age in training (days); the hazard is flat after it."""
        self._check_fitted()
        return self.baseline.max_age

    def risk_score(self, X: pd.DataFrame) -> np.ndarray:
        """``exp((z - mean) . beta)``, shape (n,); higher = expected to fail sooner."""
        with np.errstate(over="ignore"):
            return np.exp(self._eta(X))

    def log_risk(self, X: pd.DataFrame) -> np.ndarray:
        """The centred linear predictor ``(z - mean) . beta``, shape (n,)."""
        return self._eta(X)

    def cumulative_hazard_at(self, X: pd.DataFrame, ages: np.ndarray) -> np.ndarray:
        """``H0(age_i) exp(eta_i)``, shape (n,); ``ages`` in days, shape (n,)."""
        return self.baseline_hazard().cumulative_hazard_at(self._eta(X), np.asarray(ages, float))

    def cumulative_hazard(self, X: pd.DataFrame, times: np.ndarray) -> np.ndarray:
        """``H(t_j | x_i)``, shape (n, m), in one broadcast."""
        eta = self._eta(X)[:, None]
        return self.baseline_hazard().cumulative_hazard_at(eta, np.asarray(times, float)[None, :])

    def baseline_hazard(self) -> BaselineHazard:
        self._check_fitted()
        return self.baseline

    def contributions(self, X: pd.DataFrame) -> pd.DataFrame:
        """``beta_j (z_j - mean_j)`` per covariate (levels summed back), shape (n, p); rows sum to log risk."""
        self._check_fitted()
        Z = self._encode(X, learn=False)
        parts = (Z - self.means) * self.coefficients
        owner = [col for col in self.covariates for _ in (self.levels[col][1:] if col in self.levels else [col])]
        out = pd.DataFrame(0.0, index=X.index, columns=self.covariates)
        for j, col in enumerate(owner):
            out[col] += parts[:, j]
        return out

    def unfitted_copy(self, seed: int) -> "CoxBaseline":
        return CoxBaseline(self.penalizer, baseline_ties=self.baseline_ties, seed=seed)

    # -- saving ---------------------------------------------------------------
    def to_dict(self) -> dict:
        self._check_fitted()
        return {
            "format": _FORMAT,
            "version": _VERSION,
            "penalizer": self.penalizer,
            "baseline_ties": self.baseline_ties,
            "seed": self.seed,
            "covariates": list(self.covariates),
            "levels": {k: list(v) for k, v in self.levels.items()},
            "design_columns": list(self.design_columns),
            "constant_columns": list(self.constant_columns),
            "coefficients": [float(b) for b in self.coefficients],
            "means": [float(m) for m in self.means],
            "log_likelihood": self.log_likelihood,
            "baseline": self.baseline.to_dict(),
        }

    @classmethod
    def from_dict(cls, data: dict) -> "CoxBaseline":
        if not isinstance(data, dict) or data.get("format") != _FORMAT or data.get("version") != _VERSION:
            raise BundleError(f"not a saved Cox model of version {_VERSION} (format {_FORMAT!r}).")
        try:
            model = cls(data["penalizer"], baseline_ties=data["baseline_ties"], seed=data["seed"])
            model.covariates = list(data["covariates"])
            model.levels = {k: list(v) for k, v in data["levels"].items()}
            model.design_columns = list(data["design_columns"])
            model.constant_columns = list(data["constant_columns"])
            model.coefficients = np.asarray(data["coefficients"], float)
            model.means = np.asarray(data["means"], float)
            model.log_likelihood = data["log_likelihood"]
            model.baseline = BaselineHazard.from_dict(data["baseline"])
        except (KeyError, TypeError, ValueError) as exc:
            raise BundleError(f"saved Cox model is damaged: {exc}. Refit and save it again.") from exc
        p = len(model.design_columns)
        if model.coefficients.shape != (p,) or model.means.shape != (p,):
            raise BundleError("saved Cox model is damaged: coefficient and column counts differ. Refit and save it again.")
        return model

    def save(self, folder: Path) -> list[Path]:
        """Write ``cox.json`` into ``folder``; returns ``[path]``."""
        return [_atomic.write_json(Path(folder) / _FILE, self.to_dict())]

    @classmethod
    def load(cls, folder: Path) -> "CoxBaseline":
        path = Path(folder) / _FILE
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise BundleError(f"cannot read {path}: {exc.strerror}. Is this a saved model folder?") from exc
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise BundleError(f"{path}: line {exc.lineno}: not valid JSON ({exc.msg}). Refit and save it again.") from exc
        return cls.from_dict(data)


def _observed_means(Z: np.ndarray, gap: np.ndarray) -> np.ndarray:
    """Mean of each column of ``Z`` (n, p) over the rows where ``gap`` (n, p) is False;
    0 for a column with no value at all (it is then constant and gets coefficient 0)."""
    counts = (~gap).sum(axis=0)
    sums = np.where(gap, 0.0, Z).sum(axis=0)
    return np.divide(sums, counts, out=np.zeros(Z.shape[1]), where=counts > 0)
