"""Report figures: pure functions from frames/arrays to PNG bytes (matplotlib Agg).

Palette: the Okabe–Ito colour-blind-safe set (Okabe & Ito, "Color Universal
Design", 2008). Series are also told apart by marker shape or line style, so
nothing depends on colour alone. Ages on axes are shown in years
(365.25 days) because planners read asset ages that way; probabilities are
shown as percentages.
"""

from __future__ import annotations

import io
from typing import Sequence

import matplotlib

matplotlib.use("Agg")  # no display, no GUI event loop
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

#: Okabe–Ito colours (hex), in the order series use them.
PALETTE = {
    "blue": "#0072B2",
    "orange": "#E69F00",
    "green": "#009E73",
    "vermillion": "#D55E00",
    "sky": "#56B4E9",
    "purple": "#CC79A7",
    "yellow": "#F0E442",
    "black": "#000000",
}
SERIES = ["#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#000000"]
MARKERS = ["o", "s", "D", "^", "v", "P", "X"]
LINESTYLES = ["-", "--", "-.", ":", (0, (5, 1)), (0, (3, 1, 1, 1, 1, 1)), (0, (1, 1))]
INK = "#2b2b2b"
GRID = "#d9d9d9"
DAYS_PER_YEAR = 365.25

_RC = {
    "font.family": "DejaVu Sans",
    "font.size": 9,
    "axes.edgecolor": "#7a7a7a",
    "axes.labelcolor": INK,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": GRID,
    "grid.linewidth": 0.6,
    "xtick.color": INK,
    "ytick.color": INK,
    "legend.frameon": False,
    "figure.facecolor": "white",
    "axes.facecolor": "white",
    "savefig.facecolor": "white",
}


def _figure(width: float, height: float, ncols: int = 1, **kwargs):
    with plt.rc_context(_RC):
        fig, axes = plt.subplots(1, ncols, figsize=(width, height), squeeze=False, **kwargs)
    for ax in axes.ravel():
        ax.set_axisbelow(True)
    return fig, axes.ravel()


def _png(fig, layout: bool = True) -> bytes:
    buffer = io.BytesIO()
    with plt.rc_context(_RC):
        if layout:
            fig.tight_layout()
        # no Software/date metadata, so reruns give identical bytes
        fig.savefig(buffer, format="png", dpi=130, metadata={"Software": None})
    plt.close(fig)
    return buffer.getvalue()


def _percent_axis(ax, axis: str = "x") -> None:
    formatter = matplotlib.ticker.PercentFormatter(xmax=1.0, decimals=0)
    (ax.xaxis if axis == "x" else ax.yaxis).set_major_formatter(formatter)


# -- headline ---------------------------------------------------------------

def forecast_figure(forecast: pd.DataFrame) -> bytes:
    """Expected failures per group with intervals, one panel per horizon.

    ``forecast`` columns: ``group``, ``horizon_days``, ``expected_failures``,
    ``failures_low``/``failures_high`` and optionally ``chance_only_low``/``_high``.
    """
    horizons = sorted(forecast["horizon_days"].unique())
    fig, axes = _figure(3.2 * len(horizons), 1.6 + 0.42 * forecast["group"].nunique(),
                        ncols=len(horizons))
    groups = list(dict.fromkeys(forecast["group"].astype(str)))
    y = np.arange(len(groups))[::-1]
    for ax, horizon in zip(axes, horizons):
        part = forecast[forecast["horizon_days"] == horizon]
        part = part.set_index(part["group"].astype(str)).reindex(groups)
        if {"chance_only_low", "chance_only_high"} <= set(part.columns):
            ax.hlines(y, part["chance_only_low"], part["chance_only_high"], color=PALETTE["sky"],
                      lw=7, alpha=0.55, label="chance alone")
        ax.hlines(y, part["failures_low"], part["failures_high"], color=PALETTE["blue"], lw=1.6,
                  label="with model uncertainty")
        ax.plot(part["expected_failures"], y, "o", color=PALETTE["blue"], ms=5, label="expected")
        ax.set_yticks(y, groups if ax is axes[0] else [""] * len(groups))
        ax.set_title(f"next {int(horizon)} days")
        ax.set_xlabel("failures (count)")
        ax.set_xlim(left=0)
        ax.grid(axis="y", visible=False)
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", ncol=3, fontsize=8, bbox_to_anchor=(0.5, 0.0))
    fig.tight_layout(rect=(0, 0.1, 1, 1))
    return _png(fig, layout=False)


