"""``wearcast rank CONFIG``: the whole job — check, fit, ranked list with intervals, report."""

from __future__ import annotations

from pathlib import Path

import click

from wearcast.cli._common import (EPILOG_CAUTION, command_help, config_argument, forecast_lines, library_call, load,
                                  mode_lines, out_option, workers_options)


def describe_ranking(ranked, top: int = 10) -> list[str]:
    """The first units of the list and the fleet forecast, as terminal lines."""
    from wearcast.validation import format_table

    from wearcast.ranking import main_probability_column

    units = ranked.ranked_units
    main = main_probability_column(units)
    cols = [c for c in ["rank", "unit_id", "age_years", main, f"{main}_low", f"{main}_high", "rank_low",
                        "rank_high", "driver_1"] if c in units.columns]
    lines = [f"highest risk units (of {len(units)} in service):", format_table(units.head(top)[cols]).rstrip()]
    return lines + forecast_lines(ranked.fleet_forecast)


@click.command(
    "rank",
    help=command_help(
        "Run the whole job: check the export, choose and fit the model, rank every unit in "
        "service by its probability of failure within each horizon with stability intervals "
        "from bootstrap refits, forecast fleet failures (also by failure mode, for spares) and write "
        "report.html.",
        "wearcast rank fleet.toml --out runs/2026-11 --jobs 2",
    ),
)
@config_argument
@out_option
@click.option("--model", "model_name", default=None,
              help="Rank with this fitted model (boosted, forest, cox) instead of the chosen one.")
@workers_options
@library_call
def command(config: Path, out_dir: Path | None, model_name: str | None, jobs: int | None,
            scheduler: str | None) -> None:
    from wearcast.pipeline import JobState, run_job

    cfg, default_out = load(config)
    out_dir = out_dir or default_out
    state = JobState(jobs=jobs, scheduler=scheduler, rank_with=model_name)
    summaries = run_job(cfg, out_dir, state=state)
    for line in describe_ranking(state.ranked):
        click.echo(line)
    for line in mode_lines(_read_modes(summaries["rank"].get("mode_forecast_path"))):
        click.echo(line)
    click.echo(f"model: {state.ranked.summary.get('model')} — {state.fit.choice.reason}")
    for text in state.fit.warnings:
        click.echo(f"warning: {text}")
    click.echo(f"report: {summaries['report']['report_path']}")
    click.echo(f"outputs are in {out_dir}")
    click.echo(EPILOG_CAUTION)


def _read_modes(path):
    if not path:
        return None
    import pandas as pd

    return pd.read_csv(path, keep_default_na=False, na_values=[""])
