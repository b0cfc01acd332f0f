"""``wearcast demo``: write the invented fleet and run the job on it."""

from __future__ import annotations

from pathlib import Path

import click

from wearcast.cli._common import EPILOG_CAUTION, command_help, forecast_lines, library_call, life_lines, mode_lines


def describe(result: dict) -> list[str]:
    """What the demo did, as lines for the terminal (no click here)."""
    scenario = result["scenario"]
    lines = [
        f"invented fleet written to {scenario['folder']}",
        f"  config      {scenario['config']}",
        f"  register    {scenario['register']}",
        f"  events      {scenario['events']}",
        f"  readings    {scenario['readings']}",
        f"  truth       {scenario['truth']}",
    ]
    for name, summary in result["stages"].items():
        lines.append(f"stage {name}:")
        if summary.get("reason"):
            lines.append(f"  {summary['reason']}")
        for key in ("units", "lives", "failures", "suspensions", "delayed_entries", "in_service_units",
                    "rows_quarantined"):
            if key in summary:
                lines.append(f"  {key.replace('_', ' '):<17} {summary[key]}")
        lines += [f"  {line}" for line in life_lines(summary)]
        for key, value in summary.items():
            if key.endswith("_path") and value:
                lines.append(f"  {key[:-5].replace('_', ' '):<17} {value}")
    lines += _forecast_lines(result["stages"].get("rank", {}))
    lines.append(f"outputs are in {result['out_dir']}")
    lines.append(EPILOG_CAUTION)
    return lines


def _forecast_lines(rank: dict) -> list[str]:
    """The fleet forecast, read back from the file the run wrote."""
    path = rank.get("fleet_forecast_path")
    if not path:
        return []
    import pandas as pd

    lines = forecast_lines(pd.read_csv(path, keep_default_na=False), "expected failures in the invented fleet:")
    modes = rank.get("mode_forecast_path")
    return lines + (mode_lines(pd.read_csv(modes, keep_default_na=False, na_values=[""])) if modes else [])


@click.command(
    "demo",
    help=command_help(
        "Write an invented fleet of pump sets with a known true hazard (register, work-order "
        "log, duty readings and a config) and run the job on it.",
        "wearcast demo --out demo-output --units 2000 --seed 7",
    ),
)
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path), default=Path("demo-output"),
              show_default=True, help="Folder for the invented fleet (in scenario/) and the job's outputs.")
@click.option("--units", "n_units", type=click.IntRange(min=1), default=2000, show_default=True,
              help="Number of unit positions in the invented fleet.")
@click.option("--seed", type=int, default=7, show_default=True, help="Seed of the invented fleet.")
@library_call
def command(out_dir: Path, n_units: int, seed: int) -> None:
    from wearcast.pipeline import run_demo

    result = run_demo(out_dir, n_units=n_units, seed=seed)
    for line in describe(result):
        click.echo(line)
