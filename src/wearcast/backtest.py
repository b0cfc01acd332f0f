"""As-of backtests: fit on the data as it stood at a past date, check the next horizon.

For every origin ``D`` (the given origin and, optionally, earlier ones every N
months back):

1. rebuild the life table as it stood at ``D`` with
   ``load_export(config, as_of=D)``; nothing dated after ``D`` reaches the fit;
2. fit every model on it and predict ``P(fail within h days)`` for each unit in
   service at ``D`` (its open row; age = exit age at ``D``);
3. read the outcome from the export as it stood at ``D + h``: did that unit's
   life fail within ``(D, D + h]``? Units decommissioned in the window count as
   not failed and are censored at their decommission age for the C index.

Scores per origin and model: Harrell's C of the predicted probability against
the time to failure within the window; when the life table has start/stop rows
also the time-dependent C over the window (every row of the window scored with
the readings in force on it, each failure against the units at risk at its
age, :func:`wearcast.metrics.time_dependent_c`), which the promotion gate then
uses (:func:`gate_concordance`); expected failures Σp with the 2.5 % and
97.5 % quantiles of the Poisson-binomial count, against observed failures;
precision of the top-k list (share of the k highest-probability units that
failed) and its lift over a random list (the overall failure share), over an
"oldest first" list and over the Cox baseline's list.

With ``refits > 0`` each (origin, model) also gets the fleet forecast's own
interval, as ``wearcast rank`` reports it: bootstrap refits of the model on
the data as of ``D`` (:func:`wearcast.resample.bootstrap_refits`), the
failure-count law averaged over refits (chance and model uncertainty
together), and its 5 % and 95 % quantiles; the observed count is checked
against that 90 % interval.

Which models: :func:`wearcast.fitting.backtest_models` gives ``chosen`` (the
model choice run on the data as of each origin, as ``wearcast fit`` would run
it then, or the pinned model; column ``candidate`` says which one it picked)
beside the fixed ``[model] fit`` models and the Cox baseline. Every (origin,
model) seed comes from the model's name and the origin's date
(:func:`wearcast._seeds.name_seed`), so adding or removing a model, or an
origin, changes no other result.
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Mapping

import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast._poisson_binomial import count_pmf, pmf_quantile
from wearcast._seeds import name_seed
from wearcast.config import Config
from wearcast.exceptions import ConfigError, ModelError
from wearcast.io import load_export
from wearcast.lifetable import LifeTable
from wearcast.episodes import has_start_stop
from wearcast.metrics import harrell_c, time_dependent_c
from wearcast.models.base import SurvivalModel
from wearcast.modes import clean_modes, forecast_for_units, mode_shares
from wearcast.ranking import probability_column

BASELINE = "cox"


@dataclass
class BacktestResult:
    """Per-origin and summary scores of an as-of backtest.

    ``per_origin``: one row per (origin, model); ``summary``: one row per model
    (precision and lifts pooled over origins, counts summed, C as mean and
    standard error); ``units``: every scored unit (origin, model, unit_id, life,
    age_days, probability, failed, days_observed, mode); ``per_mode``: one row per
    (origin, model, failure mode) with the forecast by mode (:mod:`wearcast.modes`)
    against the failures of that mode in the window (empty when no mode is recorded).
    """

    horizon_days: int
    top_k: int
    origins: list[dt.date]
    per_origin: pd.DataFrame
    summary: pd.DataFrame
    units: pd.DataFrame = field(repr=False)
    seed: int = 0
    notes: list[str] = field(default_factory=list)
    per_mode: pd.DataFrame | None = None


def origin_dates(origin: dt.date, every_months: int | None, origins: int) -> list[dt.date]:
    """``origins`` dates: ``origin`` and every ``every_months`` months back, oldest first."""
    if origins < 1:
        raise ConfigError(f"a backtest needs at least one origin; got origins={origins}.")
    if origins > 1 and not every_months:
        raise ConfigError("several backtest origins need a step: set every_months (e.g. 3).")
    stamp = pd.Timestamp(origin)
    dates = [(stamp - pd.DateOffset(months=int(every_months or 0) * i)).date() for i in range(origins)]
    return sorted(dates)


def _names(horizon_days: int, top_k: int) -> dict[str, str]:
    h, k = int(horizon_days), int(top_k)
    return {
        "c": f"c_harrell_{h}d",
        "c_td": f"c_time_dependent_{h}d",
        "expected": f"expected_failures_{h}d",
        "observed": f"observed_failures_{h}d",
        "inside": f"observed_inside_interval_{h}d",
        "forecast": f"forecast_{h}d",
        "inside_forecast": f"observed_inside_forecast_{h}d",
        "share": f"failure_share_{h}d",
        "precision": f"precision_top{k}_{h}d",
        "precision_oldest": f"precision_top{k}_{h}d_oldest",
        "lift_random": f"lift_top{k}_{h}d_vs_random",
        "lift_oldest": f"lift_top{k}_{h}d_vs_oldest",
        "lift_cox": f"lift_top{k}_{h}d_vs_{BASELINE}",
    }


def window_outcomes(at_origin: LifeTable, later: LifeTable, horizon_days: float) -> pd.DataFrame:
    """Outcome within ``horizon_days`` for each in-service row of ``at_origin``.

    ``later``: the table as it stood at origin + horizon. A unit's life is
    matched on (unit_id, life). Returns unit_id, life, age_days (age at the
    origin), failed (bool: a failure of that life within the window) and
    days_observed (days of the window seen: to the failure, the end of the
    record, or the full horizon) and mode (the failure's mode, ``(not
    recorded)`` when blank, ``""`` without a failure), in the order of
    ``at_origin.in_service()``.
    """
    open_rows = at_origin.in_service().frame
    keys = pd.DataFrame({
        "unit_id": open_rows["unit_id"].to_numpy(),
        "life": open_rows["life"].to_numpy(),
        "age_days": open_rows["exit_age"].to_numpy(float),
        "_pos": np.arange(len(open_rows)),
    })
    f = later.frame[["unit_id", "life", "exit_age", "failed", "mode"]]
    joined = keys.merge(f, on=["unit_id", "life"], how="left")
    joined = joined[joined["exit_age"] > joined["age_days"]]
    first_failure = joined[joined["failed"]].sort_values("exit_age", kind="stable").groupby("_pos").head(1)
    fail_age = first_failure.set_index("_pos")["exit_age"]
    fail_mode = first_failure.set_index("_pos")["mode"]
    last_age = joined.groupby("_pos")["exit_age"].max()
    h = float(horizon_days)
    fail = keys["_pos"].map(fail_age).to_numpy(float)
    last = keys["_pos"].map(last_age).to_numpy(float)
    age = keys["age_days"].to_numpy(float)
    failed = np.isfinite(fail) & (fail <= age + h)
    seen = np.where(failed, fail - age, np.minimum(np.nan_to_num(last, nan=age), age + h) - age)
    out = keys.drop(columns="_pos")
    out["failed"] = failed
    out["days_observed"] = seen
    out["mode"] = np.where(failed, clean_modes(keys["_pos"].map(fail_mode)).to_numpy(), "")
    return out


def window_rows(at_origin: LifeTable, later: LifeTable, horizon_days: float):
    """The rows of the window ``(age at the origin, + horizon_days]`` of every life in service at the origin.

    Returns ``(X, entry, exit, event)``: the rows of ``later`` (the table as it stood at
    origin + horizon) cut to the window, each with the covariates in force on it; a row's
    failure counts only inside the window.
    """
    open_rows = at_origin.in_service().frame
    keys = pd.DataFrame({"unit_id": open_rows["unit_id"].to_numpy(), "life": open_rows["life"].to_numpy(),
                         "age_days": open_rows["exit_age"].to_numpy(float)})
    f = later.frame.assign(_pos=np.arange(later.n_rows))[["unit_id", "life", "entry_age", "exit_age", "failed",
                                                            "_pos"]]
    joined = keys.merge(f, on=["unit_id", "life"], how="inner")
    end = joined["age_days"].to_numpy(float) + float(horizon_days)
    keep = (joined["exit_age"].to_numpy(float) > joined["age_days"].to_numpy(float)) & (
        joined["entry_age"].to_numpy(float) < end)
    joined, end = joined[keep], end[keep]
    entry = np.maximum(joined["entry_age"].to_numpy(float), joined["age_days"].to_numpy(float))
    exit_ = np.minimum(joined["exit_age"].to_numpy(float), end)
    event = joined["failed"].to_numpy(bool) & (joined["exit_age"].to_numpy(float) <= end)
    X = later.X.iloc[joined["_pos"].to_numpy()].reset_index(drop=True)
    return X, entry, exit_, event


def gate_concordance(per_origin: pd.DataFrame, horizon_days: int) -> tuple[str, str]:
    """``(column, words)`` of the C the promotion gate compares: the time-dependent C over the
    window when the backtest has it (start/stop data), Harrell's C of the probabilities otherwise."""
    names = _names(horizon_days, 1)
    if names["c_td"] in per_origin and per_origin[names["c_td"]].notna().all():
        return names["c_td"], "time-dependent truncation-aware C (readings in force at each failure)"
    return names["c"], "Harrell's C of the predicted probabilities"


