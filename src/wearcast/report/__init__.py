"""The planners' report: one self-contained ``report.html`` plus ``figures/*.png``.

Build a :class:`ReportInputs` (every input but the headline is optional; a
section whose inputs are missing is left out) and call :func:`build_report`.
:func:`report_inputs_from_run_folder` reads whatever a run folder holds, so
``wearcast report RUN_DIR`` is one library call::

    inputs = report_inputs_from_run_folder(run_dir)
    paths = build_report(inputs, run_dir / "report")

The page embeds every figure as a base64 PNG, inlines its stylesheet and runs
no scripts, so it can be mailed, archived and printed (A4) as one file.
"""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from wearcast import CAUTION, __version__, _atomic
from wearcast.exceptions import InputMissingError, OutputError
from wearcast.lifetable import LifeTable
from wearcast.report import _html
from wearcast.report import _sections

REPORT_FILE = "report.html"
FIGURES_DIR = "figures"

#: Columns of ranked_units.csv that are never shown as group columns.
_NOT_GROUPS = {"unit_id", "age_days", "age_years", "beyond_record_age", "rank", "rank_low", "rank_high", "life", "entry_age", "exit_age"}


@dataclass
class ReportInputs:
    """Everything the report can show. Only ``title``/``as_of``/``caution`` are
    always used; each other field, when ``None`` or empty, drops its section.

    Frames follow the run's file contracts (docs/outputs.md, docs/metrics.md):
    ``ranked_units`` (one row per in-service unit), ``fleet_forecast`` (group x
    horizon), ``comparison`` (one row per model, ``c_*`` columns with
    ``_low``/``_high``), ``calibration`` (``predicted``, ``observed`` per risk
    decile, optional ``model``), ``backtest_summary``. ``oob_curve``: pairs
    ``(n_trees, concordance)`` or a frame; ``cv_curve``: held-out loss per tree
    count (array for 1..n trees, pairs or frame), ``cv_fold_curves`` (folds x
    trees) adds a band. ``life_table`` feeds the fleet curves (ages in days),
    grouped by ``group_by`` when that column exists. ``predicted_survival``:
    ``age_days``, ``survival``. ``importance``: ``covariate``, ``importance``
    (mean |contribution|). ``unit_contributions``: long ``unit_id``,
    ``covariate``, ``contribution``. ``data_quality``: the io check summary
    (``rows_read``, ``rows_kept``, ``rows_quarantined``,
    ``quarantined_by_reason``). ``monthly_changes``: name -> list of unit ids
    or a frame. ``drift``: ``covariate``, ``psi``, ``level``.
    ``life_statistics``: MTBF and B-lives per group (``life_statistics.csv``,
    :func:`wearcast.lifestats.life_statistics`); computed from ``life_table``
    when not given. ``mode_forecast``: expected failures per failure mode
    (``mode_forecast.csv``, :func:`wearcast.modes.mode_forecast`).
    ``replacement_ages``: best planned replacement age per group
    (``replacement_ages.csv``, :func:`wearcast.replacement.replacement_ages`).
    ``warnings``: sentences the run printed as warnings (``metrics.json``
    ``warnings``, :func:`wearcast.fitting.fit_warnings`), shown first.
    ``choice``: the model choice from ``metrics.json`` (``chosen``, ``reason``,
    ``concordance_words``: which C ranked the candidates).
    """

    title: str = "Fleet failure-risk report"
    as_of: str | None = None
    caution: str = CAUTION
    ranked_units: pd.DataFrame | None = None
    fleet_forecast: pd.DataFrame | None = None
    summary: dict = field(default_factory=dict)
    comparison: pd.DataFrame | None = None
    calibration: pd.DataFrame | None = None
    backtest_summary: pd.DataFrame | None = None
    oob_curve: Any = None
    cv_curve: Any = None
    cv_fold_curves: Any = None
    life_table: LifeTable | None = None
    group_by: str | None = None
    predicted_survival: pd.DataFrame | None = None
    importance: pd.DataFrame | None = None
    unit_contributions: pd.DataFrame | None = None
    data_quality: dict | None = None
    monthly_changes: dict | None = None
    drift: pd.DataFrame | None = None
    life_statistics: pd.DataFrame | None = None
    mode_forecast: pd.DataFrame | None = None
    replacement_ages: pd.DataFrame | None = None
    warnings: list[str] = field(default_factory=list)
    choice: dict | None = None
    top_k: int = 20

    def group_columns(self, ranked: pd.DataFrame) -> list[str]:
        """Grouping columns of the ranked list shown beside each unit (``group_by`` first)."""
        declared = self.summary.get("group_columns") if isinstance(self.summary, dict) else None
        if isinstance(declared, list):
            cols = [c for c in declared if c in ranked.columns]
        else:
            cols = [c for c in ranked.columns if c not in _NOT_GROUPS and not str(c).startswith(("p_fail_", "top", "driver_"))
                    and (ranked[c].dtype == object or isinstance(ranked[c].dtype, pd.CategoricalDtype))]
        if self.group_by in cols:
            cols.remove(self.group_by)
            cols.insert(0, self.group_by)
        return cols[:3]


