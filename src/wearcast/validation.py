"""Unit-grouped cross-validation and the side-by-side comparison with the Cox baseline.

What is scored: *episodes* (:func:`score_episodes`). An episode is a run of
rows of one life that ends in a failure or at the life's last row; it starts
at the first row of the life or right after the previous failure (under a
``repair`` renewal one life has one episode per failure). Scored values:
``entry`` = the episode's first entry age, ``exit`` = its last exit age,
``event`` = whether it ends in a failure, covariates = those of its last row.
Under ``replace`` renewal an episode is exactly one life.

Every model is refitted per fold on the training units only (all rows of a
unit are in one fold) and scored on the held-out units' episodes. Per fold:
Harrell's C and the truncation-aware C (age scale), Uno's C up to τ (one τ
for the whole run, so the column name can carry it), cumulative/dynamic AUC
and horizon calibration on the scale "days since the episode's entry", and the
integrated Brier score. See ``docs/metrics.md``.

Start/stop data (some life has more than one row, :func:`has_start_stop`):
the last-row scoring above judges every unit on the readings at the end of
its follow-up, so a reading that rises with wear makes a correct model look
worse than chance. There every held-out *row* is also scored with the
covariates in force on it and the fold gets ``c_time_dependent``
(:func:`wearcast.metrics.time_dependent_c`): each failure against the lives
at risk at its age, with the readings they had then; and the horizon
probabilities behind calibration and the expected failure counts are taken
with the readings in force over the window (the last one held to its end,
:mod:`wearcast._metrics_in_force`) instead of the last row's throughout.
:func:`choice_concordance` says which C the model choice and the promotion
gate use. Episodes and folds live in :mod:`wearcast.episodes`.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from wearcast import _atomic
from wearcast._metrics_concordance import truncated_concordance_counts
from wearcast._metrics_in_force import in_force_probability, window_ends
from wearcast._seeds import name_seed
from wearcast.episodes import (  # noqa: F401 - re-exported: validation is where callers look
    TIME_DEPENDENT_WORDS,
    TRUNCATION_WORDS,
    Episodes,
    choice_concordance,
    grouped_folds,
    has_start_stop,
    row_episodes,
    score_episodes,
    split_fold,
)
from wearcast.exceptions import ModelError
from wearcast.lifetable import LifeTable
from wearcast.metrics import (
    IPCW_ENTRY_NOTE,
    time_dependent_c,
    choose_tau,
    horizon_calibration,
    integrated_brier,
    percentile_interval,
    time_dependent_auc,
    unit_resamples,
    uno_c,
)
from wearcast.models.base import SurvivalModel

BASELINE = "cox"


# -- cross-validation ------------------------------------------------------------------
@dataclass
class RowScores:
    """Every held-out row of a start/stop fold, scored with its own covariates; shape (n_rows,)."""

    entry: np.ndarray
    exit: np.ndarray
    event: np.ndarray
    units: np.ndarray
    risk: np.ndarray


@dataclass
class FoldScores:
    """Held-out arrays of one fold and one model (episodes of the test units)."""

    entry: np.ndarray
    exit: np.ndarray
    event: np.ndarray
    units: np.ndarray
    risk: np.ndarray
    prob: dict[int, np.ndarray]  # horizon_days -> P(fail within h of entry), shape (n,)
    survival: np.ndarray  # S(t | x) on CVResult.brier_times, shape (n, m)
    train_exit: np.ndarray
    train_event: np.ndarray
    train_window: np.ndarray  # training episodes' exit - entry (days), for the AUC's censoring weights
    rows: RowScores | None = None  # start/stop data only: every held-out row (time-dependent C)


@dataclass
class CVResult:
    """Per-fold metrics, their mean ± standard error, and the held-out scores.

    ``per_fold``: one row per (fold, model) with the metric columns;
    ``summary``: one row per model with ``<metric>`` (mean over folds; counts
    are summed) and ``<metric>_se`` (standard error over folds);
    ``scores[model][fold]``: the :class:`FoldScores` behind them;
    ``folds``: the (train_rows, test_rows) pairs used; ``time_dependent``:
    the table has start/stop rows and the summary carries ``c_time_dependent``.
    """

    models: list[str]
    k: int
    seed: int
    horizons_days: list[int]
    tau_days: float
    brier_times: np.ndarray
    per_fold: pd.DataFrame
    summary: pd.DataFrame
    scores: dict[str, list[FoldScores]] = field(repr=False)
    folds: list[tuple[np.ndarray, np.ndarray]] = field(repr=False, default_factory=list)
    notes: list[str] = field(default_factory=list)
    time_dependent: bool = False


def _uno_column(tau: float) -> str:
    return f"c_uno_tau_{int(round(tau))}d"


def metric_columns(horizons_days, tau_days: float, time_dependent: bool = False) -> list[str]:
    """Metric column names in output order (``c_time_dependent`` only for start/stop data)."""
    cols = ["c_harrell", "c_truncation", *(["c_time_dependent"] if time_dependent else []), _uno_column(tau_days)]
    cols += [f"auc_{h}d" for h in horizons_days]
    cols += ["brier_integrated"]
    for h in horizons_days:
        cols += [f"expected_failures_{h}d", f"observed_failures_{h}d", f"calibration_slope_{h}d"]
    return cols


_SUMMED = ("expected_failures_", "observed_failures_")


def fold_metrics(s: FoldScores, horizons_days, tau_days: float, brier_times: np.ndarray) -> dict[str, float]:
    """All metric columns for one fold's held-out scores."""
    out = _concordance_only(s, horizons_days, tau_days, brier_times)
    out[_uno_column(tau_days)] = uno_c(s.train_exit, s.train_event, s.exit, s.event, s.risk, tau=tau_days).c
    window = s.exit - s.entry
    aucs = time_dependent_auc(s.train_window, s.train_event, window, s.event, s.risk, horizons_days)
    for h in horizons_days:
        out[f"auc_{h}d"] = aucs[float(h)]
    out["brier_integrated"] = integrated_brier(s.train_exit, s.train_event, s.exit, s.event, s.survival, brier_times)
    for h in horizons_days:
        cal = horizon_calibration(s.entry, s.exit, s.event, s.prob[h], h, s.entry)
        out[f"expected_failures_{h}d"] = cal.expected
        out[f"observed_failures_{h}d"] = cal.observed
        out[f"calibration_slope_{h}d"] = cal.slope
    return out