def _top(values: np.ndarray, k: int) -> np.ndarray:
    """Positions of the ``k`` largest values (ties: first listed first)."""
    return np.argsort(-np.asarray(values, float), kind="mergesort")[:k]


def score_origin(probability: np.ndarray, outcome: pd.DataFrame, horizon_days: int, top_k: int) -> dict:
    """Scores of one model at one origin (lifts over Cox are filled in later)."""
    names = _names(horizon_days, top_k)
    p = np.asarray(probability, float)
    failed = outcome["failed"].to_numpy(bool)
    n = len(p)
    k = min(int(top_k), n)
    share = float(failed.mean()) if n else float("nan")
    precision = float(failed[_top(p, k)].mean()) if k else float("nan")
    oldest = float(failed[_top(outcome["age_days"].to_numpy(float), k)].mean()) if k else float("nan")
    pmf = count_pmf(p) if n else np.ones(1)
    low, high = pmf_quantile(pmf, [0.025, 0.975])
    days = np.maximum(outcome["days_observed"].to_numpy(float), 1e-9)
    return {
        "units_in_service": n,
        "list_length": k,
        names["c"]: harrell_c(days, failed, p).c if n else float("nan"),
        names["expected"]: float(p.sum()),
        f"{names['expected']}_low": int(low),
        f"{names['expected']}_high": int(high),
        names["observed"]: int(failed.sum()),
        names["inside"]: bool(int(low) <= int(failed.sum()) <= int(high)),
        names["share"]: share,
        names["precision"]: precision,
        names["precision_oldest"]: oldest,
        names["lift_random"]: _ratio(precision, share),
        names["lift_oldest"]: _ratio(precision, oldest),
    }


