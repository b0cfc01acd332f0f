"""The invented demo fleet: Vennmoor Water Board's pump sets, with a known truth.

Vennmoor Water Board (an invented operator) runs centrifugal pump sets at six
invented sites, bought from three invented makers. Every position holds one
unit; a failed unit is replaced like-for-like (renewal policy ``replace``).
Installs spread over the 15 years before the export date; records (work
orders, duty readings) start 5 years before it, so most units enter the data
late (left truncation). Some positions are decommissioned.

True hazard of a running unit at age ``a`` days (see :mod:`wearcast._scenario_sim`):

* baseline: Weibull, shape 2.0, scale 30 years (10,957.5 days);
* static log hazard ratio: maker (categorical), seal type (categorical) and
  water hardness (numeric, mg/L); survey_score is pure noise; site is a
  group column whose effect comes only through its water hardness;
* duty, read about every 91 days (and at records start, install and each
  replacement) and held until the next reading: running hours per day
  (U-shape) and vibration mm/s (a step above 4.5), plus a duty x seal-type
  interaction (packed glands run over 16 h/day);
* ``effects="linear"`` makes every term a straight line, ``effects="none"``
  switches covariates off (pure Weibull lives).

:func:`simulate_fleet` returns the tables; :func:`generate_scenario` writes
register.csv, events.csv, readings.csv, truth.csv, scenario.json and a
ready-to-run wearcast.toml. The oracle functions (:func:`true_cumulative_hazard`,
:func:`true_fail_probability`, :func:`true_population_survival`,
:func:`oracle_risk_score`) let tests compare estimates with the truth.
"""

from __future__ import annotations

import datetime as dt
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast import _scenario_sim as sim
from wearcast.exceptions import ConfigError

OPERATOR = "Vennmoor Water Board (invented)"
DEFAULT_AS_OF = dt.date(2026, 11, 30)
READING_COLUMNS = ("running_hours_per_day", "vibration_mm_s")
COVARIATES = ("maker", "seal_type", "water_hardness_mg_l", "survey_score", *READING_COLUMNS)
CATEGORICAL = ("maker", "seal_type")
CONFIG_FILE = "wearcast.toml"
_POPULATION_SEED = 20261130  # fixed: the population curve depends on the model only


@dataclass(frozen=True)
class FleetTables:
    """The simulated export and its truth (no I/O).

    ``register``: one row per unit (position): unit_id, site, maker, model_code,
    seal_type, water_hardness_mg_l, survey_score, install_date (start of the
    life running when records began, or the later first install),
    decommission_date (NaT when still owned). ``events``: unit_id, event_date,
    event_kind (failure / replacement / decommission), failure_mode.
    ``readings``: unit_id, reading_date, running_hours_per_day, vibration_mm_s.
    ``truth``: one row per unit, see :func:`simulate_fleet`.
    """

    register: pd.DataFrame
    events: pd.DataFrame
    readings: pd.DataFrame
    truth: pd.DataFrame
    as_of: dt.date
    records_start: dt.date
    effects: str
    seed: int


@dataclass(frozen=True)
class ScenarioFiles:
    """Paths of a written scenario."""

    folder: Path
    register: Path
    events: Path
    readings: Path
    truth: Path
    manifest: Path
    config: Path

    def as_dict(self) -> dict[str, str]:
        return {k: str(v) for k, v in self.__dict__.items()}


def _years_before(day: dt.date, years: int) -> dt.date:
    try:
        return day.replace(year=day.year - years)
    except ValueError:  # 29 February
        return day.replace(year=day.year - years, day=28)


