"""Boosted survival trees: LightGBM on the Cox partial likelihood with delayed entry.

The model is a sum of ``B`` shallow trees, each fitted to the gradient and
diagonal Hessian of the Cox negative log partial likelihood (Efron or Breslow
ties) computed on risk sets that respect delayed entry: a row is at risk at
age ``t`` when ``entry_age < t <= exit_age``. Boosting starts from a zero log
relative risk. ``B`` is picked by K-fold cross-validation grouped by unit
(each fold scored on its own held-out risk sets), then the model is refitted
on all rows with that ``B``. A Breslow baseline hazard with delayed entry,
computed from the final scores, turns the relative risk into a cumulative
hazard ``H(t | x) = exp(eta(x)) H0(t)`` (ages in days).

Leaf size in events: LightGBM cannot count failures per leaf. The sum of the
Cox Hessian over a leaf's rows is close to the number of failures the model
*expects* in that leaf (for Breslow at the start of boosting, the Hessian is
each row's compensator ``exp(eta) * (H0(exit) - H0(entry))`` minus a small
``p**2`` term, and those compensators add up to the observed failures). So
``min_events_per_leaf`` is enforced approximately, as
``min_sum_hessian_in_leaf = min_events_per_leaf * subsample`` (the Hessian of
the units in the tree's subsample) together with ``min_data_in_leaf =
min_events_per_leaf`` rows. A leaf can therefore hold fewer observed failures
than asked for when its failures are fewer than expected; it never holds fewer
rows.

Subsampling (stochastic boosting) is by whole units: each tree sees the
gradient and Hessian of a random ``subsample`` share of the units (each unit
kept with that probability, drawn from the model's seed) and zeros for the
rest, so a unit's history is never split between in and out of a tree's sample.
LightGBM's own row bagging is not used: it would split units, and zero
gradients keep its histograms on contiguous rows, which is faster.

Missing values (a unit with no reading yet) use LightGBM's own handling: a
covariate with missing values among the rows the trees were grown on gets a
learned side at every split on it (NaN goes where the loss is lowest); a
missing category goes to the side of the levels not in the split's set. One
exception: LightGBM reads NaN as 0 at a split that saw no missing value while
growing, which would score an unsampled unit as one with zero running hours or
zero vibration. So a numeric covariate with no missing value in training is
filled, at scoring, with its training median (``fill_values_``).
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import lightgbm as lgb
import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast.config import BoostedSection
from wearcast.exceptions import BundleError, ModelError
from wearcast.lifetable import draw_unit_weights
from wearcast.models._boost_objective import (
    category_levels,
    cox_objective,
    encode_covariates,
    grouped_folds,
    heldout_loss_per_event,
)
from wearcast.models._cox_kernels import age_ranks_of, prepare_risk_sets
from wearcast.models.base import SurvivalModel
from wearcast.models.baseline import BaselineHazard

TREES_FILE = "boosted_trees.txt"
BASELINE_FILE = "boosted_baseline.json"
SETTINGS_FILE = "boosted_settings.json"
FORMAT_VERSION = 1


@dataclass(frozen=True)
class BoostSettings:
    """The trade's knobs (see :class:`wearcast.config.BoostedSection`).

    ``n_trees`` fixes ``B`` and skips cross-validation (used by bootstrap
    refits and benchmarks); ``None`` lets cross-validation choose it, up to
    ``max_trees``.
    """

    learning_rate: float = 0.05
    max_trees: int = 1000
    tree_depth: int = 3
    max_leaves: int | None = None
    subsample: float = 0.8
    predictors_per_split: float = 1.0
    min_events_per_leaf: int = 10
    folds: int = 5
    early_stopping_trees: int = 50
    ties: str = "efron"
    monotone: dict[str, int] = field(default_factory=dict)
    threads: int = 1
    n_trees: int | None = None

    def check(self) -> None:
        problems = []
        if not 0 < self.learning_rate <= 1:
            problems.append(f"learning_rate must be in (0, 1]; got {self.learning_rate}")
        if self.max_trees < 1:
            problems.append(f"max_trees must be at least 1; got {self.max_trees}")
        if self.tree_depth < 1:
            problems.append(f"tree_depth must be at least 1; got {self.tree_depth}")
        if self.max_leaves is not None and self.max_leaves < 2:
            problems.append(f"max_leaves must be at least 2; got {self.max_leaves}")
        if not 0 < self.subsample <= 1:
            problems.append(f"subsample must be in (0, 1]; got {self.subsample}")
        if not 0 < self.predictors_per_split <= 1:
            problems.append(f"predictors_per_split must be in (0, 1]; got {self.predictors_per_split}")
        if self.min_events_per_leaf < 1:
            problems.append(f"min_events_per_leaf must be at least 1; got {self.min_events_per_leaf}")
        if self.ties not in ("efron", "breslow"):
            problems.append(f"ties must be 'efron' or 'breslow'; got {self.ties!r}")
        if any(v not in (-1, 1) for v in self.monotone.values()):
            problems.append("monotone values must be +1 (risk rises with the covariate) or -1")
        if self.n_trees is None and self.folds < 2:
            problems.append(f"folds must be at least 2; got {self.folds}")
        if self.n_trees is not None and self.n_trees < 1:
            problems.append(f"n_trees must be at least 1; got {self.n_trees}")
        if problems:
            raise ModelError("boosted trees settings: " + "; ".join(problems) + ". Fix [model.boosted] in the config.")


class BoostedSurvivalTrees(SurvivalModel):
    """Gradient-boosted Cox trees (LightGBM, custom delayed-entry objective).

    Fitted attributes: ``n_trees_`` (B used), ``cv_curve_`` (mean held-out
    partial likelihood per failure after 1..len trees, or ``None`` when B was
    fixed), ``cv_fold_curves_`` (per fold), ``covariates_``,
    ``category_levels_``, ``baseline_`` (Breslow baseline hazard).
    """

    name = "boosted"

    def __init__(self, settings: BoostSettings | None = None, seed: int = 0, **overrides):
        settings = settings or BoostSettings()
        if overrides:
            settings = replace(settings, **overrides)
        settings.check()
        self.settings = settings
        self.seed = int(seed)
        self.booster_: lgb.Booster | None = None
        self.n_trees_: int | None = None
        self.cv_curve_: np.ndarray | None = None
        self.cv_fold_curves_: np.ndarray | None = None
        self.covariates_: tuple[str, ...] = ()
        self.category_levels_: dict[str, list[str]] = {}
        self.fill_values_: dict[str, float] = {}  # numeric covariate with no NaN in training -> its median
        self.baseline_ = None

    @classmethod
    def from_config(cls, section: BoostedSection, seed: int) -> "BoostedSurvivalTrees":
        """Build from the config's ``[model.boosted]`` table."""
        known = {f for f in BoostSettings.__dataclass_fields__}
        values = {k: v for k, v in asdict(section).items() if k in known}
        return cls(BoostSettings(**values), seed=seed)

    # -- LightGBM parameters ------------------------------------------------
    def _lgb_params(self, lgb_seed: int, covariates, levels) -> dict:
        s = self.settings
        leaves = s.max_leaves if s.max_leaves is not None else 2 ** s.tree_depth
        unknown = sorted(set(s.monotone) - set(covariates))
        if unknown:
            raise ModelError(
                f"monotone constraint on {unknown[0]!r}, which is not a covariate "
                f"({', '.join(covariates)}). Remove it from [model.boosted.monotone] or add the covariate."
            )
        on_categorical = sorted(set(s.monotone) & set(levels))
        if on_categorical:
            raise ModelError(
                f"monotone constraint on categorical covariate {on_categorical[0]!r}; categories have no order. "
                "Remove it from [model.boosted.monotone]."
            )
        params = {
            "objective": "none",
            "metric": "None",
            "boosting": "gbdt",
            "learning_rate": s.learning_rate,
            "max_depth": s.tree_depth,
            "num_leaves": int(leaves),
            "feature_fraction_bynode": s.predictors_per_split,
            "min_data_in_leaf": int(s.min_events_per_leaf),
            "min_sum_hessian_in_leaf": float(s.min_events_per_leaf * s.subsample),
            "min_data_per_group": int(s.min_events_per_leaf),
            "lambda_l2": 0.0,
            "boost_from_average": False,
            "deterministic": True,
            # With several threads, column-wise histograms: each feature's histogram
            # is summed by one thread over all rows in row order, so results do not
            # depend on num_threads. With one thread, row-wise histograms add the same
            # numbers in the same order (identical trees) and run faster.
            "force_col_wise": int(s.threads) != 1,
            "force_row_wise": int(s.threads) == 1,
            "num_threads": int(s.threads),
            "seed": int(lgb_seed),
            "verbosity": -1,
            "feature_pre_filter": False,
        }
        if s.monotone:
            params["monotone_constraints"] = [int(s.monotone.get(c, 0)) for c in covariates]
        return params

    def _dataset(self, M, event, cat_idx, params, reference=None) -> lgb.Dataset:
        return lgb.Dataset(
            M, label=np.asarray(event, float), categorical_feature=cat_idx or "auto",
            params=params, reference=reference, free_raw_data=True,
        )

    # -- fitting --------------------------------------------------------------
    def fit(self, table) -> "BoostedSurvivalTrees":
        """Fit on a :class:`wearcast.LifeTable`; returns self."""
        return self._fit(_Encoded.of(table), None)

    def fit_resampled(self, table, rng: np.random.Generator, cache: dict | None = None) -> "BoostedSurvivalTrees":
        """Fit on one bootstrap of whole units: the units drawn
        (:func:`wearcast.lifetable.draw_unit_weights`, the draw of
        :meth:`LifeTable.bootstrap_units`) enter once, with case weights =
        times drawn.

        The weights enter the partial likelihood, its derivatives and the
        baseline hazard, so the loss is the copied table's (exactly under
        Breslow ties; under Efron ties a unit's copies failing together are
        not treated as tied with each other). Leaf sizes count distinct rows
        (``min_data_in_leaf``) and weighted Hessian (``min_sum_hessian_in_leaf``).
        ``cache``: see :meth:`SurvivalModel.fit_resampled`; the encoded
        covariate matrix of ``table`` and LightGBM's feature bins found on the
        whole table are kept there (the bins are found on the whole table
        either way, as in the main fit).
        """
        key = ("boosted.encoded", tuple(table.covariates), tuple(table.categorical))
        cache = {} if cache is None else cache
        if key not in cache:
            encoded = _Encoded.of(table, with_ranks=True)
            # LightGBM's feature bins found once on the whole table (as the main fit
            # finds them) and reused: a refit's rows are only sorted into them
            params = self._lgb_params(0, encoded.covariates, encoded.levels)
            cat_idx = [encoded.covariates.index(c) for c in encoded.levels]
            bins = self._dataset(encoded.M, encoded.event, cat_idx, params).construct()
            cache[key] = (encoded, bins)
        encoded, bins = cache[key]
        rows, weights = draw_unit_weights(encoded.codes, rng)
        return self._fit(encoded.take(rows), weights, bins)

    def _fit(self, data: "_Encoded", weights: np.ndarray | None, bins=None) -> "BoostedSurvivalTrees":
        s = self.settings
        if not data.event.any():
            raise ModelError("the life table holds no failure; boosted trees need at least one failure to fit.")
        covariates, levels, M, codes = data.covariates, data.levels, data.M, data.codes
        if not covariates:
            raise ModelError("the life table has no covariates; list some under [fleet] covariates.")
        cat_idx = [covariates.index(c) for c in levels]
        # Every seed drawn up front from one generator.
        rng = np.random.default_rng(self.seed)
        fold_seed, lgb_seed, bag_seed = (int(v) for v in rng.integers(0, 2**31 - 1, size=3))
        params = self._lgb_params(lgb_seed, covariates, levels)

        if s.n_trees is None:
            folds = grouped_folds(codes, s.folds, np.random.default_rng(fold_seed))
            fold_curves = self._cv_curves(data, weights, folds, cat_idx, params, bag_seed)
            mean_curve = np.nanmean(fold_curves, axis=0)
            n_trees = int(np.nanargmin(mean_curve)) + 1
            self.cv_curve_, self.cv_fold_curves_ = mean_curve, fold_curves
        else:
            n_trees = int(s.n_trees)
            self.cv_curve_ = self.cv_fold_curves_ = None

        risk_sets = data.risk_sets(weights, s.ties)
        booster = lgb.Booster(params, self._dataset(M, data.event, cat_idx, params, reference=bins))
        objective = cox_objective(risk_sets, subsample=s.subsample, unit_codes=codes, seed=bag_seed)
        for _ in range(n_trees):
            booster.update(fobj=objective)
        self.booster_ = booster
        self.n_trees_ = n_trees
        self.covariates_ = covariates
        self.category_levels_ = levels
        self.fill_values_ = _fill_values(M, covariates, levels)
        eta = _training_scores(booster, len(M))
        self.baseline_ = BaselineHazard.from_risk_sets(risk_sets, eta, interpolation="linear").fit_tails(
            data.entry, data.exit, data.event, eta, weights=weights)
        return self

    def _cv_curves(self, data: "_Encoded", weights, folds, cat_idx, params, bag_seed) -> np.ndarray:
        """Held-out loss per failure after each tree, shape (n_folds, trees run).

        The folds grow their boosters in step; boosting stops once the mean
        curve has not improved for ``early_stopping_trees`` trees.
        """
        s = self.settings
        fold_runs = []
        fold_bag_seeds = np.random.default_rng(bag_seed).integers(0, 2**31 - 1, size=s.folds)
        for k in range(s.folds):
            train, held = np.flatnonzero(folds != k), np.flatnonzero(folds == k)
            fit_part, held_part = data.take(train), data.take(held)
            if not fit_part.event.any():
                continue
            rs_train = fit_part.risk_sets(None if weights is None else weights[train], s.ties)
            rs_held = held_part.risk_sets(None if weights is None else weights[held], s.ties)
            ds_train = self._dataset(fit_part.M, fit_part.event, cat_idx, params)
            booster = lgb.Booster(params, ds_train)
            booster.add_valid(self._dataset(held_part.M, held_part.event, cat_idx, params, reference=ds_train),
                              "held_out")

            def score(raw, _data, rs=rs_held):
                return "cox_loss_per_event", heldout_loss_per_event(rs, raw), False

            objective = cox_objective(rs_train, subsample=s.subsample, unit_codes=fit_part.codes,
                                      seed=int(fold_bag_seeds[k]))
            fold_runs.append((booster, objective, score))
        if not fold_runs:
            raise ModelError("no cross-validation fold has a failure to train on; use fewer folds.")
        curves: list[list[float]] = [[] for _ in fold_runs]
        best, best_at = np.inf, 0
        for b in range(s.max_trees):
            for curve, (booster, objective, score) in zip(curves, fold_runs):
                booster.update(fobj=objective)
                curve.append(booster.eval_valid(feval=score)[0][2])
            values = [c[-1] for c in curves if np.isfinite(c[-1])]
            mean = float(np.mean(values)) if values else np.nan
            if mean < best:
                best, best_at = mean, b
            elif b - best_at >= s.early_stopping_trees:
                break
        return np.asarray(curves, dtype=float)

    # -- prediction -----------------------------------------------------------
    def _check_fitted(self) -> None:
        if self.booster_ is None:
            raise ModelError("the boosted model is not fitted yet; call fit(table) or load a saved model first.")

    def _matrix(self, X: pd.DataFrame) -> np.ndarray:
        self._check_fitted()
        try:
            M = encode_covariates(X, self.covariates_, self.category_levels_)
        except KeyError as exc:
            raise ModelError(str(exc.args[0])) from exc
        for col, value in self.fill_values_.items():
            j = self.covariates_.index(col)
            gap = np.isnan(M[:, j])
            if gap.any():
                M[gap, j] = value
        return M

    def log_risk(self, X: pd.DataFrame) -> np.ndarray:
        """Log relative risk ``eta(x)``, shape (n,), the sum of the trees."""
        M = self._matrix(X)
        return self.booster_.predict(M, raw_score=True, num_threads=int(self.settings.threads))

    def risk_score(self, X: pd.DataFrame) -> np.ndarray:
        """Relative risk ``exp(eta(x))``, shape (n,); higher fails sooner."""
        return np.exp(self.log_risk(X))

    def fail_probabilities(self, X: pd.DataFrame, age: np.ndarray, horizons_days) -> np.ndarray:
        """P(fail within each horizon | working at ``age``), shape (n, H); ``X`` scored once."""
        return self.score_units(X, age, horizons_days)[1]

    def score_units(self, X: pd.DataFrame, age: np.ndarray, horizons_days) -> tuple[np.ndarray, np.ndarray]:
        """``(eta (n,), P(fail within each horizon) (n, H))``; the trees run once."""
        eta = self.log_risk(X)
        age = np.asarray(age, float)
        return eta, np.column_stack([self.baseline_.fail_probability(eta, age, float(h)) for h in horizons_days])

    def cumulative_hazard_at(self, X: pd.DataFrame, ages: np.ndarray) -> np.ndarray:
        """``H(age_i | x_i) = exp(eta(x_i)) H0(age_i)``, shape (n,); ages in days."""
        return self.baseline_.cumulative_hazard_at(self.log_risk(X), np.asarray(ages, float))

    def cumulative_hazard(self, X: pd.DataFrame, times: np.ndarray) -> np.ndarray:
        """``H(t_j | x_i)`` on a shared grid of days, shape (n, m)."""
        eta = self.log_risk(X)[:, None]
        return self.baseline_.cumulative_hazard_at(eta, np.asarray(times, float)[None, :])

    def contributions(self, X: pd.DataFrame) -> pd.DataFrame:
        """TreeSHAP contributions to ``eta``, shape (n, p), columns = covariates.

        Each row plus the bias (same for every row, in ``frame.attrs["bias"]``,
        shape (n,)) adds up to :meth:`log_risk`.
        """
        M = self._matrix(X)
        contrib = self.booster_.predict(M, pred_contrib=True, num_threads=int(self.settings.threads))
        frame = pd.DataFrame(contrib[:, :-1], columns=list(self.covariates_), index=X.index)
        frame.attrs["bias"] = contrib[:, -1].copy()
        return frame

    def unfitted_copy(self, seed: int) -> "BoostedSurvivalTrees":
        """Same settings, new seed, ``B`` fixed to the fitted ``n_trees_`` (no re-tuning)."""
        n_trees = self.n_trees_ if self.n_trees_ is not None else self.settings.n_trees
        return BoostedSurvivalTrees(replace(self.settings, n_trees=n_trees), seed=seed)

    # -- saving -------------------------------------------------------------
    def save(self, folder: Path) -> list[Path]:
        """Write the trees (LightGBM text), the baseline and the settings as JSON.

        Returns the three paths. Never pickles.
        """
        self._check_fitted()
        folder = Path(folder)
        info = {
            "format_version": FORMAT_VERSION,
            "model": self.name,
            "seed": self.seed,
            "settings": asdict(self.settings),
            "n_trees": self.n_trees_,
            "covariates": list(self.covariates_),
            "category_levels": self.category_levels_,
            "fill_values": dict(self.fill_values_),
            "cv_curve": None if self.cv_curve_ is None else [_finite(v) for v in self.cv_curve_],
            "cv_fold_curves": None if self.cv_fold_curves_ is None
            else [[_finite(v) for v in row] for row in self.cv_fold_curves_],
        }
        return [
            _atomic.write_text(folder / TREES_FILE, self.booster_.model_to_string()),
            _atomic.write_json(folder / BASELINE_FILE, self.baseline_.to_dict()),
            _atomic.write_json(folder / SETTINGS_FILE, info),
        ]

    @classmethod
    def load(cls, folder: Path) -> "BoostedSurvivalTrees":
        """Read a model written by :meth:`save`. Prediction works at once;
        to continue training, pass the objective again (LightGBM's text format
        does not keep a custom objective)."""
        folder = Path(folder)
        for name in (TREES_FILE, BASELINE_FILE, SETTINGS_FILE):
            if not (folder / name).is_file():
                raise BundleError(f"{folder / name} is missing; the saved boosted model is incomplete.")
        try:
            info = json.loads((folder / SETTINGS_FILE).read_text(encoding="utf-8"))
            baseline = json.loads((folder / BASELINE_FILE).read_text(encoding="utf-8"))
        except json.JSONDecodeError as exc:
            raise BundleError(f"{folder}: a JSON file of the boosted model is not valid JSON: {exc}.") from exc
        if info.get("format_version") != FORMAT_VERSION:
            raise BundleError(
                f"{folder / SETTINGS_FILE}: format_version {info.get('format_version')!r} is not "
                f"{FORMAT_VERSION}; refit the model with this wearcast version."
            )
        model = cls(BoostSettings(**info["settings"]), seed=info["seed"])
        model.booster_ = lgb.Booster(model_str=(folder / TREES_FILE).read_text(encoding="utf-8"))
        model.n_trees_ = int(info["n_trees"])
        model.covariates_ = tuple(info["covariates"])
        model.category_levels_ = {k: list(v) for k, v in info["category_levels"].items()}
        # saved before fill values existed: LightGBM's own rule throughout
        model.fill_values_ = {str(k): float(v) for k, v in (info.get("fill_values") or {}).items()}
        curve = info.get("cv_curve")
        model.cv_curve_ = None if curve is None else np.asarray(curve, dtype=float)
        fold_curves = info.get("cv_fold_curves")
        model.cv_fold_curves_ = None if fold_curves is None else np.asarray(fold_curves, dtype=float)
        model.baseline_ = _load_baseline(baseline, folder / BASELINE_FILE)
        return model


