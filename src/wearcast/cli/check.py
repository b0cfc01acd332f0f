"""``wearcast check CONFIG``: validate an export and show what the life table holds."""

from __future__ import annotations

import re
from pathlib import Path

import click

from wearcast.cli._common import command_help, config_argument, library_call

_LABELS = (
    ("units", "units"),
    ("lives", "lives"),
    ("rows", "life-table rows"),
    ("failures", "failures"),
    ("suspensions", "suspensions"),
    ("delayed_entries", "delayed entries"),
    ("in_service_units", "units in service"),
    ("time_at_risk_days", "time at risk (days)"),
    ("as_of", "as of"),
)


def format_summary(summary: dict) -> list[str]:
    """The summary as aligned ``label  value`` lines (no click here)."""
    width = max(len(label) for _, label in _LABELS)
    lines = []
    for key, label in _LABELS:
        value = summary.get(key)
        if isinstance(value, float):
            value = f"{value:,.1f}"
        lines.append(f"{label:<{width}}  {value}")
    lines.append(
        f"rows in = kept + quarantined: {summary['rows_read']} = {summary['rows_kept']} + "
        f"{summary['rows_quarantined']}"
        + (f" + {summary['rows_after_as_of']} after as_of" if summary.get("rows_after_as_of") else "")
    )
    for reason, count in summary["quarantined_by_reason"].items():
        lines.append(f"  {count:>6}  {reason}")
    lines.extend(_life_lines(summary))
    lines.append(f"quarantine: {summary['quarantine_path']}")
    lines.append(f"life table: {summary['life_table_path']}")
    if summary.get("life_statistics_path"):
        lines.append(f"life statistics (per group): {summary['life_statistics_path']}")
    return lines


def _life_lines(summary: dict) -> list[str]:
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
            lines.append(f"fleet planned replacement: none ({summary['fleet_replacement_reading']})")
        else:
            low, high = summary["fleet_replacement_age_low_days"], summary["fleet_replacement_age_high_days"]
            lines.append(f"fleet planned replacement: best at {age:,.0f} days = {age / 365.25:.1f} years "
                         f"(within 5 % of the best cost from {low:,.0f} to {high:,.0f} days), saving "
                         f"{summary['fleet_replacement_saving']:.0%} of the cost of replacing only at failure")
    return lines


@click.command(
    "check",
    help=command_help(
        "Read the export named in CONFIG, set aside rows that cannot be used (each with a "
        "reason, in quarantine.csv) and show what the life table holds, with the fleet's MTBF and "
        "B10/B50 life (per group in life_statistics.csv).",
        "wearcast check fleet.toml --out checked/",
    ),
)
@config_argument
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Folder for quarantine.csv, life_table.csv and life_statistics.csv (default: the config's "
                   "output.folder).")
@library_call
def command(config: Path, out_dir: Path | None) -> None:
    from wearcast.config import load_config
    from wearcast.pipeline import run_job, stages_named

    cfg = load_config(config)
    target = out_dir if out_dir is not None else cfg.path(cfg.output.folder)
    summary = run_job(cfg, target, stages_named(["check"]))["check"]
    for line in format_summary(summary):
        click.echo(line)
