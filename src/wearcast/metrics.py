"""Survival metrics: concordance, time-dependent AUC, Brier score, horizon calibration.

All functions take plain arrays (ages in **days**) so they can be used on any
model's output. Where scikit-survival has the estimator (Harrell's C, Uno's C,
cumulative/dynamic AUC, integrated Brier score) wearcast wraps it; the
concordance with delayed entry and the horizon calibration are wearcast's own.

What is scored: one row per *episode*, see :func:`wearcast.validation.score_episodes`
(``entry`` = the episode's first entry age, ``exit`` = its last exit age,
``event`` = whether it ended in a failure, covariates of its last row).

Caution: the IPCW estimators from scikit-survival (Uno's C, AUC, Brier score)
take exit ages only and assume no delayed entry; :data:`IPCW_ENTRY_NOTE` says
so and every output that carries them prints it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Mapping

import numpy as np
import pandas as pd

from wearcast._metrics_calibration import equal_count_groups, failure_share_within, weighted_line
from wearcast._metrics_concordance import truncated_concordance_counts

#: Printed beside every IPCW-based number (Uno's C, AUC, integrated Brier score).
IPCW_ENTRY_NOTE = (
    "Uno's C, time-dependent AUC and the integrated Brier score are scikit-survival's "
    "inverse-probability-of-censoring estimators: they use exit ages only and assume no "
    "delayed entry, so with late-entering units they are approximate; the truncation-aware "
    "C accounts for delayed entry."
)

_Z95 = 1.959963984540054


@dataclass(frozen=True)
class Concordance:
    """A concordance index and the pair counts behind it."""

    c: float
    concordant: int
    discordant: int
    tied_risk: int
    comparable: int


@dataclass(frozen=True)
class UnoConcordance:
    """Uno's IPCW concordance, restricted to failures before ``tau_days``."""

    c: float
    tau_days: float


@dataclass(frozen=True)
class HorizonCalibration:
    """Predicted against observed failures within ``horizon_days``.

    ``groups``: one row per risk group with columns ``group``, ``units``,
    ``predicted`` (mean predicted probability), ``observed`` (1 - delayed-entry
    KM at the horizon), ``failures`` (raw count within the horizon).
    ``expected`` = Σp with a normal interval from the Poisson-binomial variance
    Σp(1-p); ``observed`` = Σ over groups of units × observed share (censoring
    taken into account); ``observed_raw`` = failures seen within the horizon.
    ``slope``/``intercept``: weighted least-squares line of observed on predicted
    shares across groups (weights = units); a calibrated model gives 1 and 0.
    """

    horizon_days: float
    groups: pd.DataFrame
    expected: float
    expected_low: float
    expected_high: float
    observed: float
    observed_raw: int
    slope: float
    intercept: float
    units: int

    def as_dict(self) -> dict:
        return {
            "horizon_days": self.horizon_days,
            "expected": self.expected,
            "expected_low": self.expected_low,
            "expected_high": self.expected_high,
            "observed": self.observed,
            "observed_raw": self.observed_raw,
            "slope": self.slope,
            "intercept": self.intercept,
            "units": self.units,
            "groups": self.groups.to_dict(orient="records"),
        }


@dataclass(frozen=True)
class Interval:
    """A point estimate with a percentile bootstrap interval over resampled units."""

    estimate: float
    low: float
    high: float
    resamples: int  # resamples that gave a finite value
    draws: np.ndarray = field(repr=False, compare=False, default_factory=lambda: np.zeros(0))


