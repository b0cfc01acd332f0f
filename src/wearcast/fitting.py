"""The fit stage: candidates, cross-validated choice, comparison, final fits, bundles.

``fit_models(table, config, out_dir)``:

1. builds the candidates (:mod:`wearcast.selection`; fewer for small fleets,
   or the model pinned in ``[model] choose``), always with the Cox baseline;
2. scores them with unit-grouped K-fold cross-validation
   (:func:`wearcast.validation.cross_validate`), boosted trees choosing their
   number of trees inside each fold;
3. chooses one with the constant-score and calibration guards and the
   one-standard-error rule, on the time-dependent C when the table has
   start/stop rows and on the truncation-aware C otherwise
   (:func:`run_choice`; :class:`ChosenModel` runs the same choice inside an
   as-of backtest);
4. compares every candidate with the Cox baseline (bootstrap intervals,
   paired differences) and writes ``metrics.json``, ``comparison.csv``,
   ``candidates.csv`` and ``calibration.csv``;
5. fits the chosen model and the models listed in ``[model] fit`` on all the
   data and saves each as a bundle under ``models/<candidate>/``; writes the
   boosted cross-validation curve, the forest's out-of-bag curve and the
   drivers' overall importance when those models exist. Each final fit's seed
   comes from the candidate's name (:func:`final_fit_seed`), so the fit list
   moves no model's results.

A candidate whose fit cannot be trusted (today: a Cox fit that does not
converge, :class:`wearcast.exceptions.CoxConvergenceError`) is left out and
marked failed, with the reason, in the candidates table; the run goes on with
the others. :func:`fit_warnings` words what the planner must know (a failed
candidate, no candidate calibrated, a C below 0.5, units with missing values)
for the terminal and the top of report.html.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from wearcast import _atomic
from wearcast._seeds import name_seed
from wearcast.config import Config
from wearcast.exceptions import ConfigError, CoxConvergenceError
from wearcast.lifetable import LifeTable
from wearcast.metrics import horizon_calibration
from wearcast.models.base import SurvivalModel
from wearcast.selection import CANDIDATE_ORDER, Choice, as_dict, candidate_names, choose, pinned
from wearcast.validation import (
    choice_concordance,
    compare_models,
    constant_score_models,
    cross_validate,
    format_table,
    write_comparison,
)

MODELS_DIR = "models"


def config_model_names(config: Config) -> list[str]:
    """Map ``[model] fit`` entries (boosted, forest, cox) to candidate names."""
    return [candidate_for(name, config) for name in config.model.fit]


def candidate_for(name: str, config: Config) -> str:
    """The candidate name for a model name of the config (boosted, forest, cox or a candidate)."""
    if name in CANDIDATE_ORDER:
        return name
    if name == "boosted":
        return f"boosted_d{config.model.boosted.tree_depth}"
    if name == "forest":
        return "forest_bagging" if config.model.forest.mode == "bagging" else "forest_sqrt"
    if name == "cox":
        return "cox"
    raise ConfigError(
        f"{config.source}: model {name!r} is not known; use boosted, forest, cox or one of "
        f"{', '.join(CANDIDATE_ORDER)}."
    )


#: Inside the selection's outer folds, boosted candidates choose B by at most this many
#: inner folds (the final fit uses [model.boosted] folds): nested CV costs folds x inner folds fits.
SELECTION_INNER_FOLDS = 3


def make_model(name: str, config: Config, seed: int, *, inner_folds: int | None = None) -> SurvivalModel:
    """An unfitted model for a candidate name, with the config's settings.

    ``inner_folds`` caps the folds boosted trees use to choose their number of trees."""
    if name == "cox":
        from wearcast.models.cox import CoxBaseline

        return CoxBaseline(seed=seed)
    if name.startswith("boosted_d"):
        from wearcast.models.boosted import BoostedSurvivalTrees

        depth = int(name.removeprefix("boosted_d"))
        section = dataclasses.replace(config.model.boosted, tree_depth=depth, max_leaves=None)
        if inner_folds is not None:
            section = dataclasses.replace(section, folds=min(section.folds, inner_folds))
        return BoostedSurvivalTrees.from_config(section, seed)
    if name in ("forest_bagging", "forest_sqrt"):
        from wearcast.models.forest import SurvivalForest

        mode = "bagging" if name == "forest_bagging" else "random_forest"
        section = dataclasses.replace(config.model.forest, mode=mode)
        return SurvivalForest.from_config(section, seed)
    return make_model(candidate_for(name, config), config, seed, inner_folds=inner_folds)


@dataclass
class FitOutcome:
    """What the fit stage produced. ``models``: candidate name -> fitted model."""

    chosen: str
    choice: Choice
    models: dict[str, SurvivalModel]
    comparison: pd.DataFrame
    files: dict[str, str] = field(default_factory=dict)
    failed: dict[str, str] = field(default_factory=dict)  # candidate -> why it was left out
    missing: dict = field(default_factory=dict)  # missing_values(table)
    warnings: list[str] = field(default_factory=list)  # fit_warnings(...), plain words

    @property
    def main_model(self) -> SurvivalModel:
        return self.models[self.chosen]


def stage_seeds(seed: int) -> tuple[int, int, int]:
    """``(cross-validation, comparison, final fits)`` seeds of a fit stage run with ``seed``."""
    rng = np.random.default_rng(seed)
    cv_seed, compare_seed, fit_seed = (int(s) for s in rng.integers(0, 2**31 - 1, size=3))
    return cv_seed, compare_seed, fit_seed


def final_fit_seed(fit_seed: int, name: str) -> int:
    """The final fit's seed of candidate ``name``: from the name, so the fit list moves no other model."""
    return name_seed(fit_seed, name)


