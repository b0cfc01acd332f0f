"""``wearcast report RUN_DIR``: rebuild report.html from a run folder's files."""

from __future__ import annotations

from pathlib import Path

import click

from wearcast.cli._common import command_help, library_call


@click.command(
    "report",
    help=command_help(
        "Rebuild report.html and its figures from the files a run wrote (ranked list, fleet "
        "forecast, model comparison, backtests, life table).",
        "wearcast report runs/2026-11",
    ),
)
@click.argument("run_dir", type=click.Path(file_okay=False, path_type=Path))
@library_call
def command(run_dir: Path) -> None:
    from wearcast.report import build_report, report_inputs_from_run_folder

    paths = build_report(report_inputs_from_run_folder(run_dir), run_dir)
    click.echo(f"report: {paths['report']}")