def _ratio(a: float, b: float) -> float:
    return float(a / b) if np.isfinite(a) and np.isfinite(b) and b > 0 else float("nan")


def run_backtest(
    config: Config,
    model_factories: Mapping[str, Callable[[int], SurvivalModel]],
    origin: dt.date,
    horizon_days: int,
    every_months: int | None = None,
    origins: int = 1,
    top_k: int = 50,
    seed: int = 0,
    refits: int = 0,
    refit_jobs: int = 0,
) -> BacktestResult:
    """Run the as-of backtest described in the module docstring.

    ``model_factories``: name -> function(seed) returning an unfitted model;
    the name ``"cox"`` is the baseline for the ``_vs_cox`` lift. Seeds for
    every (origin, model) fit and its refits come from ``seed``, the model's
    name and the origin's date (:func:`wearcast._seeds.name_seed`), so the
    other models and origins listed never change them. Raises :class:`ConfigError` when an
    origin plus the horizon passes the export date (``fleet.as_of``, or the
    export's latest date when that is unset). ``refits``: bootstrap refits
    per (origin, model) for the fleet forecast's 90 % interval (0 = skip);
    ``refit_jobs``: their worker processes (0 = all cores).
    """
    if not model_factories:
        raise ValueError("run_backtest needs at least one model factory")
    horizon_days, top_k = int(horizon_days), int(top_k)
    if horizon_days < 1 or top_k < 1:
        raise ConfigError(f"horizon_days and top_k must be at least 1; got {horizon_days} and {top_k}.")
    dates = origin_dates(origin, every_months, origins)
    names = list(model_factories)
    export_end = config.fleet.as_of
    if export_end is None:
        # only the export's last date is used from this full read, never its records
        full_as_of = load_export(config).table.as_of
        export_end = None if full_as_of is None else full_as_of.date()
    rows, unit_frames, mode_rows = [], [], []
    for i, day in enumerate(dates):
        end = day + dt.timedelta(days=horizon_days)
        if export_end is not None and end > export_end:
            raise ConfigError(
                f"{config.source}: backtest origin {day} plus {horizon_days} days ends {end}, after the export "
                f"date {export_end}; choose an origin on or before {export_end - dt.timedelta(days=horizon_days)}."
            )
        fit_table = load_export(config, as_of=day).table
        _check_not_after(fit_table, day)
        later = load_export(config, as_of=end).table
        outcome = window_outcomes(fit_table, later, horizon_days)
        shares = mode_shares(fit_table, by=config.ranking.modes_by, prior_failures=config.ranking.mode_prior_failures)
        open_rows = fit_table.in_service()
        X = open_rows.X
        age = open_rows.exit
        window = window_rows(fit_table, later, horizon_days) if has_start_stop(fit_table) else None
        for name in names:
            model = model_factories[name](name_seed(seed, name, day.toordinal(), 0))
            try:
                model.fit(fit_table)
                # a chosen model's refits refit the candidate it chose (tuned choices fixed), not the choice
                forecast = {} if refits <= 0 else _forecast_interval(
                    fit_table, getattr(model, "model_", None) or model, refits,
                    name_seed(seed, name, day.toordinal(), 1), horizon_days, refit_jobs, int(outcome["failed"].sum()))
            except ModelError as exc:
                raise ModelError(f"backtest origin {day}, model {name}: {exc}") from exc
            p = np.asarray(model.fail_probability(X, age, horizon_days), float)
            td = {}
            if window is not None:
                X_w, entry_w, exit_w, event_w = window
                risk_w = np.asarray(model.risk_score(X_w), float) if len(X_w) else np.zeros(0)
                td = {_names(horizon_days, top_k)["c_td"]: time_dependent_c(entry_w, exit_w, event_w, risk_w).c}
            rows.append({"origin": day, "model": name, "candidate": getattr(model, "chosen_", None) or name,
                         "fit_rows": fit_table.n_rows, "fit_failures": fit_table.n_failures,
                         **score_origin(p, outcome, horizon_days, top_k), **td, **forecast})
            unit_frames.append(outcome.assign(origin=day, model=name, probability=p))
            mode_rows += [{"origin": day, "model": name, **r}
                          for r in mode_check(fit_table, shares, p, outcome, horizon_days, config.ranking.modes_by)]
    per_origin = pd.DataFrame(rows)
    per_mode = pd.DataFrame(mode_rows, columns=["origin", "model", *MODE_COLUMNS])
    _add_cox_lift(per_origin, horizon_days, top_k)
    units = pd.concat(unit_frames, ignore_index=True)[
        ["origin", "model", "unit_id", "life", "age_days", "probability", "failed", "days_observed", "mode"]]
    summary = _summarise(per_origin, names, horizon_days, top_k)
    if not per_mode.empty:
        cells = per_mode.groupby("model", sort=False)["inside_chance"].agg(["size", "sum"])
        summary["mode_cells"] = summary["model"].map(cells["size"]).fillna(0).astype(int)
        summary["mode_cells_inside_chance"] = summary["model"].map(cells["sum"]).fillna(0).astype(int)
    notes = [f"Outcomes: failures recorded within {horizon_days} days after each origin; models fitted only on "
             "records dated on or before the origin."]
    return BacktestResult(horizon_days, top_k, dates, per_origin, summary, units, seed, notes, per_mode)


