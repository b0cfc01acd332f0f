"""The report's sections, in reading order. Each returns ``(html, figures)``.

``figures`` maps a file stem (``figures/<stem>.png``) to PNG bytes; the same
bytes are embedded in the page, so the slides and the page always agree.
A section whose inputs are missing returns ``("", {})`` and is left out.
"""

from __future__ import annotations

import re
import numpy as np
import pandas as pd

from wearcast import _product_limit
from wearcast.report import _curves, _figures, _fleet_tables
from wearcast.report import _html as h
from wearcast.report import _normalise as norm

Section = tuple[str, dict[str, bytes]]
_NONE: Section = ("", {})


# -- 0. read first --------------------------------------------------------------

def read_first(inputs) -> Section:
    """The run's warnings (those the terminal printed), above everything else."""
    items = [str(w) for w in (inputs.warnings or []) if str(w).strip()]
    if not items:
        return _NONE
    body = f'<div class="caution-strip" id="run-warnings">{h.bullet_list(items)}</div>'
    lead = "This run printed these warnings. Read them before using the numbers below."
    return h.section("read-first", "Read first", body, lead=lead), {}


# -- 1. this month -----------------------------------------------------------

def headline(inputs) -> Section:
    figures: dict[str, bytes] = {}
    parts = []
    forecast = inputs.fleet_forecast
    level = norm.interval_words(inputs.summary)
    if forecast is not None and not forecast.empty:
        fleet = norm.fleet_rows(forecast)
        cards = []
        for _, row in fleet.iterrows():
            horizon = int(row["horizon_days"])
            attrs = {"horizon_days": horizon, "group": str(row["group"])}
            chance = ""
            if not h.is_missing(row.get("chance_only_low")):
                chance = (f'<div class="chance">by chance alone: {h.number(row["chance_only_low"], h.fmt_count, "chance_only_low", **attrs)}'
                          f'–{h.number(row["chance_only_high"], h.fmt_count, "chance_only_high", **attrs)}</div>')
            units = ""
            if not h.is_missing(row.get("units")):
                units = f' among {h.number(row["units"], h.fmt_count, "units", **attrs)} units'
            cards.append(
                f'<div class="card" data-horizon-days="{horizon}">'
                f'<div class="label">next {horizon:,} days</div>'
                f'<div class="big">{h.number(row["expected_failures"], h.fmt_expected, "expected_failures", **attrs)}</div>'
                f'<div class="range">failures expected{units}; likely between '
                f'{h.number(row["failures_low"], h.fmt_count, "failures_low", **attrs)} and '
                f'{h.number(row["failures_high"], h.fmt_count, "failures_high", **attrs)}</div>{chance}</div>')
        parts.append(f'<div class="cards" id="forecast-cards">{"".join(cards)}</div>')
        parts.append(h.note(
            f"Expected failures add up each unit's probability. The range is a {level} interval that "
            "includes how much the model itself is uncertain; 'by chance alone' is the spread expected "
            "even if every probability were exactly right."))
        if len(forecast) > len(fleet):
            groups = norm.group_rows(forecast)
            if not groups.empty:
                figures["forecast_by_group"] = _figures.forecast_figure(groups)
                parts.append(h.figure(
                    "forecast_by_group", figures["forecast_by_group"],
                    "Expected failures per group and horizon with intervals",
                    f"Expected failures in each group for each planning horizon. The dot is the expected "
                    f"number, the thin dark line its {level} interval including model uncertainty, the wide "
                    "light band the spread from chance alone."))
    parts.extend(_fleet_tables.mode_table(inputs.mode_forecast, inputs.summary))
    facts = _summary_facts(inputs.summary)
    if facts:
        parts.append(f'<p class="facts">{facts}</p>')
    ranked_html, ranked_figs = _top_units(inputs)
    figures.update(ranked_figs)
    parts.append(ranked_html)
    if not any(parts):
        return _NONE
    lead = "Which units to look at this month, and how many failures to expect across the fleet."
    return h.section("this-month", "This month", "".join(parts), lead=lead), figures