def render_report(inputs: ReportInputs) -> tuple[str, dict[str, bytes]]:
    """The page as text and its figures (stem -> PNG bytes), without writing anything."""
    bodies, figures = [], {}
    for build in _sections.SECTIONS:
        body, figs = build(inputs)
        if body:
            bodies.append(body)
            figures.update(figs)
    anchors = [a for a in (_sections.anchor_of(b) for b in bodies) if a]
    as_of = f'Records up to <time data-field="as_of">{_html.esc(inputs.as_of)}</time> · ' if inputs.as_of else ""
    header = (
        '<header class="masthead"><p class="kicker">wearcast · failure-risk report</p>'
        f"<h1>{_html.esc(inputs.title)}</h1>"
        f'<p class="as-of">{as_of}made with wearcast {_html.esc(__version__)}</p>'
        f'<p class="caution-strip">{_html.esc(inputs.caution)}</p>'
        + _html.contents([(a, _sections.TITLES.get(a, a)) for a in anchors]) + "</header>")
    footer = ("<footer>Figures use the Okabe–Ito colour-blind-safe palette; series also differ by marker or "
              "line style. Ages are measured in days since install and shown in years (365.25 days).</footer>")
    return _html.page(inputs.title, header + "".join(bodies) + footer, __version__), figures


def build_report(inputs: ReportInputs, out_dir: str | Path) -> dict[str, Path]:
    """Write ``report.html`` and ``figures/<name>.png`` into ``out_dir`` atomically.

    Returns ``{"report": path, "<figure name>": path, ...}``. Figures of an
    earlier report that this one no longer has are removed, so the folder always
    matches the page.
    """
    out_dir = Path(out_dir)
    page, figures = render_report(inputs)
    written: dict[str, Path] = {}
    fig_dir = out_dir / FIGURES_DIR
    for name, png in figures.items():
        written[name] = _atomic.write_bytes(fig_dir / f"{name}.png", png)
    if fig_dir.exists():
        for old in fig_dir.glob("*.png"):
            if old.stem not in figures:
                try:
                    old.unlink()
                except OSError as exc:
                    raise OutputError(f"cannot remove stale figure {old}: {exc.strerror}.") from exc
    written["report"] = _atomic.write_text(out_dir / REPORT_FILE, page)
    return written


# -- reading a run folder ---------------------------------------------------------