def run_choice(table: LifeTable, config: Config, cv_seed: int):
    """Cross-validate the candidates on ``table`` and choose: ``(CVResult, Choice)``. Writes nothing.

    A Cox candidate whose fit does not converge in a fold is left out (unless pinned) and
    listed with its reason in the choice's ``failed`` column."""
    pin = None if config.model.choose == "auto" else candidate_for(config.model.choose, config)
    if pin is None:
        names, note = candidate_names(table.n_failures, len(table.covariates))
        names = list(names)
    else:
        names, note = ["cox", pin], None
    names = list(dict.fromkeys(["cox", *names]))
    # only the settings matter: cross_validate gives every (fold, candidate) fit its own seed
    candidates = {name: make_model(name, config, cv_seed, inner_folds=SELECTION_INNER_FOLDS) for name in names}

    horizons = sorted({int(h) for h in config.validation.horizons_days})
    failed: dict[str, str] = {}
    while True:
        try:
            cv = cross_validate(candidates, table, k=config.validation.folds, seed=cv_seed, horizons_days=horizons,
                                jobs=config.validation.jobs)
            break
        except CoxConvergenceError as exc:
            if "cox" not in candidates or len(candidates) == 1 or pin == "cox":
                raise
            failed["cox"] = f"fit did not converge in a cross-validation fold: {_reason(exc)}"
            candidates = {k: v for k, v in candidates.items() if k != "cox"}
    summary = cv.summary.set_index("model")
    main_h = max(horizons)
    # start/stop rows: rank on the time-dependent C (readings in force at each failure)
    concordance = choice_concordance(cv.time_dependent)
    c_col = concordance[0]
    choice_input = pd.DataFrame({
        "c_mean": summary[c_col],
        "c_se": summary[f"{c_col}_se"],
        "expected_failures": summary[f"expected_failures_{main_h}d"],
        "observed_failures": summary[f"observed_failures_{main_h}d"],
        "constant_score": pd.Series(constant_score_models(cv)),
    })
    if pin is None:
        choice = choose(choice_input, calibration_share=config.validation.calibration_share, note=note,
                        concordance=concordance)
    else:
        choice = pinned(pin, choice_input, concordance)
    return cv, _with_failed(choice, failed)