def _summary_facts(summary: dict) -> str:
    labels = (("units_in_service", "units in service"), ("failures_in_history", "failures on record"),
              ("refits", "bootstrap refits"), ("stable_top_k_units", "units settled in the top list"),
              ("model", "model used"))
    bits = []
    for key, label in labels:
        value = summary.get(key) if summary else None
        if value is None or isinstance(value, (dict, list)):
            continue
        shown = h.number(value, h.fmt_count, key) if isinstance(value, (int, float)) else h.esc(value)
        bits.append(f"{label}: {shown}")
    return " · ".join(bits)


def _top_units(inputs) -> Section:
    ranked = inputs.ranked_units
    if ranked is None or ranked.empty or "rank" not in ranked.columns:
        return _NONE
    horizon = norm.ranking_horizon(ranked, inputs.summary or {})
    if horizon is None:
        return _NONE
    k = int(inputs.top_k)
    cutoff = _list_length(ranked, inputs.summary or {}, k)
    top = ranked.sort_values("rank").head(k).copy()
    pcol = f"p_fail_{horizon}d"
    level = norm.interval_words(inputs.summary)
    png = _figures.top_units_figure(ranked, horizon, k, cutoff=cutoff)
    fig_html = h.figure(
        "top_units", png, f"Top {k} units: probability and rank intervals",
        f"The {len(top)} units most likely to fail within {horizon} days. Left: probability of failure "
        f"with its {level} interval from refitting on resampled records. Right: rank with its {level} interval; the dashed line marks "
        f"position {cutoff}. Hollow vermillion points are units whose rank could fall outside the "
        f"top {cutoff} on a resample of the records, so their place on the list is not settled.")
    group_cols = inputs.group_columns(top)

    def unit_cell(row: pd.Series) -> str:
        groups = " · ".join(h.esc(row[c]) for c in group_cols if not h.is_missing(row[c]))
        return (f'<span class="unit" data-field="unit_id" data-value="{h.esc(row["unit_id"])}">{h.esc(row["unit_id"])}</span>'
                + (f'<span class="groups">{groups}</span>' if groups else ""))

    unit_header = "Unit" + (f" ({', '.join(c.replace('_', ' ') for c in group_cols)})" if group_cols else "")
    columns = [h.Column("Rank", "rank", h.fmt_count), h.Column(unit_header, "unit_id", numeric=False, render=unit_cell)]
    if "age_days" in top.columns:
        columns.append(h.Column("Age (years)", "age_days", h.fmt_years, render=_age_cell))
    # the ranking horizon with its interval, the other horizons as plain values to keep the table narrow
    columns.append(h.Column(f"Within {horizon} d ({level} interval)", pcol, h.fmt_percent,
                            render=_interval_cell(pcol, h.fmt_percent)))
    for hz in norm.horizons_in(top):
        if hz != horizon:
            columns.append(h.Column(f"Within {hz} d", f"p_fail_{hz}d", h.fmt_percent))
    if {"rank_low", "rank_high"} <= set(top.columns):
        columns.append(h.Column("Rank interval", "rank_low", render=_rank_cell))
    share_col = next((c for c in top.columns if re.fullmatch(r"top\d+_share", str(c))), None)
    if share_col:
        share_k = int(re.match(r"top(\d+)_share", share_col).group(1))
        columns.append(h.Column(f"In top {share_k} of resamples", share_col, h.fmt_percent,
                                render=_share_cell(share_col)))
    drivers = [c for c in ("driver_1", "driver_2", "driver_3") if c in top.columns]
    if drivers:
        columns.append(h.Column("Main drivers", "driver_1", numeric=False,
                                render=lambda row: '<span class="drivers">' + "<br>".join(
                                    h.esc(row[c]) for c in drivers if not h.is_missing(row[c]) and str(row[c])) + "</span>"))
    table = h.table(top, columns, row_key="unit_id", cls="top-units", table_id="top-units",
                    caption=f"Units ranked by probability of failure within {horizon} days; probabilities "
                            "are for a unit working today. Age in years since install.")
    return f"<h3>Units to look at first</h3>{fig_html}{table}{_beyond_record_note(ranked, top, inputs.summary or {})}", \
        {"top_units": png}


def _flagged(row: pd.Series) -> bool:
    value = row.get("beyond_record_age")
    return not h.is_missing(value) and str(value).lower() == "true"


def _age_cell(row: pd.Series) -> str:
    age = h.number(row["age_days"], h.fmt_years, "age_days")
    return age + ('<sup class="flag" title="window reaches past the oldest failure on record">†</sup>'
                  if _flagged(row) else "")