# -- concordance ---------------------------------------------------------------
def harrell_c(exit: np.ndarray, event: np.ndarray, risk: np.ndarray) -> Concordance:
    """Harrell's C (scikit-survival ``concordance_index_censored``), ignoring entry ages.

    Arrays of shape (n,): ``exit`` ages in days, ``event`` bool, ``risk`` (higher
    = fails sooner). ``comparable`` counts all comparable pairs. Returns C = NaN
    when no pair is comparable (no failures).
    """
    from sksurv.exceptions import NoComparablePairException
    from sksurv.metrics import concordance_index_censored

    exit, event, risk = _arrays(exit, event, risk)
    if not event.any():
        return Concordance(float("nan"), 0, 0, 0, 0)
    try:
        c, con, dis, tied, _ = concordance_index_censored(event, exit, risk)
    except NoComparablePairException:
        return Concordance(float("nan"), 0, 0, 0, 0)
    return Concordance(float(c), int(con), int(dis), int(tied), int(con + dis + tied))


def truncation_aware_c(entry: np.ndarray, exit: np.ndarray, event: np.ndarray, risk: np.ndarray) -> Concordance:
    """Concordance with delayed entry: ``j`` is compared with a failure at ``t_i`` only
    if ``j`` was under observation then (``entry_j < t_i <= exit_j``, not failing at ``t_i``).

    Equal to Harrell's C when every entry age is 0 (risks tied only when exactly
    equal; scikit-survival uses a 1e-8 tolerance). O(n log² n); 50,000 rows take
    well under a second.
    """
    entry = np.asarray(entry, float)
    exit, event, risk = _arrays(exit, event, risk)
    out = truncated_concordance_counts(entry, exit, event, risk)
    return Concordance(out["c"], out["concordant"], out["discordant"], out["tied_risk"], out["comparable"])


def time_dependent_c(entry: np.ndarray, exit: np.ndarray, event: np.ndarray, risk: np.ndarray) -> Concordance:
    """Time-dependent, truncation-aware concordance on start/stop rows.

    Arrays of shape (n_rows,), one entry per row of a life table (not per
    life): ``entry``/``exit`` the row's ages in days, ``event`` whether the
    row ends in a failure, ``risk`` the model's score of *that row's*
    covariates (the readings in force over ``(entry, exit]``). Each failure at
    age ``t`` is compared with every other life under observation at ``t``,
    through the one row of that life in force at ``t`` (``entry < t <= exit``),
    so every unit is judged on the readings it had when the failure happened,
    never on later ones. A life's rows must not overlap (the life table
    guarantees it).

    This is the truncation-aware count applied to rows: with one row per life
    it equals :func:`truncation_aware_c` on the lives (and Harrell's C when
    nobody enters late).
    """
    return truncation_aware_c(entry, exit, event, risk)


def choose_tau(
    train_exit: np.ndarray,
    train_event: np.ndarray,
    test_exit: np.ndarray,
    *,
    quantile: float = 0.9,
    min_censoring_survival: float = 0.1,
) -> float:
    """Truncation age τ (days) for Uno's C: the ``quantile`` of the test exit ages,
    lowered if needed to the last training age where the censoring
    Kaplan–Meier estimate is still above ``min_censoring_survival``.

    Weights ``1/G(t)²`` explode where ``G`` is near zero; staying below that age
    keeps the estimate stable. Returned as a whole number of days.
    """
    from sksurv.nonparametric import kaplan_meier_estimator

    train_exit, train_event = np.asarray(train_exit, float), np.asarray(train_event, bool)
    tau = float(np.quantile(np.asarray(test_exit, float), quantile))
    times, cens_surv = kaplan_meier_estimator(~train_event, train_exit)
    ok = times[cens_surv > min_censoring_survival]
    if len(ok):
        tau = min(tau, float(ok.max()))
    return float(np.floor(tau))


