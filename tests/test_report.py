"""Tests for the planners' report (wearcast.report).

The fleet curves are checked against lifelines (a reference library) on data
it ships; the page is checked for self-containment, for embedding every figure
and for showing exactly the numbers in the run's files. Fixture frames below
are invented and only shaped like the run's file contracts (ranking's
ranked_units.csv / fleet_forecast.csv / summary.json, validation's
comparison.csv): they exercise the layout, never a result.
"""

from __future__ import annotations

import base64
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from wearcast import CAUTION, LifeTable, _atomic
from wearcast.report import (FIGURES_DIR, ReportInputs, build_report, render_report,
                             report_inputs_from_run_folder)
from wearcast import _product_limit
from wearcast.report import _curves


# -- fixtures shaped like the contracts (invented values) ----------------------------------


def ranked_units(n: int = 40, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    p30 = np.sort(rng.uniform(0.002, 0.25, n))[::-1]
    frame = pd.DataFrame({
        "unit_id": [f"PX-{1000 + i}" for i in range(n)],
        "site": rng.choice(["North yard", "River works", "Hill depot"], n),
        "age_days": rng.uniform(200, 4000, n).round(1),
    })
    for h, scale in ((30, 1.0), (90, 2.6), (365, 6.0)):
        p = np.clip(p30 * scale, 0, 0.97)
        frame[f"p_fail_{h}d"] = p
        frame[f"p_fail_{h}d_low"] = p * 0.6
        frame[f"p_fail_{h}d_high"] = np.clip(p * 1.5, 0, 0.99)
    frame["rank"] = np.arange(1, n + 1)
    frame["rank_low"] = np.maximum(1, frame["rank"] - rng.integers(0, 6, n))
    frame["rank_high"] = frame["rank"] + rng.integers(0, 20, n)
    frame["top50_share"] = np.clip(1.0 - frame["rank"] / 80.0, 0, 1)
    frame["top50_stable"] = frame["top50_share"] >= 0.9
    words = ["older than most", "high duty cycles", "harsh site", "recent repair", "many starts"]
    for j in (1, 2, 3):
        frame[f"driver_{j}"] = [words[(i + j) % len(words)] for i in range(n)]
    return frame


def fleet_forecast() -> pd.DataFrame:
    rows = []
    for h, base in ((30, 4.37), (90, 11.92), (365, 38.45)):
        for group_by, group, share in (("fleet", "all", 1.0), ("site", "North yard", 0.5),
                                       ("site", "River works", 0.3), ("site", "Hill depot", 0.2)):
            e = base * share
            rows.append({"group_by": group_by, "group": group, "horizon_days": h, "units": int(400 * share),
                         "expected_failures": e, "failures_low": np.floor(e * 0.55), "failures_high": np.ceil(e * 1.6),
                         "chance_only_low": np.floor(e * 0.7), "chance_only_high": np.ceil(e * 1.4)})
    return pd.DataFrame(rows)


def summary() -> dict:
    return {"as_of": "2026-11-30", "model": "boosted", "horizons_days": [30, 90, 365], "rank_horizon_days": 30,
            "top_k": 20, "stable_share": 0.9, "interval_quantiles": [0.05, 0.95], "units_in_service": 40}


def comparison() -> pd.DataFrame:
    rows = []
    for model, c in (("boosted", 0.71), ("forest", 0.69), ("cox", 0.66)):
        row = {"model": model}
        for m, shift in (("c_harrell", 0.0), ("c_truncation", -0.01), ("c_uno_tau_1825d", -0.02)):
            row[m], row[f"{m}_low"], row[f"{m}_high"] = c + shift, c + shift - 0.04, c + shift + 0.04
            row[f"{m}_vs_cox"] = c - 0.66
        row["expected_failures_90d"], row["observed_failures_90d"] = 31.5, 29.25
        row["calibration_slope_90d"], row["calibration_slope_90d_low"], row["calibration_slope_90d_high"] = 0.9, 0.7, 1.1
        rows.append(row)
    return pd.DataFrame(rows)


def calibration() -> pd.DataFrame:
    predicted = np.linspace(0.01, 0.3, 10)
    return pd.DataFrame({"model": "boosted", "horizon_days": 90, "group": np.arange(1, 11), "units": 40,
                         "predicted": predicted, "observed": predicted * np.linspace(0.8, 1.1, 10),
                         "failures": (predicted * 40).round().astype(int)})


def backtest_summary() -> pd.DataFrame:
    return pd.DataFrame({"model": ["boosted", "cox"], "c_harrell_90d": [0.7, 0.66], "expected_failures_90d": [30.1, 29.0],
                         "observed_failures_90d": [28, 28], "precision_top50_90d": [0.22, 0.18],
                         "precision_top50_90d_oldest": [0.1, 0.1], "lift_top50_90d_vs_oldest": [2.2, 1.8],
                         "lift_top50_90d_vs_random": [3.1, 2.5], "auc_90d": [0.7, 0.6], "origins": [6, 6],
                         "origins_observed_inside_interval_90d": [6, 5],
                         "origins_observed_inside_forecast_90d": [5, 4]})


def life_table(n: int = 300, seed: int = 5) -> LifeTable:
    """Weibull lives (shape 2, scale 2000 days) with late entry and suspensions."""
    rng = np.random.default_rng(seed)
    life = 2000.0 * rng.weibull(2.0, n)
    entry = np.where(rng.random(n) < 0.3, rng.uniform(0, 800, n), 0.0)
    keep = life > entry
    life, entry = life[keep], entry[keep]
    cens = entry + rng.uniform(200, 4000, len(life))
    exit_ = np.minimum(life, cens)
    frame = pd.DataFrame({"unit_id": [f"PX-{i}" for i in range(len(life))], "entry_age": entry, "exit_age": exit_,
                          "failed": life <= cens, "site": rng.choice(["North yard", "River works"], len(life))})
    return LifeTable.from_frame(frame)


def full_inputs() -> ReportInputs:
    ranked = ranked_units()
    contrib = pd.DataFrame([{"unit_id": u, "covariate": c, "contribution": v}
                            for i, u in enumerate(ranked["unit_id"][:6])
                            for c, v in (("age_days", 0.4 - 0.05 * i), ("starts_per_day", 0.2), ("site", -0.15),
                                         ("load_factor", 0.1 * (-1) ** i))])
    return ReportInputs(
        title="Pump fleet, invented demo", as_of="2026-11-30", ranked_units=ranked,
        fleet_forecast=fleet_forecast(), summary=summary(),
        comparison=comparison(), calibration=calibration(), backtest_summary=backtest_summary(),
        oob_curve=[(n, 0.6 + 0.1 * (1 - np.exp(-n / 40))) for n in range(10, 210, 10)],
        cv_curve=1.8 - 0.2 * (1 - np.exp(-np.arange(1, 120) / 25)) + 0.0008 * np.arange(1, 120),
        life_table=life_table(), group_by="site",
        importance=pd.DataFrame({"covariate": ["age_days", "starts_per_day", "site", "load_factor"],
                                 "importance": [0.4, 0.25, 0.12, 0.05]}),
        unit_contributions=contrib,
        data_quality={"rows_read": 1250, "rows_kept": 1231, "rows_quarantined": 17, "rows_after_as_of": 2,
                      "quarantined_by_reason": {"install date after failure date": 11, "unknown unit id": 6}},
        monthly_changes={"entered_top_k": ["PX-1003", "PX-1011"], "left_top_k": ["PX-1077"],
                         "largest_movers": pd.DataFrame({"unit_id": ["PX-1003"], "rank_before": [48],
                                                         "rank_now": [4], "driver": ["many starts"]})},
        drift=pd.DataFrame({"covariate": ["age_days", "starts_per_day", "load_factor"], "psi": [0.03, 0.14, 0.31],
                            "level": ["none", "moderate", "large"]}),
    )


class _Page(HTMLParser):
    """Collects what the checks need: tags and attributes, marked numbers, style text."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.numbers: list[dict] = []
        self.sections: list[str] = []
        self.style = ""
        self.text: list[str] = []
        self._open_number: dict | None = None
        self._in_style = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag == "section":
            self.sections.append(attrs.get("id", ""))
        if tag == "style":
            self._in_style = True
        if "data-field" in attrs and "data-value" in attrs and tag == "span":
            self._open_number = dict(attrs, text="")
            self.numbers.append(self._open_number)

    def handle_endtag(self, tag):
        if tag == "style":
            self._in_style = False
        if tag == "span":
            self._open_number = None

    def handle_data(self, data):
        if self._in_style:
            self.style += data
        else:
            self.text.append(data)
        if self._open_number is not None:
            self._open_number["text"] += data


def _parse(page: str) -> _Page:
    parser = _Page()
    parser.feed(page)
    parser.close()
    return parser


def _write_run_folder(folder: Path) -> None:
    """A run folder as ranking/validation/io write it (their writers: _atomic, %.6g floats)."""
    _atomic.write_csv(folder / "ranked_units.csv", ranked_units())
    _atomic.write_csv(folder / "fleet_forecast.csv", fleet_forecast())
    _atomic.write_json(folder / "summary.json", summary())
    _atomic.write_csv(folder / "comparison.csv", comparison())
    _atomic.write_csv(folder / "calibration.csv", calibration())
    _atomic.write_csv(folder / "backtest_summary.csv", backtest_summary())
    _atomic.write_json(folder / "check_summary.json", {
        "rows_read": 1250, "rows_kept": 1231, "rows_quarantined": 17, "rows_after_as_of": 2,
        "quarantined_by_reason": {"dated before install": 11, "unit not in the register": 6}})
    _atomic.write_csv(folder / "life_table.csv", life_table().frame)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """One full report built from a run folder (figures are the slow part: ~5 s)."""
    folder = tmp_path_factory.mktemp("run")
    _write_run_folder(folder)
    inputs = report_inputs_from_run_folder(folder, oob_curve=full_inputs().oob_curve,
                                           cv_curve=full_inputs().cv_curve, drift=full_inputs().drift)
    paths = build_report(inputs, folder / "report")
    page = paths["report"].read_text(encoding="utf-8")
    return folder, paths, page, _parse(page)


# -- the fleet curves against lifelines -------------------------------------------------------

def test_product_limit_with_late_entry_matches_lifelines_on_macs():
    # Reference: lifelines KaplanMeierFitter(entry=...) on the left-truncated Multicenter AIDS
    # Cohort Study data that lifelines ships (load_multicenter_aids_cohort_study: W entry, T exit, D event).
    from lifelines import KaplanMeierFitter
    from lifelines.datasets import load_multicenter_aids_cohort_study

    df = load_multicenter_aids_cohort_study()
    ours = _product_limit.product_limit_survival(df["W"], df["T"], df["D"].astype(bool))
    km = KaplanMeierFitter().fit(df["T"], df["D"], entry=df["W"])
    np.testing.assert_allclose(ours["survival"], km.survival_function_at_times(ours["age"]).to_numpy(),
                               rtol=0, atol=1e-12)
    np.testing.assert_array_equal(ours["at_risk"], km.event_table.loc[ours["age"], "at_risk"].to_numpy())
    ci = km.confidence_interval_.loc[ours["age"]].to_numpy()  # exponential Greenwood, 95 %
    np.testing.assert_allclose(ours["low"], ci[:, 0], atol=1e-10)
    np.testing.assert_allclose(ours["high"], ci[:, 1], atol=1e-10)


def test_smoothed_hazard_without_boundary_matches_lifelines_on_waltons():
    # Reference: lifelines NelsonAalenFitter.smoothed_hazard_ (Epanechnikov kernel, no boundary
    # correction) on the Waltons data lifelines ships; tie smoothing off so increments are d/n.
    from lifelines import NelsonAalenFitter
    from lifelines.datasets import load_waltons

    w = load_waltons()
    na = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(w["T"], w["E"])
    reference = na.smoothed_hazard_(bandwidth=8.0)
    ours = _curves.smoothed_hazard(np.zeros(len(w)), w["T"], w["E"].astype(bool),
                                   reference.index.to_numpy(), 8.0, boundary=None)
    np.testing.assert_allclose(ours["rate"], reference.iloc[:, 0].to_numpy(), rtol=1e-12, atol=1e-15)


def test_boundary_correction_keeps_a_constant_hazard_flat_at_young_ages():
    # Known truth: exponential lives have a constant hazard 1/mean. A kernel estimate without
    # boundary correction is about halved at age 0 (half the kernel lies below 0; common practice
    # to correct by renormalising the kernel's mass); the corrected one should not be.
    rng = np.random.default_rng(11)
    life = rng.exponential(1000.0, 20000)
    cens = rng.uniform(0, 3000, 20000)
    exit_, event = np.minimum(life, cens), life <= cens
    grid = np.array([0.0, 100.0, 600.0])
    plain = _curves.smoothed_hazard(np.zeros_like(exit_), exit_, event, grid, 200.0, boundary=None)
    fixed = _curves.smoothed_hazard(np.zeros_like(exit_), exit_, event, grid, 200.0)
    np.testing.assert_allclose(fixed["rate"], 1e-3, rtol=0.1)
    assert plain["rate"][0] == pytest.approx(0.5e-3, rel=0.1)
    assert fixed["rate"][2] == pytest.approx(plain["rate"][2])  # away from the boundary: unchanged
    assert np.all(fixed["low"] <= fixed["rate"]) and np.all(fixed["rate"] <= fixed["high"])


@pytest.mark.parametrize("shape, expected", [(3.0, "rising"), (0.5, "falling"), (1.0, "flat")])
def test_hazard_reading_follows_the_weibull_shape(shape, expected):
    # Known truth: the Weibull hazard rises for shape > 1, falls for shape < 1, is constant at 1.
    rng = np.random.default_rng(int(shape * 10))
    life = 1000.0 * rng.weibull(shape, 8000)
    cens = rng.uniform(0, 2500, 8000)
    exit_, event = np.minimum(life, cens), life <= cens
    entry = np.zeros_like(exit_)
    grid = np.linspace(0.0, np.quantile(exit_, 0.9), 120)
    curve = _curves.smoothed_hazard(entry, exit_, event, grid, _curves.default_bandwidth(exit_, event))
    phase, sentence = _curves.hazard_shape(curve)
    assert phase == expected, sentence


def test_at_risk_counts_follow_the_delayed_entry_rule():
    # A row is at risk at t when entry < t <= exit (wearcast.lifetable); counted by hand.
    entry = np.array([0.0, 5.0, 5.0])
    exit_ = np.array([10.0, 8.0, 20.0])
    assert _product_limit.at_risk_counts(entry, exit_, np.array([5.0, 5.5, 8.0, 8.5, 10.0, 20.0, 20.5])).tolist() == \
        [1, 3, 3, 2, 2, 1, 0]


# -- the page -------------------------------------------------------------------------------------

def test_page_parses_and_references_nothing_outside(built):
    _, _, page, parsed = built
    assert page.startswith("<!DOCTYPE html>")
    for tag, attrs in parsed.tags:
        for key in ("src", "href", "srcset", "action", "poster", "data"):
            if key not in attrs:
                continue
            value = attrs[key] or ""
            assert not re.match(r"\s*(https?:)?//", value), f"<{tag} {key}={value!r}> points outside the page"
            if key == "src":
                assert value.startswith("data:image/png;base64,"), f"<{tag}> src is not an embedded PNG"
            if key == "href":
                assert value.startswith("#"), f"<{tag}> href {value!r} is not an in-page anchor"
        assert tag not in ("script", "link", "iframe", "object", "embed"), f"<{tag}> is not allowed"
    assert "@import" not in parsed.style
    assert not re.search(r"url\(", parsed.style), "the stylesheet must not load anything"
    assert "http://" not in page and "https://" not in page


def test_every_figure_file_is_embedded_in_the_page(built):
    folder, paths, page, parsed = built
    pngs = sorted((folder / "report" / FIGURES_DIR).glob("*.png"))
    assert {p.stem for p in pngs} == set(paths) - {"report"}
    assert {"top_units", "forecast_by_group", "concordance", "calibration", "backtest", "tree_curves",
            "survival", "hazard", "drift"} <= {p.stem for p in pngs}
    sources = {attrs["src"] for tag, attrs in parsed.tags if tag == "img"}
    for png in pngs:
        data = png.read_bytes()
        assert data.startswith(b"\x89PNG\r\n\x1a\n")
        assert "data:image/png;base64," + base64.b64encode(data).decode("ascii") in sources, png.name
    for tag, attrs in parsed.tags:
        if tag == "img":
            assert attrs.get("alt"), "every figure needs alt text"


def test_headline_numbers_equal_the_run_files(built):
    folder, _, _, parsed = built
    forecast = pd.read_csv(folder / "fleet_forecast.csv")
    fleet = forecast[forecast["group_by"] == "fleet"].set_index("horizon_days")
    shown = [n for n in parsed.numbers if "data-horizon-days" in n]
    fields = {"expected_failures", "failures_low", "failures_high", "chance_only_low", "chance_only_high", "units"}
    assert {n["data-field"] for n in shown} == fields
    assert {int(n["data-horizon-days"]) for n in shown} == set(fleet.index)
    for n in shown:
        expected = float(fleet.loc[int(n["data-horizon-days"]), n["data-field"]])
        assert float(n["data-value"]) == expected, n
        # the big plain number is the same value, rounded for reading
        decimals = 1 if n["data-field"] == "expected_failures" else 0
        assert float(n["text"].replace(",", "")) == pytest.approx(round(expected, decimals)), n
    # and the summary's own copy agrees (ranking writes both)
    saved = json.loads((folder / "summary.json").read_text())
    if "expected_failures" in saved:
        for h, value in saved["expected_failures"].items():
            assert fleet.loc[int(h), "expected_failures"] == pytest.approx(value)


def test_top_units_table_shows_the_ranked_file(built):
    folder, _, page, _ = built
    ranked = pd.read_csv(folder / "ranked_units.csv", dtype={"unit_id": str}).set_index("unit_id")
    rows = re.findall(r'<tr data-key="([^"]+)">(.*?)</tr>', page.split('id="top-units"')[1].split("</table>")[0])
    assert [u for u, _ in rows] == list(ranked.sort_values("rank").index[:20])
    for unit, cells in rows:
        values = dict(re.findall(r'data-field="([^"]+)" data-value="([^"]*)"', cells))
        assert values["unit_id"] == unit
        for field in ("rank", "rank_low", "rank_high", "p_fail_30d", "p_fail_30d_low", "p_fail_30d_high",
                      "p_fail_90d", "p_fail_365d", "top50_share"):
            assert float(values[field]) == pytest.approx(float(ranked.loc[unit, field]), rel=1e-12), (unit, field)
        for driver in ranked.loc[unit, ["driver_1", "driver_2", "driver_3"]]:
            assert driver in cells
        flag = "flag-stable" if ranked.loc[unit, "top50_stable"] else "flag-unstable"
        assert flag in cells, (unit, flag)


def test_data_quality_counts_and_caution_are_shown(built):
    folder, _, page, parsed = built
    dq = json.loads((folder / "check_summary.json").read_text())
    marked = {n["data-field"]: n for n in parsed.numbers}
    for key in ("rows_read", "rows_kept", "rows_quarantined", "rows_after_as_of"):
        assert int(marked[key]["data-value"]) == dq[key]
    for reason, count in dq["quarantined_by_reason"].items():
        assert re.search(rf'data-key="{re.escape(reason)}">.*?data-value="{count}"', page)
    text = " ".join(" ".join(parsed.text).split())
    assert CAUTION in text
    assert "working today" in text and "not guarantees" in text


def test_evidence_tables_show_the_validation_files(built):
    folder, _, page, parsed = built
    comparison_file = pd.read_csv(folder / "comparison.csv").set_index("model")
    table = page.split('class="calibration-counts"')[1].split("</table>")[0]
    shown = [float(v) for v in re.findall(r'data-field="expected" data-value="([^"]+)"', table)]
    assert shown == comparison_file["expected_failures_90d"].tolist()
    backtest = page.split('class="backtest"')[1].split("</table>")[0]
    assert "auc_90d" not in backtest and 'data-field="precision_top50_90d_oldest"' in backtest
    # the interval check is said in words under the table, from the run's own counts
    assert ("Observed failures within 90 days fell inside the fleet forecast&#x27;s 90 % interval (chance and "
            "model uncertainty): boosted at 5 of 6 past dates, cox at 4 of 6 past dates.") in page


def test_sections_come_in_reading_order(built):
    *_, parsed = built
    assert parsed.sections == ["this-month", "evidence", "fleet", "changes", "data-quality", "cautions"]


def test_missing_inputs_drop_their_sections_and_leave_a_valid_page(tmp_path):
    paths = build_report(ReportInputs(title="Empty run", as_of="2026-11-30"), tmp_path)
    parsed = _parse(paths["report"].read_text(encoding="utf-8"))
    assert parsed.sections == ["cautions"]
    assert set(paths) == {"report"}
    assert not list(tmp_path.rglob(f"*{_atomic.TMP_SUFFIX}"))


def test_rebuilding_removes_figures_the_new_page_does_not_have(tmp_path):
    build_report(ReportInputs(ranked_units=ranked_units(), summary=summary()), tmp_path)
    assert (tmp_path / FIGURES_DIR / "top_units.png").exists()
    build_report(ReportInputs(life_table=life_table()), tmp_path)
    assert sorted(p.stem for p in (tmp_path / FIGURES_DIR).glob("*.png")) == ["hazard", "survival", "weibull"]


def test_run_without_refits_still_renders(tmp_path):
    # ranking writes empty interval columns when no bootstrap refits were run
    ranked = ranked_units(12)
    for col in [c for c in ranked.columns if c.endswith(("_low", "_high"))] + ["top50_share"]:
        ranked[col] = np.nan
    ranked["rank_low"] = pd.array([pd.NA] * len(ranked), dtype="Int64")
    ranked["rank_high"] = pd.array([pd.NA] * len(ranked), dtype="Int64")
    page, figures = render_report(ReportInputs(ranked_units=ranked, summary=summary()))
    assert "top_units" in figures and 'data-field="rank_low" data-value=""' in page


def test_figures_are_reproducible_bytes():
    inputs = ReportInputs(life_table=life_table(), group_by="site")
    _, first = render_report(inputs)
    _, second = render_report(inputs)
    assert first == second


def test_loader_reports_a_missing_folder(tmp_path):
    from wearcast.exceptions import InputMissingError

    with pytest.raises(InputMissingError, match="does not exist"):
        report_inputs_from_run_folder(tmp_path / "nope")


# -- end to end on the invented demo fleet ----------------------------------------------------

@pytest.mark.slow
def test_report_from_the_scenario_fleet(tmp_path):
    """Scenario export -> wearcast.io -> report. The scenario knows its true population
    survival (wearcast.scenario.true_population_survival, Monte Carlo over the simulated
    process), so the observed fleet curve can be checked against a truth outside the report."""
    from wearcast import scenario
    from wearcast.config import load_config
    from wearcast.io import load_export

    files = scenario.generate_scenario(tmp_path / "scenario", n_units=800, seed=3)
    result = load_export(load_config(files.config))
    table = result.table
    dq = {"rows_read": result.rows_read, "rows_kept": result.rows_kept,
          "rows_quarantined": result.rows_quarantined, "quarantined_by_reason": result.by_reason()}
    ages = np.array([3.0, 6.0, 9.0]) * 365.25
    truth = scenario.true_population_survival(ages, n_lives=20000)
    km = _product_limit.product_limit_survival(table.entry, table.exit, table.event)
    at = np.searchsorted(km["age"], ages, side="right") - 1
    # the 95 % band of the delayed-entry curve covers the true survival (Monte Carlo error ~0.001)
    assert np.all(km["low"][at] - 0.002 <= truth) and np.all(truth <= km["high"][at] + 0.002), (km["survival"][at], truth)

    paths = build_report(ReportInputs(title="Demo fleet (invented)", as_of="2026-11-30", life_table=table,
                                      group_by="site", data_quality=dq), tmp_path / "report")
    assert {"survival", "hazard", "weibull"} <= set(paths)
    parsed = _parse(paths["report"].read_text(encoding="utf-8"))
    marked = {n["data-field"]: n["data-value"] for n in parsed.numbers}
    facts = table.summary()
    for key in ("units", "lives", "failures", "suspensions", "delayed_entries"):
        assert int(marked[key]) == facts[key], key
    assert float(marked["unit_years"]) == pytest.approx(facts["time_at_risk_days"] / 365.25)
    assert int(marked["rows_read"]) == result.rows_read
    assert parsed.sections == ["fleet", "data-quality", "cautions"]
    # the scenario's baseline hazard is Weibull with shape 2 (wearcast.scenario docstring): rising
    assert "looks rising with age" in " ".join(parsed.text)
    # life statistics: computed from the life table when no life_statistics.csv is given, per site
    from wearcast.lifestats import life_statistics

    stats = life_statistics(table, ["site"])
    cells = [n for n in parsed.numbers if n["data-field"] == "b10_days"]
    assert [float(c["data-value"]) for c in cells] == pytest.approx(stats["b10_days"].tolist())
    assert len([n for n in parsed.numbers if n["data-field"] == "mtbf_days"]) == len(stats) == 1 + table.frame["site"].nunique()


def test_no_unfilled_template_fields_in_the_page(built):
    _, _, page, _ = built
    text = re.sub(r'src="data:[^"]*"', "", page)
    text = re.sub(r"<style>.*?</style>", "", text, flags=re.S)
    assert not re.search(r"\{[A-Za-z_][A-Za-z0-9_]*\}", text), "a caption still shows a {placeholder}"


def test_monthly_changes_read_as_sentences_and_a_table(tmp_path):
    # The shape wearcast.monthly.month_changes writes.
    changes = {
        "previous_run": "2026-10-31_abc", "probability_column": "p_fail_365d",
        "entered_top": ["U-7"], "left_top": [],
        "largest_movers": [{"unit_id": "U-7", "before": 0.05, "now": 0.12, "change": 0.07,
                            "drivers_before": ["age high (+0.10)"],
                            "drivers_now": ["vibration_mm_s high (+0.50)", "age high (+0.12)"]}],
    }
    html_text, _ = render_report(ReportInputs(as_of="2026-11-30", monthly_changes=changes))
    text = re.sub(r"<[^>]+>", " ", html_text)
    assert "Entered the top list" in text and "U-7" in text
    assert "vibration_mm_s high (+0.50); age high (+0.12)" in text
    assert "+7.0" in text and "12.0 %" in text
    assert "['" not in text


def test_mode_table_shows_the_mode_forecast_numbers(tmp_path):
    # fixture shaped like mode_forecast.csv (wearcast.modes.mode_forecast): fleet rows and one site row
    modes = pd.DataFrame({
        "group_by": ["fleet"] * 4 + ["site"], "group": ["all"] * 4 + ["North"],
        "horizon_days": [90, 90, 365, 365, 90], "mode": ["seal_leak", "bearing_wear"] * 2 + ["seal_leak"],
        "expected_failures": [4.7, 3.9, 18.5, 15.4, 1.1], "chance_only_low": [1, 1, 12, 9, 0],
        "chance_only_high": [8, 7, 26, 22, 3], "mode_share": [0.55, 0.45, 0.55, 0.45, 1.0]})
    summary_ = dict(summary(), modes={"modes_by": "seal_type", "mix_by_age": "No clear shift of the mode mix."})
    inputs = ReportInputs(title="Modes", as_of="2026-11-30", fleet_forecast=fleet_forecast(), summary=summary_,
                          mode_forecast=modes)
    parsed = _parse(build_report(inputs, tmp_path / "r")["report"].read_text(encoding="utf-8"))
    shown = {(n["data-mode"], int(n["data-horizon-days"])): float(n["data-value"])
             for n in parsed.numbers if n["data-field"] == "mode_expected_failures"}
    fleet_rows = modes[modes["group_by"] == "fleet"]
    assert shown == {(m, h): v for m, h, v in zip(fleet_rows["mode"], fleet_rows["horizon_days"],
                                                   fleet_rows["expected_failures"])}
    highs = sorted(float(n["data-value"]) for n in parsed.numbers if n["data-field"] == "mode_high")
    assert highs == sorted(fleet_rows["chance_only_high"].astype(float))
    text = " ".join(parsed.text)
    assert "that of its seal_type" in text and "No clear shift of the mode mix." in text


def test_backtest_by_mode_sentence_counts_cells(tmp_path):
    bt = backtest_summary().assign(mode_cells=[24, 24], mode_cells_inside_chance=[19, 17])
    inputs = ReportInputs(title="Backtest", as_of="2026-11-30", backtest_summary=bt)
    parsed = _parse(build_report(inputs, tmp_path / "r")["report"].read_text(encoding="utf-8"))
    text = " ".join(parsed.text)
    assert "(past dates x modes): boosted in 19 of 24, cox in 17 of 24." in text
    plain = ReportInputs(title="Backtest", as_of="2026-11-30", backtest_summary=backtest_summary())
    assert "Split by failure mode" not in " ".join(
        _parse(build_report(plain, tmp_path / "p")["report"].read_text(encoding="utf-8")).text)


def test_replacement_table_shows_the_ages_and_the_caution(tmp_path):
    from wearcast.replacement import replacement_ages

    stats = pd.DataFrame({"group_by": ["fleet", "site", "site"], "group": ["all", "North", "South"],
                          "weibull_shape": [2.1, 0.8, 1.3], "weibull_shape_low": [1.8, 0.6, 0.9],
                          "weibull_scale_days": [7500.0, 5000.0, 6000.0]})
    ages = replacement_ages(stats, 1.0, 5.0)
    inputs = ReportInputs(title="Ages", as_of="2026-11-30", life_table=life_table(), replacement_ages=ages,
                          summary={"units_past_planned_replacement_age": 37, "planned_replacement_age_days": 3652.5})
    parsed = _parse(build_report(inputs, tmp_path / "r")["report"].read_text(encoding="utf-8"))
    shown = [float(n["data-value"]) for n in parsed.numbers if n["data-field"] == "best_age_days"]
    assert shown == pytest.approx([ages["best_age_days"].iloc[0], ages["best_age_days"].iloc[2]])
    text = " ".join(parsed.text)
    assert "* The Weibull shape's bounds include 1 for this group" in text
    assert "37 units in service are already at or past the whole fleet's best age (10.0 years" in text
    assert "planned replacement does not pay" in text
    assert "never replaces, inspections, manufacturer instructions, local codes and licensed engineering" in text


def test_b_lives_on_few_units_are_flagged(tmp_path):
    from wearcast.lifestats import life_statistics

    table = life_table()
    stats = life_statistics(table, ["site"])
    stats["b10_fewest_at_risk"] = 50
    stats.loc[1, "b10_fewest_at_risk"] = 3
    inputs = ReportInputs(title="Few", as_of="2026-11-30", life_table=table, group_by="site", life_statistics=stats)
    text = " ".join(_parse(build_report(inputs, tmp_path / "r")["report"].read_text(encoding="utf-8")).text)
    assert f"Read with care: B10 of {stats.loc[1, 'group']} rest on fewer than 10 units" in text
    stats["b10_fewest_at_risk"] = 50
    plain = ReportInputs(title="Few", as_of="2026-11-30", life_table=table, group_by="site", life_statistics=stats)
    assert "Read with care" not in " ".join(_parse(build_report(plain, tmp_path / "p")["report"].read_text(
        encoding="utf-8")).text)


def test_run_warnings_come_first_in_plain_words(tmp_path):
    # metrics.json "warnings" (wearcast.fitting.fit_warnings) are what the terminal printed;
    # the page shows them, escaped, in a section above everything else.
    _write_run_folder(tmp_path)
    said = ["The cox model was left out: its fit did not converge (step size 0.95 and 0.2).",
            "2 unit(s) in service have no value yet for: vibration_mm_s (2) <no reading>."]
    _atomic.write_json(tmp_path / "metrics.json", {"warnings": said})
    inputs = report_inputs_from_run_folder(tmp_path)
    assert inputs.warnings == said
    page, _ = render_report(inputs)
    parsed = _parse(page)
    assert parsed.sections[0] == "read-first"
    block = page.split('id="run-warnings"')[1].split("</div>")[0]
    assert "did not converge (step size 0.95 and 0.2)" in block and "&lt;no reading&gt;" in block
    # a run without warnings has no such section
    (tmp_path / "metrics.json").unlink()
    assert "read-first" not in _parse(render_report(report_inputs_from_run_folder(tmp_path))[0]).sections
def test_report_names_the_concordance_that_chose_the_model(tmp_path):
    comparison = pd.DataFrame({"model": ["cox", "forest_sqrt"], "c_truncation": [0.47, 0.48],
                               "c_time_dependent": [0.74, 0.71], "c_time_dependent_low": [0.69, 0.64],
                               "c_time_dependent_high": [0.76, 0.73]})
    choice = {"chosen": "cox", "reason": "chose cox: highest cross-validated C.",
              "concordance": "c_time_dependent",
              "concordance_words": "time-dependent truncation-aware C (readings in force at each failure)"}
    paths = build_report(ReportInputs(comparison=comparison, choice=choice), tmp_path)
    text = " ".join(_parse(paths["report"].read_text(encoding="utf-8")).text)
    assert "ranked on the cross-validated time-dependent truncation-aware C (readings in force" in text
    assert "C with the readings in force at each failure" in text
