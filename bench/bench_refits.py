"""Bootstrap refits of the boosted model: wall time, worker scaling, memory.

Run: ``.venv/bin/python bench/bench_refits.py`` (the full set below, writes its
section of bench/README.md), or for a quick look
``--units 2000 --refits 10 --scaling-refits 4 --large-units 0 --no-readme``.

What is timed, on :mod:`wearcast.scenario` fleets read through
``wearcast.io.load_export`` (counting-process rows, about 17 per unit):

* the main fit (boosted trees, B fixed by ``--trees``; the config's defaults
  otherwise: learning rate 0.05, depth 3, subsample 0.8, one thread);
* ``bootstrap_refits`` end to end (``--refits`` refits, ``--jobs`` workers,
  checkpoints on), then the same call again with every checkpoint present,
  which is the cost of summarising alone (reading the files, quantiles,
  the fleet-count mixtures);
* worker scaling: ``--scaling-refits`` refits with 1 and with 2 workers;
* a larger fleet (``--large-units``) with ``--large-refits`` refits, to give
  the per-refit cost and the memory there.

Peak memory is the parent process's RSS rise (worker processes not counted).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import markdown_table, measure, write_section  # noqa: E402

from wearcast.config import load_config  # noqa: E402
from wearcast.io import load_export  # noqa: E402
from wearcast.lifetable import LifeTable  # noqa: E402
from wearcast.models.boosted import BoostedSurvivalTrees, BoostSettings  # noqa: E402
from wearcast.ranking import rank_units  # noqa: E402
from wearcast.resample import bootstrap_refits  # noqa: E402
from wearcast.scenario import generate_scenario  # noqa: E402

HORIZONS = [30, 90, 365]


def fleet(n_units: int, seed: int, cache: Path) -> LifeTable:
    """The scenario's life table, cached as parquet next to the generated export."""
    folder = cache / f"refit-fleet-{n_units}-{seed}"
    parquet, meta = folder / "table.parquet", folder / "table.json"
    if parquet.exists() and meta.exists():
        info = json.loads(meta.read_text())
        return LifeTable(pd.read_parquet(parquet), tuple(info["covariates"]), tuple(info["categorical"]),
                         pd.Timestamp(info["as_of"]))
    if not (folder / "wearcast.toml").exists():
        generate_scenario(folder, n_units=n_units, seed=seed)
    table = load_export(load_config(folder / "wearcast.toml")).table
    table.frame.to_parquet(parquet)
    meta.write_text(json.dumps({"covariates": table.covariates, "categorical": table.categorical,
                                "as_of": str(table.as_of)}))
    return table


def one_row_per_life(table: LifeTable) -> LifeTable:
    """The same fleet without reading history: one row per life, from its first
    entry age to its last exit age, with the covariates of its last row."""
    f = table.frame.sort_values(["unit_id", "life", "entry_age"], kind="stable")
    lives = f.groupby(["unit_id", "life"], sort=False)
    flat = lives.tail(1).copy()
    flat["entry_age"] = lives["entry_age"].transform("min").loc[flat.index]
    return LifeTable(flat.reset_index(drop=True), table.covariates, table.categorical, table.as_of)


def run_refits(table, model, refits, jobs, checkpoint) -> tuple[float, float]:
    m = measure(bootstrap_refits, table, model, refits, 20261201, HORIZONS, jobs=jobs,
                checkpoint_dir=checkpoint, group_by=["site"], progress=False)
    return m.seconds, m.peak_mib


def bench_size(n_units, refits, jobs, args, cache, rows: list[dict], label: str, flat: bool = False) -> None:
    table = fleet(n_units, 7, cache)
    if flat:
        table = one_row_per_life(table)
    settings = BoostSettings(n_trees=args.trees)
    fit = measure(lambda: BoostedSurvivalTrees(settings, seed=1).fit(table))
    model = fit.result
    with tempfile.TemporaryDirectory(dir=cache) as tmp:
        seconds, peak = run_refits(table, model, refits, jobs, Path(tmp))
        summary_only, summary_peak = run_refits(table, model, refits, jobs, Path(tmp))
        refit_summary = bootstrap_refits(table, model, refits, 20261201, HORIZONS, jobs=jobs,
                                         checkpoint_dir=Path(tmp), group_by=["site"], progress=False)
    rank = measure(rank_units, table, model, refit_summary, HORIZONS, 50, 0.8, ["site"])
    rows.append({
        "case": label, "units": n_units, "rows": table.n_rows, "trees": args.trees, "refits": refits,
        "workers": jobs, "main fit s": fit.seconds, "refits s (end to end)": seconds,
        "s per refit x workers": seconds * jobs / refits, "summary only s": summary_only,
        "rank_units s": rank.seconds, "parent peak MiB": max(peak, summary_peak),
    })
    print(rows[-1], flush=True)