def uno_c(
    train_exit: np.ndarray,
    train_event: np.ndarray,
    test_exit: np.ndarray,
    test_event: np.ndarray,
    risk: np.ndarray,
    tau: float | None = None,
) -> UnoConcordance:
    """Uno's C (scikit-survival ``concordance_index_ipcw``) up to age ``tau`` days.

    The censoring distribution is estimated on the training arrays. ``tau=None``
    picks it with :func:`choose_tau`; the chosen value is returned so outputs
    can print it. Ignores entry ages (see :data:`IPCW_ENTRY_NOTE`).
    """
    from sksurv.exceptions import NoComparablePairException
    from sksurv.metrics import concordance_index_ipcw

    test_exit, test_event, risk = _arrays(test_exit, test_event, risk)
    train_exit, train_event = np.asarray(train_exit, float), np.asarray(train_event, bool)
    if tau is None:
        tau = choose_tau(train_exit, train_event, test_exit)
    tau = float(tau)
    if not (test_event & (test_exit < tau)).any():
        return UnoConcordance(float("nan"), tau)
    try:
        c = concordance_index_ipcw(_surv(train_event, train_exit), _surv(test_event, test_exit), risk, tau=tau)[0]
    except (NoComparablePairException, ValueError):
        c = float("nan")
    return UnoConcordance(float(c), tau)


def time_dependent_auc(
    train_exit: np.ndarray,
    train_event: np.ndarray,
    test_exit: np.ndarray,
    test_event: np.ndarray,
    risk: np.ndarray,
    horizons_days,
) -> dict[float, float]:
    """Cumulative/dynamic AUC at each age in ``horizons_days`` (scikit-survival
    ``cumulative_dynamic_auc``): failures by age t against units still working at t.

    Returns ``{age: auc}``; NaN for ages outside the test follow-up
    ``[min exit, max exit)`` or without failures before them. Ignores entry ages.
    """
    from sksurv.metrics import cumulative_dynamic_auc

    test_exit, test_event, risk = _arrays(test_exit, test_event, risk)
    train_exit, train_event = np.asarray(train_exit, float), np.asarray(train_event, bool)
    lo, hi = test_exit.min(initial=np.inf), test_exit.max(initial=-np.inf)
    train_max = train_exit.max(initial=-np.inf)
    wanted = [float(h) for h in horizons_days]
    out = {h: float("nan") for h in wanted}
    usable = [h for h in wanted
              if lo <= h < hi and h < train_max and (test_event & (test_exit <= h)).any() and (test_exit > h).any()]
    if not usable:
        return out
    test_exit, test_event = _end_follow_up(test_exit, test_event, max(usable))
    times = np.unique(usable)
    try:
        auc, _ = cumulative_dynamic_auc(_surv(train_event, train_exit), _surv(test_event, test_exit), risk, times)
    except ValueError:
        return out
    for t, value in zip(times, np.atleast_1d(auc)):
        out[float(t)] = float(value)
    return out


def integrated_brier(
    train_exit: np.ndarray,
    train_event: np.ndarray,
    test_exit: np.ndarray,
    test_event: np.ndarray,
    survival: np.ndarray,
    times_days: np.ndarray,
) -> float:
    """Integrated Brier score (scikit-survival ``integrated_brier_score``); lower is better.

    ``survival``: predicted S(t | x) from age 0, shape (n_test, m), on the grid
    ``times_days`` (m,). Grid points outside the test follow-up are dropped;
    needs at least two left. The IPCW weights assume no delayed entry
    (:data:`IPCW_ENTRY_NOTE`): with late-entering units the score is approximate.
    """
    from sksurv.metrics import integrated_brier_score

    test_exit, test_event = np.asarray(test_exit, float), np.asarray(test_event, bool)
    train_exit, train_event = np.asarray(train_exit, float), np.asarray(train_event, bool)
    survival = np.asarray(survival, float)
    times_days = np.asarray(times_days, float)
    keep = (times_days >= test_exit.min(initial=np.inf)) & (times_days < test_exit.max(initial=-np.inf))
    keep &= times_days < train_exit.max(initial=-np.inf)
    if keep.sum() < 2:
        return float("nan")
    test_exit, test_event = _end_follow_up(test_exit, test_event, float(times_days[keep].max()))
    try:
        return float(
            integrated_brier_score(
                _surv(train_event, train_exit), _surv(test_event, test_exit), survival[:, keep], times_days[keep]
            )
        )
    except ValueError:
        return float("nan")