def cross_validate(
    models: Mapping[str, SurvivalModel],
    table: LifeTable,
    k: int = 5,
    seed: int = 0,
    horizons_days=(90, 365),
    *,
    tau_days: float | None = None,
    brier_points: int = 20,
    jobs: int = 1,
) -> CVResult:
    """Fit each model's ``unfitted_copy`` on the training units of each of ``k``
    unit-grouped folds and score the held-out units' episodes.

    ``models``: name -> model (fitted or not; only its settings are used).
    ``horizons_days``: calibration and AUC windows (days after the episode's
    entry). ``tau_days``: Uno's τ; by default chosen once from all episodes
    (:func:`wearcast.metrics.choose_tau`). Seeds for the folds and for every
    (fold, model) refit are drawn up front from ``numpy.random.default_rng(seed)``,
    each model's from its name (:func:`wearcast._seeds.name_seed`, so the list of
    models moves no model's results), so ``jobs`` (parallel worker processes for the fits; 0 = all cores) never
    changes a result.
    """
    if not models:
        raise ValueError("cross_validate needs at least one model")
    if table.n_failures == 0:
        raise ModelError("the life table has no failures, so models cannot be compared; "
                         "check the failure event kinds in [fleet] failure_kinds.")
    horizons = [int(h) for h in horizons_days]
    names = list(models)
    rng = np.random.default_rng(seed)
    fold_seed, model_base = (int(v) for v in rng.integers(0, 2**31 - 1, size=2))
    # each (fold, model) seed from the model's name: the candidate list moves no model's results
    model_seeds = np.array([[name_seed(model_base, name, i) for name in names] for i in range(k)], np.int64)
    folds = grouped_folds(table, k, fold_seed)
    episodes = score_episodes(table)
    start_stop = len(episodes) < table.n_rows
    row_episode = row_episodes(table) if start_stop else None
    if tau_days is None:
        tau_days = choose_tau(episodes.exit, episodes.event, episodes.exit)
    tau_days = float(tau_days)
    low = float(np.quantile(episodes.exit[episodes.event], 0.1))
    brier_times = np.unique(np.linspace(min(low, tau_days * 0.5), tau_days, brier_points).round(1))
    scores: dict[str, list[FoldScores]] = {name: [] for name in names}
    rows = []
    held_out = []
    tasks = []
    for i, (train_rows, test_rows) in enumerate(folds):
        train_table, test_ep, train_ep = split_fold(table, episodes, train_rows, test_rows)
        X_test = table.X.iloc[test_ep.rows].reset_index(drop=True)
        rows_in = None
        if start_stop:
            # every held-out row, with the position of its episode among the held-out episodes
            local = np.full(len(episodes), -1, np.int64)
            held = np.zeros(table.n_rows, bool)
            held[test_rows] = True
            local[held[episodes.rows]] = np.arange(len(test_ep))
            rows_in = (table.X.iloc[test_rows].reset_index(drop=True), table.entry[test_rows],
                       table.exit[test_rows], local[row_episode[test_rows]], np.isin(test_rows, test_ep.rows))
        held_out.append((test_ep, train_ep, test_rows))
        for j, name in enumerate(names):
            tasks.append(delayed(_fit_and_predict)(models[name], int(model_seeds[i, j]), train_table, X_test,
                                                   test_ep.entry, horizons, brier_times, rows_in))
    n_jobs = -1 if jobs == 0 else max(1, int(jobs))
    results = iter(Parallel(n_jobs=n_jobs)(tasks) if n_jobs != 1 else [t[0](*t[1], **t[2]) for t in tasks])
    unit_ids = table.frame["unit_id"].to_numpy().astype(str)
    for i, (test_ep, train_ep, test_rows) in enumerate(held_out):
        for name in names:
            risk, prob, survival, row_risk = next(results)
            rows_scored = None if row_risk is None else RowScores(
                table.entry[test_rows], table.exit[test_rows], table.event[test_rows], unit_ids[test_rows], row_risk)
            s = FoldScores(
                entry=test_ep.entry,
                exit=test_ep.exit,
                event=test_ep.event,
                units=test_ep.unit_id,
                risk=risk,
                prob=prob,
                survival=survival,
                train_exit=train_ep.exit,
                train_event=train_ep.event,
                train_window=train_ep.exit - train_ep.entry,
                rows=rows_scored,
            )
            scores[name].append(s)
            rows.append({"fold": i + 1, "model": name, "units": len(np.unique(s.units)), "episodes": len(s.exit),
                         **fold_metrics(s, horizons, tau_days, brier_times)})
    per_fold = pd.DataFrame(rows)
    columns = metric_columns(horizons, tau_days, start_stop)
    summary = _summarise(per_fold, names, columns)
    notes = [IPCW_ENTRY_NOTE, f"Uno's C is restricted to failures before age {tau_days:g} days (tau)."]
    if start_stop:
        notes.append("The life table has start/stop rows: c_time_dependent scores every held-out row with the "
                     "readings in force on it, each failure against the units at risk at its age; the other "
                     "indices score each unit on its last row.")
    return CVResult(names, k, seed, horizons, tau_days, brier_times, per_fold, summary, scores, folds, notes,
                    start_stop)


