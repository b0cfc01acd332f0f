"""Plausible ranges of numeric covariates: which values a reading or a register
column can take before it is a typing slip, a placeholder or a unit mix-up.

A range comes from ``fleet.ranges`` when the config declares one for the
column; otherwise from the column's name when its unit makes the range plain
(hours per day: 0 to 24; a power, a speed, a vibration level, a count, a
concentration in ppm or mg/l: not negative); otherwise only the magnitude bound applies. Values beyond
``MAGNITUDE`` (1e308 from an overflowed cell, 9.9e37 "no data" markers) are
placeholders, not readings, in every column.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

from wearcast.exceptions import ConfigError

#: No reading or register value of a fleet export is this large (common practice:
#: overflowed spreadsheet cells and loggers' "no data" markers are 1e30 and beyond).
MAGNITUDE = 1e12

#: Names whose unit says "hours in a day".
_HOURS_PER_DAY = re.compile(r"(hours?|hrs?|h)_(per_)?day")
#: Name parts of quantities that cannot be negative (unit suffixes and words). Temperatures
#: and pressures are left out: both can be below zero on the scales exports use.
_NON_NEGATIVE = re.compile(
    r"(^|_)(kw|kwh|mw|w|hp|kva|a|amps?|v|rpm|hz|mm_s|in_s|g|kg|t|tonnes?|mm|um|hours?|hrs?|h|days?|"
    r"count|cycles?|starts?|trips?|vibration|power|speed|load|current|rated|"
    r"ppm|ppb|mg_l|mg_kg|ug_l|concentration)(_|$)")


@dataclass(frozen=True)
class PlausibleRange:
    low: float
    high: float
    why: str  # how the range was set, in words

    def describe(self) -> str:
        return f"{_number(self.low)} to {_number(self.high)} ({self.why})"


def _number(x: float) -> str:
    if math.isinf(x):
        return "-inf" if x < 0 else "inf"
    return f"{x:g}".replace("e+", "e")  # 24, 0.5, 1e12: as a person writes them


def check_ranges(ranges: dict[str, list[float]], numeric: list[str], source: str) -> None:
    """Raise :class:`ConfigError` for a ``fleet.ranges`` entry that cannot be used."""
    for col, pair in ranges.items():
        if col not in numeric:
            raise ConfigError(f"{source}: fleet.ranges names {col!r}, which is not a numeric covariate "
                              f"({', '.join(numeric) or 'none declared'}). Add it to fleet.covariates or remove it.")
        if len(pair) != 2 or not pair[0] <= pair[1]:
            raise ConfigError(f"{source}: fleet.ranges.{col} = {pair!r} must be [low, high] with low <= high, "
                              "e.g. [0, 24]; use -inf / inf for no bound.")


def plausible_range(column: str, ranges: dict[str, list[float]]) -> PlausibleRange:
    """The range for ``column``: declared, or from its name, or the magnitude bound alone."""
    if column in ranges:
        low, high = ranges[column]
        return PlausibleRange(float(low), float(high), f"fleet.ranges.{column}")
    name = column.strip().lower().replace(" ", "_").replace("-", "_").replace("/", "_per_")
    if _HOURS_PER_DAY.search(name):
        return PlausibleRange(0.0, 24.0, "hours in a day")
    if _NON_NEGATIVE.search(name):
        return PlausibleRange(0.0, MAGNITUDE, "cannot be negative")
    return PlausibleRange(-MAGNITUDE, MAGNITUDE, "larger values are placeholders, not readings")


def toml_key(column: str) -> str:
    """``column`` as a TOML key: bare when it can be, else quoted (``"Fe ppm"``)."""
    return column if re.fullmatch(r"[A-Za-z0-9_-]+", column) else '"' + column.replace('"', '\\"') + '"'


def outside(values: pd.Series, span: PlausibleRange) -> np.ndarray:
    """Mask of numbers outside ``span`` (NaN, an empty cell, is inside)."""
    x = values.to_numpy(dtype=float)
    with np.errstate(invalid="ignore"):
        return (x < span.low) | (x > span.high)
