"""Kernels of the invented demo fleet: the true hazard and its exact simulation.

Everything here is pure numpy on arrays; :mod:`wearcast.scenario` turns the
results into tables and files. Time is counted in whole **days relative to the
export date** (``as_of`` is day 0, earlier days are negative); ages are days
since the current life started.

The true hazard of a running unit is

    h(a) = (k / s) * (a / s) ** (k - 1) * exp(static + duty(hours, vibration, seal))

with Weibull shape ``k = WEIBULL_SHAPE`` and scale ``s = WEIBULL_SCALE_DAYS``.
Duty values hold from one reading to the next (piecewise constant), so the
cumulative hazard over a stretch of constant duty is
``exp(eta) * ((a1 / s) ** k - (a0 / s) ** k)`` and a failure age is found by
inverting that expression exactly, stretch by stretch.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Weibull shape of the wear-out baseline (rising hazard: wear-out).
WEIBULL_SHAPE = 2.0
#: Weibull scale in days (30 years). With the fleet's average duty this gives
#: about 3 % failure probability in the year after age 10 (mid-life).
WEIBULL_SCALE_DAYS = 30 * 365.25
#: Days between routine duty readings.
READING_INTERVAL_DAYS = 91
DAYS_PER_YEAR = 365.25

EFFECTS = ("nonlinear", "linear", "none")

# -- the invented fleet's make-up (names are made up) --------------------------
#: site name, unit-id prefix, mean water hardness (mg/L as CaCO3), share of positions
SITES = (
    ("Quillfen Intake", "QF", 90.0, 0.22),
    ("Sallowby Booster", "SB", 140.0, 0.18),
    ("Greymantle Lift", "GM", 175.0, 0.16),
    ("Tarnwick Works", "TW", 210.0, 0.18),
    ("Oxlip Reservoir", "OX", 260.0, 0.14),
    ("Fennerholt Weir", "FH", 310.0, 0.12),
)
#: maker, model codes, share, log hazard ratio (against Brannick)
MAKERS = (
    ("Brannick", ("BK-40", "BK-65"), 0.45, 0.0),
    ("Corvale", ("CV-210",), 0.30, 0.4),
    ("Ostrel", ("OS-7T", "OS-9T"), 0.25, -0.3),
)
#: seal type, share, log hazard ratio (against mechanical_single)
SEALS = (
    ("mechanical_single", 0.50, 0.0),
    ("mechanical_double", 0.20, -0.25),
    ("packed_gland", 0.30, 0.2),
)
PACKED_GLAND = 2  # index of packed_gland in SEALS
#: duty class: mean running hours per day and share
DUTY_CLASSES = ((3.0, 0.25), (11.0, 0.55), (19.0, 0.20))
HOURS_NOISE_SD = 1.5
VIBRATION_NOISE_SD = 0.3
VIBRATION_THRESHOLD = 4.5  # mm/s; above it the nonlinear truth adds a step
FAILURE_MODES = ("seal_leak", "bearing_wear", "impeller_wear", "motor_winding")


def baseline_cumulative_hazard(age_days: np.ndarray) -> np.ndarray:
    """Weibull cumulative hazard ``(a / s) ** k`` at ages in days (any shape)."""
    return (np.maximum(age_days, 0.0) / WEIBULL_SCALE_DAYS) ** WEIBULL_SHAPE


def static_log_risk(maker: np.ndarray, seal: np.ndarray, hardness: np.ndarray, effects: str) -> np.ndarray:
    """Log hazard ratio of the static covariates, shape (n,).

    ``maker``/``seal`` are integer codes into MAKERS/SEALS; ``hardness`` in mg/L.
    The survey score is pure noise and has no term.
    """
    if effects == "none":
        return np.zeros(len(maker))
    maker_effect = np.array([m[3] for m in MAKERS])[maker]
    seal_effect = np.array([s[2] for s in SEALS])[seal]
    return maker_effect + seal_effect + 0.003 * (hardness - 180.0)


def duty_log_risk(hours: np.ndarray, vibration: np.ndarray, seal: np.ndarray, effects: str) -> np.ndarray:
    """Log hazard ratio of the time-varying duty, same shape as ``hours``.

    nonlinear: U-shape in running hours per day (idle standby units seize,
    hard-driven units wear), a step above 4.5 mm/s vibration, and extra risk for
    packed-gland seals run more than 16 h/day (the duty x seal interaction).
    linear: straight lines in hours and vibration, no interaction.
    """
    if effects == "none":
        return np.zeros(np.shape(hours))
    if effects == "linear":
        return 0.04 * (hours - 11.0) + 0.35 * (vibration - 3.0)
    packed = seal == PACKED_GLAND
    return (
        0.010 * (hours - 11.0) ** 2
        + 0.9 * (vibration > VIBRATION_THRESHOLD)
        + np.where(packed, 0.10 * np.maximum(hours - 16.0, 0.0), 0.0)
    )


@dataclass
class Positions:
    """Static make-up of n positions (integer codes; arrays of shape (n,))."""

    site: np.ndarray
    maker: np.ndarray
    model: np.ndarray  # index into the maker's model codes
    seal: np.ndarray
    hardness: np.ndarray  # mg/L as CaCO3
    survey_score: np.ndarray  # 1..5, no effect (noise covariate)
    hours_level: np.ndarray  # the position's typical running hours per day


def draw_positions(n: int, rng: np.random.Generator) -> Positions:
    """Draw the static covariates of ``n`` positions, independently of install dates."""
    site = rng.choice(len(SITES), size=n, p=[s[3] for s in SITES])
    maker = rng.choice(len(MAKERS), size=n, p=[m[2] for m in MAKERS])
    n_models = np.array([len(m[1]) for m in MAKERS])
    model = np.floor(rng.random(n) * n_models[maker]).astype(np.int64)
    seal = rng.choice(len(SEALS), size=n, p=[s[1] for s in SEALS])
    hardness = np.round(np.array([s[2] for s in SITES])[site] + rng.normal(0.0, 15.0, n), 0)
    survey_score = np.round(rng.uniform(1.0, 5.0, n), 1)
    duty = rng.choice(len(DUTY_CLASSES), size=n, p=[d[1] for d in DUTY_CLASSES])
    hours_level = np.array([d[0] for d in DUTY_CLASSES])[duty]
    return Positions(site, maker, model, seal, hardness, survey_score, hours_level)


def draw_wear(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A new unit's vibration at install (mm/s) and its yearly growth (mm/s per year)."""
    return rng.uniform(1.0, 2.6, n), np.exp(rng.normal(np.log(0.15), 0.5, n))


