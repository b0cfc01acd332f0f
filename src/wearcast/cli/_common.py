"""Pieces every command shares: error mapping and option groups."""

from __future__ import annotations

import functools
import re
import sys
from pathlib import Path

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


def mode_lines(modes) -> list[str]:
    """The whole fleet's expected failures by failure mode (modes.mode_forecast), a line per horizon."""
    if modes is None or len(modes) == 0:
        return []
    from wearcast.lifetable import FLEET

    fleet = modes[(modes["group_by"].astype(str) == FLEET[0]) & (modes["group"].astype(str) == FLEET[1])]
    lines = ["expected failures by failure mode (chance-only 90 % interval):"]
    for h, part in fleet.groupby("horizon_days", sort=True):
        cells = ", ".join(f"{row['mode']} {float(row['expected_failures']):.1f} "
                          f"({int(row['chance_only_low'])}-{int(row['chance_only_high'])})" for _, row in part.iterrows())
        lines.append(f"  within {int(h)} days: {cells}")
    return lines


def life_lines(summary: dict) -> list[str]:
    """Fleet MTBF and B-lives with their bounds, when the check computed them."""
    level = summary.get("life_statistics_level")
    if level is None:
        return []
    lines = []
    names = sorted({m.group(1) for k in summary if (m := re.fullmatch(r"fleet_(mtbf|b\d+(?:_\d+)?)_days", k))},
                   key=lambda n: (n != "mtbf", len(n), n))
    for name in names:
        value, low, high = (summary.get(f"fleet_{name}{part}_days") for part in ("", "_low", "_high"))
        label = "MTBF" if name == "mtbf" else f"{name.upper()} life"
        if value is None and low is None:
            text = "not reached within the records" if name != "mtbf" else "no failures and no time at risk"
        elif value is None:
            text = (f"not reached within the records (lower {level:.0%} bound {low:,.0f} days)" if name != "mtbf"
                    else f"no failures yet (lower {level:.0%} bound {low:,.0f} days)")
        else:
            bounds = f"{low:,.0f} to {high:,.0f} days" if high is not None else f"{low:,.0f} days to beyond the records"
            text = f"{value:,.0f} days = {value / 365.25:,.1f} years ({level:.0%} bounds {bounds})"
        lines.append(f"fleet {label}: {text}")
    shape, low, high = (summary.get(f"fleet_weibull_shape{part}") for part in ("", "_low", "_high"))
    if shape is not None:
        lines.append(f"fleet Weibull shape: {shape:.2f} ({level:.0%} bounds {low:.2f} to {high:.2f}): "
                     f"{summary.get('fleet_weibull_reading', '')}")
    if "fleet_replacement_reading" in summary:
        age = summary.get("fleet_best_replacement_age_days")
        if age is None:
            lines.append(f"fleet planned replacement: no age given; {summary['fleet_replacement_reading']}")
        else:
            low, high = summary["fleet_replacement_age_low_days"], summary["fleet_replacement_age_high_days"]
            lines.append(f"fleet planned replacement: best at {age:,.0f} days = {age / 365.25:.1f} years "
                         f"(within 5 % of the best cost from {low:,.0f} to {high:,.0f} days), saving "
                         f"{summary['fleet_replacement_saving']:.0%} of the cost of replacing only at failure"
                         + ("" if summary.get("fleet_wear_out_clear", True)
                            else f"; {summary['fleet_replacement_reading']}"))
    return lines