def simulate_fleet(
    n_units: int = 2000,
    seed: int = 7,
    *,
    as_of: dt.date = DEFAULT_AS_OF,
    install_years: float = 15.0,
    records_years: int = 5,
    effects: str = "nonlinear",
    decommission_rate_per_year: float = 0.02,
    replacement_delay_days: int = 5,
) -> FleetTables:
    """Simulate ``n_units`` positions; the same seed gives the same tables.

    Positions are first installed uniformly over the ``install_years`` before
    ``as_of`` (the last 60 days excluded); records start ``records_years``
    before ``as_of``; decommissioning happens at ``decommission_rate_per_year``
    from the later of install and records start. Every position is in the
    register (``len(register) == n_units``).

    ``truth`` columns: unit_id, site, maker, seal_type, effects, weibull_shape,
    weibull_scale_days, static_log_risk, position_install_date (first install,
    maybe before records), first_life_is_original (the register's install date
    is the position's first install, not an unrecorded replacement),
    in_service, awaiting_replacement, life_start_date, age_at_as_of_days,
    last_running_hours_per_day, last_vibration_mm_s, log_risk_now (static +
    duty log hazard ratio in force at as_of; NaN when not in service).
    """
    if effects not in sim.EFFECTS:
        raise ConfigError(f"scenario effects must be one of {', '.join(sim.EFFECTS)}; got {effects!r}.")
    if n_units < 1:
        raise ConfigError(f"scenario needs at least 1 unit; got n_units={n_units}.")
    position_seed, install_seed, history_seed = np.random.SeedSequence(seed).spawn(3)
    positions = sim.draw_positions(n_units, np.random.default_rng(position_seed))
    records_start = _years_before(as_of, records_years)
    records_day = -(as_of - records_start).days
    install_rng = np.random.default_rng(install_seed)
    install_day = install_rng.integers(-int(round(install_years * sim.DAYS_PER_YEAR)), -60, n_units, endpoint=True)
    observed_from = np.maximum(install_day, records_day)
    wait = np.ceil(install_rng.exponential(sim.DAYS_PER_YEAR / decommission_rate_per_year, n_units))
    decommission_day = np.where(observed_from + wait < 0, observed_from + np.maximum(wait, 1), 1).astype(np.int64)
    history = sim.simulate_history(
        positions, install_day, decommission_day, records_day, effects,
        np.random.default_rng(history_seed), replacement_delay_days=replacement_delay_days,
    )
    unit_ids = _unit_ids(positions.site)
    base = np.datetime64(as_of, "D")

    def dates(days):
        return pd.to_datetime(base + np.asarray(days).astype("timedelta64[D]"))

    site_names = np.array([s[0] for s in sim.SITES])
    maker_names = np.array([m[0] for m in sim.MAKERS])
    seal_names = np.array([s[0] for s in sim.SEALS])
    model_codes = np.array([m[1][k] if k < len(m[1]) else "" for m in sim.MAKERS for k in range(2)]).reshape(-1, 2)
    register = pd.DataFrame({
        "unit_id": unit_ids,
        "site": site_names[positions.site],
        "maker": maker_names[positions.maker],
        "model_code": model_codes[positions.maker, positions.model],
        "seal_type": seal_names[positions.seal],
        "water_hardness_mg_l": positions.hardness,
        "survey_score": positions.survey_score,
        "install_date": dates(history.register_install_day),
        "decommission_date": dates(history.end_day).where(history.decommissioned, pd.NaT),
    })
    events = _events_frame(history, unit_ids, dates)
    readings = history.readings
    # readings were logged pass by pass, so each unit's are already in date order
    order = np.argsort(readings["position"], kind="stable")
    readings_frame = pd.DataFrame({
        "unit_id": pd.Categorical.from_codes(readings["position"][order], categories=unit_ids),
        "reading_date": dates(readings["day"][order]),
        "running_hours_per_day": readings["hours"][order],
        "vibration_mm_s": readings["vibration"][order],
    })
    static = sim.static_log_risk(positions.maker, positions.seal, positions.hardness, effects)
    running = history.in_service
    truth = pd.DataFrame({
        "unit_id": unit_ids,
        "site": register["site"],
        "maker": register["maker"],
        "seal_type": register["seal_type"],
        "effects": effects,
        "weibull_shape": sim.WEIBULL_SHAPE,
        "weibull_scale_days": sim.WEIBULL_SCALE_DAYS,
        "static_log_risk": static,
        "position_install_date": dates(history.install_day),
        "first_life_is_original": history.register_install_day == history.install_day,
        "in_service": running,
        "awaiting_replacement": history.awaiting_replacement,
        "life_start_date": dates(history.life_start_day),
        "age_at_as_of_days": np.where(running, -history.life_start_day, np.nan).astype(float),
        "last_running_hours_per_day": np.where(running, history.last_hours, np.nan),
        "last_vibration_mm_s": np.where(running, history.last_vibration, np.nan),
        "log_risk_now": np.where(running, history.last_eta, np.nan),
    })
    return FleetTables(register, events, readings_frame, truth, as_of, records_start, effects, seed)


