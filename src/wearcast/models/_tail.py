"""A power-law tail for cumulative hazards past the oldest failure on record (pure functions).

Breslow's and Nelson–Aalen's estimators put hazard only on observed failure
ages, so they stop rising after the oldest recorded failure: a unit older than
every failure on record would read P(fail) = 0 at every horizon, and a window
that reaches past that age would lose the part beyond it. Past that age (the
*anchor*) wearcast continues the cumulative hazard with a power law

    H(a) = H(anchor) + rate * ((a / anchor) ** shape - 1)        a > anchor,

a Weibull-shaped hazard fitted by maximum likelihood, with delayed entry, to
the upper part of the records: the rows' time at risk after ``from_age`` and
the failures after it, ``from_age`` being chosen so that part holds the last
``max(TAIL_MIN_FAILURES, TAIL_SHARE * failures)`` failures (all of them in a
small fleet). Each row carries its relative risk ``r_i = exp(eta_i)`` (a
Cox or boosted score) and case weight ``w_i``; with all ``r_i = 1`` it is the
two-parameter Weibull fit with delayed entry restricted to ages above
``from_age``.

With ages scaled by the anchor (``b = age / anchor``) the log-likelihood is

    l(shape, rate) = sum_fail w (log shape + log rate + (shape - 1) log b + eta)
                     - rate * S(shape),   S(shape) = sum w r (B ** shape - A ** shape)

(``A``, ``B`` the row's scaled entry and exit clipped to ``from_age``), so
``rate = D / S(shape)`` for the weighted failures ``D`` and ``shape`` is the
maximiser of the profile ``D log shape + (shape - 1) sum w log b - D log S``.
The refits re-estimate the tail on every resampled history, so its sampling
uncertainty is part of the refit intervals.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize_scalar

#: The tail is fitted on at least this many of the oldest failures (all when fewer).
TAIL_MIN_FAILURES = 20
#: ... and on at least this share of the failures (the older half: a third gave shapes
#: 1.8-2.5 on simulated fleets whose true shape is 2, half 1.6-2.3).
TAIL_SHARE = 0.5
#: Shapes searched; outside them a tail fitted on few failures is not believable.
SHAPE_BOUNDS = (0.2, 10.0)
#: Below this many failures in the fitted part, the shape is fixed at 1 (a constant hazard).
MIN_FAILURES_FOR_SHAPE = 3
#: The curve takes over from the step estimate at the age of this many-th oldest failure:
#: among the last few failures few units are at risk, so each one moves the step a lot.
SPARSE_END_FAILURES = 10


@dataclass(frozen=True)
class PowerTail:
    """``H(a) - H(anchor) = rate * ((a / anchor) ** shape - 1)`` for ages ``a > anchor`` (days).

    ``from_age``: the records above this age were used for the fit;
    ``failures``: the (weighted) failures they held.
    """

    anchor: float
    shape: float
    rate: float
    from_age: float
    failures: float

    @property
    def active(self) -> bool:
        """False for :data:`NO_TAIL` (no failures to fit): the step estimate is used everywhere."""
        return self.anchor > 0 and self.rate > 0

    def increment(self, ages) -> np.ndarray:
        """Cumulative hazard added past the anchor: 0 at or before it; same shape as ``ages``."""
        ages = np.asarray(ages, float)
        if not self.active:
            return np.zeros(ages.shape)
        scaled = np.maximum(ages, self.anchor) / self.anchor
        with np.errstate(over="ignore"):
            return self.rate * np.expm1(self.shape * np.log(scaled))

    def to_dict(self) -> dict:
        return {"anchor_days": self.anchor, "shape": self.shape, "rate": self.rate,
                "from_age_days": self.from_age, "failures": self.failures}

    @classmethod
    def from_dict(cls, data: dict) -> "PowerTail":
        tail = cls(float(data["anchor_days"]), float(data["shape"]), float(data["rate"]),
                   float(data["from_age_days"]), float(data["failures"]))
        if not (tail.anchor >= 0 and tail.shape > 0 and tail.rate >= 0 and np.isfinite([tail.shape, tail.rate]).all()):
            raise ValueError(f"damaged tail {data!r}")
        return tail


NO_TAIL = PowerTail(0.0, 1.0, 0.0, 0.0, 0.0)


def tail_start(failure_ages: np.ndarray, min_failures: int = TAIL_MIN_FAILURES, share: float = TAIL_SHARE) -> float:
    """The age above which the tail is fitted: the records after it hold the last
    ``max(min_failures, ceil(share * n))`` of the ``n`` failure ages (0 when that is all)."""
    ages = np.sort(np.asarray(failure_ages, float))
    keep = max(int(min_failures), int(np.ceil(share * ages.size)))
    if keep >= ages.size:
        return 0.0
    return float(ages[ages.size - keep - 1])


def sparse_end(failure_ages: np.ndarray, n_last: int = SPARSE_END_FAILURES) -> float:
    """The age of the ``n_last``-th oldest failure (the youngest one when there are fewer)."""
    ages = np.sort(np.asarray(failure_ages, float))
    return float(ages[max(ages.size - n_last, 0)])


def fit_power_tail(
    entry: np.ndarray,
    exit: np.ndarray,
    event: np.ndarray,
    eta: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    *,
    anchor: float | None = None,
    min_failures: int = TAIL_MIN_FAILURES,
    share: float = TAIL_SHARE,
) -> PowerTail:
    """Fit the tail to rows (``entry``/``exit`` days, ``event`` bool, log risk
    ``eta`` and case ``weights``, all shape (n,)). ``anchor``, the age from
    which the curve replaces the step estimate, defaults to the age of the
    :data:`SPARSE_END_FAILURES`-th oldest failure (the youngest one in a fleet
    with fewer). Returns :data:`NO_TAIL` without failures."""
    entry = np.asarray(entry, float).ravel()
    exit = np.asarray(exit, float).ravel()
    event = np.asarray(event, bool).ravel()
    n = exit.size
    eta = np.zeros(n) if eta is None else np.asarray(eta, float).ravel()
    weights = np.ones(n) if weights is None else np.asarray(weights, float).ravel()
    failed = event & (weights > 0)
    if not failed.any():
        return NO_TAIL
    anchor = sparse_end(exit[failed]) if anchor is None else float(anchor)
    from_age = tail_start(exit[failed], min_failures, share)
    rows = (exit > from_age) & (weights > 0)
    b = exit[rows] / anchor
    a = np.maximum(entry[rows], from_age) / anchor
    wr = weights[rows] * np.exp(eta[rows] - eta[rows].max())  # shifted: undone on the rate
    fail = failed[rows]
    w_fail = weights[rows][fail]
    deaths = float(w_fail.sum())
    sum_log_b = float(np.sum(w_fail * np.log(b[fail])))
    log_b, log_a = np.log(b), np.log(np.where(a > 0, a, 1.0))

    def exposure(shape: float) -> float:
        with np.errstate(over="ignore"):
            return float(np.sum(wr * (np.exp(shape * log_b) - np.where(a > 0, np.exp(shape * log_a), 0.0))))

    def negative_profile(log_shape: float) -> float:
        shape = np.exp(log_shape)
        s = exposure(shape)
        if not (np.isfinite(s) and s > 0):
            return np.inf
        return -(deaths * log_shape + (shape - 1.0) * sum_log_b - deaths * np.log(s))

    if int(fail.sum()) >= MIN_FAILURES_FOR_SHAPE:
        found = minimize_scalar(negative_profile, bounds=tuple(np.log(SHAPE_BOUNDS)), method="bounded",
                                options={"xatol": 1e-9})
        shape = float(np.exp(found.x))
    else:
        shape = 1.0
    rate = deaths / exposure(shape) * np.exp(-eta[rows].max())
    return PowerTail(anchor, shape, float(rate), from_age, deaths)
