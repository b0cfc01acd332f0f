"""Turn the run's outputs into the tidy shapes the figures take.

Each function accepts the loose forms other stages write (a list of pairs, a
frame with the model's own column names, a JSON dict) and returns a small
frame with fixed columns, or ``None`` when there is nothing to show.
"""

from __future__ import annotations

import re
from typing import Any

import numpy as np
import pandas as pd

#: Group labels that mean "the whole fleet" in fleet_forecast.csv.
FLEET_LABELS = ("fleet", "all", "total", "__fleet__", "")

_P_COLUMN = re.compile(r"^p_fail_(\d+)d$")


def horizons_in(ranked: pd.DataFrame) -> list[int]:
    """Horizons (days) with a ``p_fail_{h}d`` column, increasing."""
    return sorted(int(m.group(1)) for c in ranked.columns if (m := _P_COLUMN.match(str(c))))


def ranking_horizon(ranked: pd.DataFrame, summary: dict) -> int | None:
    """The horizon the list is ranked by: from the summary when it says, else the
    horizon whose probabilities follow the rank order most closely."""
    for key in ("rank_horizon_days", "ranking_horizon_days", "horizon_days", "rank_by_horizon_days"):
        value = summary.get(key)
        if isinstance(value, (int, float)) and f"p_fail_{int(value)}d" in ranked.columns:
            return int(value)
    horizons = horizons_in(ranked)
    if not horizons:
        return None
    if "rank" not in ranked.columns or len(ranked) < 2:
        return horizons[0]
    best, best_corr = horizons[0], -np.inf
    for h in horizons:
        corr = pd.Series(-ranked["rank"].to_numpy(float)).corr(
            pd.Series(ranked[f"p_fail_{h}d"].to_numpy(float)), method="spearman")
        if np.isfinite(corr) and corr > best_corr + 1e-12:
            best, best_corr = h, corr
    return best


def is_fleet_row(forecast: pd.DataFrame) -> pd.Series:
    """True for whole-fleet rows: ``group_by == "fleet"`` (wearcast.lifetable.FLEET) or,
    without a ``group_by`` column, a group label such as ``fleet``/``all``."""
    if "group_by" in forecast.columns:
        return forecast["group_by"].fillna("").astype(str).str.lower().isin(("fleet", ""))
    return forecast["group"].fillna("").astype(str).str.lower().isin(FLEET_LABELS)


def fleet_rows(forecast: pd.DataFrame) -> pd.DataFrame:
    """The whole-fleet rows of the forecast, one per horizon (increasing)."""
    fleet = forecast[is_fleet_row(forecast)]
    if fleet.empty and forecast["group"].nunique() == 1:
        fleet = forecast
    return fleet.sort_values("horizon_days").drop_duplicates("horizon_days")


def group_rows(forecast: pd.DataFrame) -> pd.DataFrame:
    """The per-group rows with a readable ``group`` label (``site: North``)."""
    part = forecast[~is_fleet_row(forecast)].copy()
    if "group_by" in part.columns:
        part["group"] = part["group_by"].astype(str).str.replace("_", " ") + ": " + part["group"].astype(str)
    return part


def interval_words(summary: dict) -> str:
    """``"90 %"`` from the summary's ``interval_quantiles`` (default 5–95 %)."""
    q = (summary or {}).get("interval_quantiles") or [0.05, 0.95]
    try:
        level = round(100 * (float(q[1]) - float(q[0])))
    except (TypeError, ValueError, IndexError):
        return "90 %"
    return f"{level} %"


def concordance_long(comparison: pd.DataFrame) -> pd.DataFrame | None:
    """``model, measure, value, low, high`` from a per-model comparison frame.

    Measures are the ``c_*`` columns that are not ``_low``/``_high``/``_vs_*``.
    """
    if comparison is None or comparison.empty or "model" not in comparison.columns:
        return None
    measures = [c for c in comparison.columns if str(c).startswith("c_")
                and not re.search(r"_(low|high|se)$|_vs_", str(c))]
    rows = []
    for _, row in comparison.iterrows():
        for m in measures:
            if pd.isna(row[m]):
                continue
            rows.append({"model": str(row["model"]), "measure": m, "value": float(row[m]),
                         "low": float(row.get(f"{m}_low", np.nan)), "high": float(row.get(f"{m}_high", np.nan))})
    return pd.DataFrame(rows, columns=["model", "measure", "value", "low", "high"]) if rows else None


