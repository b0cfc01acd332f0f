"""Fleet curves for the report: smoothed hazard rate (product-limit survival comes from
:mod:`wearcast._product_limit`).

Pure functions on arrays of life-table rows. Ages are days. A row is at risk
at age ``t`` when ``entry < t <= exit`` (delayed entry), as everywhere in
wearcast, so a unit installed before records began only counts from the age
it entered the records.
"""

from __future__ import annotations

import numpy as np

from wearcast._product_limit import at_risk_counts
from wearcast.models._hazard import breslow_cumulative_hazard

_Z95 = 1.959963984540054


def epanechnikov(u: np.ndarray) -> np.ndarray:
    """Epanechnikov kernel ``0.75 (1 - u^2)`` on ``|u| < 1``, zero elsewhere."""
    u = np.asarray(u, float)
    return np.where(np.abs(u) < 1.0, 0.75 * (1.0 - u * u), 0.0)


def _kernel_mass_above(lower: float, grid: np.ndarray, bandwidth: float) -> np.ndarray:
    """Share of the kernel centred at each grid age that lies above ``lower``."""
    # integral of 0.75(1-u^2) from a to 1, a = (lower - t) / b clipped to [-1, 1]
    a = np.clip((lower - np.asarray(grid, float)) / bandwidth, -1.0, 1.0)
    return 0.75 * ((1.0 - a) - (1.0 - a ** 3) / 3.0)


def smoothed_hazard(entry, exit, event, grid, bandwidth: float,
                    *, boundary: float | None = 0.0) -> dict[str, np.ndarray]:
    """Kernel-smoothed Nelson–Aalen hazard rate (failures per day) on ``grid``.

    ``h(t) = (1/b) sum_j K((t - t_j)/b) dH_j`` with the Epanechnikov kernel,
    ``dH_j = d_j / n_j`` the Nelson–Aalen increments with delayed entry. Near
    ``boundary`` (age 0 by default) the kernel is renormalised to its mass
    above the boundary, so the rate is not halved at young ages where infant
    mortality shows; pass ``boundary=None`` for the plain estimator.

    Returns arrays of shape (m,): ``age``, ``rate``, ``low``, ``high``
    (pointwise 95 % band from ``var = (1/b^2) sum K^2 d/n^2``, floored at 0).
    """
    if not bandwidth > 0:
        raise ValueError(f"bandwidth must be positive days, got {bandwidth!r}")
    entry = np.asarray(entry, float)
    exit = np.asarray(exit, float)
    event = np.asarray(event, bool)
    grid = np.asarray(grid, float)
    ages, cumhaz = breslow_cumulative_hazard(entry, exit, event)
    if len(ages) == 0:
        zeros = np.zeros_like(grid)
        return {"age": grid, "rate": zeros, "low": zeros, "high": zeros}
    d_hazard = np.diff(np.concatenate([[0.0], cumhaz]))
    at_risk = at_risk_counts(entry, exit, ages).astype(float)
    weights = epanechnikov((grid[:, None] - ages[None, :]) / bandwidth) / bandwidth
    mass = np.ones_like(grid) if boundary is None else _kernel_mass_above(boundary, grid, bandwidth)
    mass = np.maximum(mass, 1e-12)
    rate = weights @ d_hazard / mass
    with np.errstate(divide="ignore", invalid="ignore"):
        var_terms = np.where(at_risk > 0, d_hazard / at_risk, 0.0)  # d/n^2 = dH/n
    variance = (weights ** 2) @ var_terms / mass ** 2
    half = _Z95 * np.sqrt(variance)
    return {"age": grid, "rate": rate, "low": np.maximum(rate - half, 0.0), "high": rate + half}


def default_bandwidth(exit, event) -> float:
    """A readable smoothing window in days: a tenth of the span of failure ages.

    Common practice for a first look (no optimal-bandwidth claim); at least one day.
    """
    failed_ages = np.asarray(exit, float)[np.asarray(event, bool)]
    if len(failed_ages) < 2:
        return 1.0
    span = float(np.quantile(failed_ages, 0.95) - np.min(failed_ages))
    return max(span / 10.0, 1.0)


def hazard_shape(curve: dict[str, np.ndarray]) -> tuple[str, str]:
    """A cautious reading of a smoothed hazard curve: ``(phase, sentence)``.

    Compares the rate in the youngest fifth, the middle and the oldest fifth of
    the grid. ``phase`` is one of ``"falling"``, ``"rising"``, ``"bathtub"``,
    ``"flat"`` or ``"unclear"``; a shape is called only when two of the rates
    differ by half or more, and the sentence says when their 95 % bands overlap.
    """
    rate, low, high = curve["rate"], curve["low"], curve["high"]
    m = len(rate)
    if m < 5 or not np.any(rate > 0):
        return "unclear", "Too few failures to read a shape from the hazard curve."
    parts = [slice(0, max(m // 5, 1)), slice(2 * m // 5, max(3 * m // 5, 2 * m // 5 + 1)),
             slice(m - max(m // 5, 1), m)]
    early, middle, late = (float(np.mean(rate[p])) for p in parts)
    lo = [float(np.mean(low[p])) for p in parts]
    hi = [float(np.mean(high[p])) for p in parts]
    # a shape is called when one part differs from the middle by half or more, or the
    # young part is well below the middle and the old part no lower (a steady rise)
    falls_late = early > 1.5 * middle
    rises_late = late > 1.5 * middle
    falls = falls_late or (middle > 1.5 * late and early >= middle)
    rises = rises_late or (middle > 1.5 * early and late >= middle)
    sure_fall = (falls_late and lo[0] > hi[1]) or (lo[1] > hi[2] and early >= middle)
    sure_rise = (rises_late and lo[2] > hi[1]) or (lo[1] > hi[0] and late >= middle)
    if falls and rises:
        phase, text = "bathtub", ("higher at young and old ages than in mid-life (a bathtub shape: "
                                  "early failures, then a random phase, then wear-out)")
        sure = sure_fall and sure_rise
    elif falls:
        phase, text = "falling", "falling with age (early-life failures, sometimes called infant mortality)"
        sure = sure_fall
    elif rises:
        phase, text = "rising", "rising with age (a wear-out pattern)"
        sure = sure_rise
    else:
        phase, text = "flat", "roughly flat with age (failures look random with respect to age)"
        sure = True
    hedge = ("" if sure else " The uncertainty bands overlap, so this is a weak hint only.")
    return phase, f"The smoothed hazard rate looks {text}.{hedge}"