def _beyond_record_note(ranked: pd.DataFrame, top: pd.DataFrame, summary: dict) -> str:
    """One sentence on the units whose window reaches past the oldest failure on record."""
    if "beyond_record_age" not in ranked.columns:
        return ""
    flagged = int(ranked.apply(_flagged, axis=1).sum())
    if not flagged:
        return ""
    in_top = int(top.apply(_flagged, axis=1).sum())
    oldest = summary.get("oldest_failure_age_days")
    at = f" ({h.fmt_years(float(oldest))} years)" if isinstance(oldest, (int, float)) else ""
    return h.note(
        f"† {flagged:,} unit{'s' if flagged != 1 else ''} in service ({in_top:,} in this list) "
        f"{'are' if flagged != 1 else 'is'} old enough that the longest window reaches past the oldest "
        f"failure on record{at}. No past unit failed at those ages, so the probability there is carried "
        "on by a curve fitted to the oldest records: treat it as less certain than the rest and check "
        "these units' condition directly.")


def _list_length(ranked: pd.DataFrame, summary: dict, default: int) -> int:
    """How many units planners act on: the summary's top_k, else the k of a topK_share column."""
    if isinstance(summary.get("top_k"), (int, float)):
        return int(summary["top_k"])
    for col in ranked.columns:
        m = re.fullmatch(r"top(\d+)_share", str(col))
        if m:
            return int(m.group(1))
    return default


def _interval_cell(col: str, fmt):
    def render(row: pd.Series) -> str:
        main = h.number(row[col], fmt, col)
        if h.is_missing(row.get(f"{col}_low")):
            return main
        return (f'{main} <span class="interval">({h.number(row[f"{col}_low"], fmt, f"{col}_low")}'
                f'–{h.number(row[f"{col}_high"], fmt, f"{col}_high")})</span>')
    return render


def _rank_cell(row: pd.Series) -> str:
    return (f'<span class="interval">{h.number(row["rank_low"], h.fmt_count, "rank_low")}'
            f'–{h.number(row["rank_high"], h.fmt_count, "rank_high")}</span>')


def _share_cell(col: str):
    def render(row: pd.Series) -> str:
        stable = row.get(col.replace("_share", "_stable"))
        flag = ""
        if isinstance(stable, str):  # read back from CSV as text
            stable = {"true": True, "false": False}.get(stable.strip().lower())
        if not h.is_missing(stable):
            flag = (' <span class="flag-stable">stable</span>' if bool(stable)
                    else ' <span class="flag-unstable">unsettled</span>')
        return h.number(row[col], lambda v: h.fmt_percent(v, 0), col) + flag
    return render


# -- 2. model evidence ---------------------------------------------------------