def top_units_figure(ranked: pd.DataFrame, horizon_days: int, k: int, cutoff: int | None = None) -> bytes:
    """Top-``k`` units: probability interval (left) and rank interval (right).

    ``ranked`` columns: ``unit_id``, ``rank``, ``rank_low``, ``rank_high`` and
    ``p_fail_{h}d`` with ``_low``/``_high``. Units whose rank interval reaches past
    ``cutoff`` (the list length planners act on) are drawn hollow in vermillion.
    """
    col = f"p_fail_{int(horizon_days)}d"
    top = ranked.sort_values("rank").head(k).copy()
    for c in ("rank", "rank_low", "rank_high", col, f"{col}_low", f"{col}_high"):
        if c in top.columns:  # nullable Int64 / NA from a run without refits -> float NaN
            top[c] = pd.to_numeric(top[c], errors="coerce").astype(float)
    cutoff = k if cutoff is None else cutoff
    y = np.arange(len(top))[::-1]
    fig, (ax_p, ax_r) = _figure(8.6, 0.9 + 0.23 * len(top), ncols=2, sharey=True,
                                gridspec_kw={"width_ratios": [1.25, 1]})
    unstable = (top["rank_high"] > cutoff).to_numpy(bool) if "rank_high" in top else np.zeros(len(top), bool)
    colours = np.where(unstable, PALETTE["vermillion"], PALETTE["blue"])
    if {f"{col}_low", f"{col}_high"} <= set(top.columns):
        ax_p.hlines(y, top[f"{col}_low"], top[f"{col}_high"], colors=colours, lw=1.4)
    if {"rank_low", "rank_high"} <= set(top.columns):
        ax_r.hlines(y, top["rank_low"], top["rank_high"], colors=colours, lw=1.4)
    for ax, values in ((ax_p, top[col]), (ax_r, top["rank"])):
        ax.scatter(values[~unstable], y[~unstable], marker="o", color=PALETTE["blue"], s=18, zorder=3,
                   label="rank interval inside the list")
        ax.scatter(values[unstable], y[unstable], marker="o", facecolors="white",
                   edgecolors=PALETTE["vermillion"], s=22, zorder=3, linewidths=1.3,
                   label="rank interval reaches past the list")
        ax.grid(axis="y", visible=False)
    ax_p.set_yticks(y, top["unit_id"].astype(str))
    ax_p.set_xlabel(f"probability of failure within {int(horizon_days)} days")
    ax_p.set_xlim(left=0)
    _percent_axis(ax_p)
    ax_r.axvline(cutoff, color=INK, lw=0.8, ls="--")
    ax_r.set_xlabel("rank in the fleet (1 = most at risk)")
    ax_r.set_xlim(left=0)
    ax_r.legend(loc="lower right", fontsize=7)
    return _png(fig)


# -- model evidence ---------------------------------------------------------

def concordance_figure(rows: pd.DataFrame) -> bytes:
    """Concordance per model and measure with 95 % intervals.

    ``rows`` long format: ``model``, ``measure``, ``value``, ``low``, ``high``.
    """
    measures = list(dict.fromkeys(rows["measure"]))
    models = list(dict.fromkeys(rows["model"]))
    fig, axes = _figure(7.6, 0.9 + 0.5 * len(measures) * len(models) / 2 + 0.6)
    ax = axes[0]
    step = 1.0 / (len(models) + 1)
    for j, model in enumerate(models):
        part = rows[rows["model"] == model].set_index("measure").reindex(measures)
        y = np.arange(len(measures))[::-1] + (len(models) / 2 - j - 0.5) * step
        ax.hlines(y, part["low"], part["high"], color=SERIES[j % len(SERIES)], lw=1.6)
        ax.plot(part["value"], y, MARKERS[j % len(MARKERS)], color=SERIES[j % len(SERIES)], ms=6,
                label=model, ls="none")
    ax.axvline(0.5, color=INK, lw=0.8, ls=":")
    ax.set_yticks(np.arange(len(measures))[::-1], measures)
    ax.set_xlabel("concordance index (probability a pair is ordered correctly; 0.5 = chance)")
    ax.grid(axis="y", visible=False)
    ax.legend(loc="lower left", bbox_to_anchor=(1.0, 0.0), fontsize=8)
    return _png(fig)