def read_duty(hours_level, v0, growth, age_days, rng: np.random.Generator):
    """One duty reading per unit: (hours per day, vibration mm/s), rounded as logged."""
    n = len(hours_level)
    hours = np.round(np.clip(hours_level + rng.normal(0.0, HOURS_NOISE_SD, n), 0.0, 24.0), 1)
    vibration = v0 + growth * age_days / DAYS_PER_YEAR + rng.normal(0.0, VIBRATION_NOISE_SD, n)
    return hours, np.round(np.clip(vibration, 0.2, 25.0), 2)


def failure_age(a0, eta, remaining):
    """Age at which the cumulative hazard since ``a0`` reaches ``remaining`` (exact inverse)."""
    h0 = baseline_cumulative_hazard(a0) + remaining * np.exp(-eta)
    return WEIBULL_SCALE_DAYS * h0 ** (1.0 / WEIBULL_SHAPE)


def draw_failure_mode(seal, vibration, rng: np.random.Generator) -> np.ndarray:
    """Failure mode codes (index into FAILURE_MODES); seals and vibration tilt the mix."""
    n = len(seal)
    weights = np.tile(np.array([0.30, 0.30, 0.25, 0.15]), (n, 1))
    weights[seal == PACKED_GLAND, 0] *= 2.0
    weights[vibration > VIBRATION_THRESHOLD, 1] *= 2.0
    cumulative = np.cumsum(weights, axis=1)
    u = rng.random(n) * cumulative[:, -1]
    return (u[:, None] > cumulative).sum(axis=1)