def _unit_ids(site: np.ndarray) -> pd.Index:
    width = max(6, len(str(len(site))))
    prefixes = pd.Series(np.array([s[1] for s in sim.SITES])[site])
    numbers = pd.Series(np.arange(1, len(site) + 1)).astype(str).str.zfill(width)
    return pd.Index(prefixes + "-" + numbers)


def _events_frame(history: sim.FleetHistory, unit_ids: pd.Index, dates) -> pd.DataFrame:
    fail = history.failures
    keep = fail["recorded"]
    decom = np.flatnonzero(history.decommissioned)
    position = np.concatenate([fail["position"][keep], history.replacements["position"], decom])
    day = np.concatenate([fail["day"][keep], history.replacements["day"], history.end_day[decom]])
    kind = np.concatenate([np.zeros(keep.sum(), np.int64), np.ones(len(history.replacements["day"]), np.int64),
                           np.full(len(decom), 2, np.int64)])
    modes = np.concatenate([np.array(sim.FAILURE_MODES)[fail["mode"][keep]],
                            np.full(len(position) - keep.sum(), "")])
    order = np.lexsort((kind, day, position))
    return pd.DataFrame({
        "unit_id": pd.Categorical.from_codes(position[order], categories=unit_ids),
        "event_date": dates(day[order]),
        "event_kind": np.array(["failure", "replacement", "decommission"])[kind[order]],
        "failure_mode": modes[order],
    })


# -- writing ----------------------------------------------------------------


def generate_scenario(
    out_dir: str | Path,
    n_units: int = 2000,
    seed: int = 7,
    as_of: dt.date = DEFAULT_AS_OF,
    **options,
) -> ScenarioFiles:
    """Simulate the fleet and write it into ``out_dir`` (atomically, file by file).

    ``options`` go to :func:`simulate_fleet` (``effects``, ``install_years``,
    ...). Returns the paths; ``config`` is a wearcast.toml that reads the
    other files with relative paths, so the folder can be moved.
    """
    folder = Path(out_dir)
    tables = simulate_fleet(n_units, seed, as_of=as_of, **options)
    files = ScenarioFiles(
        folder=folder,
        register=folder / "register.csv",
        events=folder / "events.csv",
        readings=folder / "readings.csv",
        truth=folder / "truth.csv",
        manifest=folder / "scenario.json",
        config=folder / CONFIG_FILE,
    )
    _atomic.write_bytes(files.register, _csv_bytes(tables.register))
    _atomic.write_bytes(files.events, _csv_bytes(tables.events))
    _atomic.write_bytes(files.readings, _csv_bytes(tables.readings))
    _atomic.write_bytes(files.truth, _csv_bytes(tables.truth))
    _atomic.write_json(files.manifest, {
        "operator": OPERATOR,
        "n_units": n_units,
        "seed": seed,
        "effects": tables.effects,
        "as_of": tables.as_of,
        "records_start": tables.records_start,
        "weibull_shape": sim.WEIBULL_SHAPE,
        "weibull_scale_days": sim.WEIBULL_SCALE_DAYS,
        "counts": {
            "register_rows": len(tables.register),
            "event_rows": len(tables.events),
            "failures": int((tables.events["event_kind"] == "failure").sum()),
            "reading_rows": len(tables.readings),
        },
    })
    _atomic.write_text(files.config, config_text(tables, seed))
    return files