def fit_models(table: LifeTable, config: Config, out_dir: Path, *, seed: int | None = None) -> FitOutcome:
    """Run the fit stage on ``table``; write its files into ``out_dir``."""
    out_dir = Path(out_dir)
    seed = config.model.seed if seed is None else seed
    cv_seed, compare_seed, fit_seed = stage_seeds(seed)
    cv, choice = run_choice(table, config, cv_seed)
    failed = {str(name): str(why) for name, why in choice.candidates["failed"].items() if why}
    missing = missing_values(table)
    main_h = max(cv.horizons_days)

    resampled = (None if config.validation.bootstrap_metrics == "all"
                 else ("c_harrell", "c_truncation", "c_time_dependent"))
    comparison = compare_models(cv, bootstrap=config.validation.bootstrap, seed=compare_seed,
                                resampled_columns=resampled, jobs=config.validation.jobs)
    calibration = _calibration(cv, [choice.name, "cox"], main_h)

    to_fit = list(dict.fromkeys([choice.name, *config_model_names(config)]))
    fit_seeds = [final_fit_seed(fit_seed, name) for name in to_fit]
    golden = golden_rows(table)
    n_jobs = -1 if config.validation.jobs == 0 else max(1, config.validation.jobs)
    models = [make_model(name, config, int(s)) for name, s in zip(to_fit, fit_seeds)]
    if n_jobs == 1 or len(models) == 1:
        done = [_fit(m, table) for m in models]
    else:
        done = Parallel(n_jobs=n_jobs)(delayed(_fit)(m, table) for m in models)
    fitted: dict[str, SurvivalModel] = {}
    for name, (model, error) in zip(to_fit, done):
        if error is None:
            fitted[name] = model
        elif name == choice.name or not isinstance(error, CoxConvergenceError):
            raise error
        else:
            failed.setdefault(name, f"final fit on all units did not converge: {_reason(error)}")
    choice = _with_failed(choice, failed)
    warnings = fit_warnings(choice, failed, missing)
    extra = {"choice": as_dict(choice), "calibration": calibration.to_dict(orient="records"),
             "failed_candidates": dict(failed), "missing_values": missing, "warnings": warnings}
    files: dict[str, str] = {path.stem: str(path) for path in write_comparison(cv, out_dir, comparison, extra)}
    files["candidates"] = str(_atomic.write_csv(out_dir / "candidates.csv",
                                                choice.candidates.reset_index(names="candidate")))
    files["calibration"] = str(_atomic.write_csv(out_dir / "calibration.csv", calibration))
    for name, model in fitted.items():
        _save_bundle(model, out_dir / MODELS_DIR / name, golden)
    files.update(_model_side_files(fitted, choice.name, golden, out_dir))
    files.update(_readable_summary(fitted[choice.name], golden, out_dir))
    return FitOutcome(choice.name, choice, fitted, comparison, files, failed, missing, warnings)


def _reason(exc: Exception) -> str:
    return str(exc).removeprefix("cox: ")


def _with_failed(choice: Choice, failed: dict[str, str]) -> Choice:
    """The choice with a ``failed`` column (the reason, "" when the candidate was fitted) and a row,
    not eligible, for each candidate left out."""
    table = choice.candidates.copy()
    table["failed"] = [failed.get(str(name), "") for name in table.index]
    for col in ("eligible", "within_1se"):
        if col in table.columns:
            table.loc[table["failed"] != "", col] = False
    extra = [name for name in failed if name not in table.index]
    if extra:
        rows = pd.DataFrame({"failed": [failed[n] for n in extra]}, index=pd.Index(extra))
        for col in ("eligible", "within_1se"):
            if col in table.columns:
                rows[col] = False
        table = pd.concat([table, rows]) if len(table) else rows
    return dataclasses.replace(choice, candidates=table)


def missing_values(table: LifeTable) -> dict:
    """Units in service (every unit when none is) with a covariate value missing:
    ``{"units": n, "by_covariate": {covariate: n, ...}, "examples": [unit ids, at most 5]}``;
    covariates with none are left out."""
    rows = golden_rows(table)
    if not table.covariates or not rows.n_rows:
        return {"units": 0, "by_covariate": {}, "examples": []}
    gaps = rows.X.isna()
    units = rows.frame["unit_id"].astype(str)
    by = {str(col): int(units[gaps[col].to_numpy()].nunique()) for col in table.covariates if gaps[col].any()}
    hit = gaps.any(axis=1).to_numpy()
    return {"units": int(units[hit].nunique()), "by_covariate": by,
            "examples": sorted(units[hit].unique())[:5]}