def evidence(inputs) -> Section:
    parts, figures = [], {}
    conc = norm.concordance_long(inputs.comparison) if inputs.comparison is not None else None
    if conc is not None:
        conc = conc.assign(measure=conc["measure"].map(norm.measure_label))
        figures["concordance"] = _figures.concordance_figure(conc)
        parts.append("<h3>Does the model order units correctly?</h3>")
        parts.append(h.figure(
            "concordance", figures["concordance"], "Concordance of each model with 95 % intervals",
            "Concordance is the chance that, of two units, the one that failed first was given the higher "
            "risk. 0.5 is a coin toss, 1 is perfect ordering. Lines are 95 % intervals from resampling "
            "units; overlapping lines mean the models are not clearly different on this data."))
        table = conc.copy()
        parts.append(h.table(table, [
            h.Column("Model", "model", numeric=False), h.Column("Measure", "measure", numeric=False),
            h.Column("Estimate", "value", h.fmt_number), h.Column("95 % low", "low", h.fmt_number),
            h.Column("95 % high", "high", h.fmt_number)], cls="concordance"))
    choice = inputs.choice or {}
    if choice.get("chosen") and choice.get("concordance_words"):
        parts.append(h.note(f"Model used: {choice['chosen']}. The candidates were ranked on the cross-validated "
                            f"{choice['concordance_words']}. {choice.get('reason', '')}".rstrip()))
    calibration = inputs.calibration
    if calibration is not None and not calibration.empty and {"predicted", "observed"} <= set(calibration.columns):
        figures["calibration"] = _figures.calibration_figure(calibration)
        horizon = ""
        if "horizon_days" in calibration.columns:
            horizon = f" within {int(calibration['horizon_days'].iloc[0])} days"
        parts.append("<h3>Are the probabilities about right?</h3>")
        parts.append(h.figure(
            "calibration", figures["calibration"], "Predicted against observed failure share by risk decile",
            f"Units are split into ten equal-sized groups by predicted probability of failure{horizon}. "
            "Each point compares the group's average prediction with the share that actually failed. "
            "Points on the dotted diagonal mean the probabilities can be taken at face value; points "
            "below it mean the model over-states risk, above it under-states risk.", wide=False))
    counts = norm.calibration_counts(inputs.comparison)
    if counts is not None:
        if "calibration" not in figures:
            parts.append("<h3>Are the probabilities about right?</h3>")
        parts.append(h.table(counts, [
            h.Column("Model", "model", numeric=False), h.Column("Horizon (days)", "horizon_days", h.fmt_count),
            h.Column("Expected failures", "expected", h.fmt_expected),
            h.Column("Observed (allowing for suspensions)", "observed", h.fmt_expected),
            h.Column("Calibration slope", "slope", h.fmt_number, render=_interval_cell("slope", h.fmt_number))],
            cls="calibration-counts",
            caption="Held-out units in cross-validation: failures the model expected against those that "
                    "happened. A calibration slope near 1 means the spread of the probabilities is right."))
    back, label = norm.backtest_long(inputs.backtest_summary)
    if back is not None:
        figures["backtest"] = _figures.backtest_figure(back, label)
        parts.append("<h3>Would the list have found failures in the past?</h3>")
        parts.append(h.figure(
            "backtest", figures["backtest"], "Backtest precision of the model and the oldest-first rule",
            "The model was refitted as of past dates using only records available then; bars show the "
            f"{label}, averaged over those dates. The orange bar is the simple rule of inspecting the "
            "oldest units first."))
    if inputs.backtest_summary is not None and not inputs.backtest_summary.empty:
        bt = inputs.backtest_summary.loc[:, norm.backtest_columns(inputs.backtest_summary)]
        cols = [h.Column(c.replace("_", " "), c, h.fmt_number if pd.api.types.is_float_dtype(bt[c]) else h.fmt_text,
                         numeric=pd.api.types.is_numeric_dtype(bt[c])) for c in bt.columns]
        parts.append(h.table(bt, cols, cls="backtest", caption="Backtest results as written by the run."))
        held = norm.interval_hits(inputs.backtest_summary)
        if held:
            parts.append(h.paragraph(held))
        by_mode = norm.mode_hits(inputs.backtest_summary)
        if by_mode:
            parts.append(h.paragraph(by_mode))
    curves = []
    oob = norm.tree_curve(inputs.oob_curve, "oob_concordance")
    if oob is not None:
        curves.append(("Forest: out-of-bag concordance", oob, "concordance (out-of-bag)"))
    cv = norm.cv_curve_with_band(inputs.cv_curve, inputs.cv_fold_curves)
    if cv is not None:
        curves.append(("Boosted: held-out partial likelihood", cv, "loss per failure (lower is better)"))
    if curves:
        figures["tree_curves"] = _figures.tree_curve_figure(curves)
        parts.append("<h3>Enough trees?</h3>")
        parts.append(h.figure(
            "tree_curves", figures["tree_curves"], "Model quality against number of trees",
            "How the models' quality changes as trees are added. A curve that has levelled off means more "
            "trees would not help; for the boosted model the dashed line marks the number of trees chosen "
            "by cross-validation on whole units."))
    if not parts:
        return _NONE
    return h.section("evidence", "Model evidence", "".join(parts),
                     lead="How far the ranking can be trusted, measured on records the models did not see."), figures


# -- 3. fleet reliability ------------------------------------------------------