def config_text(tables: FleetTables, seed: int) -> str:
    """The wearcast.toml for a scenario folder (paths relative to it)."""

    def toml_list(items):
        return "[" + ", ".join(f'"{i}"' for i in items) + "]"

    return (
        f"# wearcast config for the invented demo fleet of the {OPERATOR}.\n"
        "# Written by wearcast.scenario.generate_scenario; paths are relative to this file.\n\n"
        "[input]\n"
        'shape = "register_log"\n'
        'register = "register.csv"\n'
        'events = "events.csv"\n'
        'readings = "readings.csv"\n\n'
        "[fleet]\n"
        f"as_of = {tables.as_of.isoformat()}\n"
        f"records_start = {tables.records_start.isoformat()}\n"
        'renewal = "replace"\n'
        f"covariates = {toml_list(COVARIATES)}\n"
        f"categorical = {toml_list(CATEGORICAL)}\n"
        'group_by = ["site"]\n\n'
        "[model]\n"
        f"seed = {int(seed)}\n\n"
        "# Lighter than the defaults so the demo finishes in a few minutes on a laptop.\n"
        "[model.forest]\n"
        "n_trees = 100\n\n"
        "[validation]\n"
        "folds = 3\n"
        "bootstrap = 100\n\n"
        "[ranking]\n"
        "refits = 40\n"
        "top_k = 50\n"
        "# seals tilt which way a pump set fails, so each seal type gets its own failure-mode mix\n"
        'modes_by = "seal_type"\n\n'
        "# invented relative costs: a failure (call-out, lost pumping, collateral damage) costs five planned swaps\n"
        "[costs]\n"
        "planned_replacement = 1.0\n"
        "failure = 5.0\n\n"
        "[output]\n"
        'folder = "wearcast-output"\n'
    )


