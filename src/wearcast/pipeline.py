"""The main job as a sequence of stages, and the demo that runs it on the invented fleet.

A stage is a function ``stage(config, out_dir, state) -> dict``: it reads the
config and what earlier stages left in ``state`` (a :class:`JobState`), writes
its files into ``out_dir`` (through :mod:`wearcast._atomic`) and returns a
JSON-able summary with the paths it wrote. :data:`JOB_STAGES` lists them in
order; adding a stage is one line there. No stage imports a later one.

Stages: ``check`` (export → validated life table, quarantine, life statistics), ``fit``
(candidates, cross-validated choice, comparison with the Cox baseline,
bundles), ``rank`` (bootstrap refits, ranked units, fleet forecast) and
``report`` (report.html with figures).
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from wearcast import _atomic
from wearcast.config import Config, load_config


@dataclass
class JobState:
    """What the stages hand on to each other in one run."""

    export: object | None = None  # wearcast.io.ExportResult
    fit: object | None = None  # wearcast.fitting.FitOutcome
    ranked: object | None = None  # wearcast.ranking.RankedList
    summaries: dict[str, dict] = field(default_factory=dict)
    timings: dict[str, float] = field(default_factory=dict)  # wall seconds per stage
    jobs: int | None = None  # overrides [ranking] jobs when set
    scheduler: str | None = None  # Dask scheduler address for refits
    rank_with: str | None = None  # rank with this fitted model (name) instead of the chosen one
    rank_model: object | None = None  # or with this model object (the monthly run's champion)


Stage = Callable[[Config, Path, JobState], dict]


def check_stage(config: Config, out_dir: Path, state: JobState) -> dict:
    """Read and validate the export; write quarantine.csv, life_table.csv,
    life_statistics.csv (MTBF, B-lives, Weibull per group), replacement_ages.csv
    (when [costs] are set) and check_summary.json."""
    from wearcast.exceptions import WearcastError
    from wearcast.io import load_export, write_check
    from wearcast.lifestats import fleet_headline, life_statistics, write_life_statistics
    from wearcast.modes import check_modes_by
    from wearcast.replacement import REPLACEMENT_FILE, check_costs, replacement_ages, write_replacement_ages
    from wearcast.replacement import fleet_headline as replacement_headline

    try:
        state.export = load_export(config, quarantine_dir=out_dir)
    except WearcastError as exc:
        _remove_earlier_check(out_dir, keep_quarantine=bool(getattr(exc, "quarantine_path", None)))
        raise
    summary = write_check(state.export, out_dir)
    check_modes_by(state.export.table.frame, config.ranking.modes_by, config.ranking.mode_prior_failures)
    stats = life_statistics(state.export.table, config.fleet.group_by)
    summary["life_statistics_path"] = str(write_life_statistics(stats, out_dir))
    summary.update(fleet_headline(stats))
    costs = config.costs
    _atomic.remove_output(out_dir / REPLACEMENT_FILE)  # an earlier run's, when [costs] is gone now
    if check_costs(costs.planned_replacement, costs.failure, config.source):
        ages = replacement_ages(stats, costs.planned_replacement, costs.failure,
                                renewal=state.export.table.meta.get("renewal", "replace"))
        summary["replacement_ages_path"] = str(write_replacement_ages(ages, out_dir))
        summary.update(replacement_headline(ages))
    # Paths inside the run folder are written relative to it, so a folder can be moved
    # (the monthly run renames its staging folder) and reruns elsewhere match byte for byte.
    on_disk = {k: (_relative(v, out_dir) if k.endswith("_path") else v) for k, v in summary.items()}
    summary["check_summary_path"] = str(_atomic.write_json(out_dir / "check_summary.json", on_disk))
    return summary


#: What the check stage writes; a failed check removes an earlier run's copies so the folder
#: never shows a previous life table beside this run's quarantine as if they belonged together.
CHECK_OUTPUTS = ("life_table.csv", "check_summary.json", "life_statistics.csv", "replacement_ages.csv")


def _remove_earlier_check(out_dir: Path, *, keep_quarantine: bool) -> None:
    from wearcast.io import QUARANTINE_FILE

    for name in CHECK_OUTPUTS + (() if keep_quarantine else (QUARANTINE_FILE,)):
        _atomic.remove_output(Path(out_dir) / name)


def _relative(path, folder: Path):
    if not path or path == "None":
        return None
    try:
        return Path(path).resolve().relative_to(Path(folder).resolve()).as_posix()
    except ValueError:
        return str(path)


def fit_stage(config: Config, out_dir: Path, state: JobState) -> dict:
    """Choose and fit the models; write metrics, comparison and bundles."""
    from wearcast.fitting import fit_models

    state.fit = fit_models(state.export.table, config, out_dir)
    return {"chosen": state.fit.chosen, "reason": state.fit.choice.reason,
            "models": sorted(state.fit.models), "warnings": list(state.fit.warnings),
            **{f"{k}_path": v for k, v in state.fit.files.items()}}


def rank_stage(config: Config, out_dir: Path, state: JobState) -> dict:
    """Bootstrap refits of the chosen model, ranked units and fleet forecast."""
    from wearcast.ranking import rank_units, write_ranking
    from wearcast.resample import refits_for_config

    table = state.export.table
    name, model = _ranking_model(config, state)
    section = config.ranking
    jobs = section.jobs if state.jobs is None else state.jobs
    refits = None
    if section.refits > 0:
        refits = refits_for_config(table, model, _with_jobs(section, jobs), config.model.seed,
                                   group_by=config.fleet.group_by, checkpoint_dir=out_dir / "refits",
                                   scheduler=state.scheduler)
    state.ranked = rank_units(table, model, refits, section.horizons_days, section.top_k, section.stable_share,
                              config.fleet.group_by)
    state.ranked.summary["model"] = name
    state.ranked.summary["choice_reason"] = state.fit.choice.reason if state.fit is not None else None
    state.ranked.summary["group_by"] = config.fleet.group_by[0] if config.fleet.group_by else None
    modes = _mode_forecast(table, state.ranked.ranked_units, section, config.fleet.group_by)
    if modes is not None:
        state.ranked.summary["modes"] = modes[1]
    best_age = state.summaries.get("check", {}).get("fleet_best_replacement_age_days")
    if best_age is not None:
        # with [costs]: which units are already older than the fleet's best planned replacement age
        past = state.ranked.ranked_units["age_days"].to_numpy(float) >= float(best_age)
        state.ranked.ranked_units["past_planned_replacement_age"] = past
        state.ranked.summary["planned_replacement_age_days"] = float(best_age)
        state.ranked.summary["units_past_planned_replacement_age"] = int(past.sum())
    paths = write_ranking(state.ranked, out_dir)
    from wearcast.modes import MODE_FORECAST_FILE, write_mode_forecast

    if modes is not None:
        paths["mode_forecast"] = write_mode_forecast(modes[0], out_dir)
    else:
        _atomic.remove_output(out_dir / MODE_FORECAST_FILE)  # an earlier run's, when no mode is recorded now
    return {k + "_path": str(v) for k, v in paths.items()} | {"units_ranked": len(state.ranked.ranked_units)}


def _mode_forecast(table, ranked_units, section, group_by):
    """(mode_forecast frame, summary entry), or None when no failure has a recorded mode."""
    from wearcast.modes import forecast_for_units, mode_mix_by_age, mode_shares

    shares = mode_shares(table, by=section.modes_by, prior_failures=section.mode_prior_failures)
    if shares.empty:
        return None
    frame = forecast_for_units(table, ranked_units, section.horizons_days, shares, section.modes_by, group_by)
    mix = mode_mix_by_age(table)
    return frame, {"modes_by": section.modes_by, "mode_prior_failures": section.mode_prior_failures,
                   "mix_by_age_p_value": mix["p_value"], "mix_by_age": mix["statement"]}


def _ranking_model(config: Config, state: JobState):
    """(name, fitted model) the list is ranked with."""
    from wearcast.exceptions import ConfigError
    from wearcast.fitting import candidate_for

    if state.rank_model is not None:
        return getattr(state.rank_model, "name", "model"), state.rank_model
    if state.rank_with is None:
        return state.fit.chosen, state.fit.main_model
    wanted = candidate_for(state.rank_with, config)
    if wanted not in state.fit.models:
        raise ConfigError(
            f"model {state.rank_with!r} was not fitted in this run (fitted: {', '.join(sorted(state.fit.models))}); "
            "add it to [model] fit in the config."
        )
    return wanted, state.fit.models[wanted]


def report_stage(config: Config, out_dir: Path, state: JobState) -> dict:
    """report.html and figures from everything the run wrote."""
    from wearcast.report import build_report, report_inputs_from_run_folder

    overrides = {}
    if state.export is not None:
        overrides["life_table"] = state.export.table
    inputs = report_inputs_from_run_folder(out_dir, **overrides)
    paths = build_report(inputs, out_dir)
    return {"report_path": str(paths["report"]), "figures": len(paths) - 1}


def _with_jobs(section, jobs: int):
    import dataclasses

    return dataclasses.replace(section, jobs=jobs)


#: (name, stage) in the order they run.
JOB_STAGES: tuple[tuple[str, Stage], ...] = (
    ("check", check_stage),
    ("fit", fit_stage),
    ("rank", rank_stage),
    ("report", report_stage),
)


def run_job(config: Config, out_dir: str | Path, stages: tuple[tuple[str, Stage], ...] = JOB_STAGES,
            *, state: JobState | None = None) -> dict:
    """Run every stage on the export named in ``config``; outputs go to ``out_dir``.

    Returns ``{stage name: stage summary}`` in run order and writes them to
    ``run_summary.json``. A stage's :class:`wearcast.exceptions.WearcastError`
    stops the run and propagates; files already written stay complete
    (each is written atomically).
    """
    out_dir = Path(out_dir)
    state = state or JobState()
    for name, stage in stages:
        run_stage(name, stage, config, out_dir, state)
    _atomic.write_text(out_dir / "run_summary.json",
                       json.dumps(state.summaries, indent=2, sort_keys=True, default=str) + "\n")
    return state.summaries


def run_stage(name: str, stage: Stage, config: Config, out_dir: Path, state: JobState) -> dict:
    """Run one stage; keep its summary and wall time in ``state``; return the summary."""
    start = time.perf_counter()
    state.summaries[name] = stage(config, Path(out_dir), state)
    state.timings[name] = time.perf_counter() - start
    return state.summaries[name]


def stages_named(names) -> tuple[tuple[str, Stage], ...]:
    """The stages of :data:`JOB_STAGES` with these names, in job order."""
    wanted = set(names)
    return tuple((n, s) for n, s in JOB_STAGES if n in wanted)


def run_demo(out_dir: str | Path, n_units: int = 2000, seed: int = 7) -> dict:
    """Write the invented fleet into ``out_dir/scenario`` and run the job on it.

    The job's outputs go straight into ``out_dir`` (beside ``scenario/``).
    Returns ``{"out_dir", "scenario" (paths of the scenario files, strings),
    "stages" (stage name -> summary)}``.
    """
    from wearcast.scenario import generate_scenario

    out_dir = Path(out_dir)
    files = generate_scenario(out_dir / "scenario", n_units=n_units, seed=seed)
    config = load_config(files.config)
    stages = run_job(config, out_dir)
    return {"out_dir": str(out_dir), "scenario": files.as_dict(), "stages": stages}