# -- calibration ----------------------------------------------------------------
def horizon_calibration(
    entry: np.ndarray,
    exit: np.ndarray,
    event: np.ndarray,
    predicted_prob: np.ndarray,
    horizon_days: float,
    start_age: np.ndarray,
    groups: int = 10,
) -> HorizonCalibration:
    """Predicted vs observed failures within ``horizon_days`` after ``start_age``.

    Row i: a unit known to be working at ``start_age[i]`` (days) with predicted
    ``predicted_prob[i]`` = P(fail in (start, start + h]); its follow-up is the
    interval (``entry``, ``exit``] of ages with ``event`` = ended in a failure.
    Units are split into ``groups`` equal-count groups by predicted probability
    (deciles by default); in each the observed share is one minus the
    delayed-entry Kaplan–Meier estimate at ``h`` on the scale "days since
    start_age", so units suspended before ``h`` count for the time they were seen.
    """
    entry = np.asarray(entry, float)
    exit, event, p = _arrays(exit, event, predicted_prob)
    start = np.broadcast_to(np.asarray(start_age, float), exit.shape)
    h = float(horizon_days)
    rel_entry = np.maximum(entry - start, 0.0)
    rel_exit = exit - start
    failed_within = event & (rel_exit > 0) & (rel_exit <= h)
    labels = equal_count_groups(p, groups)
    rows = []
    for g in np.unique(labels):
        m = labels == g
        rows.append(
            {
                "group": int(g) + 1,
                "units": int(m.sum()),
                "predicted": float(p[m].mean()),
                "observed": failure_share_within(rel_entry[m], rel_exit[m], event[m], h),
                "failures": int(failed_within[m].sum()),
            }
        )
    table = pd.DataFrame(rows, columns=["group", "units", "predicted", "observed", "failures"])
    expected = float(p.sum())
    sd = float(np.sqrt(np.sum(p * (1.0 - p))))
    observed = float(np.nansum(table["units"] * table["observed"])) if len(table) else 0.0
    intercept, slope = weighted_line(table["predicted"], table["observed"], table["units"])
    return HorizonCalibration(
        horizon_days=h,
        groups=table,
        expected=expected,
        expected_low=max(0.0, expected - _Z95 * sd),
        expected_high=expected + _Z95 * sd,
        observed=observed,
        observed_raw=int(failed_within.sum()),
        slope=slope,
        intercept=intercept,
        units=int(len(p)),
    )


def expected_count_interval(predicted_prob: np.ndarray, level: float = 0.95) -> tuple[float, float, float]:
    """Expected number of failures Σp and a normal interval from the
    Poisson-binomial variance Σp(1-p); returns ``(expected, low, high)``."""
    from scipy.stats import norm

    p = np.asarray(predicted_prob, float)
    z = float(norm.ppf(0.5 + level / 2))
    expected = float(p.sum())
    sd = float(np.sqrt(np.sum(p * (1.0 - p))))
    return expected, max(0.0, expected - z * sd), expected + z * sd


# -- bootstrap over units ----------------------------------------------------------
def unit_resamples(groups: np.ndarray, n: int, seed: int) -> list[np.ndarray]:
    """``n`` row-index arrays, each drawing whole units with replacement.

    ``groups``: unit code per row, shape (n_rows,). All draws come from one
    generator seeded once, so two metrics or two models given the same
    ``seed`` see the same resamples (paired comparisons).
    """
    groups = np.asarray(groups)
    _, codes = np.unique(groups, return_inverse=True)
    codes = codes.ravel()
    n_units = int(codes.max()) + 1 if len(codes) else 0
    order = np.argsort(codes, kind="mergesort")
    sizes = np.bincount(codes, minlength=n_units)
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    rng = np.random.default_rng(seed)
    out = []
    for draw in rng.integers(0, n_units, size=(n, n_units)):
        lengths = sizes[draw]
        offsets = np.repeat(starts[draw] - np.concatenate([[0], np.cumsum(lengths)[:-1]]), lengths)
        out.append(order[offsets + np.arange(lengths.sum())])
    return out