def fit_warnings(choice: Choice, failed: dict[str, str], missing: dict) -> list[str]:
    """What the planner must read before the numbers, in plain words (one sentence or two each)."""
    out = [f"The {name} model was left out: its {reason}" + ("" if reason.endswith(".") else ".")
           for name, reason in failed.items()]
    table = choice.candidates
    if "eligible" in table.columns and not table["eligible"].fillna(False).astype(bool).any():
        out.append(f"{choice.reason[0].upper()}{choice.reason[1:]}")  # says it is a fallback, and which
    c = table["c_mean"].get(choice.name) if "c_mean" in table.columns else None
    if c is not None and np.isfinite(c) and c < 0.5:
        out.append(f"The chosen model {choice.name} ranks held-out units worse than chance (cross-validated "
                   f"C {c:.3f}, below 0.5). Do not use its ranking to plan work; check the export and covariates.")
    if missing.get("units"):
        cols = ", ".join(f"{col} ({n})" for col, n in missing["by_covariate"].items())
        out.append(f"{missing['units']} unit(s) in service have no value yet for: {cols} (for example "
                   f"{', '.join(missing['examples'])}; often a unit with no reading yet). They are scored, not "
                   "left out; each model's rule for a missing value is in docs/models.md.")
    return out




def _readable_summary(model, fleet: LifeTable, out_dir: Path) -> dict[str, str]:
    """readable_rules.txt: a depth-3 tree summarising the chosen model over the fleet."""
    from wearcast.exceptions import ModelError
    from wearcast.models.readable import explain_with_shallow_tree

    if fleet.n_rows < 2 or not fleet.covariates:
        return {}
    try:
        summary = explain_with_shallow_tree(model, fleet, depth=3)
    except ModelError:
        return {}
    return {"readable_rules": str(_atomic.write_text(out_dir / "readable_rules.txt", summary.text() + "\n"))}


def golden_rows(table: LifeTable) -> LifeTable:
    """Rows whose predictions a bundle stores to check itself: the units in service
    (every row when none is)."""
    in_service = table.in_service()
    return in_service if in_service.n_rows else table


def _fit(model: SurvivalModel, table: LifeTable) -> tuple[SurvivalModel | None, Exception | None]:
    """``(fitted model, None)``, or ``(None, error)`` when the fit raised a ModelError."""
    from wearcast.exceptions import ModelError

    try:
        return model.fit(table), None
    except ModelError as exc:
        return None, exc


def _save_bundle(model, folder: Path, golden: LifeTable) -> None:
    from wearcast.models.bundle import write_bundle

    write_bundle(model, folder, golden.X, golden.exit)


def _calibration(cv, names, horizon: int) -> pd.DataFrame:
    """Held-out calibration by risk decile at ``horizon`` for the named models."""
    frames = []
    for name in dict.fromkeys(names):
        if name not in cv.scores:
            continue
        folds = cv.scores[name]
        cal = horizon_calibration(
            np.concatenate([s.entry for s in folds]), np.concatenate([s.exit for s in folds]),
            np.concatenate([s.event for s in folds]), np.concatenate([s.prob[horizon] for s in folds]),
            horizon, np.concatenate([s.entry for s in folds]),
        )
        frames.append(cal.groups.assign(model=name, horizon_days=horizon))
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()


def _model_side_files(fitted: dict, chosen: str, golden: LifeTable, out_dir: Path) -> dict[str, str]:
    files = {}
    for name, model in fitted.items():
        curve = getattr(model, "cv_curve_", None)
        if name.startswith("boosted") and curve is not None and "cv_curve" not in files:
            frame = pd.DataFrame({"trees": np.arange(1, len(curve) + 1), "heldout_loss": curve})
            files["cv_curve"] = str(_atomic.write_csv(out_dir / "cv_curve.csv", frame))
        oob = getattr(model, "oob_curve_", None)
        if name.startswith("forest") and oob is not None and "oob_curve" not in files:
            files["oob_curve"] = str(_atomic.write_csv(out_dir / "oob_curve.csv", oob))
    try:
        contrib = fitted[chosen].contributions(golden.X)
    except NotImplementedError:
        return files
    importance = contrib.abs().mean().sort_values(ascending=False)
    frame = pd.DataFrame({"covariate": importance.index, "importance": importance.to_numpy()})
    files["importance"] = str(_atomic.write_csv(out_dir / "importance.csv", frame))
    return files


