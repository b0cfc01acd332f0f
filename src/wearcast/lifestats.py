"""Life statistics per fleet group: MTBF and B-lives, from the life table alone.

Model-free numbers a reliability engineer quotes beside any model, computed
for the whole fleet and for each level of the ``[fleet] group_by`` columns:

* **MTBF** (days): total time at risk divided by the number of failures, the
  constant-failure-rate estimate; with ``renewal = "replace"`` it is the mean
  time to failure of a life, with ``"repair"`` the mean time between repairs.
  Two-sided bounds at ``level`` for a period that ended at a fixed date, not
  at a failure (time-terminated): lower ``2T / chi2(1 - a/2; 2r + 2)``, upper
  ``2T / chi2(a/2; 2r)``, ``a = 1 - level``. These are ``T`` divided by
  Garwood's exact bounds for the Poisson failure count (Garwood 1936,
  *Biometrika* 28:437–442). With no failures there is no estimate and no
  upper bound, only a one-sided lower bound at ``level`` ("at least this
  long"): ``T / ln(1 / (1 - level))``.
* **B-lives** (days): the age by which ``p`` % of units have failed, read off
  the delayed-entry product-limit curve as the first age where
  ``S(t) <= 1 - p/100`` (lifelines' ``qth_survival_time`` convention), with
  bounds where the pointwise log(-log) band at ``level`` crosses the same
  height (lifelines: ``qth_survival_times`` on ``confidence_interval_``).
  Each life counts up to its first failure, so with ``renewal = "repair"``
  it is the age at first failure. An empty cell means the curve has not
  fallen that far within the records. With delayed entry the curve is
  conditional on surviving to the youngest entry age
  (``observed_from_age_days``), usually 0 when some units were installed
  after records began.

* **Weibull shape and scale**: the two-parameter Weibull fitted by maximum
  likelihood to the same lives (delayed entry and suspensions respected,
  :mod:`wearcast._weibull`), with Wald bounds on the log scale. A shape
  above 1 means a failure rate rising with age (wear-out), below 1 falling
  (early-life failures), near 1 constant; :func:`shape_reading` says so only
  when the bounds are on one side of 1.

All assume the records are representative of the fleet's future duty; they
describe the population, not any one unit (the ranked list does that).
"""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd
from scipy.stats import chi2

from wearcast import _atomic
from wearcast._product_limit import age_at_survival, product_limit_survival
from wearcast._weibull import fit_weibull
from wearcast.lifetable import LifeTable, group_labels, group_members

LIFE_STATISTICS_FILE = "life_statistics.csv"
DEFAULT_B_LIVES = (10, 50)
DEFAULT_LEVEL = 0.90


def mtbf_bounds(time_at_risk: float, failures: int, level: float = DEFAULT_LEVEL) -> tuple[float, float, float]:
    """``(estimate, low, high)`` MTBF for ``failures`` in ``time_at_risk`` (time-terminated).

    No failures: ``(nan, low, nan)`` with ``low`` one-sided at ``level``. No time at risk: all NaN.
    """
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be between 0 and 1, got {level!r}")
    if not time_at_risk > 0:
        return float("nan"), float("nan"), float("nan")
    alpha = 1.0 - level
    if failures == 0:
        # no upper bound exists, so the whole level goes to the lower one (one-sided)
        return float("nan"), float(2.0 * time_at_risk / chi2.ppf(level, 2)), float("nan")
    low = 2.0 * time_at_risk / chi2.ppf(1.0 - alpha / 2.0, 2 * failures + 2)
    high = 2.0 * time_at_risk / chi2.ppf(alpha / 2.0, 2 * failures)
    return time_at_risk / failures, float(low), float(high)


def b_life(entry, exit, event, percent: float, level: float = DEFAULT_LEVEL) -> tuple[float, float, float]:
    """``(estimate, low, high)`` age in days by which ``percent`` % have failed (NaN: not reached)."""
    return _b_life_from(product_limit_survival(entry, exit, event, level=level), percent)


def _fewest_at_risk(curve: dict, age: float) -> int | None:
    """The smallest number of units at risk at a failure age up to ``age`` (None: not reached).

    With late entry the young ages of the curve can rest on a handful of units; a
    B-life read there moves a lot with one failure more or less.
    """
    if not np.isfinite(age):
        return None
    upto = curve["age"] <= age
    return int(curve["at_risk"][upto].min()) if upto.any() else None