@dataclass
class FleetHistory:
    """Raw result of :func:`simulate_history` (days relative to as_of)."""

    install_day: np.ndarray  # (n,) first install of the position
    register_install_day: np.ndarray  # (n,) start of the life running at records start (or later install)
    end_day: np.ndarray  # (n,) decommission day, or 0 when still owned at as_of
    decommissioned: np.ndarray  # (n,) bool
    phase: np.ndarray  # (n,) reading phase: routine readings on records_start + phase + 91 j
    in_service: np.ndarray  # (n,) bool: a unit runs at as_of
    awaiting_replacement: np.ndarray  # (n,) bool: failed, replacement due after as_of
    life_start_day: np.ndarray  # (n,) start of the last life
    last_hours: np.ndarray  # (n,) duty in force at the end (or at failure)
    last_vibration: np.ndarray
    last_eta: np.ndarray  # (n,) total log hazard ratio in force at the end
    failures: dict  # position, day, mode, recorded (bool)
    replacements: dict  # position, day
    readings: dict  # position, day, hours, vibration


def _next_grid(t, records_start, phase):
    step = READING_INTERVAL_DAYS
    return records_start + phase + step * (np.floor_divide(t - records_start - phase, step) + 1)


def simulate_history(
    positions: Positions,
    install_day: np.ndarray,
    decommission_day: np.ndarray,
    records_start: int,
    effects: str,
    rng: np.random.Generator,
    replacement_delay_days: int = 5,
) -> FleetHistory:
    """Run every position from its first install to ``min(decommission, as_of)``.

    Vectorised over positions; each pass advances every active position by one
    stretch of constant duty (to its next reading, to records start, or to its
    end), or to a failure inside the stretch found by exact inversion. A failed
    unit is replaced like-for-like ``0..replacement_delay_days`` days later
    (renewal: the new unit starts at age 0 with new wear). Only what happens on
    or after ``records_start`` is recorded, as an export would hold it.
    """
    n = len(install_day)
    end_day = np.minimum(decommission_day, 0).astype(np.int64)
    phase = rng.integers(0, READING_INTERVAL_DAYS, n)
    static = static_log_risk(positions.maker, positions.seal, positions.hardness, effects)
    t = install_day.astype(np.int64).copy()
    life_start = t.copy()
    remaining = rng.exponential(size=n)
    v0, growth = draw_wear(n, rng)
    hours = np.full(n, np.nan)
    vibration = np.full(n, np.nan)
    eta = np.zeros(n)
    redraw = np.ones(n, dtype=bool)
    has_register = np.zeros(n, dtype=bool)
    register_install = np.zeros(n, dtype=np.int64)
    in_service = np.zeros(n, dtype=bool)
    awaiting = np.zeros(n, dtype=bool)
    failures = {"position": [], "day": [], "mode": [], "recorded": []}
    replacements = {"position": [], "day": []}
    readings = {"position": [], "day": [], "hours": [], "vibration": []}

    active = np.arange(n)
    while active.size:
        i = active
        ti = t[i]
        # a reading starts a stretch: new duty values (except at records start,
        # where the values in force are logged as the first reading)
        r = i[redraw[i]]
        if r.size:
            h, v = read_duty(positions.hours_level[r], v0[r], growth[r], (t[r] - life_start[r]).astype(float), rng)
            hours[r], vibration[r] = h, v
            eta[r] = static[r] + duty_log_risk(h, v, positions.seal[r], effects)
        newly = i[(ti >= records_start) & ~has_register[i]]
        register_install[newly] = life_start[newly]
        has_register[newly] = True
        logged = i[ti >= records_start]
        readings["position"].append(logged)
        readings["day"].append(t[logged])
        readings["hours"].append(hours[logged])
        readings["vibration"].append(vibration[logged])

        grid = _next_grid(ti, records_start, phase[i])
        bound = np.minimum(grid, end_day[i])
        bound = np.where(ti < records_start, np.minimum(bound, records_start), bound)
        a0 = (ti - life_start[i]).astype(float)
        a1 = (bound - life_start[i]).astype(float)
        increment = np.exp(eta[i]) * (baseline_cumulative_hazard(a1) - baseline_cumulative_hazard(a0))
        fails = increment >= remaining[i]

        ok = i[~fails]
        remaining[ok] -= increment[~fails]
        t[ok] = bound[~fails]
        redraw[ok] = bound[~fails] == grid[~fails]
        at_end = ok[t[ok] >= end_day[ok]]
        in_service[at_end] = end_day[at_end] == 0

        f = i[fails]
        done_failed = np.array([], dtype=np.int64)
        if f.size:
            age = failure_age(a0[fails], eta[f], remaining[f])
            age_days = np.minimum(np.maximum(np.ceil(age), 1.0), a1[fails]).astype(np.int64)
            day = life_start[f] + age_days
            recorded = has_register[f]
            failures["position"].append(f)
            failures["day"].append(day)
            failures["mode"].append(draw_failure_mode(positions.seal[f], vibration[f], rng))
            failures["recorded"].append(recorded)
            renew = day + rng.integers(0, replacement_delay_days + 1, f.size)
            renewed = renew < end_day[f]
            g = f[renewed]
            replacements["position"].append(g[recorded[renewed]])
            replacements["day"].append(renew[renewed][recorded[renewed]])
            t[g] = renew[renewed]
            life_start[g] = renew[renewed]
            remaining[g] = rng.exponential(size=g.size)
            v0[g], growth[g] = draw_wear(g.size, rng)
            redraw[g] = True
            done_failed = f[~renewed]
            awaiting[done_failed] = end_day[done_failed] == 0
        finished = np.concatenate([at_end, done_failed])
        keep = np.ones(n, dtype=bool)
        keep[finished] = False
        active = active[keep[active]]

    def cat(parts, dtype):
        return np.concatenate(parts).astype(dtype) if parts else np.array([], dtype=dtype)

    return FleetHistory(
        install_day=install_day.astype(np.int64),
        register_install_day=register_install,
        end_day=end_day,
        decommissioned=decommission_day < 0,
        phase=phase,
        in_service=in_service,
        awaiting_replacement=awaiting,
        life_start_day=life_start,
        last_hours=hours,
        last_vibration=vibration,
        last_eta=eta,
        failures={k: cat(v, bool if k == "recorded" else np.int64) for k, v in failures.items()},
        replacements={k: cat(v, np.int64) for k, v in replacements.items()},
        readings={
            "position": cat(readings["position"], np.int64),
            "day": cat(readings["day"], np.int64),
            "hours": cat(readings["hours"], float),
            "vibration": cat(readings["vibration"], float),
        },
    )


