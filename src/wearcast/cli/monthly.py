"""``wearcast monthly CONFIG``: the unattended monthly retraining a scheduler runs."""

from __future__ import annotations

import datetime as dt
import sys
from pathlib import Path

import click

from wearcast.cli._common import command_help, config_argument, library_call, load, workers_options


@click.command(
    "monthly",
    help=command_help(
        "Retrain for a new month's export: check it, fit a challenger, compare it with the "
        "current champion on the most recent holdout, promote it only if it is not worse, "
        "rank with the promoted model, write the report and record what changed. Exit codes: "
        "0 done, 3 challenger rejected (champion kept, outputs written), 65 data error, "
        "66 missing input, 73 cannot write outputs, 75 another run holds the lock, 78 config error.",
        "wearcast monthly fleet.toml --as-of 2026-11-30",
    ),
)
@config_argument
@click.option("--as-of", "as_of", type=click.DateTime(["%Y-%m-%d"]), default=None,
              help="Export date (default: fleet.as_of in the config).")
@workers_options
@library_call
def command(config: Path, as_of: dt.datetime | None, jobs: int | None, scheduler: str | None) -> None:
    from wearcast.monthly import run_monthly

    cfg, _ = load(config)
    outcome = run_monthly(cfg, as_of=None if as_of is None else as_of.date(), jobs=jobs, scheduler=scheduler)
    if outcome.already_recorded:
        click.echo(f"month {outcome.run_id} was already recorded with these inputs; nothing changed.")
    click.echo(f"decision: {outcome.decision}")
    for reason in outcome.reasons:
        click.echo(f"  {reason}")
    for text in outcome.warnings:
        click.echo(f"warning: {text}")
    click.echo(f"outputs are in {outcome.run_dir}")
    sys.exit(outcome.exit_code)