def _b_life_from(curve: dict, percent: float) -> tuple[float, float, float]:
    if not 0.0 < percent < 100.0:
        raise ValueError(f"a B-life percentage must be between 0 and 100, got {percent!r}")
    q = 1.0 - percent / 100.0
    return (age_at_survival(curve["age"], curve["survival"], q),
            age_at_survival(curve["age"], curve["low"], q),
            age_at_survival(curve["age"], curve["high"], q))


class _Rows:
    """The life table's rows as arrays sorted by (unit, life, exit age), built once."""

    def __init__(self, frame: pd.DataFrame):
        unit = pd.factorize(frame["unit_id"].astype(str))[0].astype(np.int64)
        life = frame["life"].to_numpy(np.int64)
        key = unit * (int(life.max(initial=0)) + 1) + life  # one integer per (unit, life)
        self.order = np.lexsort((frame["exit_age"].to_numpy(float), key))
        self.unit, self.key = unit[self.order], key[self.order]
        self.entry = frame["entry_age"].to_numpy(float)[self.order]
        self.exit = frame["exit_age"].to_numpy(float)[self.order]
        self.failed = frame["failed"].to_numpy(bool)[self.order]

    def subset(self, positions: np.ndarray) -> np.ndarray:
        """Sorted-order indices of the given frame positions."""
        mask = np.zeros(len(self.order), bool)
        mask[positions] = True
        return np.flatnonzero(mask[self.order])


def _first_failure_mask(key: np.ndarray, failed: np.ndarray) -> np.ndarray:
    """Rows (sorted by life, then exit age) up to and including their life's first failure."""
    count = np.cumsum(failed.astype(np.int64))
    start = np.searchsorted(key, key, side="left")  # first row of each row's life
    before = count - failed - np.where(start > 0, count[np.maximum(start - 1, 0)], 0)
    return before == 0