def fresh_life_survival(ages_days: np.ndarray, effects: str, n_lives: int, rng: np.random.Generator) -> np.ndarray:
    """Survival of a freshly installed unit, averaged over the fleet's covariates.

    Monte Carlo over ``n_lives`` new positions (static covariates, duty class,
    wear and reading phase drawn as in the fleet), but each life's conditional
    survival ``exp(-Lambda(t))`` is computed exactly from its duty path, which
    keeps the Monte Carlo error small (about 0.1 / sqrt(n_lives)).
    Returns shape ``ages_days.shape``.
    """
    ages = np.asarray(ages_days, dtype=float)
    flat = ages.ravel()
    max_age = float(flat.max()) if flat.size else 0.0
    pos = draw_positions(n_lives, rng)
    v0, growth = draw_wear(n_lives, rng)
    static = static_log_risk(pos.maker, pos.seal, pos.hardness, effects)
    # stretch starts: 0 (commissioning reading), then offset, offset + 91, ...
    offset = rng.integers(1, READING_INTERVAL_DAYS + 1, n_lives).astype(float)
    n_stretch = int(np.ceil(max_age / READING_INTERVAL_DAYS)) + 2
    starts = np.concatenate(
        [np.zeros((n_lives, 1)), offset[:, None] + READING_INTERVAL_DAYS * np.arange(n_stretch - 1)[None, :]], axis=1
    )
    eta = np.empty((n_lives, n_stretch))
    for j in range(n_stretch):
        h, v = read_duty(pos.hours_level, v0, growth, starts[:, j], rng)
        eta[:, j] = static + duty_log_risk(h, v, pos.seal, effects)
    h0 = baseline_cumulative_hazard(starts)
    pieces = np.exp(eta[:, :-1]) * (h0[:, 1:] - h0[:, :-1])
    cum_at_start = np.concatenate([np.zeros((n_lives, 1)), np.cumsum(pieces, axis=1)], axis=1)
    rows = np.arange(n_lives)
    out = np.empty(flat.size)
    for q, age in enumerate(flat):
        j = np.where(age <= offset, 0, 1 + np.floor((age - offset) / READING_INTERVAL_DAYS)).astype(np.int64)
        j = np.minimum(j, n_stretch - 1)
        lam = cum_at_start[rows, j] + np.exp(eta[rows, j]) * (
            baseline_cumulative_hazard(np.full(n_lives, age)) - h0[rows, j]
        )
        out[q] = np.mean(np.exp(-lam))
    return out.reshape(ages.shape)
