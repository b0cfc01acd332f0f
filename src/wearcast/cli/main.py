"""``wearcast`` entry point: a click group; commands live one per module."""

from __future__ import annotations

import click

from wearcast import CAUTION, __version__


@click.group(
    help=(
        "Rank in-service units of a fleet by their probability of failure within a "
        "planning horizon, from a monthly register and work-order export.\n\n"
        f"Caution: {CAUTION}"
    ),
    context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100},
)
@click.version_option(__version__, prog_name="wearcast")
def main() -> None:
    pass


def _register() -> None:
    # Imported here so `wearcast --help` stays fast and import errors name the command.
    from wearcast.cli import backtest, check, demo, fit, monthly, rank, report

    for module in (check, fit, rank, backtest, report, monthly, demo):
        main.add_command(module.command)


_register()
