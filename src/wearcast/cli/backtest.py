"""``wearcast backtest CONFIG --as-of DATE``: how well past lists would have done."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import click

from wearcast.cli._common import (command_help, config_argument, library_call, load, out_option, parse_days,
                                  parse_months)


@click.command(
    "backtest",
    help=command_help(
        "Rebuild the data as it stood at a past date, run the model choice on it as 'wearcast fit' "
        "would have then (the 'chosen' row) and fit the [model] fit models and Cox beside it, predict failures "
        "within the horizon for every unit then in service and compare with what happened: "
        "concordance, expected vs observed failures, precision of the top-k list and its lift "
        "over a random list, over oldest-first and over the Cox model. Several origins with "
        "--every and --origins.",
        "wearcast backtest fleet.toml --as-of 2025-11-30 --horizon 90d --every 3m --origins 4",
    ),
)
@config_argument
@click.option("--as-of", "as_of", required=True, type=click.DateTime(["%Y-%m-%d"]),
              help="Latest origin (YYYY-MM-DD); origin + horizon must not pass the export date.")
@click.option("--horizon", default="90d", show_default=True, help="Outcome window (e.g. 90d, 12w, 1y).")
@click.option("--every", default=None, help="Step between origins, in months (e.g. 3m).")
@click.option("--origins", type=click.IntRange(min=1), default=1, show_default=True,
              help="Number of origins, stepping back from --as-of.")
@click.option("--top-k", "top_k", type=click.IntRange(min=1), default=None,
              help="Length of the list scored (default: [ranking] top_k).")
@click.option("--refits", type=click.IntRange(min=0), default=0, show_default=True,
              help="Bootstrap refits per origin and model, to check the fleet forecast's 90 % interval "
                   "(0 = skip; 200 as in [ranking] refits takes about as long as that many fits).")
@out_option
@library_call
def command(config: Path, as_of: dt.datetime, horizon: str, every: str | None, origins: int,
            top_k: int | None, refits: int, out_dir: Path | None) -> None:
    from wearcast.backtest import run_backtest, write_backtest
    from wearcast.fitting import backtest_models
    from wearcast.validation import format_table

    cfg, default_out = load(config)
    out_dir = (out_dir or default_out) / "backtest"
    result = run_backtest(cfg, backtest_models(cfg), as_of.date(), parse_days(horizon),
                          every_months=parse_months(every) if every else None, origins=origins,
                          top_k=top_k or cfg.ranking.top_k, seed=cfg.model.seed, refits=refits,
                          refit_jobs=cfg.ranking.jobs)
    write_backtest(result, out_dir)
    from wearcast.report import build_report, report_inputs_from_run_folder

    report = build_report(report_inputs_from_run_folder(out_dir, title="Backtest of failure-risk lists"), out_dir)
    click.echo(format_table(result.summary).rstrip())
    click.echo(f"report: {report['report']}")
    click.echo(f"outputs are in {out_dir}")