def fleet(inputs) -> Section:
    table = inputs.life_table
    if table is None or table.n_rows == 0 or table.n_failures == 0:
        return _NONE
    frame = table.frame
    figures, parts = {}, []
    observed = [("fleet", _product_limit.product_limit_survival(table.entry, table.exit, table.event))]
    group_by = inputs.group_by if inputs.group_by in frame.columns else None
    if group_by:
        counts = frame.groupby(group_by, observed=True)["failed"].sum().sort_values(ascending=False)
        for name in counts.index[:6]:
            rows = (frame[group_by] == name).to_numpy()
            observed.append((f"{group_by} {name}", _product_limit.product_limit_survival(
                table.entry[rows], table.exit[rows], table.event[rows])))
    figures["survival"] = _figures.survival_figure(observed, inputs.predicted_survival)
    group_note = f" Thinner lines show the {len(observed) - 1} {group_by} groups with the most failures." if group_by else ""
    predicted_note = (" The dashed vermillion line is the fleet survival the model predicts; where it leaves "
                      "the grey band the model and the records disagree." if inputs.predicted_survival is not None else "")
    parts.append(h.figure(
        "survival", figures["survival"], "Share of units still working against age",
        "The share of units expected to still be working at each age, from the records (Kaplan–Meier "
        "with late entry: units installed before records began count only from the age they were first "
        f"recorded). The grey band is a 95 % interval.{group_note}{predicted_note}"))
    bandwidth = _curves.default_bandwidth(table.exit, table.event)
    top_age = _age_with_enough_at_risk(table.entry, table.exit)
    if top_age > bandwidth:
        grid = np.linspace(0.0, top_age, 160)
        curve = _curves.smoothed_hazard(table.entry, table.exit, table.event, grid, bandwidth)
        figures["hazard"] = _figures.hazard_figure(curve, bandwidth)
        _, reading = _curves.hazard_shape(curve)
        parts.append(h.figure(
            "hazard", figures["hazard"], "Failure rate against age",
            "How often running units fail at each age (failures per unit-year), smoothed over a window of "
            f"±{bandwidth:.0f} days, shown up to the age where at least 10 units are still under observation. "
            "A falling curve suggests early-life failures, a flat one random failures, a rising one wear-out."))
        parts.append(h.paragraph(reading + " Check it against maintenance history before acting on it."))
    facts = table.summary()
    parts.append(h.simple_table([
        ("units", h.number(facts["units"], h.fmt_count, "units")),
        ("lives (renewals counted separately)", h.number(facts["lives"], h.fmt_count, "lives")),
        ("failures", h.number(facts["failures"], h.fmt_count, "failures")),
        ("suspensions (still running or removed without failing)", h.number(facts["suspensions"], h.fmt_count, "suspensions")),
        ("lives entering records late", h.number(facts["delayed_entries"], h.fmt_count, "delayed_entries")),
        ("unit-years observed", h.number(facts["time_at_risk_days"] / 365.25, lambda v: f"{v:,.0f}", "unit_years")),
    ], caption="What the curves are built from."))
    stats = _fleet_tables.statistics(inputs, table)
    parts.extend(_fleet_tables.life_statistics_table(stats))
    fit = _fleet_tables.fleet_weibull(stats)
    if fit is not None and len(observed[0][1]["age"]) >= 3:
        figures["weibull"] = _figures.weibull_plot_figure(observed[0][1], *fit)
        parts.append(h.figure(
            "weibull", figures["weibull"], "Weibull probability plot of the fleet",
            "Each point is the share of the fleet failed by that age, from the records (late entry "
            "respected), on scales where a Weibull life is a straight line; the line is the Weibull fit in the "
            "table above. Points that bend away from the line suggest more than one failure pattern (early "
            "failures and wear-out, or a mix of makers), which one Weibull cannot describe."))
    parts.extend(_fleet_tables.replacement_table(inputs.replacement_ages, inputs.summary))
    return h.section("fleet", "Fleet reliability", "".join(parts),
                     lead="How the fleet as a whole has survived so far, read from the records alone."), figures


def _age_with_enough_at_risk(entry, exit, minimum: int = 10) -> float:
    ages = np.unique(np.concatenate([entry, exit]))
    counts = _product_limit.at_risk_counts(entry, exit, ages)
    ok = ages[counts >= minimum]
    return float(ok.max()) if len(ok) else 0.0


# -- 4. drivers ------------------------------------------------------------------