def calibration_figure(calibration: pd.DataFrame) -> bytes:
    """Predicted against observed failure share per risk decile.

    ``calibration`` columns: ``predicted``, ``observed`` and optionally
    ``model``, ``observed_low``/``observed_high``, ``horizon_days``.
    """
    fig, axes = _figure(4.8, 4.2)
    ax = axes[0]
    models = list(dict.fromkeys(calibration["model"])) if "model" in calibration else [None]
    top = float(np.nanmax(calibration[["predicted", "observed"]].to_numpy())) if len(calibration) else 1.0
    if "observed_high" in calibration:
        top = max(top, float(np.nanmax(calibration["observed_high"])))
    top = min(1.0, top * 1.08 + 1e-3)
    ax.plot([0, top], [0, top], color=INK, lw=0.8, ls=":", label="perfect agreement")
    for j, model in enumerate(models):
        part = calibration if model is None else calibration[calibration["model"] == model]
        colour = SERIES[j % len(SERIES)]
        if {"observed_low", "observed_high"} <= set(part.columns):
            ax.vlines(part["predicted"], part["observed_low"], part["observed_high"], color=colour, lw=1.0,
                      alpha=0.8)
        ax.plot(part["predicted"], part["observed"], marker=MARKERS[j % len(MARKERS)],
                ls=LINESTYLES[j % len(LINESTYLES)], color=colour, ms=5, lw=1.0,
                label=str(model) if model is not None else "model")
    ax.set_xlim(0, top)
    ax.set_ylim(0, top)
    _percent_axis(ax, "x")
    _percent_axis(ax, "y")
    ax.set_xlabel("predicted probability of failure (decile mean)")
    ax.set_ylabel("observed share that failed")
    ax.legend(loc="upper left", fontsize=7)
    return _png(fig)


def backtest_figure(rows: pd.DataFrame, value_label: str) -> bytes:
    """Backtest measures per model (bars) beside the oldest-first rule.

    ``rows`` long format: ``label`` (model or rule), ``value``, optional
    ``low``/``high``.
    """
    fig, axes = _figure(6.0, 0.8 + 0.38 * len(rows))
    ax = axes[0]
    y = np.arange(len(rows))[::-1]
    colours = [PALETTE["orange"] if "oldest" in str(lbl) else PALETTE["blue"] for lbl in rows["label"]]
    ax.barh(y, rows["value"], color=colours, height=0.6)
    if {"low", "high"} <= set(rows.columns):
        ax.hlines(y, rows["low"], rows["high"], color=INK, lw=1.2)
    ax.set_yticks(y, rows["label"].astype(str))
    ax.set_xlabel(value_label)
    ax.grid(axis="y", visible=False)
    return _png(fig)


def tree_curve_figure(curves: Sequence[tuple[str, pd.DataFrame, str]]) -> bytes:
    """One panel per curve of a score against number of trees.

    ``curves``: ``(title, frame, y_label)``; ``frame`` has ``n_trees``, ``value``
    and optionally ``low``/``high`` and ``chosen`` (bool, the tree count used).
    """
    fig, axes = _figure(4.2 * len(curves), 3.2, ncols=len(curves))
    for j, (ax, (title, frame, y_label)) in enumerate(zip(axes, curves)):
        colour = SERIES[j % len(SERIES)]
        if {"low", "high"} <= set(frame.columns):
            ax.fill_between(frame["n_trees"], frame["low"], frame["high"], color=colour, alpha=0.18, lw=0)
        ax.plot(frame["n_trees"], frame["value"], color=colour, lw=1.5)
        if "chosen" in frame and frame["chosen"].any():
            chosen = frame[frame["chosen"].astype(bool)].iloc[0]
            ax.axvline(chosen["n_trees"], color=INK, lw=0.8, ls="--")
            ax.annotate(f" chosen: {int(chosen['n_trees'])}", (chosen["n_trees"], chosen["value"]),
                        fontsize=7, color=INK)
        ax.set_title(title)
        ax.set_xlabel("number of trees")
        ax.set_ylabel(y_label)
    return _png(fig)


