"""Two-parameter Weibull fit by maximum likelihood with delayed entry and suspensions.

Pure functions on arrays of life-table rows (ages in days): a row entered at
age ``a`` and left at ``t``, failed or not. ``S(t) = exp(-(t / scale) ** shape)``
(lifelines' ``WeibullFitter`` writes ``lambda_`` for the scale and ``rho_``
for the shape). Each row contributes ``log h(t)`` if it failed, minus the
cumulative hazard between ``a`` and ``t``, so a life split into several rows
(readings) gives the same likelihood as the whole life.

The fit works on ``u = log scale`` and ``v = log shape`` with Newton steps on
the exact gradient and Hessian. With ``k = shape``, ``L = log t - u`` and
``L0 = log a - u`` (the ``a`` terms vanish when ``a = 0``):

    l  = sum d (v + k L - log t) - exp(k L) + exp(k L0)
"""

from __future__ import annotations

import numpy as np
from scipy.stats import norm


def _terms(entry, exit, u: float, v: float):
    k = np.exp(v)
    L = np.log(exit) - u
    late = entry > 0
    L0 = np.where(late, np.log(np.where(late, entry, 1.0)) - u, 0.0)
    e = np.exp(k * L)
    e0 = np.where(late, np.exp(k * L0), 0.0)
    return k, L, L0, e, e0


def weibull_loglik(entry, exit, event, u: float, v: float) -> float:
    """Log-likelihood at ``u = log scale``, ``v = log shape``."""
    entry, exit, event = _arrays(entry, exit, event)
    with np.errstate(over="ignore", invalid="ignore"):  # a far trial step overflows; the line search rejects it
        k, L, L0, e, e0 = _terms(entry, exit, u, v)
        return float(np.sum(event * (v + k * L - np.log(exit)) - e + e0))


def weibull_score_hessian(entry, exit, event, u: float, v: float) -> tuple[np.ndarray, np.ndarray]:
    """Gradient (2,) and Hessian (2, 2) of the log-likelihood in ``(u, v)``."""
    entry, exit, event = _arrays(entry, exit, event)
    k, L, L0, e, e0 = _terms(entry, exit, u, v)
    d = event.astype(float)
    kL, kL0 = k * L, k * L0
    g_u = np.sum(-d * k + k * e - k * e0)
    g_v = np.sum(d * (1.0 + kL) - kL * e + kL0 * e0)
    h_uu = np.sum(-k * k * e + k * k * e0)
    h_uv = np.sum(-d * k + k * e + k * kL * e - k * e0 - k * kL0 * e0)
    h_vv = np.sum(d * kL - kL * e - kL * kL * e + kL0 * e0 + kL0 * kL0 * e0)
    return np.array([g_u, g_v]), np.array([[h_uu, h_uv], [h_uv, h_vv]])


def _arrays(entry, exit, event):
    return np.asarray(entry, float), np.asarray(exit, float), np.asarray(event, bool)


def fit_weibull(entry, exit, event, *, level: float = 0.90, max_iter: int = 100, tol: float = 1e-10) -> dict:
    """Maximum-likelihood shape and scale with Wald bounds on the log scale.

    Returns ``shape``, ``scale`` (days), ``shape_low``/``shape_high``,
    ``scale_low``/``scale_high`` (two-sided at ``level``), ``se_shape``,
    ``se_scale`` (delta method from the inverse observed information) and
    ``converged``. All NaN (``converged`` False) with fewer than two failures
    or when Newton steps do not settle.
    """
    entry, exit, event = _arrays(entry, exit, event)
    nan = float("nan")
    out = {"shape": nan, "scale": nan, "shape_low": nan, "shape_high": nan, "scale_low": nan,
           "scale_high": nan, "se_shape": nan, "se_scale": nan, "converged": False}
    if event.sum() < 2 or np.any(exit <= 0):
        return out
    # start from the exponential fit (shape 1): scale = time at risk / failures
    theta = np.array([np.log(np.sum(exit - entry) / event.sum()), 0.0])
    current = weibull_loglik(entry, exit, event, *theta)
    for _ in range(max_iter):
        grad, hess = weibull_score_hessian(entry, exit, event, *theta)
        try:
            step = -np.linalg.solve(hess, grad)
        except np.linalg.LinAlgError:
            return out
        if not np.all(np.isfinite(step)) or grad @ step <= 0:  # not an ascent direction: use the gradient
            step = grad / max(np.abs(grad).max(), 1.0)
        scale_step = 1.0
        while scale_step > 1e-8:
            trial = theta + scale_step * step
            value = weibull_loglik(entry, exit, event, *trial)
            if np.isfinite(value) and value >= current - 1e-12:
                break
            scale_step /= 2.0
        else:
            return out
        theta, previous, current = trial, current, value
        if abs(current - previous) < tol * (1.0 + abs(current)) and np.abs(scale_step * step).max() < 1e-8:
            break
    else:
        return out
    grad, hess = weibull_score_hessian(entry, exit, event, *theta)
    try:
        cov = np.linalg.inv(-hess)
    except np.linalg.LinAlgError:
        return out
    if not (np.all(np.isfinite(cov)) and cov[0, 0] > 0 and cov[1, 1] > 0):
        return out
    z = float(norm.ppf(0.5 + level / 2.0))
    u, v = theta
    se_u, se_v = np.sqrt(cov[0, 0]), np.sqrt(cov[1, 1])
    scale, shape = float(np.exp(u)), float(np.exp(v))
    out.update(shape=shape, scale=scale, se_shape=shape * se_v, se_scale=scale * se_u,
               shape_low=float(np.exp(v - z * se_v)), shape_high=float(np.exp(v + z * se_v)),
               scale_low=float(np.exp(u - z * se_u)), scale_high=float(np.exp(u + z * se_u)),
               converged=True)
    return out


def probability_plot(ages, survival) -> tuple[np.ndarray, np.ndarray]:
    """Weibull probability-plot coordinates ``(log age, log(-log S))`` of the points with 0 < S < 1.

    On these axes a Weibull curve is the straight line ``shape * (log age - log scale)``.
    """
    ages, survival = np.asarray(ages, float), np.asarray(survival, float)
    keep = (ages > 0) & (survival > 0) & (survival < 1)
    return np.log(ages[keep]), np.log(-np.log(survival[keep]))
