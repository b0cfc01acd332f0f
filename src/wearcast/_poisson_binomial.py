"""The distribution of a fleet's failure count: the Poisson-binomial law.

When unit ``i`` fails within the horizon with probability ``p_i``, independently
of the others, the number of failures ``K = sum_i X_i`` follows the
Poisson-binomial distribution: mean ``sum p_i``, variance ``sum p_i (1 - p_i)``.

Exact pmf (:func:`poisson_binomial_pmf`)
    The probability generating function is ``prod_i (1 - p_i + p_i z)``. We
    add one unit at a time, ``pmf'[k] = pmf[k] (1 - p_i) + pmf[k-1] p_i``,
    in compiled code (numba; ``O(n k)`` for counts up to ``k``); without
    numba the ``n`` linear factors are multiplied pairwise in a balanced tree
    (direct convolution for short pieces, batched real FFTs for long ones),
    ``O(n log k)`` numpy work. Tests hold the two to 1e-12.
    Units with ``p_i > 1/2`` are counted by their survivals instead
    (``X_i = 1 - Y_i`` with ``P(Y_i = 1) = 1 - p_i < 1/2``), which keeps both
    partial counts small; each partial count is then truncated above
    ``mean + 12 sd + 40``. By Bernstein's inequality the mass dropped there is
    below ``exp(-50)``; it is not redistributed.
Refined normal approximation (:func:`refined_normal_pmf`)
    ``P(K <= k) ~ G((k + 1/2 - mu) / sigma)`` with
    ``G(x) = Phi(x) + gamma (1 - x^2) phi(x) / 6`` and skewness
    ``gamma = sigma^-3 sum p_i (1 - p_i)(1 - 2 p_i)`` (Volkova 1996, as given
    in Hong 2013, "On computing the distribution function for the Poisson
    binomial distribution", Comput. Stat. Data Anal. 59, 41-51).
    :func:`count_pmf` uses it when the count's variance exceeds
    :data:`EXACT_VARIANCE_LIMIT`, where its CDF error is far below the
    5 %/95 % quantile resolution of one failure.

All functions are pure: arrays in, arrays out. Counts are numbers of units.
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sp_fft
from scipy import signal
from scipy.special import ndtr

try:  # numba is a declared dependency; without it the product tree below is used
    from numba import njit
except ImportError:  # pragma: no cover
    njit = None

#: Above this variance (``sum p (1 - p)``, in failures squared) :func:`count_pmf`
#: switches from the exact pmf to the refined normal approximation.
EXACT_VARIANCE_LIMIT = 400.0

_DIRECT_MAX = 32  # pieces shorter than this are multiplied by direct convolution


def count_moments(p: np.ndarray) -> tuple[float, float, float]:
    """Mean, variance and third central moment of the count, for ``p`` of shape (n,)."""
    p = np.asarray(p, float)
    q = p * (1.0 - p)
    return float(p.sum()), float(q.sum()), float((q * (1.0 - 2.0 * p)).sum())


def _truncation(p: np.ndarray) -> int:
    """Largest count kept for a partial sum with these ``p`` (all <= 1/2)."""
    mean, var, _ = count_moments(p)
    return int(min(len(p), np.ceil(mean + 12.0 * np.sqrt(var) + 40.0)))


def _recursion_loop(p, out):
    # out: zeros of length k_max + 1; adds one Bernoulli(p_i) at a time, dropping
    # mass above k_max (exact below it: mass only ever moves up by one)
    k_max = out.size - 1
    out[0] = 1.0
    top = 0
    for i in range(p.size):
        pi = p[i]
        qi = 1.0 - pi
        if top < k_max:
            top += 1
            out[top] = out[top - 1] * pi
            start = top - 1
        else:
            start = top
        for k in range(start, 0, -1):
            out[k] = out[k] * qi + out[k - 1] * pi
        out[0] *= qi


_recursion = njit(cache=True, nogil=True)(_recursion_loop) if njit is not None else None


def _product_pmf(p: np.ndarray, k_max: int) -> np.ndarray:
    """pmf on ``0..min(n, k_max)`` of a sum of Bernoulli(p_i): the compiled
    recursion (numba) when installed, else a tree of products."""
    if _recursion is not None:
        out = np.zeros(min(len(p), k_max) + 1)
        _recursion(np.ascontiguousarray(p, dtype=np.float64), out)
        return out
    return _product_tree(p, k_max)


def _product_tree(p: np.ndarray, k_max: int) -> np.ndarray:
    """pmf on ``0..min(n, k_max)`` of a sum of Bernoulli(p_i), by a tree of products."""
    n = len(p)
    if n == 0:
        return np.ones(1)
    size = 1 << (n - 1).bit_length()
    polys = np.zeros((size, 2))
    polys[:, 0] = 1.0  # padding factors are Bernoulli(0): the polynomial 1
    polys[:n, 0] = 1.0 - p
    polys[:n, 1] = p
    while polys.shape[0] > 1:
        left, right = polys[0::2], polys[1::2]
        length = left.shape[1]
        out_len = min(2 * length - 1, k_max + 1)
        if length <= _DIRECT_MAX:
            out = np.zeros((left.shape[0], 2 * length - 1))
            for j in range(length):
                out[:, j:j + length] += left[:, j:j + 1] * right
            out = out[:, :out_len]
        else:
            nfft = sp_fft.next_fast_len(2 * length - 1, real=True)
            spectrum = sp_fft.rfft(left, nfft, axis=1) * sp_fft.rfft(right, nfft, axis=1)
            out = sp_fft.irfft(spectrum, nfft, axis=1)[:, :out_len]
            np.clip(out, 0.0, None, out=out)  # FFT rounding can leave -1e-17
        polys = out
    return polys[0]


def poisson_binomial_pmf(p: np.ndarray) -> np.ndarray:
    """Exact pmf of the number of successes, shape (n + 1,): ``pmf[k] = P(K = k)``.

    ``p``: success probabilities, shape (n,), each in [0, 1]. Values beyond
    the truncation described in the module docstring are 0 (mass < exp(-50)).
    """
    p = np.asarray(p, float).ravel()
    if np.any(~np.isfinite(p)) or np.any((p < 0) | (p > 1)):
        raise ValueError("probabilities must be finite and within [0, 1]")
    n = len(p)
    high = p > 0.5
    low_p, survive_p = p[~high], 1.0 - p[high]
    low = _product_pmf(low_p, _truncation(low_p))  # failures among low-p units
    survivals = _product_pmf(survive_p, _truncation(survive_p))  # survivals among high-p units
    n_high = int(high.sum())
    # K = A + n_high - S: convolve A with S reversed, then shift.
    if min(len(low), len(survivals)) > 64:
        combined = signal.fftconvolve(low, survivals[::-1])
        np.clip(combined, 0.0, None, out=combined)
    else:
        combined = np.convolve(low, survivals[::-1])
    out = np.zeros(n + 1)
    start = n_high - (len(survivals) - 1)  # count that combined[0] stands for (>= 0)
    stop = min(n + 1, start + len(combined))
    out[start:stop] = combined[: stop - start]
    return out


def refined_normal_pmf(p: np.ndarray) -> np.ndarray:
    """Refined normal approximation of the pmf, shape (n + 1,).

    Evaluated on ``mean +- 14 sd`` (zero outside), made monotone in the CDF
    and normalised to sum to 1. See the module docstring for the formula.
    """
    p = np.asarray(p, float).ravel()
    n = len(p)
    mean, var, third = count_moments(p)
    out = np.zeros(n + 1)
    if var <= 0.0:
        out[int(round(mean))] = 1.0
        return out
    sd = np.sqrt(var)
    lo = max(0, int(np.floor(mean - 14 * sd)))
    hi = min(n, int(np.ceil(mean + 14 * sd)))
    k = np.arange(lo - 1, hi + 1, dtype=float)
    x = (k + 0.5 - mean) / sd
    gamma = third / sd**3
    cdf = ndtr(x) + gamma * (1.0 - x**2) * np.exp(-0.5 * x**2) / np.sqrt(2 * np.pi) / 6.0
    cdf = np.maximum.accumulate(np.clip(cdf, 0.0, 1.0))
    cdf[0] = 0.0 if lo == 0 else cdf[0]
    cdf[-1] = 1.0
    out[lo:hi + 1] = np.diff(cdf)
    return out / out.sum()


def count_pmf(p: np.ndarray, exact_variance_limit: float = EXACT_VARIANCE_LIMIT) -> np.ndarray:
    """pmf of the failure count, shape (n + 1,): exact up to the variance limit,
    refined normal above it."""
    p = np.asarray(p, float).ravel()
    if count_moments(p)[1] > exact_variance_limit:
        return refined_normal_pmf(p)
    return poisson_binomial_pmf(p)


def pmf_quantile(pmf: np.ndarray, q: float | np.ndarray) -> np.ndarray:
    """Smallest count ``k`` with ``P(K <= k) >= q``; ``pmf`` shape (m,), ``q`` scalar or (r,)."""
    cdf = np.cumsum(np.asarray(pmf, float))
    cdf /= cdf[-1]
    q = np.asarray(q, float)
    # A tiny tolerance so that rounding in the cumulative sum does not push an
    # exact quantile (say P(K <= 3) = 0.95 exactly) one count up.
    return np.minimum(np.searchsorted(cdf, q - 1e-12, side="left"), len(cdf) - 1)
