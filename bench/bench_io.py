"""Time ``wearcast.io.load_export`` on the invented scenario at growing fleet sizes.

Usage: ``python bench/bench_io.py [N_UNITS ...] [--no-readme]`` (default 10,000
100,000 1,000,000 units). Each size is generated once into a temporary folder
(not timed), then loaded once; the table gives rows read, wall seconds and the
peak rise of resident memory during the load (see ``bench/_common.py``), and is
written to the "Loading exports" section of ``bench/README.md``.

Targets (the monthly job): 100,000 units well under a minute, 1,000,000 units in
a few minutes within a few GB (loading and life statistics together).
"""

from __future__ import annotations

import platform
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

from _common import markdown_table, measure, write_section  # noqa: E402

import wearcast.config  # noqa: E402
from wearcast.io import load_export  # noqa: E402
from wearcast.lifestats import life_statistics  # noqa: E402
from wearcast.scenario import generate_scenario  # noqa: E402

DEFAULT_SIZES = (10_000, 100_000, 1_000_000)
#: The row-by-row loader this replaced (commit 0359edd), measured once on the same 2-core machine.
BEFORE = ("Before the column-wise loader (row by row, commit 0359edd): 2,000 units 3.2 s / 88 MiB, "
          "20,000 units 32 s / 818 MiB, 100,000 units 504 s / 3.8 GB; 1,000,000 units not attempted.")


def run(sizes) -> list[dict]:
    rows = []
    for n in sizes:
        with tempfile.TemporaryDirectory() as tmp:
            files = generate_scenario(Path(tmp), n_units=n, seed=7)
            cfg = wearcast.config.load_config(files.config)
            m = measure(load_export, cfg)
            result = m.result
            stats = measure(life_statistics, result.table, list(cfg.fleet.group_by))
            rows.append({"units": f"{n:,}", "rows read": f"{result.rows_read:,}",
                         "life-table rows": f"{len(result.table.frame):,}",
                         "seconds": round(m.seconds, 2), "peak MiB": round(m.peak_mib),
                         "life statistics s": round(stats.seconds, 2)})
            print(rows[-1], flush=True)
            del m, result, stats
    return rows


def main(argv: list[str]) -> None:
    write = "--no-readme" not in argv
    sizes = [int(a.replace("_", "")) for a in argv if not a.startswith("--")] or list(DEFAULT_SIZES)
    rows = run(sizes)
    if write:
        text = ("## Loading exports\n\n`python bench/bench_io.py`: `load_export` on the invented scenario "
                "(register + event log + readings, CSV), one load per size, "
                f"{platform.machine()} with {platform.python_version()}; peak MiB is the rise of resident "
                "memory during the load; life statistics s is `wearcast.lifestats.life_statistics` (MTBF, "
                "B-lives and Weibull fit for the fleet and each site) on the loaded table, as the check stage "
                "runs it.\n\n"
                + markdown_table(rows, ["units", "rows read", "life-table rows", "seconds", "peak MiB",
                                        "life statistics s"])
                + "\n\n" + BEFORE)
        print(write_section("io", text))


if __name__ == "__main__":
    main(sys.argv[1:])