def constant_score_models(result: CVResult) -> dict[str, bool]:
    """Model name -> whether its held-out risk score was the same for every unit in every fold.

    Such a model orders nobody (a booster that kept no tree): its C is 0.5 by
    construction with no spread over folds, so the choice must not treat it as
    a candidate that ranks units at chance level.
    """
    return {name: all(len(s.risk) > 0 and np.ptp(s.risk) == 0 for s in folds)
            for name, folds in result.scores.items()}


def _fit_and_predict(template: SurvivalModel, seed: int, train_table: LifeTable, X_test: pd.DataFrame,
                     entry_test: np.ndarray, horizons, brier_times: np.ndarray, rows_in=None):
    """One (fold, model) cell: fit a fresh copy on the training units, predict the held-out ones.

    ``rows_in`` (start/stop data): ``(X, entry, exit, episode, last row)`` of every held-out row; each row
    is then scored with its own covariates, and the horizon probabilities are taken with the
    readings in force over the window (:mod:`wearcast._metrics_in_force`) instead of the last row's."""
    model = template.unfitted_copy(seed)
    model.fit(train_table)
    # one scoring pass; the metrics use the risk score only through its order (log is fine)
    risk, p = model.score_units(X_test, entry_test, horizons)
    risk, p = np.asarray(risk, float), np.asarray(p, float)
    prob = {h: p[:, j] for j, h in enumerate(horizons)}
    row_risk = None
    if rows_in is not None:
        X_rows, row_entry, row_exit, episode, last_row = rows_in
        row_risk = np.asarray(model.risk_score(X_rows), float)
        h_start = np.asarray(model.cumulative_hazard_at(X_rows, row_entry), float)
        for h in horizons:
            ends, inside = window_ends(row_entry, row_exit, entry_test[episode], h, last_row)
            h_end = np.asarray(model.cumulative_hazard_at(X_rows, ends), float)
            prob[h] = in_force_probability(h_start, h_end, inside, episode, len(entry_test))
    return risk, prob, np.asarray(model.survival(X_test, brier_times), float), row_risk


