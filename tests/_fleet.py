"""A small invented fleet with a light config, for end-to-end command tests.

The data are the invented demo scenario (wearcast.scenario); only the job's
plumbing is checked with it. Statistical checks live beside each module and
compare with published datasets and reference libraries.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

from wearcast.scenario import generate_scenario

LIGHT = """
[model]
seed = {seed}
choose = "{choose}"
fit = ["boosted", "cox"]

[model.boosted]
max_trees = 150
learning_rate = 0.1
folds = 3
early_stopping_trees = 20

[validation]
folds = 3
bootstrap = 10
horizons_days = [90, 365]

[ranking]
refits = 6
top_k = 20
jobs = 1

[monthly]
holdout_days = 365
"""


def light_fleet(folder: Path, n_units: int = 500, seed: int = 3, choose: str = "boosted", extra: str = "") -> Path:
    """Write the scenario into ``folder`` and return its config path (light settings)."""
    files = generate_scenario(Path(folder), n_units=n_units, seed=seed)
    text = Path(files.config).read_text(encoding="utf-8")
    # keep [input] and [fleet] from the scenario; replace the rest with light settings
    head = text.split("[model]")[0]
    Path(files.config).write_text(head + LIGHT.format(seed=seed, choose=choose) + extra, encoding="utf-8")
    return Path(files.config)


def copy_fleet(src_config: Path, dest: Path) -> Path:
    """Copy a fleet folder (inputs and config only) to ``dest``."""
    dest.mkdir(parents=True, exist_ok=True)
    for name in ("register.csv", "events.csv", "readings.csv", src_config.name):
        shutil.copy2(src_config.parent / name, dest / name)
    return dest / src_config.name


def set_key(config: Path, section: str, key: str, value: str) -> None:
    """Replace ``key = ...`` in ``[section]`` of a TOML file (simple, test-only)."""
    text = config.read_text(encoding="utf-8")
    pattern = re.compile(rf"(\[{re.escape(section)}\]\n(?:(?!\[).*\n)*?){key} = .*\n")
    if pattern.search(text):
        text = pattern.sub(lambda m: f"{m.group(1)}{key} = {value}\n", text, count=1)
    else:
        text = text.replace(f"[{section}]\n", f"[{section}]\n{key} = {value}\n", 1)
    config.write_text(text, encoding="utf-8")