MODE_COLUMNS = ["mode", "expected_failures", "chance_only_low", "chance_only_high", "observed_failures",
                "inside_chance"]


def mode_check(fit_table: LifeTable, shares: pd.DataFrame, p: np.ndarray, outcome: pd.DataFrame,
               horizon_days: int, modes_by: str | None) -> list[dict]:
    """The forecast by failure mode made at the origin against the modes that failed in the window.

    ``shares``: the mode mix as of the origin (:func:`wearcast.modes.mode_shares`). One dict per
    mode (modes of the fit-time history first, then any mode seen only in the window, with
    nothing expected); empty when the history records no mode.
    """
    if shares.empty:
        return []
    units = pd.DataFrame({probability_column(horizon_days): np.asarray(p, float)})
    forecast = forecast_for_units(fit_table, units, [horizon_days], shares, modes_by)
    observed = outcome.loc[outcome["failed"].to_numpy(bool), "mode"].value_counts()
    out = []
    for row in forecast.itertuples(index=False):
        seen = int(observed.get(row.mode, 0))
        out.append({"mode": row.mode, "expected_failures": float(row.expected_failures),
                    "chance_only_low": int(row.chance_only_low), "chance_only_high": int(row.chance_only_high),
                    "observed_failures": seen,
                    "inside_chance": bool(row.chance_only_low <= seen <= row.chance_only_high)})
    for mode in sorted(set(observed.index) - set(forecast["mode"])):
        out.append({"mode": mode, "expected_failures": 0.0, "chance_only_low": 0, "chance_only_high": 0,
                    "observed_failures": int(observed[mode]), "inside_chance": False})
    return out