def _summarise(per_fold: pd.DataFrame, names: list[str], columns: list[str]) -> pd.DataFrame:
    out = []
    for name in names:
        part = per_fold[per_fold["model"] == name]
        row = {"model": name, "folds": len(part)}
        for col in columns:
            values = part[col].to_numpy(float)
            finite = values[np.isfinite(values)]
            if col.startswith(_SUMMED):
                row[col] = float(finite.sum()) if len(finite) else float("nan")
                row[f"{col}_se"] = float(np.sqrt(len(finite)) * finite.std(ddof=1)) if len(finite) > 1 else float("nan")
            else:
                row[col] = float(finite.mean()) if len(finite) else float("nan")
                row[f"{col}_se"] = float(finite.std(ddof=1) / np.sqrt(len(finite))) if len(finite) > 1 else float("nan")
        out.append(row)
    return pd.DataFrame(out)


# -- comparison with bootstrap intervals ------------------------------------------------
_CONCORDANCE = ("c_harrell", "c_truncation", "c_time_dependent")


def _concordance_only(s: FoldScores, horizons_days, tau_days: float, brier_times) -> dict[str, float]:
    """Harrell's and the truncation-aware C of one fold's held-out scores.

    Harrell's C goes through the counting kernel with everyone entered before the
    first exit: the same pairs as scikit-survival's (tests check the equality), much faster.
    """
    before = np.full(len(s.exit), min(0.0, float(s.exit.min(initial=0.0))) - 1.0)
    out = {"c_harrell": truncated_concordance_counts(before, s.exit, s.event, s.risk)["c"],
           "c_truncation": truncated_concordance_counts(s.entry, s.exit, s.event, s.risk)["c"]}
    if s.rows is not None:
        r = s.rows
        out["c_time_dependent"] = time_dependent_c(r.entry, r.exit, r.event, r.risk).c
    return out


def _bootstrap_frame(folds, draws_idx, bootstrap, evaluate, horizons, tau, brier_times, columns) -> pd.DataFrame:
    """One model's metric values on every bootstrap resample (rows) of the held-out units.

    ``draws_idx[f][b]``: (episode positions, row positions or None) of resample ``b`` of fold ``f``."""
    return pd.DataFrame([
        _combine([evaluate(_resampled(s, *draws_idx[f][b]), horizons, tau, brier_times)
                  for f, s in enumerate(folds)], columns)
        for b in range(bootstrap)
    ], columns=columns)


def _fold_spread_intervals(result: CVResult, name: str, baseline: str | None, columns, level: float) -> dict:
    """Normal intervals from per-fold values (and per-fold paired differences)."""
    from scipy.stats import norm

    z = float(norm.ppf(0.5 + level / 2))
    per_fold = result.per_fold.set_index(["model", "fold"])
    out = {}
    for col in columns:
        mine = per_fold.loc[name, col].to_numpy(float)
        summed = col.startswith(_SUMMED)
        out.update(_normal_interval(col, mine, summed, z))
        if baseline is None:
            out[f"{col}_vs_cox"] = out[f"{col}_vs_cox_low"] = out[f"{col}_vs_cox_high"] = np.nan
            continue
        diff = mine - per_fold.loc[baseline, col].to_numpy(float)
        d = _normal_interval(col, diff, summed, z)
        out[f"{col}_vs_{baseline}"], out[f"{col}_vs_{baseline}_low"], out[f"{col}_vs_{baseline}_high"] = (
            d[col], d[f"{col}_low"], d[f"{col}_high"])
    return out


def _normal_interval(col: str, values: np.ndarray, summed: bool, z: float) -> dict:
    finite = values[np.isfinite(values)]
    if len(finite) < 2:
        est = float(finite.sum() if summed else finite.mean()) if len(finite) else np.nan
        return {col: est, f"{col}_low": np.nan, f"{col}_high": np.nan}
    if summed:
        est, se = float(finite.sum()), float(np.sqrt(len(finite)) * finite.std(ddof=1))
    else:
        est, se = float(finite.mean()), float(finite.std(ddof=1) / np.sqrt(len(finite)))
    return {col: est, f"{col}_low": est - z * se, f"{col}_high": est + z * se}