def describe_fit(outcome: FitOutcome) -> list[str]:
    """Lines for the terminal: the candidates table and the choice."""
    cols = [c for c in ("candidate", "c_mean", "c_se", "calibration_ratio", "eligible", "within_1se")
            if c in outcome.choice.candidates.reset_index(names="candidate").columns]
    table = outcome.choice.candidates.reset_index(names="candidate").loc[:, cols]
    lines = [f"candidates (unit-grouped cross-validation, c_mean = {outcome.choice.concordance_words}, "
             f"column {outcome.choice.concordance}):", format_table(table).rstrip(),
             f"choice: {outcome.choice.reason}"]
    lines += [f"warning: {text}" for text in outcome.warnings]
    comp = outcome.comparison
    shown = [c for c in comp.columns if c == "model" or (c.startswith(("c_", "brier_integrated"))
             and not c.endswith(("_vs_cox_low", "_vs_cox_high")))]
    lines += ["comparison with the Cox baseline (95 % intervals in comparison.csv):", format_table(comp[shown]).rstrip()]
    tau = comp.attrs.get("tau_days")
    if tau is not None:
        lines.append(f"Uno's C counts failures before age {tau:g} days (tau). The IPCW metrics (Uno's C, AUC, "
                     "Brier score) assume no delayed entry; read them beside the truncation-aware C.")
    return lines


class ChosenModel(SurvivalModel):
    """The model ``wearcast fit`` would ship for a table: fitting it runs the choice.

    ``fit(table)`` cross-validates the candidates on ``table`` and chooses as
    :func:`fit_models` does with the same ``seed`` (or takes the model pinned in
    ``[model] choose``, with no cross-validation), then fits the chosen
    candidate with the final-fit seed :func:`fit_models` gives it, so its
    predictions equal ``fit_models(table, config, out, seed=seed).main_model``'s.
    The as-of backtest fits one per origin. Fitted attributes: ``chosen_``
    (candidate name), ``choice_`` (:class:`~wearcast.selection.Choice`, None when
    pinned) and ``model_`` (the fitted candidate); predictions are the candidate's.
    """

    name = "chosen"

    def __init__(self, config: Config, seed: int = 0):
        self.config = config
        self.seed = int(seed)
        self.chosen_: str | None = None
        self.choice_: Choice | None = None
        self.model_: SurvivalModel | None = None

    def fit(self, table) -> "ChosenModel":
        cv_seed, _, fit_seed = stage_seeds(self.seed)
        if self.config.model.choose == "auto":
            self.choice_ = run_choice(table, self.config, cv_seed)[1]
            self.chosen_ = self.choice_.name
        else:
            self.chosen_ = candidate_for(self.config.model.choose, self.config)
        self.model_ = make_model(self.chosen_, self.config, final_fit_seed(fit_seed, self.chosen_)).fit(table)
        return self

    def _fitted(self) -> SurvivalModel:
        if self.model_ is None:
            from wearcast.exceptions import ModelError

            raise ModelError("chosen: the model is not fitted yet; call fit(table) first.")
        return self.model_

    def risk_score(self, X: pd.DataFrame) -> np.ndarray:
        return self._fitted().risk_score(X)

    def cumulative_hazard_at(self, X: pd.DataFrame, ages: np.ndarray) -> np.ndarray:
        return self._fitted().cumulative_hazard_at(X, ages)

    def cumulative_hazard(self, X: pd.DataFrame, times: np.ndarray) -> np.ndarray:
        return self._fitted().cumulative_hazard(X, times)

    def fail_probability(self, X: pd.DataFrame, age: np.ndarray, horizon_days: float) -> np.ndarray:
        return self._fitted().fail_probability(X, age, horizon_days)

    def fail_probabilities(self, X: pd.DataFrame, age: np.ndarray, horizons_days) -> np.ndarray:
        return self._fitted().fail_probabilities(X, age, horizons_days)

    def score_units(self, X: pd.DataFrame, age: np.ndarray, horizons_days):
        return self._fitted().score_units(X, age, horizons_days)

    def unfitted_copy(self, seed: int) -> "ChosenModel":
        return ChosenModel(self.config, seed)


def backtest_models(config: Config) -> dict:
    """Name -> function(seed) returning an unfitted model, for :func:`wearcast.backtest.run_backtest`:
    ``chosen`` (the choice run at each origin, or the pinned model), then the ``[model] fit``
    models and the Cox baseline, fixed."""
    names = list(dict.fromkeys(config_model_names(config) + ["cox"]))
    factories = {"chosen": lambda seed: ChosenModel(config, seed)}
    factories.update({name: (lambda seed, n=name: make_model(n, config, seed)) for name in names})
    return factories