def _merge_contiguous(key, entry, exit, failed) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Join back-to-back rows of one life ((a, b] then (b, c]) into one row (a, c].

    Rows sorted by life, then age. The product-limit curve and the Weibull
    likelihood are the same either way (a life is at risk at the same ages, and
    its likelihood telescopes); the curve and the fit just get fewer rows. A gap
    in a life's record stays a gap. The failure, if any, is on a run's last row.
    """
    if len(key) == 0:
        return entry, exit, failed
    starts = np.r_[True, (key[1:] != key[:-1]) | (entry[1:] != exit[:-1])]
    first = np.flatnonzero(starts)
    last = np.r_[first[1:] - 1, len(key) - 1]
    return entry[first], exit[last], np.logical_or.reduceat(failed, first)


def first_failure_rows(frame: pd.DataFrame) -> np.ndarray:
    """Positions of the rows of each life up to and including its first failure."""
    rows = _Rows(frame)
    return np.sort(rows.order[_first_failure_mask(rows.key, rows.failed)])


def life_statistics(table: LifeTable, group_by: Sequence[str] = (), *,
                    b_lives: Sequence[float] = DEFAULT_B_LIVES, level: float = DEFAULT_LEVEL) -> pd.DataFrame:
    """One row for the fleet, then one per level of each ``group_by`` column.

    Columns: ``group_by``, ``group``, ``units``, ``lives``, ``failures``,
    ``suspensions``, ``time_at_risk_days``, ``mtbf_days``, ``mtbf_low_days``,
    ``mtbf_high_days``, for each ``p`` in ``b_lives`` ``b<p>_days``,
    ``b<p>_low_days``, ``b<p>_high_days``, ``b<p>_fewest_at_risk``, ``weibull_shape`` (+ ``_low``,
    ``_high``), ``weibull_scale_days`` (+ ``_low_days``, ``_high_days``), then
    ``observed_from_age_days`` and ``level``. See the module docstring for the definitions.
    """
    frame = table.frame
    rows = _Rows(frame)
    groups = group_members(group_labels(frame, group_by), len(frame))
    records = [_group_record(rows, key, rows.subset(positions), b_lives, level) for key, positions in groups]
    return pd.DataFrame.from_records(records)


def _group_record(rows: _Rows, key: tuple[str, str], idx: np.ndarray, b_lives: Sequence[float],
                  level: float) -> dict:
    life_key, failed = rows.key[idx], rows.failed[idx]
    last_of_life = np.r_[life_key[1:] != life_key[:-1], True] if len(idx) else np.zeros(0, bool)
    time_at_risk = float(np.sum(rows.exit[idx] - rows.entry[idx]))
    record = {"group_by": key[0], "group": key[1], "units": int(len(np.unique(rows.unit[idx]))),
              "lives": int(last_of_life.sum()), "failures": int(failed.sum()),
              "suspensions": int(np.sum(last_of_life & ~failed)), "time_at_risk_days": time_at_risk}
    estimate, low, high = mtbf_bounds(time_at_risk, record["failures"], level)
    record.update(mtbf_days=estimate, mtbf_low_days=low, mtbf_high_days=high)
    first = idx[_first_failure_mask(life_key, failed)]
    entry, exit_, event = _merge_contiguous(rows.key[first], rows.entry[first], rows.exit[first], rows.failed[first])
    curve = product_limit_survival(entry, exit_, event, level=level)
    for p in b_lives:
        name = f"b{_plain(p)}"
        estimate, low, high = _b_life_from(curve, p)
        record.update({f"{name}_days": estimate, f"{name}_low_days": low, f"{name}_high_days": high,
                       f"{name}_fewest_at_risk": _fewest_at_risk(curve, estimate)})
    weibull = fit_weibull(entry, exit_, event, level=level)
    record.update(weibull_shape=weibull["shape"], weibull_shape_low=weibull["shape_low"],
                  weibull_shape_high=weibull["shape_high"], weibull_scale_days=weibull["scale"],
                  weibull_scale_low_days=weibull["scale_low"], weibull_scale_high_days=weibull["scale_high"])
    record["observed_from_age_days"] = float(entry.min()) if len(entry) else float("nan")
    record["level"] = level
    return record


NO_WEIBULL = "no Weibull fit (fewer than two failures, or the fit did not settle)"


def shape_reading(shape: float, low: float, high: float) -> str:
    """The Weibull shape in words; a trend is named only when both bounds are on one side of 1."""
    if not np.isfinite(shape):
        return NO_WEIBULL
    if low > 1.0:
        return "failure rate rising with age (wear-out)"
    if high < 1.0:
        return "failure rate falling with age (early-life failures)"
    return "no clear trend with age (a constant, random failure rate fits)"


def fleet_headline(stats: pd.DataFrame) -> dict:
    """The fleet row's MTBF and B-lives as plain numbers (None where there is none) for summaries."""
    fleet = stats.iloc[0]
    keys = [c for c in stats.columns if c.startswith(("mtbf", "b")) and c.endswith("_days")]
    out = {f"fleet_{k}": (None if pd.isna(fleet[k]) else round(float(fleet[k]), 1)) for k in keys}
    shape = [fleet.get(f"weibull_shape{part}", np.nan) for part in ("", "_low", "_high")]
    out.update({f"fleet_weibull_shape{part}": (None if pd.isna(v) else round(float(v), 3))
                for part, v in zip(("", "_low", "_high"), shape)})
    out["fleet_weibull_reading"] = shape_reading(*(float(v) for v in shape))
    return out | {"life_statistics_level": float(fleet["level"])}


def _plain(p: float) -> str:
    return str(int(p)) if float(p).is_integer() else str(p).replace(".", "_")


def write_life_statistics(stats: pd.DataFrame, out_dir: str | Path) -> Path:
    """Write ``life_statistics.csv`` atomically; return its path. Days as whole numbers
    (empty where there is no value)."""
    return _atomic.write_csv(Path(out_dir) / LIFE_STATISTICS_FILE, whole_days(stats))


def whole_days(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy with every ``*_days`` column rounded to whole days (nullable integers: empty stays empty)."""
    out = frame.copy()
    for col in [c for c in out.columns if c.endswith("_days")]:
        out[col] = out[col].astype(float).round(0).astype("Int64")
    return out


__all__ = ["NO_WEIBULL", "LIFE_STATISTICS_FILE", "life_statistics", "write_life_statistics", "fleet_headline", "mtbf_bounds",
           "b_life", "first_failure_rows", "shape_reading"]
