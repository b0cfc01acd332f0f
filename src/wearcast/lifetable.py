"""The one survival-data type every later stage uses.

A :class:`LifeTable` holds one row per ``(entry_age, exit_age]`` interval of a
unit's life, with ages in **days** since install (or since the last renewal
under a ``replace`` policy). A unit that was installed before records began
enters late (``entry_age > 0``: left truncation); a unit still running at the
export date is a suspension (``failed = False``) whose last row is marked
``in_service``. Under a ``repair`` policy one life holds several rows, each
starting at the previous event (counting-process rows); covariates that change
over time split a life into several rows as well.

A row is *at risk* at age ``t`` when ``entry_age < t <= exit_age``. Every model
and metric in wearcast uses that definition.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable, Sequence

import numpy as np
import pandas as pd

from wearcast.exceptions import ConfigError, DataError

#: Columns every life table has, in this order.
CORE_COLUMNS = ("unit_id", "life", "entry_age", "exit_age", "failed", "mode", "in_service")


def unit_draw(n_units: int, rng: np.random.Generator) -> np.ndarray:
    """One bootstrap of ``n_units`` units: how many times each is drawn in n_units
    draws with replacement from ``rng``, shape (n_units,) int64 (0 = left out)."""
    return np.bincount(rng.integers(0, n_units, size=n_units), minlength=n_units)


def draw_unit_counts(codes: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """:func:`unit_draw` for the units of a table: each unit code 0..max(``codes``),
    shape (n_units,) int64. ``codes``: (n_rows,) from :meth:`LifeTable.unit_codes`."""
    return unit_draw(int(codes.max()) + 1 if len(codes) else 0, rng)


def draw_unit_weights(codes: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """The same bootstrap as :func:`draw_unit_counts`, as case weights on rows:
    ``(rows, weights)``, the positions of the rows whose unit was drawn (in
    order) and each one's weight, the number of times its unit was drawn
    (float)."""
    codes = np.asarray(codes)
    row_counts = draw_unit_counts(codes, rng)[codes]
    rows = np.flatnonzero(row_counts > 0)
    return rows, row_counts[rows].astype(float)


def _where(frame: pd.DataFrame, row: int) -> str:
    """``row 12 (unit P-0042)``: the row as a person finds it in the table."""
    return f"row {row} (unit {frame['unit_id'].iloc[row]})" if "unit_id" in frame.columns else f"row {row}"


def _plain(value) -> str:
    """A value as a person writes it (``12.5``, ``abc``, ``empty``), never a Python repr."""
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
        return "empty"
    if isinstance(value, (float, np.floating)):
        return f"{float(value):g}"
    return str(value.item() if isinstance(value, np.generic) else value)


def check_life_table(
    frame: pd.DataFrame,
    covariates: Sequence[str] = (),
    categorical: Sequence[str] = (),
    *,
    source: str = "life table",
) -> pd.DataFrame:
    """Validate and normalise a life-table frame; return a clean copy.

    Raises :class:`DataError` naming the first problem and how to fix it. The
    checks: the core columns exist; ages are finite, ``entry_age >= 0`` and
    ``exit_age > entry_age``; ``failed`` is boolean; rows of one life do not
    overlap; covariates are numeric unless declared categorical.
    """
    missing = [c for c in ("unit_id", "entry_age", "exit_age", "failed") if c not in frame.columns]
    if missing:
        raise DataError(
            f"{source}: missing column(s) {', '.join(missing)}; found {', '.join(map(str, frame.columns))}. "
            "Map your export's columns in the config's [columns] table."
        )
    out = frame.copy()
    if "life" not in out.columns:
        out["life"] = 1
    if "mode" not in out.columns:
        out["mode"] = ""
    if "in_service" not in out.columns:
        out["in_service"] = False
    out["unit_id"] = out["unit_id"].astype(str)
    out["life"] = pd.to_numeric(out["life"], errors="raise").astype(np.int64)
    out["mode"] = out["mode"].fillna("").astype(str)
    out["in_service"] = out["in_service"].astype(bool)
    for col in ("entry_age", "exit_age"):
        values = pd.to_numeric(out[col], errors="coerce").astype(float)
        bad = ~np.isfinite(values.to_numpy())
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            raise DataError(
                f"{source}: {_where(out, row)}: column {col} is not a finite number "
                f"({_plain(frame[col].iloc[row])}). "
                "Ages must be numbers of days."
            )
        out[col] = values
    if out["failed"].dtype != bool:
        failed = out["failed"]
        if not failed.isin([0, 1, True, False]).all():
            row = int(np.flatnonzero(~failed.isin([0, 1, True, False]).to_numpy())[0])
            raise DataError(
                f"{source}: {_where(out, row)}: column failed is {_plain(failed.iloc[row])}; "
                "use 0/1 or true/false."
            )
        out["failed"] = failed.astype(bool)
    entry = out["entry_age"].to_numpy()
    exit_ = out["exit_age"].to_numpy()
    if (entry < 0).any():
        row = int(np.flatnonzero(entry < 0)[0])
        raise DataError(f"{source}: {_where(out, row)}: entry_age {_plain(entry[row])} is negative; "
                        "ages start at 0.")
    if (exit_ <= entry).any():
        row = int(np.flatnonzero(exit_ <= entry)[0])
        raise DataError(
            f"{source}: {_where(out, row)}: exit_age {_plain(exit_[row])} is not after entry_age "
            f"{_plain(entry[row])}; "
            "every interval must have a positive length."
        )
    categorical = list(categorical)
    for col in covariates:
        if col not in out.columns:
            raise DataError(f"{source}: covariate {col!r} is not a column; found {', '.join(map(str, out.columns))}.")
        if col in categorical:
            out[col] = out[col].astype("category")
            continue
        values = pd.to_numeric(out[col], errors="coerce")
        bad = values.isna() & out[col].notna()
        if bad.any():
            row = int(np.flatnonzero(bad.to_numpy())[0])
            raise DataError(
                f"{source}: {_where(out, row)}: covariate {col} is not numeric ({_plain(out[col].iloc[row])}). "
                "Declare it under categorical in the config if it is a category."
            )
        out[col] = values.astype(float)
    _check_no_overlap(out, source)
    ordered = list(CORE_COLUMNS) + [c for c in out.columns if c not in CORE_COLUMNS]
    # Reorder / renumber only when needed: each is a full copy of a table that can hold millions of rows.
    if list(out.columns) != ordered:
        out = out[ordered]
    if not (isinstance(out.index, pd.RangeIndex) and out.index.name is None
            and out.index.equals(pd.RangeIndex(len(out)))):
        out = out.reset_index(drop=True)
    return out


def _check_no_overlap(frame: pd.DataFrame, source: str) -> None:
    if len(frame) < 2:
        return
    keys = ["unit_id", "life", "entry_age", "exit_age"]
    order = frame[keys].sort_values(keys, kind="mergesort")  # the key columns only: no copy of the whole table
    same_life = (order["unit_id"].to_numpy()[1:] == order["unit_id"].to_numpy()[:-1]) & (
        order["life"].to_numpy()[1:] == order["life"].to_numpy()[:-1]
    )
    overlap = same_life & (order["entry_age"].to_numpy()[1:] < order["exit_age"].to_numpy()[:-1])
    if overlap.any():
        k = int(np.flatnonzero(overlap)[0])
        row_a, row_b = order.index[k], order.index[k + 1]
        raise DataError(
            f"{source}: rows {row_a} and {row_b} of unit {order['unit_id'].iloc[k]} overlap "
            f"({order['entry_age'].iloc[k]}–{order['exit_age'].iloc[k]} and "
            f"{order['entry_age'].iloc[k + 1]}–{order['exit_age'].iloc[k + 1]} days). "
            "Intervals of one life must not overlap."
        )


@dataclass(frozen=True)
class LifeTable:
    """Validated survival data: ``frame`` plus which columns are covariates.

    ``frame`` columns: ``unit_id`` (str), ``life`` (int, 1-based renewal count),
    ``entry_age``/``exit_age`` (float days), ``failed`` (bool: the interval ends
    in a failure), ``mode`` (failure mode or ""), ``in_service`` (bool: this row
    is the unit's open interval at the export date), then covariates. Extra
    columns (for example ``site`` for grouping, or calendar dates
    ``entry_date``/``exit_date``) are kept.
    """

    frame: pd.DataFrame
    covariates: tuple[str, ...] = ()
    categorical: tuple[str, ...] = ()
    as_of: pd.Timestamp | None = None
    meta: dict = field(default_factory=dict, compare=False)

    @classmethod
    def from_frame(
        cls,
        frame: pd.DataFrame,
        covariates: Iterable[str] = (),
        categorical: Iterable[str] = (),
        *,
        as_of=None,
        source: str = "life table",
        meta: dict | None = None,
    ) -> "LifeTable":
        covariates = tuple(covariates)
        categorical = tuple(c for c in categorical if c in covariates)
        clean = check_life_table(frame, covariates, categorical, source=source)
        as_of = None if as_of is None else pd.Timestamp(as_of)
        return cls(clean, covariates, categorical, as_of, dict(meta or {}))

    # -- arrays models and metrics use ------------------------------------
    @property
    def entry(self) -> np.ndarray:
        """Entry ages in days, shape (n_rows,), float64."""
        return self.frame["entry_age"].to_numpy(dtype=float)

    @property
    def exit(self) -> np.ndarray:
        """Exit ages in days, shape (n_rows,), float64."""
        return self.frame["exit_age"].to_numpy(dtype=float)

    @property
    def event(self) -> np.ndarray:
        """Failure flags, shape (n_rows,), bool."""
        return self.frame["failed"].to_numpy(dtype=bool)

    @property
    def unit_ids(self) -> np.ndarray:
        return self.frame["unit_id"].to_numpy()

    @property
    def X(self) -> pd.DataFrame:
        """Covariates only, in declared order (categoricals as pandas category)."""
        return self.frame.loc[:, list(self.covariates)]

    def unit_codes(self) -> np.ndarray:
        """Integer code per row identifying the unit (for grouped folds)."""
        return pd.factorize(self.frame["unit_id"], sort=True)[0]

    # -- counts ----------------------------------------------------------
    @property
    def n_rows(self) -> int:
        return len(self.frame)

    @property
    def n_units(self) -> int:
        return int(self.frame["unit_id"].nunique())

    @property
    def n_lives(self) -> int:
        return int(len(self.frame.drop_duplicates(["unit_id", "life"])))

    @property
    def n_failures(self) -> int:
        return int(self.frame["failed"].sum())

    def summary(self) -> dict:
        """Counts a reliability engineer checks first (days for time)."""
        f = self.frame
        lives = f.groupby(["unit_id", "life"], sort=False)
        first_entry = lives["entry_age"].min()
        last_row_failed = lives["failed"].last()
        return {
            "units": self.n_units,
            "lives": self.n_lives,
            "rows": self.n_rows,
            "failures": self.n_failures,
            "suspensions": int((~last_row_failed).sum()),
            "delayed_entries": int((first_entry > 0).sum()),
            "in_service_units": int(f.loc[f["in_service"], "unit_id"].nunique()),
            "time_at_risk_days": float((f["exit_age"] - f["entry_age"]).sum()),
        }

    # -- subsets -----------------------------------------------------------
    def take_rows(self, rows: np.ndarray) -> "LifeTable":
        """A new table of the given row positions (no re-validation needed)."""
        return LifeTable(self.frame.iloc[rows].reset_index(drop=True), self.covariates,
                         self.categorical, self.as_of, dict(self.meta))

    def take_units(self, unit_ids: Iterable[str]) -> "LifeTable":
        """All rows of the listed units (each listed unit once)."""
        keep = self.frame["unit_id"].isin(set(map(str, unit_ids))).to_numpy()
        return self.take_rows(np.flatnonzero(keep))

    def bootstrap_units(self, rng: np.random.Generator) -> "LifeTable":
        """Resample whole unit histories with replacement.

        A unit drawn k times appears k times with ids ``"<id>#<j>"`` so copies
        stay distinct units (risk sets and folds treat them separately).
        """
        codes = self.unit_codes()
        counts = draw_unit_counts(codes, rng)
        draws = np.repeat(np.arange(counts.size), counts)  # sorted unit codes, one per draw
        n_units = counts.size
        order = np.argsort(codes, kind="stable")
        starts = np.searchsorted(codes[order], np.arange(n_units + 1))
        lengths = starts[draws + 1] - starts[draws]
        # copy number of each draw: its position among equal draws (draws are sorted)
        copy_of_draw = np.arange(len(draws)) - np.searchsorted(draws, draws, side="left")
        offsets = np.repeat(np.cumsum(lengths) - lengths, lengths)
        within = np.arange(int(lengths.sum())) - offsets
        rows = order[np.repeat(starts[draws], lengths) + within]
        # one label per draw, then repeated over its rows (string work per unit, not per row)
        first_row = self.frame["unit_id"].to_numpy()[order[starts[draws]]].astype(str)
        labels = pd.Series(first_row).str.cat(pd.Series(copy_of_draw.astype(str)), sep="#").to_numpy()
        frame = self.frame.iloc[rows].reset_index(drop=True)
        frame["unit_id"] = np.repeat(labels, lengths)
        return LifeTable(frame, self.covariates, self.categorical, self.as_of, dict(self.meta))

    def bootstrap_weights(self, rng: np.random.Generator) -> tuple["LifeTable", np.ndarray]:
        """The same resample as :meth:`bootstrap_units`, as case weights.

        Returns the rows of the units drawn at least once (in table order) and
        each row's weight, shape (rows,) float: the number of times its unit
        was drawn. Weighted risk sets give the same Breslow partial likelihood
        as the duplicated table with about 63 % of its rows.
        """
        rows, weights = draw_unit_weights(self.unit_codes(), rng)
        return self.take_rows(rows), weights

    def in_service(self) -> "LifeTable":
        """The open interval of every unit still running at the export date."""
        return self.take_rows(np.flatnonzero(self.frame["in_service"].to_numpy()))


#: Label (group_by, group) of the whole fleet in per-group outputs.
FLEET = ("fleet", "all")


def level_labels(values: pd.Series) -> np.ndarray:
    """A grouping column's values as text labels, ``(missing)`` where empty; shape (n,)."""
    values = values.astype(object)
    return np.where(values.isna().to_numpy(), "(missing)", values.astype(str).to_numpy()).astype(str)


def group_labels(rows: pd.DataFrame, group_by: Sequence[str]) -> list[tuple[str, np.ndarray]]:
    """``[(column, labels (n,) str), ...]`` for each grouping column of ``rows``.

    Raises :class:`ConfigError` naming the column when ``rows`` lacks it.
    """
    out = []
    for col in group_by:
        if col == FLEET[0]:
            raise ConfigError(
                f"[fleet] group_by names a column {col!r}; that name is kept for the whole-fleet rows of the "
                "outputs. Rename the column in the export (or map it in [columns])."
            )
        if col not in rows.columns:
            raise ConfigError(
                f"[fleet] group_by names {col!r}, which is not a column of the life table "
                f"({', '.join(map(str, rows.columns))}). Remove it or add the column to the export."
            )
        out.append((str(col), level_labels(rows[col])))
    return out


def group_members(groupings, n_units: int) -> list[tuple[tuple[str, str], np.ndarray]]:
    """``[((column, level), positions), ...]`` from :func:`group_labels`: the whole fleet
    first, then each column's levels sorted."""
    members = [(FLEET, np.arange(n_units))]
    for col, labels in groupings:
        for level in sorted(set(labels)):
            members.append(((col, str(level)), np.flatnonzero(labels == level)))
    return members