@dataclass(frozen=True)
class _Encoded:
    """A life table as the booster sees it: covariate matrix ``M`` (n, p)
    (categoricals as codes of ``levels``), ages and failures (n,), unit codes
    (n,); :meth:`take` selects rows without going back to pandas."""

    covariates: tuple[str, ...]
    levels: dict[str, list[str]]
    M: np.ndarray
    entry: np.ndarray
    exit: np.ndarray
    event: np.ndarray
    codes: np.ndarray
    #: ``(ages, entry_rank, exit_rank)``: the sorted distinct ages of the table taken from and
    #: the rows' ranks in them (see ``prepare_risk_sets(age_ranks=)``); None: sort afresh
    age_ranks: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    @classmethod
    def of(cls, table, *, with_ranks: bool = False) -> "_Encoded":
        covariates = tuple(table.covariates)
        levels = category_levels(table.X, table.categorical)
        return cls(covariates, levels, encode_covariates(table.X, covariates, levels),
                   table.entry, table.exit, table.event, table.unit_codes(),
                   age_ranks_of(table.entry, table.exit) if with_ranks else None)

    def take(self, rows: np.ndarray) -> "_Encoded":
        ranks = None if self.age_ranks is None else (self.age_ranks[0], *(r[rows] for r in self.age_ranks[1:]))
        return _Encoded(self.covariates, self.levels, self.M[rows], self.entry[rows], self.exit[rows],
                        self.event[rows], self.codes[rows], ranks)

    def risk_sets(self, weights, ties: str):
        return prepare_risk_sets(self.entry, self.exit, self.event, weights=weights, ties=ties,
                                 age_ranks=self.age_ranks)


