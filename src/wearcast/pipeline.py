"""The main job as a sequence of stages, and the demo that runs it on the invented fleet.

A stage is a function ``stage(config, out_dir, results) -> dict``: it reads
the config, writes its files into ``out_dir`` (through :mod:`wearcast._atomic`)
and returns a summary with the paths it wrote; ``results`` holds the earlier
stages' summaries by name. :data:`JOB_STAGES` lists them in order; adding a
stage is one line there. No stage imports a later one.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

from wearcast.config import Config, load_config

Stage = Callable[[Config, Path, dict], dict]


def _check_stage(config: Config, out_dir: Path, results: dict) -> dict:
    """Read and validate the export; write quarantine.csv and life_table.csv."""
    from wearcast.io import check_export

    return check_export(config, out_dir)


#: (name, stage) in the order they run.
JOB_STAGES: tuple[tuple[str, Stage], ...] = (
    ("check", _check_stage),
)


def run_job(config: Config, out_dir: str | Path, stages: tuple[tuple[str, Stage], ...] = JOB_STAGES) -> dict:
    """Run every stage on the export named in ``config``; outputs go to ``out_dir``.

    Returns ``{stage name: stage summary}`` in run order. A stage's
    :class:`wearcast.exceptions.WearcastError` stops the run and propagates.
    """
    out_dir = Path(out_dir)
    results: dict[str, dict] = {}
    for name, stage in stages:
        results[name] = stage(config, out_dir, results)
    return results


def run_demo(out_dir: str | Path, n_units: int = 2000, seed: int = 7) -> dict:
    """Write the invented fleet into ``out_dir/scenario`` and run the job on it.

    The job's outputs go straight into ``out_dir`` (beside ``scenario/``).
    Returns ``{"out_dir", "scenario" (paths of the scenario files, strings),
    "stages" (stage name -> summary)}``.
    """
    from wearcast.scenario import generate_scenario

    out_dir = Path(out_dir)
    files = generate_scenario(out_dir / "scenario", n_units=n_units, seed=seed)
    config = load_config(files.config)
    stages = run_job(config, out_dir)
    return {"out_dir": str(out_dir), "scenario": files.as_dict(), "stages": stages}