def report_inputs_from_run_folder(folder: str | Path, **overrides: Any) -> ReportInputs:
    """Collect whatever report inputs exist in a run folder (missing files are skipped).

    Reads ``ranked_units.csv``, ``fleet_forecast.csv``, ``summary.json``,
    ``comparison.csv``, ``metrics.json``, ``calibration.csv``,
    ``backtest_summary.csv``, ``oob_curve.csv``, ``cv_curve.csv``,
    ``importance.csv``, ``contributions.csv``, ``predicted_survival.csv``,
    ``drift.csv``, ``life_statistics.csv``, ``mode_forecast.csv``, ``replacement_ages.csv``, ``monthly_changes.json``, ``check_summary.json`` and
    ``life_table.csv`` (searched in the folder and its direct subfolders).
    ``overrides`` replace any field (for example ``life_table=`` or ``top_k=``).
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputMissingError(f"run folder {folder} does not exist. Pass the folder a run wrote its outputs to.")
    summary = _read_json(folder, "summary.json") or {}
    metrics = _read_json(folder, "metrics.json") or {}
    values: dict[str, Any] = {
        "summary": summary,
        "as_of": summary.get("as_of"),
        "ranked_units": _read_csv(folder, "ranked_units.csv", dtype={"unit_id": str}),
        "fleet_forecast": _read_csv(folder, "fleet_forecast.csv", keep_default_na=False, na_values=[""]),
        "comparison": _read_csv(folder, "comparison.csv"),
        "calibration": _read_csv(folder, "calibration.csv"),
        "backtest_summary": _read_csv(folder, "backtest_summary.csv"),
        "oob_curve": _read_csv(folder, "oob_curve.csv"),
        "cv_curve": _read_csv(folder, "cv_curve.csv"),
        "importance": _read_csv(folder, "importance.csv"),
        "unit_contributions": _read_csv(folder, "contributions.csv", dtype={"unit_id": str}),
        "predicted_survival": _read_csv(folder, "predicted_survival.csv"),
        "drift": _read_csv(folder, "drift.csv"),
        "life_statistics": _read_csv(folder, "life_statistics.csv", keep_default_na=False, na_values=[""]),
        "mode_forecast": _read_csv(folder, "mode_forecast.csv", keep_default_na=False, na_values=[""]),
        "replacement_ages": _read_csv(folder, "replacement_ages.csv", keep_default_na=False, na_values=[""]),
        "monthly_changes": _read_json(folder, "monthly_changes.json"),
        "data_quality": _read_json(folder, "check_summary.json"),
        "group_by": summary.get("group_by"),
        "warnings": _run_warnings(summary, metrics),
        "choice": metrics.get("choice") if isinstance(metrics.get("choice"), dict) else None,
    }
    forecast = values["fleet_forecast"]
    if forecast is not None:
        forecast["group"] = forecast["group"].fillna("").astype(str)
        if values["group_by"] is None and "group_by" in forecast.columns:
            # the first grouping the forecast was split by (ranking's group_by) also groups the fleet curves
            named = [g for g in forecast["group_by"].dropna().astype(str) if g.lower() not in ("fleet", "")]
            values["group_by"] = named[0] if named else None
    if values["calibration"] is None and isinstance(metrics.get("calibration"), list):
        values["calibration"] = pd.DataFrame(metrics["calibration"])
    if values["comparison"] is None and isinstance(metrics.get("models"), dict):
        values["comparison"] = pd.DataFrame([{"model": k, **v} for k, v in metrics["models"].items()
                                             if isinstance(v, dict)])
    life_path = _find(folder, "life_table.csv")
    if life_path is not None and "life_table" not in overrides:
        frame = pd.read_csv(life_path, dtype={"unit_id": str})
        values["life_table"] = LifeTable.from_frame(frame, source=str(life_path))
    names = {f.name for f in dataclasses.fields(ReportInputs)}
    unknown = set(overrides) - names
    if unknown:
        raise TypeError(f"unknown report input(s): {', '.join(sorted(unknown))}")
    values.update(overrides)
    return ReportInputs(**{k: v for k, v in values.items() if v is not None or k in overrides})


def _run_warnings(summary: dict, metrics: dict) -> list[str] | None:
    """The warnings a run recorded (metrics.json, then summary.json), each once, in order."""
    found = [str(w) for source in (metrics, summary) if isinstance(source.get("warnings"), list)
             for w in source["warnings"]]
    return list(dict.fromkeys(found)) or None


def _find(folder: Path, name: str) -> Path | None:
    direct = folder / name
    if direct.is_file():
        return direct
    for sub in sorted(p for p in folder.iterdir() if p.is_dir()):
        if (sub / name).is_file():
            return sub / name
    return None


def _read_csv(folder: Path, name: str, **kwargs) -> pd.DataFrame | None:
    path = _find(folder, name)
    return None if path is None else pd.read_csv(path, **kwargs)


def _read_json(folder: Path, name: str):
    path = _find(folder, name)
    if path is None:
        return None
    with open(path, encoding="utf-8") as handle:
        return json.load(handle)


__all__ = ["ReportInputs", "build_report", "render_report", "report_inputs_from_run_folder",
           "REPORT_FILE", "FIGURES_DIR"]