def _training_scores(booster: lgb.Booster, n: int) -> np.ndarray:
    """Final raw scores of the training rows, shape (n,), read from the scores
    LightGBM keeps while boosting (public ``eval_train`` hands them to a custom
    metric), which saves predicting the training set again."""
    captured = []

    def grab(raw, _data):
        captured.append(np.array(raw, dtype=float))
        return "scores", 0.0, False

    booster.eval_train(feval=grab)
    if not captured or captured[0].shape != (n,):  # pragma: no cover - LightGBM API change
        raise ModelError("could not read the training scores back from LightGBM")
    return captured[0]


def _fill_values(M: np.ndarray, covariates, levels) -> dict[str, float]:
    """Training median of each numeric covariate with no missing value in ``M`` (n, p)."""
    out = {}
    for j, col in enumerate(covariates):
        if col not in levels and len(M) and not np.isnan(M[:, j]).any():
            out[col] = float(np.median(M[:, j]))
    return out


def _finite(value: float) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None


# -- baseline hazard ------------------------------------------------------------
def _load_baseline(data: dict, path: Path) -> BaselineHazard:
    try:
        return BaselineHazard.from_dict(data)
    except (ValueError, KeyError, TypeError) as exc:
        raise BundleError(f"{path}: {exc}. The saved model is damaged; save it again from a fitted model.") from exc
