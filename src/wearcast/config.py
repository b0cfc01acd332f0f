"""Run configuration: one TOML file, loaded once at the edge.

Every section is a frozen dataclass; :func:`load_config` rejects unknown keys
(naming the key and the section) and wrong types, so a typo never silently
falls back to a default. ``docs/config.md`` documents every key; keep the two
in step (a test checks that every field here is documented there).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import tomllib
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from wearcast.exceptions import ConfigError, InputMissingError


@dataclass(frozen=True)
class InputSection:
    """Where the export is and what shape it has."""

    shape: str = "register_log"  # "register_log" or "life_table"
    register: str | None = None
    events: str | None = None
    readings: str | None = None
    life_table: str | None = None
    sheet: str | None = None  # Excel sheet name, when the files are .xlsx
    delimiter: str | None = None  # CSV delimiter; sniffed when unset
    decimal: str = "."  # "," for decimal-comma exports
    encoding: str = "utf-8"  # a BOM is removed either way
    date_format: str | None = None  # strftime format, e.g. "%d/%m/%Y"; required when dates are ambiguous
    date_format_by_file: dict[str, str] = field(default_factory=dict)  # register/events/readings/life_table -> format
    encoding_by_file: dict[str, str] = field(default_factory=dict)  # register/events/readings/life_table -> encoding
    age_unit: str = "days"  # unit of numeric ages in a life_table export: days, hours, weeks, months, years


@dataclass(frozen=True)
class ColumnsSection:
    """Names of the export's columns (left: wearcast's name; right: yours)."""

    unit_id: str = "unit_id"
    install_date: str = "install_date"
    decommission_date: str = "decommission_date"
    event_date: str = "event_date"
    event_kind: str = "event_kind"
    failure_mode: str = "failure_mode"
    reading_date: str = "reading_date"
    entry: str = "entry"
    exit: str = "exit"
    failed: str = "failed"
    life: str = "life"  # life_table shape only, optional: life number within a unit (1, 2, ...)
    retired: str = "retired"  # life_table shape only, optional: 1/true marks a retired or decommissioned unit


@dataclass(frozen=True)
class FleetSection:
    """How to turn the export into lives."""

    as_of: dt.date | None = None  # export date; units still running are suspended here
    records_start: dt.date | None = None  # units installed earlier enter late at their age on this date
    renewal: str = "replace"  # "replace": a failure starts a new life at age 0; "repair": the unit keeps its age
    covariates: list[str] = field(default_factory=list)
    categorical: list[str] = field(default_factory=list)
    group_by: list[str] = field(default_factory=list)  # columns for per-group forecasts (site, make, ...)
    failure_kinds: list[str] = field(default_factory=lambda: ["failure"])
    replacement_kinds: list[str] = field(default_factory=lambda: ["replacement"])
    decommission_kinds: list[str] = field(default_factory=lambda: ["decommission"])
    max_bad_share: float = 0.05  # stop (exit 65) when more than this share of one file's rows is rejected
    ranges: dict[str, list[float]] = field(default_factory=dict)  # covariate -> [low, high]; outside: quarantined
    no_failures_expected: bool = False  # true: no failure in 100+ unit-years is not an error


@dataclass(frozen=True)
class BoostedSection:
    """Boosted survival trees (Cox partial likelihood with delayed entry)."""

    learning_rate: float = 0.05  # shrinkage λ
    max_trees: int = 1000  # upper bound on B; B itself is chosen by cross-validation
    tree_depth: int = 3  # d: depth of each tree
    max_leaves: int | None = None  # defaults to 2**tree_depth
    subsample: float = 0.8  # share of units (whole histories) per tree
    predictors_per_split: float = 1.0  # share of predictors tried at each tree
    min_events_per_leaf: int = 10
    folds: int = 5
    early_stopping_trees: int = 50
    ties: str = "efron"  # "efron" or "breslow"
    monotone: dict[str, int] = field(default_factory=dict)  # covariate -> +1 (risk rises) / -1
    threads: int = 1


@dataclass(frozen=True)
class ForestSection:
    """Bagged survival trees / random survival forest with delayed entry."""

    mode: str = "random_forest"  # "random_forest" (√p predictors per split) or "bagging" (all)
    n_trees: int = 200
    predictors_per_split: float | None = None  # share of predictors; None = √p / p
    min_events_per_leaf: int = 5
    max_depth: int = 12
    time_grid_points: int = 200
    grow_on: str = "episodes"  # choose splits on one point per life episode ("episodes") or on every row ("rows")
    leaf_prior_units: float = 10.0  # weight, in units at risk, of the tree's pooled hazard in each leaf's


@dataclass(frozen=True)
class ModelSection:
    """Which models to fit and the run's seed."""

    fit: list[str] = field(default_factory=lambda: ["boosted", "forest", "cox"])
    choose: str = "auto"  # "auto" (cross-validated choice) or a model name to pin
    seed: int = 20261201
    boosted: BoostedSection = field(default_factory=BoostedSection)
    forest: ForestSection = field(default_factory=ForestSection)


