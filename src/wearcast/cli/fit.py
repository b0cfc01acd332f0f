"""``wearcast fit CONFIG``: check the export, choose and fit the models, compare them."""

from __future__ import annotations

from pathlib import Path

import click

from wearcast.cli._common import command_help, config_argument, library_call, load, out_option


@click.command(
    "fit",
    help=command_help(
        "Check the export, score the candidate models (Cox, boosted trees of depth 1-3, "
        "bagged trees and a survival forest) by unit-grouped cross-validation, choose one by "
        "the one-standard-error rule and save every fitted model as a bundle. Writes "
        "metrics.json, comparison.csv, report.html and models/ into the output folder.",
        "wearcast fit fleet.toml --out runs/2026-11",
    ),
)
@config_argument
@out_option
@library_call
def command(config: Path, out_dir: Path | None) -> None:
    from wearcast.fitting import describe_fit
    from wearcast.pipeline import JobState, run_job, stages_named

    cfg, default_out = load(config)
    out_dir = out_dir or default_out
    state = JobState()
    summaries = run_job(cfg, out_dir, stages_named(["check", "fit", "report"]), state=state)
    for line in describe_fit(state.fit):
        click.echo(line)
    click.echo(f"report: {summaries['report']['report_path']}")
    click.echo(f"outputs are in {out_dir}")