def bootstrap_interval(
    metric_fn: Callable[..., float],
    data: Mapping[str, np.ndarray],
    groups: np.ndarray,
    n: int = 200,
    seed: int = 0,
    level: float = 0.95,
) -> Interval:
    """Percentile bootstrap interval of ``metric_fn(**data)`` resampling units.

    ``data``: arrays of shape (n_rows,) passed by keyword; ``groups``: unit code
    per row. Resamples where the metric is not finite are skipped and counted
    out of ``resamples``.
    """
    data = {k: np.asarray(v) for k, v in data.items()}
    estimate = float(metric_fn(**data))
    draws = np.array([float(metric_fn(**{k: v[idx] for k, v in data.items()}))
                      for idx in unit_resamples(groups, n, seed)])
    return _percentile_interval(estimate, draws, level)


def paired_difference(
    metric_fn: Callable[..., float],
    data_a: Mapping[str, np.ndarray],
    data_b: Mapping[str, np.ndarray],
    groups: np.ndarray,
    n: int = 200,
    seed: int = 0,
    level: float = 0.95,
) -> Interval:
    """Bootstrap interval of ``metric(a) - metric(b)`` on the same unit resamples.

    ``data_a`` and ``data_b`` hold the two models' arrays for the same rows.
    """
    data_a = {k: np.asarray(v) for k, v in data_a.items()}
    data_b = {k: np.asarray(v) for k, v in data_b.items()}
    estimate = float(metric_fn(**data_a)) - float(metric_fn(**data_b))
    draws = []
    for idx in unit_resamples(groups, n, seed):
        a = float(metric_fn(**{k: v[idx] for k, v in data_a.items()}))
        b = float(metric_fn(**{k: v[idx] for k, v in data_b.items()}))
        draws.append(a - b)
    return _percentile_interval(estimate, np.array(draws), level)


def percentile_interval(estimate: float, draws: np.ndarray, level: float = 0.95) -> Interval:
    """Percentile interval of finite bootstrap ``draws`` around ``estimate``."""
    return _percentile_interval(estimate, np.asarray(draws, float), level)


def _percentile_interval(estimate: float, draws: np.ndarray, level: float) -> Interval:
    finite = draws[np.isfinite(draws)]
    if len(finite) == 0:
        return Interval(estimate, float("nan"), float("nan"), 0, draws)
    alpha = (1.0 - level) / 2
    low, high = np.quantile(finite, [alpha, 1.0 - alpha])
    return Interval(estimate, float(low), float(high), int(len(finite)), draws)


# -- helpers ----------------------------------------------------------------------
def _arrays(exit, event, values):
    exit = np.asarray(exit, float)
    event = np.asarray(event, bool)
    values = np.asarray(values, float)
    if not (exit.shape == event.shape == values.shape) or exit.ndim != 1:
        raise ValueError(
            f"exit, event and scores must be 1-D arrays of the same length; got shapes "
            f"{exit.shape}, {event.shape}, {values.shape}"
        )
    return exit, event, values


def _end_follow_up(exit: np.ndarray, event: np.ndarray, last: float) -> tuple[np.ndarray, np.ndarray]:
    """Suspend everyone still running just after ``last`` days.

    Metrics evaluated at ages up to ``last`` do not depend on what happens
    later, but scikit-survival computes censoring weights for every failure and
    stops when the censoring survival is 0 beyond the training follow-up.
    """
    cut = last + 1e-6 * max(1.0, abs(last))
    late = exit > cut
    return np.where(late, cut, exit), event & ~late


def _surv(event: np.ndarray, exit: np.ndarray) -> np.ndarray:
    from sksurv.util import Surv

    return Surv.from_arrays(event=np.asarray(event, bool), time=np.asarray(exit, float))