def measure_label(measure: str) -> str:
    """Plain names for concordance measures."""
    if measure == "c_harrell":
        return "Harrell's C"
    if measure == "c_time_dependent":
        return "C with the readings in force at each failure"
    if measure == "c_truncation":
        return "C with delayed entry"
    m = re.match(r"c_uno_tau_(\d+)d", measure)
    if m:
        return f"Uno's C up to {int(m.group(1)):,} days"
    return measure


def tree_curve(curve: Any, value_name: str = "value") -> pd.DataFrame | None:
    """``n_trees, value[, low, high, chosen]`` from pairs, an array or a frame.

    Accepts a list of ``(n_trees, value)`` pairs, a 1-D array indexed by trees
    (1..n), or a frame with a trees column (``n_trees``/``trees``) and one value
    column (``value``, ``oob_concordance``, ``c``, ``score``, ``loss``).
    """
    if curve is None:
        return None
    if isinstance(curve, pd.DataFrame):
        frame = curve.copy()
        trees = next((c for c in ("n_trees", "trees") if c in frame.columns), None)
        value = next((c for c in ("value", value_name, "oob_concordance", "c", "score", "loss", "partial_likelihood")
                      if c in frame.columns), None)
        if trees is None or value is None:
            return None
        out = pd.DataFrame({"n_trees": frame[trees].astype(float), "value": frame[value].astype(float)})
        for extra in ("low", "high", "chosen"):
            if extra in frame.columns:
                out[extra] = frame[extra]
    else:
        arr = np.asarray(curve, dtype=float)
        if arr.ndim == 1:
            out = pd.DataFrame({"n_trees": np.arange(1, len(arr) + 1, dtype=float), "value": arr})
        elif arr.ndim == 2 and arr.shape[1] >= 2:
            out = pd.DataFrame({"n_trees": arr[:, 0], "value": arr[:, 1]})
        else:
            return None
    out = out[np.isfinite(out["value"].to_numpy(float))]
    return out if len(out) else None


def cv_curve_with_band(curve: Any, fold_curves: Any = None) -> pd.DataFrame | None:
    """The boosted model's CV curve with its chosen tree count (the minimum).

    ``fold_curves`` (folds x trees) adds a band of ± one standard error.
    """
    frame = tree_curve(curve)
    if frame is None:
        return None
    if fold_curves is not None:
        folds = np.asarray(fold_curves, float)
        if folds.ndim == 2 and folds.shape[1] == len(frame):
            se = np.nanstd(folds, axis=0, ddof=1) / np.sqrt(max(folds.shape[0], 1))
            frame["low"], frame["high"] = frame["value"] - se, frame["value"] + se
    if "chosen" not in frame.columns:
        frame["chosen"] = False
        frame.loc[frame["value"].idxmin(), "chosen"] = True
    return frame


def backtest_long(backtest: pd.DataFrame) -> tuple[pd.DataFrame | None, str]:
    """Rows ``label, value`` of top-k precision for each model and the oldest-first rule.

    Looks for ``precision_top{k}_{h}d`` (one row per model, pooled over as-of
    dates; docs/metrics.md) and ``precision_top{k}_{h}d_oldest``.
    """
    if backtest is None or backtest.empty:
        return None, ""
    cols = [c for c in backtest.columns if re.match(r"precision_top\d+_\d+d$", str(c))]
    if not cols:
        return None, ""
    col = cols[0]
    m = re.match(r"precision_top(\d+)_(\d+)d", col)
    k, h = int(m.group(1)), int(m.group(2))
    label_col = "model" if "model" in backtest.columns else None
    rows = []
    grouped = backtest.groupby(label_col, sort=False) if label_col else [("model", backtest)]
    for name, part in grouped:
        rows.append({"label": str(name), "value": float(part[col].mean())})
    oldest = [c for c in (f"{col}_oldest", f"precision_oldest_top{k}_{h}d") if c in backtest.columns]
    if oldest:
        rows.append({"label": "oldest first", "value": float(backtest[oldest[0]].mean())})
    label = f"share of the top {k} that failed within {h} days"
    return pd.DataFrame(rows), label


