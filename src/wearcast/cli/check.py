"""``wearcast check CONFIG``: validate an export and show what the life table holds."""

from __future__ import annotations

from pathlib import Path

import click

from wearcast.cli._common import command_help, config_argument, library_call, life_lines

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
    for f in summary.get("files", ()):
        lines.append(
            f"  {f['file']} ({f['role']}): {f['rows_read']} read = {f['rows_kept']} kept + "
            f"{f['rows_quarantined']} quarantined"
            + (f" + {f['rows_after_as_of']} after as_of" if f.get("rows_after_as_of") else ""))
    for reason, count in summary["quarantined_by_reason"].items():
        lines.append(f"  {count:>6}  {reason}")
    for warning in summary.get("warnings", ()):
        lines.append(f"warning: {warning}")
    lines.extend(life_lines(summary))
    lines.append(f"quarantine: {summary['quarantine_path']}")
    lines.append(f"life table: {summary['life_table_path']}")
    if summary.get("life_statistics_path"):
        lines.append(f"life statistics (per group): {summary['life_statistics_path']}")
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
    from wearcast.pipeline import JobState, check_stage, run_stage

    cfg = load_config(config)
    target = out_dir if out_dir is not None else cfg.path(cfg.output.folder)
    # the check stage alone: run_summary.json of an earlier full run in this folder stays as it was
    summary = run_stage("check", check_stage, cfg, target, JobState())
    for line in format_summary(summary):
        click.echo(line)