def drivers(inputs) -> Section:
    parts, figures = [], {}
    imp = inputs.importance
    if imp is not None and not imp.empty:
        col = next((c for c in ("importance", "mean_abs_contribution") if c in imp.columns), None)
        if col:
            frame = imp.rename(columns={col: "importance"})
            figures["importance"] = _figures.importance_figure(frame)
            parts.append(h.figure(
                "importance", figures["importance"], "Overall influence of each covariate",
                "How much each recorded characteristic moves the risk score on average across the fleet "
                "(mean size of its contribution). Influence is not cause: a covariate may stand in for "
                "something not recorded."))
    contrib = inputs.unit_contributions
    if contrib is not None and not contrib.empty and inputs.ranked_units is not None:
        top = inputs.ranked_units.sort_values("rank")["unit_id"].astype(str)
        units = [u for u in top if u in set(contrib["unit_id"].astype(str))][:6]
        if units:
            figures["unit_drivers"] = _figures.unit_drivers_figure(contrib, units)
            parts.append(h.figure(
                "unit_drivers", figures["unit_drivers"], "Signed drivers for the top units",
                "For the units at the top of the list: what raises their risk (solid vermillion, to the "
                "right) and what lowers it (hatched blue, to the left), relative to a typical unit."))
    if not parts:
        return _NONE
    return h.section("drivers", "What drives the risk", "".join(parts)), figures


# -- 5. month over month -----------------------------------------------------------

def _month_over_month(monthly: dict) -> list[str]:
    """The monthly run's changes (wearcast.monthly.month_changes) in planners' words."""
    column = str(monthly.get("probability_column", ""))
    horizon = column.removeprefix("p_fail_").removesuffix("d")
    within = f"within {horizon} days" if horizon.isdigit() else "within the horizon"
    parts = [h.paragraph(f"Compared with the previous run ({monthly.get('previous_run', 'unknown')}); "
                         f"probabilities of failure {within}.")]
    for key, label in (("entered_top", "Entered the top list"), ("left_top", "Left the top list")):
        units = monthly.get(key)
        units = [] if units is None else list(units)
        parts.append(f"<h3>{h.esc(label)}</h3>" + h.paragraph(", ".join(map(str, units)) if units else "none"))
    movers = monthly.get("largest_movers")
    movers = movers.copy() if isinstance(movers, pd.DataFrame) else pd.DataFrame(list(movers or []))
    if not movers.empty:
        for col in ("drivers_before", "drivers_now"):
            if col in movers:
                movers[col] = movers[col].map(lambda v: "; ".join(v) if isinstance(v, (list, tuple)) else v)
        if "change" in movers:
            movers["change_points"] = 100.0 * movers["change"].astype(float)
        cols = [h.Column("Unit", "unit_id", numeric=False),
                h.Column("Before", "before", h.fmt_percent, numeric=True),
                h.Column("Now", "now", h.fmt_percent, numeric=True),
                h.Column("Change (points)", "change_points", lambda v: f"{float(v):+.1f}", numeric=True),
                h.Column("Main drivers before", "drivers_before", numeric=False),
                h.Column("Main drivers now", "drivers_now", numeric=False)]
        cols = [c for c in cols if c.field in movers.columns]
        parts.append("<h3>Largest movers</h3>" + h.table(movers, cols))
    return parts