def _csv_bytes(frame: pd.DataFrame) -> bytes:
    """CSV bytes with plain ``YYYY-MM-DD`` dates and no quoting (fast for millions of rows)."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    columns = {}
    for name in frame.columns:
        col = frame[name]
        if pd.api.types.is_datetime64_any_dtype(col):
            columns[name] = pa.array(col.to_numpy(dtype="datetime64[D]"), type=pa.date32(),
                                     mask=col.isna().to_numpy())
        elif isinstance(col.dtype, pd.CategoricalDtype):
            columns[name] = pa.array(col.cat.categories.to_numpy().astype(str)).take(
                pa.array(col.cat.codes.to_numpy()))
        elif col.dtype == bool:
            columns[name] = pa.array(np.where(col.to_numpy(), "true", "false"))
        else:
            columns[name] = pa.array(col.to_numpy(), from_pandas=True)
    buffer = io.BytesIO()
    buffer.write((",".join(frame.columns) + "\n").encode("utf-8"))
    pacsv.write_csv(pa.table(columns), buffer,
                    pacsv.WriteOptions(include_header=False, quoting_style="none"))
    return buffer.getvalue()


# -- the truth, for tests -----------------------------------------------------


def read_truth(path: str | Path) -> pd.DataFrame:
    """Read a written truth.csv back (unit_id as text, flags as bool)."""
    truth = pd.read_csv(path, dtype={"unit_id": str}, parse_dates=["position_install_date", "life_start_date"])
    for col in ("first_life_is_original", "in_service", "awaiting_replacement"):
        truth[col] = truth[col].astype(str).str.lower().eq("true")
    return truth


def _unit_lookup(truth: pd.DataFrame, unit_ids) -> pd.DataFrame:
    indexed = truth.set_index(truth["unit_id"].astype(str))
    ids = pd.Index(np.asarray(unit_ids).astype(str))
    missing = ~ids.isin(indexed.index)
    if missing.any():
        raise KeyError(f"unit {ids[missing][0]!r} is not in the truth table")
    return indexed.loc[ids]


def _effects(truth: pd.DataFrame) -> str:
    return str(truth["effects"].iloc[0])


def true_log_risk(truth: pd.DataFrame, rows: pd.DataFrame) -> np.ndarray:
    """True log hazard ratio of each life-table row, shape (n_rows,).

    ``rows`` needs unit_id, running_hours_per_day and vibration_mm_s (the duty
    in force on the row); the static part comes from ``truth``.
    """
    unit = _unit_lookup(truth, rows["unit_id"])
    seal = pd.Categorical(unit["seal_type"], categories=[s[0] for s in sim.SEALS]).codes
    duty = sim.duty_log_risk(rows["running_hours_per_day"].to_numpy(float),
                             rows["vibration_mm_s"].to_numpy(float), seal, _effects(truth))
    return unit["static_log_risk"].to_numpy(float) + duty


def true_cumulative_hazard(truth: pd.DataFrame, rows: pd.DataFrame, ages=None) -> np.ndarray:
    """True cumulative hazard accumulated on life-table rows (duty constant per row).

    ``rows``: unit_id, entry_age, exit_age (days), running_hours_per_day,
    vibration_mm_s. Without ``ages``: hazard over each row's
    ``(entry_age, exit_age]``, shape (n_rows,). With ``ages`` (days, shape
    (m,)): hazard from entry_age up to ``min(age, exit_age)`` (0 before
    entry), shape (n_rows, m); summing the rows of one life gives the life's
    cumulative hazard since it entered the data.
    """
    scale = np.exp(true_log_risk(truth, rows))
    entry = rows["entry_age"].to_numpy(float)
    exit_ = rows["exit_age"].to_numpy(float)
    h_entry = sim.baseline_cumulative_hazard(entry)
    if ages is None:
        return scale * (sim.baseline_cumulative_hazard(exit_) - h_entry)
    ages = np.asarray(ages, dtype=float)[None, :]
    upto = np.clip(ages, entry[:, None], exit_[:, None])
    return scale[:, None] * (sim.baseline_cumulative_hazard(upto) - h_entry[:, None])


def true_fail_probability(truth: pd.DataFrame, age_days=None, horizon_days: float = 365.0) -> np.ndarray:
    """P(fail within ``horizon_days``) for units in service at as_of, shape (n_units,).

    Assumes the duty stays at its last reading (``log_risk_now``). ``age_days``
    defaults to each unit's age at as_of; units not in service give NaN.
    """
    age = truth["age_at_as_of_days"].to_numpy(float) if age_days is None else np.asarray(age_days, float)
    increment = sim.baseline_cumulative_hazard(age + horizon_days) - sim.baseline_cumulative_hazard(age)
    return 1.0 - np.exp(-np.exp(truth["log_risk_now"].to_numpy(float)) * increment)


def true_population_survival(ages_days, effects: str = "nonlinear", n_lives: int = 100_000) -> np.ndarray:
    """Survival curve of a freshly installed unit drawn from the fleet's covariates.

    ``S(t) = E[exp(-Lambda(t))]`` over static covariates, duty class, wear and
    reading phase, by Monte Carlo over ``n_lives`` lives with each life's
    cumulative hazard exact (error about 0.1 / sqrt(n_lives)); a fixed internal
    seed makes it repeatable. ``ages_days``: array of ages in days.
    """
    if effects not in sim.EFFECTS:
        raise ConfigError(f"scenario effects must be one of {', '.join(sim.EFFECTS)}; got {effects!r}.")
    rng = np.random.default_rng(_POPULATION_SEED)
    return sim.fresh_life_survival(np.asarray(ages_days, dtype=float), effects, n_lives, rng)


def oracle_risk_score(truth: pd.DataFrame, horizon_days: float = 365.0) -> pd.Series:
    """True risk of each in-service unit at as_of, indexed by unit_id (higher = riskier).

    The true P(fail within ``horizon_days``) with duty held at its last reading:
    the ranking a perfect model would produce, for concordance checks of the
    ranked list. Units not in service are left out.
    """
    p = true_fail_probability(truth, horizon_days=horizon_days)
    keep = truth["in_service"].to_numpy(bool)
    return pd.Series(p[keep], index=truth["unit_id"].astype(str).to_numpy()[keep], name="true_risk")