@dataclass(frozen=True)
class RankingSection:
    """The ranked list and the fleet forecast."""

    horizons_days: list[int] = field(default_factory=lambda: [30, 90, 365])
    refits: int = 200
    top_k: int = 50
    stable_share: float = 0.8  # a unit's top-k place is stable when it is there in this share of refits
    jobs: int = 0  # 0 = all cores
    modes_by: str | None = None  # a column whose levels get their own failure-mode mix (e.g. the seal type)
    mode_prior_failures: float = 10.0  # weight, in failures, of the fleet's mode mix in each level's mix


@dataclass(frozen=True)
class ValidationSection:
    folds: int = 5
    horizons_days: list[int] = field(default_factory=lambda: [90, 365])
    bootstrap: int = 200
    calibration_share: float = 0.25  # a candidate whose expected/observed count is off by more is not eligible
    bootstrap_metrics: str = "concordance"  # "concordance": bootstrap the C indices only; "all": every metric
    jobs: int = 0  # worker processes for the cross-validation fits; 0 = all cores (results do not depend on it)


@dataclass(frozen=True)
class MonthlySection:
    registry: str = "registry"
    c_tolerance: float = 0.01
    calibration_bound: float = 0.25  # |expected / observed - 1| allowed for promotion
    holdout_days: int = 365  # the promotion gate scores both models on failures in the last this many days


@dataclass(frozen=True)
class CostsSection:
    """Costs for the planned replacement age (same unit for both; only their ratio matters)."""

    planned_replacement: float | None = None
    failure: float | None = None


@dataclass(frozen=True)
class OutputSection:
    folder: str = "wearcast-output"


@dataclass(frozen=True)
class Config:
    input: InputSection = field(default_factory=InputSection)
    columns: ColumnsSection = field(default_factory=ColumnsSection)
    fleet: FleetSection = field(default_factory=FleetSection)
    model: ModelSection = field(default_factory=ModelSection)
    ranking: RankingSection = field(default_factory=RankingSection)
    validation: ValidationSection = field(default_factory=ValidationSection)
    monthly: MonthlySection = field(default_factory=MonthlySection)
    costs: CostsSection = field(default_factory=CostsSection)
    output: OutputSection = field(default_factory=OutputSection)
    #: Folder the config file lives in; relative paths resolve against it.
    base_dir: Path = field(default=Path("."), compare=False)
    source: str = field(default="<defaults>", compare=False)

    def path(self, relative: str | None) -> Path | None:
        """Resolve a path from the config against the config's folder."""
        if relative is None:
            return None
        p = Path(relative)
        return p if p.is_absolute() else self.base_dir / p


