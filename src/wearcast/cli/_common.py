"""Pieces every command shares: error mapping and option groups."""

from __future__ import annotations

import functools
from pathlib import Path
import sys

import click

from wearcast import CAUTION
from wearcast.exceptions import WearcastError

EPILOG_CAUTION = f"Caution: {CAUTION}"


def library_call(func):
    """Run a command body; map :class:`WearcastError` to message + exit code."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except WearcastError as exc:
            click.echo(f"error: {exc}", err=True)
            quarantine = getattr(exc, "quarantine_path", None)
            if quarantine:
                click.echo(f"rejected rows and reasons: {quarantine}", err=True)
            sys.exit(exc.exit_code)

    return wrapper


def command_help(summary: str, example: str) -> str:
    """Help text with an example and the safety caution (click keeps \\b blocks)."""
    return f"{summary}\n\n\b\nExample:\n  {example}\n\n{EPILOG_CAUTION}"


_UNITS_DAYS = {"d": 1, "w": 7, "m": 30.4375, "y": 365.25}


def parse_days(text: str) -> int:
    """'90d', '12w', '3m', '1y' or a bare number of days -> whole days."""
    text = str(text).strip().lower()
    unit = text[-1] if text and text[-1] in _UNITS_DAYS else "d"
    number = text[:-1] if text and text[-1] in _UNITS_DAYS else text
    try:
        value = float(number)
    except ValueError:
        raise click.BadParameter(f"{text!r} is not a duration; write e.g. 90d, 12w, 3m or 1y.") from None
    if value <= 0:
        raise click.BadParameter(f"{text!r} must be positive.")
    return int(round(value * _UNITS_DAYS[unit]))


def parse_months(text: str) -> int:
    """'3m' or '3' -> 3 months (a step between backtest origins)."""
    text = str(text).strip().lower().removesuffix("m")
    if not text.isdigit() or int(text) < 1:
        raise click.BadParameter(f"{text!r} is not a number of months; write e.g. 3m.")
    return int(text)


def config_argument(func):
    return click.argument("config", type=click.Path(dir_okay=False, path_type=Path))(func)


def out_option(func):
    return click.option(
        "--out", "out_dir", type=click.Path(file_okay=False, path_type=Path), default=None,
        help="Output folder (default: the config's output.folder, relative to the config file).",
    )(func)


def workers_options(func):
    func = click.option("--scheduler", default=None, metavar="ADDRESS",
                        help="Run bootstrap refits on a Dask cluster (e.g. tls://host:8786); needs wearcast[dask].")(func)
    return click.option("--jobs", type=click.IntRange(min=0), default=None,
                        help="Parallel workers for refits (0 = all cores; default: [ranking] jobs).")(func)


def load(config_path: Path):
    """The config and its default output folder."""
    from wearcast.config import load_config

    config = load_config(config_path)
    return config, config.path(config.output.folder)


def forecast_lines(forecast, heading: str = "expected failures in the fleet:") -> list[str]:
    """The fleet-wide rows of a fleet forecast (ranking.fleet_forecast), one line per horizon."""
    fleet = forecast[forecast["group"].astype(str) == "all"] if "group" in forecast.columns else forecast
    lines = [heading]
    for _, row in fleet.iterrows():
        lines.append(f"  within {int(row['horizon_days'])} days: {float(row['expected_failures']):.1f} "
                     f"(90 % interval {float(row['failures_low']):.0f}-{float(row['failures_high']):.0f})")
    return lines