def _resampled(s: FoldScores, idx: np.ndarray, row_idx: np.ndarray | None = None) -> FoldScores:
    rows = None
    if s.rows is not None and row_idx is not None:
        r = s.rows
        rows = RowScores(r.entry[row_idx], r.exit[row_idx], r.event[row_idx], r.units[row_idx], r.risk[row_idx])
    return FoldScores(s.entry[idx], s.exit[idx], s.event[idx], s.units[idx], s.risk[idx],
                      {h: p[idx] for h, p in s.prob.items()}, s.survival[idx], s.train_exit,
                      s.train_event, s.train_window, rows)


def _combine(fold_values: list[dict[str, float]], columns: list[str]) -> dict[str, float]:
    out = {}
    for col in columns:
        values = np.array([v[col] for v in fold_values], float)
        finite = values[np.isfinite(values)]
        if not len(finite):
            out[col] = float("nan")
        else:
            out[col] = float(finite.sum() if col.startswith(_SUMMED) else finite.mean())
    return out


def compare_models(
    result: CVResult,
    *,
    bootstrap: int = 200,
    seed: int = 0,
    baseline: str = BASELINE,
    level: float = 0.95,
    resampled_columns: Sequence[str] | None = None,
    jobs: int = 1,
) -> pd.DataFrame:
    """One row per model: every metric, its bootstrap interval and the paired
    difference against ``baseline``.

    Columns per metric ``m``: ``m`` (mean over folds; failure counts summed over
    folds), ``m_low``/``m_high`` (percentile interval at ``level`` from
    ``bootstrap`` resamples of held-out units within each fold),
    ``m_vs_cox`` (this model minus the baseline) with ``m_vs_cox_low``/``_high``
    computed on the same resamples. ``expected_failures_<h>d_pb_low/_high``:
    the Poisson-binomial interval Σp ± 1.96 √Σp(1-p) of the expected count.
    The baseline columns are NaN when ``baseline`` is not among the models.

    ``resampled_columns``: the metrics given bootstrap intervals (default: all).
    The IPCW metrics and calibration cost tens of milliseconds per fold and
    resample, so a fit stage may bootstrap only the concordance indices; the
    other metrics then get a normal interval from the spread over folds (mean
    ± z·se, and for ``_vs_cox`` the per-fold paired differences). The
    attribute ``interval_method`` of the result says which is which.
    ``jobs``: worker processes, one model each (0 = all cores); no result depends on it.
    """
    all_columns = metric_columns(result.horizons_days, result.tau_days, result.time_dependent)
    columns = all_columns if resampled_columns is None else [c for c in all_columns if c in set(resampled_columns)]
    fold_spread = [c for c in all_columns if c not in columns]
    evaluate = _concordance_only if set(columns) <= set(_CONCORDANCE) else fold_metrics
    rng = np.random.default_rng(seed)
    fold_seeds = rng.integers(0, 2**31 - 1, size=result.k)
    # the same resamples for every model (paired differences); on start/stop data the same
    # seed over the same held-out units draws the same units for the rows as for the episodes
    draws_idx = []
    for f, fold in enumerate(result.scores[result.models[0]]):
        episode_draws = unit_resamples(fold.units, bootstrap, int(fold_seeds[f]))
        row_draws = (unit_resamples(fold.rows.units, bootstrap, int(fold_seeds[f])) if fold.rows is not None
                     else [None] * bootstrap)
        draws_idx.append(list(zip(episode_draws, row_draws)))
    point = {name: result.summary.set_index("model").loc[name, columns].astype(float).to_dict()
             for name in result.models}
    n_jobs = -1 if jobs == 0 else max(1, int(jobs))
    frames = Parallel(n_jobs=n_jobs)(
        delayed(_bootstrap_frame)(result.scores[name], draws_idx, bootstrap, evaluate, result.horizons_days,
                                  result.tau_days, result.brier_times, columns)
        for name in result.models
    ) if n_jobs != 1 else [
        _bootstrap_frame(result.scores[name], draws_idx, bootstrap, evaluate, result.horizons_days,
                         result.tau_days, result.brier_times, columns) for name in result.models]
    boot = dict(zip(result.models, frames))
    has_base = baseline in result.models
    rows = []
    for name in result.models:
        row = {"model": name}
        for col in columns:
            iv = percentile_interval(point[name][col], boot[name][col].to_numpy(float), level)
            row[col], row[f"{col}_low"], row[f"{col}_high"] = iv.estimate, iv.low, iv.high
            if has_base:
                diff = boot[name][col].to_numpy(float) - boot[baseline][col].to_numpy(float)
                dv = percentile_interval(point[name][col] - point[baseline][col], diff, level)
                row[f"{col}_vs_{baseline}"], row[f"{col}_vs_{baseline}_low"], row[f"{col}_vs_{baseline}_high"] = (
                    dv.estimate, dv.low, dv.high)
            else:
                row[f"{col}_vs_{baseline}"] = row[f"{col}_vs_{baseline}_low"] = row[f"{col}_vs_{baseline}_high"] = np.nan
        row.update(_fold_spread_intervals(result, name, baseline if has_base else None, fold_spread, level))
        for h in result.horizons_days:
            p = np.concatenate([s.prob[h] for s in result.scores[name]])
            sd = float(np.sqrt(np.sum(p * (1 - p))))
            row[f"expected_failures_{h}d_pb_low"] = max(0.0, float(p.sum()) - 1.959963984540054 * sd)
            row[f"expected_failures_{h}d_pb_high"] = float(p.sum()) + 1.959963984540054 * sd
        rows.append(row)
    out = pd.DataFrame(rows)
    order = ["model"]
    for col in all_columns:
        order += [col, f"{col}_low", f"{col}_high", f"{col}_vs_{baseline}", f"{col}_vs_{baseline}_low",
                  f"{col}_vs_{baseline}_high"]
    out = out[order + [c for c in out.columns if c not in order]]
    method = {c: "bootstrap of held-out units" for c in columns}
    method.update({c: "normal interval from the spread over folds" for c in fold_spread})
    out.attrs.update({"bootstrap": bootstrap, "level": level, "tau_days": result.tau_days, "baseline": baseline,
                      "interval_method": method})
    return out