# -- fleet reliability --------------------------------------------------------

def survival_figure(observed: Sequence[tuple[str, dict]], predicted: pd.DataFrame | None = None) -> bytes:
    """Step curves of observed survival (Kaplan–Meier with delayed entry).

    ``observed``: ``(label, curve)`` pairs, curve as from
    :func:`wearcast._product_limit.product_limit_survival`; the first is the
    fleet and gets a 95 % band. ``predicted``: optional ``age_days``, ``survival``.
    """
    fig, axes = _figure(6.4, 3.8)
    ax = axes[0]
    for j, (label, curve) in enumerate(observed):
        if len(curve["age"]) == 0:
            continue
        years = np.concatenate([[0.0], curve["age"]]) / DAYS_PER_YEAR
        surv = np.concatenate([[1.0], curve["survival"]])
        colour = INK if j == 0 else SERIES[(j - 1) % len(SERIES)]
        if j == 0:
            ax.fill_between(years, np.concatenate([[1.0], curve["low"]]),
                            np.concatenate([[1.0], curve["high"]]), step="post", color="#bdbdbd",
                            alpha=0.45, lw=0, label="fleet, 95 % band")
        ax.step(years, surv, where="post", color=colour, lw=2.0 if j == 0 else 1.2,
                ls="-" if j == 0 else LINESTYLES[(j - 1) % len(LINESTYLES)], label=label)
    if predicted is not None and len(predicted):
        ax.plot(predicted["age_days"] / DAYS_PER_YEAR, predicted["survival"], color=PALETTE["vermillion"],
                lw=1.8, ls="--", label="fleet, predicted by the model")
    ax.set_ylim(0, 1.02)
    ax.set_xlim(left=0)
    _percent_axis(ax, "y")
    ax.set_xlabel("age since install (years)")
    ax.set_ylabel("share still working")
    ax.legend(loc="lower left", fontsize=7, ncol=2 if len(observed) > 4 else 1)
    return _png(fig)


def weibull_plot_figure(curve: dict, shape: float, scale_days: float) -> bytes:
    """Weibull probability plot: the fleet's product-limit points and the fitted straight line.

    x: age (log scale, years); y: share failed on the Weibull scale ``log(-log S)``.
    """
    from wearcast._weibull import probability_plot

    fig, axes = _figure(6.4, 3.8)
    ax = axes[0]
    x, y = probability_plot(curve["age"], curve["survival"])
    ax.plot(np.exp(x) / DAYS_PER_YEAR, y, ls="none", marker="o", ms=3, color=INK, alpha=0.7,
            label="records (Kaplan–Meier with late entry)")
    if len(x):
        ages = np.exp(np.linspace(x.min(), x.max(), 50))
        ax.plot(ages / DAYS_PER_YEAR, shape * (np.log(ages) - np.log(scale_days)), color=PALETTE["vermillion"],
                lw=1.8, label=f"Weibull fit (shape {shape:.2f})")
    ax.set_xscale("log")
    years = np.array([0.1, 0.2, 0.5, 1, 2, 5, 10, 20, 50, 100])
    low_x, high_x = ax.get_xlim()
    ax.set_xticks(years[(years >= low_x) & (years <= high_x)])
    ax.set_xticklabels([f"{v:g}" for v in years[(years >= low_x) & (years <= high_x)]])
    ax.minorticks_off()
    shares = np.array([0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5, 0.632, 0.8, 0.9, 0.99])
    ticks = np.log(-np.log(1 - shares))
    lo, hi = (y.min(), y.max()) if len(y) else (ticks[0], ticks[-1])
    shown = (ticks >= lo - 0.3) & (ticks <= hi + 0.3)
    ax.set_yticks(ticks[shown])
    ax.set_yticklabels([f"{100 * v:g}%" for v in shares[shown]])
    ax.set_xlabel("age since install (years, log scale)")
    ax.set_ylabel("share failed (Weibull scale)")
    ax.legend(loc="upper left", fontsize=7)
    return _png(fig)