def _forecast_interval(table: LifeTable, model: SurvivalModel, refits: int, seed: int, horizon_days: int,
                       jobs: int, observed: int) -> dict:
    """The fleet forecast's 5-95 % interval from bootstrap refits, and whether ``observed`` is inside."""
    from wearcast.resample import INTERVAL, bootstrap_refits

    names = _names(horizon_days, 1)
    summary = bootstrap_refits(table, model, refits, seed, [horizon_days], jobs=jobs, progress=False)
    low, high = pmf_quantile(summary.count_pmf[0][0], list(INTERVAL))
    return {f"{names['forecast']}_low": int(low), f"{names['forecast']}_high": int(high),
            names["inside_forecast"]: bool(int(low) <= observed <= int(high))}


def _check_not_after(table: LifeTable, day: dt.date) -> None:
    """Guard: the fit table must hold nothing dated after the origin."""
    if "exit_date" in table.frame.columns and len(table.frame):
        latest = pd.to_datetime(table.frame["exit_date"]).max()
        if pd.notna(latest) and latest.date() > day:
            raise ModelError(f"backtest origin {day}: the as-of table holds a record dated {latest.date()}; "
                             "the export loader did not cut at the origin.")


def _add_cox_lift(per_origin: pd.DataFrame, horizon_days: int, top_k: int) -> None:
    names = _names(horizon_days, top_k)
    base = per_origin[per_origin["model"] == BASELINE].set_index("origin")[names["precision"]]
    per_origin[names["lift_cox"]] = [
        _ratio(p, base.get(o, np.nan)) for o, p in zip(per_origin["origin"], per_origin[names["precision"]])
    ]