# -- output ------------------------------------------------------------------------------
def write_comparison(result: CVResult, out_dir, comparison: pd.DataFrame | None = None,
                     extra: dict | None = None) -> list[Path]:
    """Write ``metrics.json`` (per fold, summary, τ, notes, and any ``extra`` keys)
    and ``comparison.csv`` atomically into ``out_dir``; ``comparison`` defaults to
    the summary."""
    out_dir = Path(out_dir)
    table = comparison if comparison is not None else result.summary
    payload = {
        "folds": result.k,
        "seed": result.seed,
        "models": result.models,
        "horizons_days": result.horizons_days,
        "tau_days": result.tau_days,
        "brier_times_days": [float(t) for t in result.brier_times],
        "notes": result.notes,
        "per_fold": json.loads(result.per_fold.to_json(orient="records")),
        "summary": json.loads(result.summary.to_json(orient="records")),
        "comparison": json.loads(table.to_json(orient="records")),
        "bootstrap": dict(table.attrs) if comparison is not None else None,
        **(extra or {}),
    }
    return [_atomic.write_json(out_dir / "metrics.json", payload),
            _atomic.write_csv(out_dir / "comparison.csv", table)]


def format_table(df: pd.DataFrame, columns: list[str] | None = None, digits: int = 3) -> str:
    """An aligned plain-text table (text columns left, numbers right, NaN as "-")."""
    df = df if columns is None else df.loc[:, columns]
    cells = [[str(c) for c in df.columns]]
    numeric = [pd.api.types.is_numeric_dtype(df[c]) and not pd.api.types.is_bool_dtype(df[c]) for c in df.columns]
    whole = [pd.api.types.is_integer_dtype(df[c]) for c in df.columns]
    for row in df.itertuples(index=False):
        line = []
        for value, is_num, is_whole in zip(row, numeric, whole):
            if not is_num:
                line.append(str(value))
            elif not np.isfinite(value):
                line.append("-")
            else:
                line.append(f"{int(value)}" if is_whole else f"{value:.{digits}f}")
        cells.append(line)
    widths = [max(len(r[i]) for r in cells) for i in range(len(cells[0]))]
    lines = []
    for r, row in enumerate(cells):
        parts = [(cell.rjust(w) if numeric[i] and r > 0 else cell.ljust(w)) for i, (cell, w) in enumerate(zip(row, widths))]
        lines.append("  ".join(parts).rstrip())
        if r == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines) + "\n"
