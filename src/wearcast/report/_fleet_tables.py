"""Tables of the report that read fleet-level files: life statistics, planned replacement ages
and failures by mode."""

from __future__ import annotations

import numpy as np
import pandas as pd

from wearcast.report import _html as h
from wearcast.report import _normalise as norm


def statistics(inputs, table) -> pd.DataFrame | None:
    """The life statistics to show: life_statistics.csv, or computed from the life table."""
    stats = inputs.life_statistics
    if stats is None:
        from wearcast.lifestats import life_statistics

        stats = life_statistics(table, [inputs.group_by] if inputs.group_by in table.frame.columns else [])
    if stats is None or stats.empty or "mtbf_days" not in stats.columns:
        return None
    return stats


def fleet_weibull(stats: pd.DataFrame | None) -> tuple[float, float] | None:
    """(shape, scale in days) of the whole fleet's Weibull fit, when there is one."""
    if stats is None or "weibull_shape" not in stats.columns:
        return None
    fleet = stats[norm.is_fleet_row(stats)]
    if fleet.empty:
        return None
    shape, scale = float(fleet["weibull_shape"].iloc[0]), float(fleet["weibull_scale_days"].iloc[0])
    return (shape, scale) if np.isfinite(shape) and np.isfinite(scale) else None


def life_statistics_table(stats: pd.DataFrame | None) -> list[str]:
    """MTBF, B-lives and the Weibull shape per group."""
    if stats is None:
        return []
    level = float(stats["level"].iloc[0]) if "level" in stats.columns else 0.9
    frame, is_fleet = _labelled(stats)
    by_names = sorted(set(frame.loc[~is_fleet, "group_by"].astype(str)))
    # own field names, so a reader's data-field lookup does not confuse them with the fleet facts above
    frame["group_failures"] = frame["failures"]
    frame["group_unit_years"] = frame["time_at_risk_days"] / 365.25

    group_header = f"Group ({', '.join(by_names)})" if by_names else "Group"
    columns = [h.Column(group_header, "label", numeric=False), h.Column("Failures", "group_failures", h.fmt_count),
               h.Column("Unit-years", "group_unit_years", lambda v: "–" if h.is_missing(v) else f"{float(v):,.0f}"),
               h.Column("MTBF", "mtbf_days", render=_with_bounds("mtbf_days", "mtbf_low_days", "mtbf_high_days"))]
    for name in sorted({c[:-len("_days")] for c in frame.columns
                        if c.startswith("b") and c.endswith("_days") and "_low" not in c and "_high" not in c},
                       key=lambda n: float(n[1:].replace("_", "."))):
        columns.append(h.Column(f"{name.upper()} life", f"{name}_days",
                                render=_with_bounds(f"{name}_days", f"{name}_low_days", f"{name}_high_days")))
    if "weibull_shape" in frame.columns:
        shape_fmt = lambda v: h.fmt_number(v, 2)  # noqa: E731
        columns.append(h.Column("Weibull β", "weibull_shape", render=_with_bounds(
            "weibull_shape", "weibull_shape_low", "weibull_shape_high", shape_fmt)))
    thin = _thin_b_lives(frame)
    conditional = frame["observed_from_age_days"].max() if "observed_from_age_days" in frame.columns else 0.0
    caveat = (" Some groups have no unit recorded from new, so their B-lives are conditional on reaching the "
              "youngest recorded age (observed_from_age_days in life_statistics.csv)." if conditional and conditional > 0 else "")
    return [
        h.table(frame, columns, caption=f"Life statistics from the records alone (ages and MTBF in years; {level * 100:.0f} % bounds in brackets)", cls="life-stats", table_id="life-stats"),
        h.paragraph(
            "B10 life: the age by which one unit in ten has failed, read off the Kaplan–Meier curve of each "
            "life up to its first failure (late entry respected; the curve above, unless renewal = \"repair\" "
            "counts repeat failures there); B50 is the median life. A dash means the curve has not fallen that far within "
            "the records; \"≥\" marks a bound beyond them. MTBF: unit-years observed divided by "
            "failures, which assumes a constant failure rate; when the rate rises with age (wear-out), trust "
            "the B-lives over the MTBF. Weibull β (shape): from a Weibull distribution fitted to the same lives "
            "(late entry respected); above 1 the failure rate rises with age (wear-out), below 1 it falls "
            f"(early-life failures), near 1 it is constant. Bounds are {level * 100:.0f} % intervals for sampling "
            f"only (the figure's band is 95 %).{caveat}{thin}{_shape_sentence(frame[is_fleet])}"),
    ]


def _labelled(frame: pd.DataFrame) -> tuple[pd.DataFrame, pd.Series]:
    """A copy with a ``label`` column ("whole fleet" or the group's level), and the fleet-row mask."""
    is_fleet = norm.is_fleet_row(frame)
    return frame.assign(label=np.where(is_fleet, "whole fleet", frame["group"].astype(str))), is_fleet


def _with_bounds(value: str, low: str, high: str, fmt=h.fmt_years):
    """A cell renderer: the estimate, then its bounds in grey ("≥" when the upper one is beyond the records)."""
    def render(row):
        shown = h.number(row.get(value), fmt, value)
        if h.is_missing(row.get(low)):
            return shown
        lower = h.number(row.get(low), fmt, low)
        spread = f"≥ {lower}" if h.is_missing(row.get(high)) else f"{lower}–{h.number(row.get(high), fmt, high)}"
        return f'{shown} <span class="muted">({spread})</span>'
    return render