def backtest_columns(backtest: pd.DataFrame) -> list[str]:
    """The backtest summary columns worth a table: model (and, for ``chosen``, the candidates it
    picked), precision, lift, C (Harrell's; the time-dependent C on start/stop data), counts, and at how
    many origins the observed count fell inside the chance interval and the forecast interval."""
    keep = re.compile(r"^(model|candidates|origins|precision_top\d+_\d+d(_oldest)?|lift_top\d+_\d+d_vs_\w+|"
                      r"c_harrell_\d+d|c_time_dependent_\d+d|expected_failures_\d+d|observed_failures_\d+d|"
                      r"origins_observed_inside_(interval|forecast)_\d+d)$")
    return [c for c in backtest.columns if keep.match(str(c))]


def interval_hits(backtest: pd.DataFrame) -> str:
    """One sentence per model: at how many past dates the observed failures fell inside the
    fleet forecast's 90 % interval (backtests run with refits) or, failing that, inside the
    95 % chance interval; empty when the summary has neither count."""
    if backtest is None or backtest.empty or "model" not in backtest.columns or "origins" not in backtest.columns:
        return ""
    for kind, what in (("forecast", "the fleet forecast's 90 % interval (chance and model uncertainty)"),
                       ("interval", "the 95 % chance interval of the expected count")):
        cols = [c for c in backtest.columns if re.fullmatch(rf"origins_observed_inside_{kind}_(\d+)d", str(c))]
        if cols:
            days = re.fullmatch(r".*_(\d+)d", cols[0]).group(1)
            counts = ", ".join(f"{row['model']} at {int(row[cols[0]])} of {int(row['origins'])} past dates"
                               for _, row in backtest.iterrows())
            return f"Observed failures within {days} days fell inside {what}: {counts}."
    return ""


def mode_hits(backtest: pd.DataFrame) -> str:
    """One sentence: in how many (past date, failure mode) cells the observed count of that mode
    fell inside the forecast-by-mode's chance interval, per model; empty without those columns."""
    if backtest is None or backtest.empty or not {"model", "mode_cells", "mode_cells_inside_chance"} <= set(backtest.columns):
        return ""
    counts = ", ".join(f"{row['model']} in {int(row['mode_cells_inside_chance'])} of {int(row['mode_cells'])}"
                       for _, row in backtest.iterrows() if int(row["mode_cells"]) > 0)
    if not counts:
        return ""
    return ("Split by failure mode, the observed count of each mode fell inside the 90 % chance interval of "
            f"its forecast (past dates x modes): {counts}. That interval leaves out model uncertainty and "
            "the uncertainty of the mode mix, so expect it to hold less often than nine times in ten.")


def calibration_counts(comparison: pd.DataFrame) -> pd.DataFrame | None:
    """Expected against observed failures per model and horizon from the comparison table."""
    if comparison is None or comparison.empty or "model" not in comparison.columns:
        return None
    rows = []
    for col in comparison.columns:
        m = re.fullmatch(r"expected_failures_(\d+)d", str(col))
        if not m or f"observed_failures_{m.group(1)}d" not in comparison.columns:
            continue
        h = int(m.group(1))
        for _, row in comparison.iterrows():
            rows.append({"model": row["model"], "horizon_days": h, "expected": row[col],
                         "observed": row[f"observed_failures_{h}d"],
                         "slope": row.get(f"calibration_slope_{h}d", np.nan),
                         "slope_low": row.get(f"calibration_slope_{h}d_low", np.nan),
                         "slope_high": row.get(f"calibration_slope_{h}d_high", np.nan)})
    return pd.DataFrame(rows) if rows else None
