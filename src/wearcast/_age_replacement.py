"""Age replacement under a Weibull life: the long-run cost per day of replacing at age T.

Pure functions. A unit is replaced at failure (cost ``c_f``) or, if it reaches
age ``T`` without failing, by plan (cost ``c_p``); each replacement starts a new
life. By the renewal-reward theorem the long-run cost per unit of time is

    C(T) = (c_p R(T) + c_f (1 - R(T))) / integral_0^T R(t) dt

(Barlow and Proschan 1965, *Mathematical Theory of Reliability*, ch. 4).
Running to failure costs ``c_f / MTTF``. With ``R(t) = exp(-(t / scale) ** shape)``
the integral is ``scale / shape * lower_gamma(1 / shape, (T / scale) ** shape)``.
A finite best age exists only when the failure rate rises (shape > 1) and a
failure costs more than a planned replacement; at the optimum
``h(T) integral_0^T R - (1 - R(T)) = c_p / (c_f - c_p)``.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize_scalar
from scipy.special import gamma, gammainc


def weibull_survival(t, shape: float, scale: float) -> np.ndarray:
    return np.exp(-(np.asarray(t, float) / scale) ** shape)


def mean_life_to(t, shape: float, scale: float) -> np.ndarray:
    """``integral_0^T R(u) du`` for each ``T`` in ``t`` (days)."""
    a = 1.0 / shape
    return scale * a * gamma(a) * gammainc(a, (np.asarray(t, float) / scale) ** shape)


def cost_rate(t, shape: float, scale: float, cost_planned: float, cost_failure: float) -> np.ndarray:
    """Long-run cost per day of replacing at age ``t`` (or at failure, whichever comes first)."""
    r = weibull_survival(t, shape, scale)
    return (cost_planned * r + cost_failure * (1.0 - r)) / mean_life_to(t, shape, scale)


def run_to_failure_rate(shape: float, scale: float, cost_failure: float) -> float:
    """Cost per day with no planned replacement: ``c_f / MTTF``, ``MTTF = scale * Gamma(1 + 1/shape)``."""
    return cost_failure / (scale * gamma(1.0 + 1.0 / shape))


def best_replacement_age(shape: float, scale: float, cost_planned: float, cost_failure: float,
                         *, near: float = 0.05) -> dict:
    """The age that minimises :func:`cost_rate`, and how flat the minimum is.

    Returns ``age`` (days; NaN when running to failure is cheapest), ``cost_rate``
    at that age, ``run_to_failure_rate``, ``saving`` (share of the run-to-failure
    cost saved), and ``age_low``/``age_high``: the ages whose cost per day is within
    ``near`` (5 %) of the best, so a plan can fit other work without losing much.
    """
    if not (shape > 0 and scale > 0 and cost_planned > 0 and cost_failure > 0):
        raise ValueError("shape, scale and both costs must be positive")
    rtf = run_to_failure_rate(shape, scale, cost_failure)
    nan = float("nan")
    out = {"age": nan, "cost_rate": rtf, "run_to_failure_rate": rtf, "saving": 0.0, "age_low": nan, "age_high": nan}
    if shape <= 1.0 or cost_failure <= cost_planned:
        return out
    f = lambda x: float(cost_rate(scale * np.exp(x), shape, scale, cost_planned, cost_failure))  # noqa: E731
    grid = np.linspace(np.log(1e-4), np.log(20.0), 400)  # log(age / scale)
    values = cost_rate(scale * np.exp(grid), shape, scale, cost_planned, cost_failure)
    i = int(np.argmin(values))
    if i == len(grid) - 1 or values[i] >= rtf * (1.0 - 1e-9):
        return out  # keeps falling toward old ages, or never beats running to failure
    found = minimize_scalar(f, bounds=(grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]), method="bounded",
                            options={"xatol": 1e-10})
    best_x = float(found.x) if f(float(found.x)) <= values[i] else float(grid[i])
    best = f(best_x)
    if not best < rtf:
        return out
    ok = grid[values <= best * (1.0 + near)]
    return {"age": float(scale * np.exp(best_x)), "cost_rate": best, "run_to_failure_rate": rtf,
            "saving": 1.0 - best / rtf, "age_low": float(scale * np.exp(ok.min())),
            "age_high": float(scale * np.exp(ok.max()))}