#: Keys whose value must be one of a few words: (section class, key) -> allowed values.
_CHOICES: dict[tuple[type, str], tuple[str, ...]] = {
    (InputSection, "shape"): ("register_log", "life_table"),
    (InputSection, "age_unit"): ("days", "hours", "weeks", "months", "years"),
    (FleetSection, "renewal"): ("replace", "repair"),
    (BoostedSection, "ties"): ("efron", "breslow"),
    (ForestSection, "mode"): ("random_forest", "bagging"),
    (ForestSection, "grow_on"): ("episodes", "rows"),
    (ModelSection, "choose"): ("auto", "boosted", "forest", "cox", "boosted_d1", "boosted_d2", "boosted_d3",
                               "forest_bagging", "forest_sqrt"),
    (ValidationSection, "bootstrap_metrics"): ("concordance", "all"),
}


def load_config(path: str | Path) -> Config:
    """Read and check a TOML config; raises :class:`ConfigError` naming the key."""
    path = Path(path)
    if not path.exists():
        raise InputMissingError(f"config file {path} does not exist. Pass the path of your TOML config.")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8-sig"))
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}. Check quotes and brackets on that line.") from exc
    cfg = config_from_dict(data, source=str(path))
    return dataclasses.replace(cfg, base_dir=path.resolve().parent, source=str(path))


def config_from_dict(data: dict, source: str = "<dict>") -> Config:
    """Build a :class:`Config` from a parsed TOML mapping."""
    return _build(Config, data, source, "")


_SKIP = {"base_dir", "source"}


def _build(cls, data: Any, source: str, where: str):
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: [{where}] must be a table, got {type(data).__name__}.")
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls) if f.name not in _SKIP}
    unknown = sorted(set(data) - set(fields))
    if unknown:
        label = f"[{where}]" if where else "the top level"
        raise ConfigError(
            f"{source}: unknown key {unknown[0]!r} in {label}; known keys: {', '.join(sorted(fields))}."
        )
    values = {}
    for name, value in data.items():
        key = f"{where}.{name}" if where else name
        values[name] = _coerce(hints[name], value, source, key)
        allowed = _CHOICES.get((cls, name))
        if allowed is not None and values[name] not in allowed:
            raise ConfigError(
                f"{source}: {key} = {value!r} is not known; use one of {', '.join(repr(a) for a in allowed)}."
            )
    try:
        return cls(**values)
    except TypeError as exc:  # pragma: no cover - dataclass construction guards
        raise ConfigError(f"{source}: [{where}]: {exc}") from exc


def _coerce(hint, value, source: str, key: str):
    origin = typing.get_origin(hint)
    args = typing.get_args(hint)
    if dataclasses.is_dataclass(hint):
        return _build(hint, value, source, key)
    if origin in (types.UnionType, typing.Union):
        if value is None:
            return None
        inner = [a for a in args if a is not type(None)]
        return _coerce(inner[0], value, source, key)
    if origin is list:
        if not isinstance(value, list):
            raise ConfigError(f"{source}: {key} must be a list, e.g. {key.split('.')[-1]} = [...]")
        return [_coerce(args[0], v, source, key) for v in value]
    if origin is dict:
        if not isinstance(value, dict):
            raise ConfigError(f"{source}: {key} must be a table")
        return {str(k): _coerce(args[1], v, source, f"{key}.{k}") for k, v in value.items()}
    if hint is dt.date:
        if isinstance(value, dt.datetime):
            return value.date()
        if isinstance(value, dt.date):
            return value
        if isinstance(value, str):
            try:
                return dt.date.fromisoformat(value)
            except ValueError:
                pass
        raise ConfigError(f"{source}: {key} must be a date written YYYY-MM-DD, got {value!r}.")
    if hint is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{source}: {key} must be a number, got {value!r}.")
        return float(value)
    if hint is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{source}: {key} must be a whole number, got {value!r}.")
        return value
    if hint is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{source}: {key} must be true or false, got {value!r}.")
        return value
    if hint is str:
        if not isinstance(value, str):
            raise ConfigError(f"{source}: {key} must be text in quotes, got {value!r}.")
        return value
    return value