def _target_line(rows: list[dict]) -> str:
    """The target (200 refits at 10,000 units within 60 s on 2 cores), passed or missed."""
    target = [r for r in rows if r["case"] == "target run" and r["units"] == 10_000 and r["refits"] == 200]
    if not target:
        return "The target run (200 refits at 10,000 units) was not part of this run."
    seconds = target[0]["refits s (end to end)"]
    verdict = "PASS" if seconds <= 60 else "MISSED"
    line = (f"Target: 200 refits at 10,000 units within 60 s on 2 cores: **{verdict}** ({seconds:.1f} s on "
            f"{target[0]['rows']:,} counting-process rows, about {target[0]['rows'] / 10_000:.0f} per unit "
            "from quarterly readings).")
    flat = [r for r in rows if r["case"] == "one row per life"]
    if flat:
        line += (f" The same fleet without reading history (one row per life, {flat[0]['rows']:,} rows): "
                 f"{flat[0]['refits s (end to end)']:.1f} s.")
    return line


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=10_000)
    ap.add_argument("--refits", type=int, default=200)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--trees", type=int, default=100)
    ap.add_argument("--scaling-refits", type=int, default=20)
    ap.add_argument("--large-units", type=int, default=100_000)
    ap.add_argument("--large-refits", type=int, default=4)
    ap.add_argument("--cache", type=Path, default=Path(tempfile.gettempdir()) / "wearcast-bench")
    ap.add_argument("--skip-main", action="store_true", help="only the scaling and large-fleet runs")
    ap.add_argument("--flat", action=argparse.BooleanOptionalAction, default=True,
                    help="also time the target run on one row per life (no reading history)")
    ap.add_argument("--no-readme", action="store_true")
    args = ap.parse_args(argv)
    args.cache.mkdir(parents=True, exist_ok=True)
    rows: list[dict] = []
    started = time.strftime("%Y-%m-%d")
    if not args.skip_main:
        bench_size(args.units, args.refits, args.jobs, args, args.cache, rows, "target run")
    if args.flat and not args.skip_main:
        bench_size(args.units, args.refits, args.jobs, args, args.cache, rows, "one row per life", flat=True)
    if args.scaling_refits:
        for jobs in (1, 2):
            bench_size(args.units, args.scaling_refits, jobs, args, args.cache, rows, "scaling")
    if args.large_units:
        bench_size(args.large_units, args.large_refits, args.jobs, args, args.cache, rows, "large fleet")
    columns = ["case", "units", "rows", "trees", "refits", "workers", "main fit s", "refits s (end to end)",
               "s per refit x workers", "summary only s", "rank_units s", "parent peak MiB"]
    text = "\n".join([
        "## Bootstrap refits (bench/bench_refits.py)",
        "",
        f"Run {started} on {platform.machine()} with {os.cpu_count()} cores, Python {platform.python_version()}, "
        f"1-minute load average {os.getloadavg()[0]:.1f} at the end; allocator: "
        f"MALLOC_MMAP_THRESHOLD_={os.environ.get('MALLOC_MMAP_THRESHOLD_', 'unset (glibc default)')}. "
        + _target_line(rows),
        "",
        markdown_table(rows, columns),
        "",
        "`refits s (end to end)`: `bootstrap_refits` with checkpoints (seed draw, fits, files, summary); "
        "`summary only s`: the same call again with every refit file present (nothing refitted). "
        "`s per refit x workers`: worker-seconds per refit (flat when scaling is perfect). "
        "Peak memory is the parent process only.",
    ])
    print(text)
    if not args.no_readme:
        write_section("refits", text)


if __name__ == "__main__":
    main()