def hazard_figure(curve: dict, bandwidth_days: float) -> bytes:
    """Smoothed hazard rate against age, in failures per unit-year, with 95 % band."""
    fig, axes = _figure(6.4, 3.4)
    ax = axes[0]
    years = curve["age"] / DAYS_PER_YEAR
    per_year = DAYS_PER_YEAR
    ax.fill_between(years, curve["low"] * per_year, curve["high"] * per_year, color=PALETTE["sky"],
                    alpha=0.35, lw=0, label="95 % band")
    ax.plot(years, curve["rate"] * per_year, color=PALETTE["blue"], lw=1.8,
            label=f"smoothed rate (window ±{bandwidth_days:.0f} days)")
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    ax.set_xlabel("age since install (years)")
    ax.set_ylabel("failures per unit-year of running")
    ax.legend(loc="upper left", fontsize=7)
    return _png(fig)


# -- drivers and monitoring -------------------------------------------------

def importance_figure(importance: pd.DataFrame) -> bytes:
    """Mean |contribution| per covariate (``covariate``, ``importance``), largest on top."""
    part = importance.sort_values("importance", ascending=True).tail(15)
    fig, axes = _figure(5.8, 0.8 + 0.3 * len(part))
    ax = axes[0]
    ax.barh(part["covariate"].astype(str), part["importance"], color=PALETTE["green"], height=0.6)
    ax.set_xlabel("mean |contribution| to the log risk score")
    ax.grid(axis="y", visible=False)
    return _png(fig)


def unit_drivers_figure(contributions: pd.DataFrame, units: Sequence[str]) -> bytes:
    """Signed contributions for a few units (``unit_id``, ``covariate``, ``contribution``).

    One small panel per unit; bars to the right raise the unit's risk (vermillion),
    to the left lower it (blue, hatched).
    """
    units = list(units)
    ncols = min(len(units), 3)
    nrows = int(np.ceil(len(units) / ncols))
    with plt.rc_context(_RC):
        fig, axes = plt.subplots(nrows, ncols, figsize=(3.1 * ncols, 0.6 + 2.0 * nrows), squeeze=False)
    for ax in axes.ravel()[len(units):]:
        ax.axis("off")
    for ax, unit in zip(axes.ravel(), units):
        part = contributions[contributions["unit_id"].astype(str) == str(unit)]
        part = part.reindex(part["contribution"].abs().sort_values().index).tail(6)
        positive = part["contribution"].to_numpy() > 0
        bars = ax.barh(part["covariate"].astype(str), part["contribution"], height=0.6,
                       color=np.where(positive, PALETTE["vermillion"], PALETTE["blue"]))
        for bar, pos in zip(bars, positive):
            if not pos:
                bar.set_hatch("///")
                bar.set_edgecolor("white")
        ax.axvline(0, color=INK, lw=0.8)
        ax.set_title(f"unit {unit}", fontsize=9)
        ax.set_xlabel("contribution to log risk", fontsize=8)
        ax.grid(axis="y", visible=False)
        ax.tick_params(labelsize=7)
    return _png(fig)


def drift_figure(drift: pd.DataFrame, moderate: float, large: float) -> bytes:
    """Population stability index per covariate with the reading thresholds."""
    part = drift.sort_values("psi", ascending=True)
    fig, axes = _figure(5.8, 0.8 + 0.3 * len(part))
    ax = axes[0]
    colours = [PALETTE["vermillion"] if v > large else PALETTE["orange"] if v > moderate else PALETTE["green"]
               for v in part["psi"]]
    ax.barh(part["covariate"].astype(str), part["psi"], color=colours, height=0.6)
    ax.axvline(moderate, color=INK, lw=0.8, ls=":")
    ax.axvline(large, color=INK, lw=0.8, ls="--")
    ax.set_xlabel(f"population stability index (dotted {moderate}: moderate shift, dashed {large}: large)")
    ax.grid(axis="y", visible=False)
    return _png(fig)