def _thin_b_lives(frame: pd.DataFrame, minimum: int = 10) -> str:
    """A sentence naming the B-lives that rest on fewer than ``minimum`` units at risk at some age."""
    notes = []
    for col in [c for c in frame.columns if c.endswith("_fewest_at_risk")]:
        fewest = pd.to_numeric(frame[col], errors="coerce")
        thin = frame.loc[fewest < minimum, "label"].astype(str).tolist()
        if thin:
            notes.append(f"{col[:-len('_fewest_at_risk')].upper()} of {', '.join(thin)}")
    if not notes:
        return ""
    return (f" Read with care: {'; '.join(notes)} rest on fewer than {minimum} units under observation at some "
            "younger age (late entry leaves few young units on record), so one failure more or less moves them.")


def _shape_sentence(fleet: pd.DataFrame) -> str:
    if fleet.empty or "weibull_shape" not in fleet.columns:
        return ""
    from wearcast.lifestats import shape_reading

    row = fleet.iloc[0]
    shape, low, high = (float(row.get(f"weibull_shape{p}", np.nan)) for p in ("", "_low", "_high"))
    if not np.isfinite(shape):
        return ""
    return (f" For the whole fleet the shape is {shape:.2f} ({low:.2f}–{high:.2f}): "
            f"{shape_reading(shape, low, high)}.")


def mode_table(forecast: pd.DataFrame | None, summary: dict) -> list[str]:
    """Expected failures of each mode for the fleet, one column per horizon (mode_forecast.csv)."""
    if forecast is None or forecast.empty:
        return []
    fleet = forecast[norm.is_fleet_row(forecast)]
    if fleet.empty:
        return []
    horizons = sorted(fleet["horizon_days"].unique(), key=float)
    wide = pd.DataFrame({"mode": list(dict.fromkeys(fleet["mode"]))})
    columns = [h.Column("Failure mode", "mode", numeric=False)]
    for hz in horizons:
        part = fleet[fleet["horizon_days"] == hz].set_index("mode")
        tag = f"{float(hz):g}"
        for col in ("expected_failures", "chance_only_low", "chance_only_high"):
            wide[f"{col}_{tag}"] = part[col].reindex(wide["mode"]).to_numpy()

        def cell(row, tag=tag, hz=hz):
            attrs = {"horizon_days": int(float(hz)), "mode": row["mode"]}
            return (f'{h.number(row[f"expected_failures_{tag}"], h.fmt_expected, "mode_expected_failures", **attrs)}'
                    f' <span class="muted">({h.number(row[f"chance_only_low_{tag}"], h.fmt_count, "mode_low", **attrs)}'
                    f'–{h.number(row[f"chance_only_high_{tag}"], h.fmt_count, "mode_high", **attrs)})</span>')
        columns.append(h.Column(f"next {int(float(hz)):,} days", f"expected_failures_{tag}", render=cell))
    info = (summary or {}).get("modes") or {}
    by = info.get("modes_by")
    mix = (f"each unit's mix is that of its {by} (shrunk toward the fleet's mix where a {by} has few "
           "failures)" if by else "every unit is given the fleet's mix")
    note = (f"Each unit's probability of failing is split by the failure modes recorded in the history: {mix}. "
            "The range in brackets is the spread from chance alone; it leaves out model uncertainty and "
            "the uncertainty of the mix itself, so plan spares with some margin above it.")
    age = info.get("mix_by_age")
    return [h.table(wide, columns, caption="Expected failures by failure mode, whole fleet (for spares and crews)",
                    cls="modes", table_id="mode-forecast"),
            h.note(note + (f" {age}" if age else ""))]


def replacement_table(ages: pd.DataFrame | None, summary: dict | None = None) -> list[str]:
    """Best planned replacement age per group (replacement_ages.csv), with the cost model's limits."""
    if ages is None or ages.empty or "best_age_days" not in ages.columns:
        return []
    frame, _ = _labelled(ages)
    with_bounds = _with_bounds("best_age_days", "age_low_days", "age_high_days")

    def age_cell(row):
        if h.is_missing(row.get("best_age_days")):
            return h.esc(row.get("reading", "none"))
        return with_bounds(row) + (" *" if _unclear(row) else "")

    columns = [h.Column("Group", "label", numeric=False),
               h.Column("Weibull β", "weibull_shape", lambda v: h.fmt_number(v, 2)),
               h.Column("Best age to replace, years (within 5 % of the best cost)", "best_age_days", render=age_cell),
               h.Column("Saving against replacing at failure", "saving", h.fmt_percent)]
    return [h.table(frame, columns, caption="Planned replacement age from the cost model ([costs] in the config)",
                    cls="replacement", table_id="replacement-ages"),
            h.paragraph(
                "The age at which replacing a still-working unit by plan costs least per year, given the Weibull "
                "fit above and the two costs in the config (age replacement: Barlow and Proschan 1965). It is a "
                "fleet-average policy: it ignores each unit's condition and readings (the ranked list has those) "
                "and consequences a cost cannot carry, so it supports, and never replaces, inspections, "
                "manufacturer instructions, local codes and licensed engineering judgement."
                + (" * The Weibull shape's bounds include 1 for this group: the records do not show wear-out "
                   "clearly, and a planned replacement pays only if the failure rate truly rises with age."
                   if any(_unclear(row) for _, row in frame.iterrows()) else "")
                + _past_sentence(summary or {}))]


def _past_sentence(summary: dict) -> str:
    past, age = summary.get("units_past_planned_replacement_age"), summary.get("planned_replacement_age_days")
    if past is None or age is None:
        return ""
    return (f" {past:,} units in service are already at or past the whole fleet's best age "
            f"({float(age) / 365.25:.1f} years; column past_planned_replacement_age of ranked_units.csv).")


def _unclear(row) -> bool:
    """An age is given but the Weibull shape's bounds include 1 (no clear wear-out)."""
    return not h.is_missing(row.get("best_age_days")) and str(row.get("wear_out_clear")).lower() in ("false", "0")