def _summarise(per_origin: pd.DataFrame, models: list[str], horizon_days: int, top_k: int) -> pd.DataFrame:
    names = _names(horizon_days, top_k)
    pooled = {}
    out = []
    for name in models:
        part = per_origin[per_origin["model"] == name]
        k = part["list_length"].to_numpy(float)
        hits = float(np.sum(part[names["precision"]].to_numpy(float) * k))
        hits_oldest = float(np.sum(part[names["precision_oldest"]].to_numpy(float) * k))
        units = float(part["units_in_service"].sum())
        failures = float(part[names["observed"]].sum())
        precision = hits / k.sum() if k.sum() else float("nan")
        pooled[name] = precision
        concordance = {}
        for key in ("c", "c_td"):
            if names[key] not in part:
                continue
            c = part[names[key]].to_numpy(float)
            c = c[np.isfinite(c)]
            concordance[names[key]] = float(c.mean()) if len(c) else float("nan")
            concordance[f"{names[key]}_se"] = float(c.std(ddof=1) / np.sqrt(len(c))) if len(c) > 1 else float("nan")
        out.append({
            "model": name,
            "origins": len(part),
            "candidates": ", ".join(dict.fromkeys(part["candidate"].astype(str))),
            **concordance,
            names["expected"]: float(part[names["expected"]].sum()),
            names["observed"]: int(failures),
            f"origins_{names['inside']}": int(part[names["inside"]].sum()),
            **({f"origins_{names['inside_forecast']}": int(part[names["inside_forecast"]].sum())}
               if names["inside_forecast"] in part else {}),
            names["share"]: failures / units if units else float("nan"),
            names["precision"]: precision,
            names["precision_oldest"]: hits_oldest / k.sum() if k.sum() else float("nan"),
            names["lift_random"]: _ratio(precision, failures / units if units else float("nan")),
            names["lift_oldest"]: _ratio(hits, hits_oldest),
        })
    summary = pd.DataFrame(out)
    summary[names["lift_cox"]] = [_ratio(pooled[m], pooled.get(BASELINE, np.nan)) for m in summary["model"]]
    return summary


def write_backtest(result: BacktestResult, out_dir) -> list[Path]:
    """Write backtest_origins.csv, backtest_summary.csv, backtest_modes.csv (when failure
    modes are recorded) and backtest.json atomically."""
    out_dir = Path(out_dir)
    per_origin = result.per_origin.assign(origin=[d.isoformat() for d in result.per_origin["origin"]])
    payload = {
        "horizon_days": result.horizon_days,
        "top_k": result.top_k,
        "seed": result.seed,
        "origins": [d.isoformat() for d in result.origins],
        "notes": result.notes,
        "per_origin": json.loads(per_origin.to_json(orient="records")),
        "summary": json.loads(result.summary.to_json(orient="records")),
    }
    written = [
        _atomic.write_csv(out_dir / "backtest_origins.csv", per_origin),
        _atomic.write_csv(out_dir / "backtest_summary.csv", result.summary),
    ]
    if result.per_mode is not None and not result.per_mode.empty:
        per_mode = result.per_mode.assign(origin=[d.isoformat() for d in result.per_mode["origin"]])
        payload["per_mode"] = json.loads(per_mode.to_json(orient="records"))
        written.append(_atomic.write_csv(out_dir / "backtest_modes.csv", per_mode))
    else:
        _atomic.remove_output(out_dir / "backtest_modes.csv")  # an earlier backtest's
    written.append(_atomic.write_json(out_dir / "backtest.json", payload))
    return written