def changes(inputs) -> Section:
    parts, figures = [], {}
    monthly = inputs.monthly_changes
    if monthly and "previous_run" in monthly:  # the shape wearcast.monthly.month_changes writes
        parts += _month_over_month(monthly)
    elif monthly:
        for key, value in monthly.items():
            title = str(key).replace("_", " ").capitalize()
            if isinstance(value, pd.DataFrame) or (isinstance(value, list) and value and isinstance(value[0], dict)):
                frame = value if isinstance(value, pd.DataFrame) else pd.DataFrame(value)
                if frame.empty:
                    continue
                cols = [h.Column(c.replace("_", " "), c, h.fmt_count if pd.api.types.is_integer_dtype(frame[c])
                                 else h.fmt_number if pd.api.types.is_float_dtype(frame[c]) else h.fmt_text,
                                 numeric=pd.api.types.is_numeric_dtype(frame[c])) for c in frame.columns]
                parts.append(f"<h3>{h.esc(title)}</h3>" + h.table(frame, cols))
            elif isinstance(value, (list, tuple)):
                shown = ", ".join(map(str, value)) if value else "none"
                parts.append(f"<h3>{h.esc(title)}</h3>" + h.paragraph(shown))
            elif not isinstance(value, dict):
                parts.append(h.simple_table([(title, h.number(value, h.fmt_count, str(key))
                                              if isinstance(value, (int, float)) else h.esc(value))]))
    drift = inputs.drift
    if drift is not None and not drift.empty and {"covariate", "psi"} <= set(drift.columns):
        from wearcast.drift import PSI_LARGE, PSI_MODERATE

        figures["drift"] = _figures.drift_figure(drift, PSI_MODERATE, PSI_LARGE)
        parts.append("<h3>Has the fleet changed since the model was trained?</h3>")
        parts.append(h.figure(
            "drift", figures["drift"], "Population stability index per covariate",
            f"How different this month's units are from the records the model learnt from, per covariate. "
            f"Above {PSI_MODERATE} is read as a moderate shift and above {PSI_LARGE} as a large one "
            "(common practice in model monitoring, not a statistical test)."))
        flagged = drift[drift["psi"] > PSI_MODERATE].sort_values("psi", ascending=False)
        if flagged.empty:
            parts.append(h.paragraph("No covariate has shifted beyond the moderate threshold."))
        else:
            items = [f'<span class="level-{"large" if v > PSI_LARGE else "moderate"}">{h.esc(c)}</span>: '
                     f'{h.number(v, lambda x: f"{x:.2f}", "psi", covariate=c)}'
                     for c, v in zip(flagged["covariate"], flagged["psi"])]
            parts.append(h.paragraph("Drift warnings (the model may be less reliable for these):")
                         + h.bullet_list(items, raw=True))
    if not parts:
        return _NONE
    return h.section("changes", "Since last month", "".join(parts)), figures


# -- 6. data quality ----------------------------------------------------------------

def data_quality(inputs) -> Section:
    dq = inputs.data_quality
    if not dq:
        return _NONE
    labels = (("rows_read", "rows read"), ("rows_kept", "rows kept"),
              ("rows_quarantined", "rows set aside (quarantined)"),
              ("rows_after_as_of", "rows dated after the export date (ignored)"))
    rows = [(label, h.number(dq[key], h.fmt_count, key)) for key, label in labels if key in dq]
    parts = [h.simple_table(rows, caption="Rows of the export.")] if rows else []
    reasons = dq.get("quarantined_by_reason") or dq.get("by_reason") or {}
    if reasons:
        frame = pd.DataFrame({"reason": list(reasons.keys()), "rows": [int(v) for v in reasons.values()]})
        parts.append(h.table(frame, [h.Column("Reason", "reason", numeric=False), h.Column("Rows", "rows", h.fmt_count)],
                             caption="Why rows were set aside (first reason found per row).", row_key="reason"))
    if dq.get("quarantine_path"):
        parts.append(h.note(f"Every set-aside row, with its line number and reason, is in {dq['quarantine_path']}."))
    if not parts:
        return _NONE
    return h.section("data-quality", "Data quality", "".join(parts)), {}


# -- 7. cautions ------------------------------------------------------------------------

def cautions(inputs) -> Section:
    items = [
        "A probability here is the chance a unit that is working today fails within the stated number "
        "of days, if the future resembles the past records. It is not a prediction that the unit will "
        "fail, and a low value is not a clearance.",
        "The probabilities are estimated from past failure and suspension records. Units, duties or "
        "conditions unlike those in the records (new designs, changed use) are less well covered.",
        "Intervals show how much the estimates move when the records are resampled. They describe "
        "sampling uncertainty only; they are not guarantees and do not cover errors in the records.",
        "Drivers show what the model associates with risk, not what causes failure.",
    ]
    body = h.bullet_list(items) + f'<p class="caution-strip" id="caution">{h.esc(inputs.caution)}</p>'
    return h.section("cautions", "What these numbers mean", body), {}


SECTIONS = (read_first, headline, evidence, fleet, drivers, changes, data_quality, cautions)
TITLES = {"read-first": "Read first", "this-month": "This month", "evidence": "Model evidence", "fleet": "Fleet reliability",
          "drivers": "Drivers", "changes": "Since last month", "data-quality": "Data quality",
          "cautions": "What these numbers mean"}


def anchor_of(section_html: str) -> str | None:
    marker = '<section id="'
    if not section_html.startswith(marker):
        return None
    return section_html[len(marker):section_html.index('"', len(marker))]
