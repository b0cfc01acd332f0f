"""Compiled single-pass Cox gradient and diagonal Hessian (numba).

The same quantities as :func:`wearcast.models._cox_kernels.cox_gradient_hessian`
(Breslow or Efron ties, strata, case weights, delayed entry), computed in
three loops over the rows instead of about twenty NumPy passes. Boosting calls
it once per tree, so it sets the pace of fitting and of bootstrap refits.

The NumPy version stays the reference: tests compare the two to 1e-12, and
:func:`available` tells callers whether numba could be imported (the NumPy
version is used when it cannot).
"""

from __future__ import annotations

import numpy as np

try:  # numba is a declared dependency; the guard keeps a broken install usable.
    from numba import njit
except ImportError:  # pragma: no cover - exercised only without numba
    njit = None


def available() -> bool:
    """True when the compiled kernel can run."""
    return njit is not None


def _gradient_hessian_loops(weights, r, row_fail_entry, row_fail_exit, event_rows, event_group,
                            event_rank, group_count, group_weight, row_group, efron, grad, hess):
    # r: (n,) shifted risks w_i exp(eta_i - max eta), computed by NumPy's
    # vectorised exp before the call
    n = r.size
    m = group_weight.size
    bounds = np.zeros(m + 1)
    for i in range(n):
        ri = r[i]
        bounds[row_fail_entry[i]] += ri
        bounds[row_fail_exit[i]] -= ri
    S = np.empty(m)
    E = np.zeros(m)
    running = 0.0
    for g in range(m):
        running += bounds[g]
        S[g] = running
    for k in range(event_rows.size):
        E[event_group[k]] += r[event_rows[k]]
    for g in range(m):
        if S[g] < E[g]:  # every failing row is in its own risk set; clamp rounding
            S[g] = E[g]
    a = np.zeros(m)
    b = np.zeros(m)
    a2 = np.zeros(m)
    b2 = np.zeros(m)
    b3 = np.zeros(m)
    if efron:
        for k in range(event_rows.size):
            g = event_group[k]
            d = float(group_count[g])
            c = group_weight[g] / d
            if c > 0:
                f = event_rank[k] / d
                D = S[g] - f * E[g]
                floor = (1.0 - f) * E[g]
                if D < floor:
                    D = floor
                inv = c / D
                inv2 = c / (D * D)
                a[g] += inv
                b[g] += inv2
                a2[g] += inv * f
                b2[g] += inv2 * f
                b3[g] += inv2 * f * f
    else:
        for g in range(m):
            W = group_weight[g]
            if W > 0:
                a[g] = W / S[g]
                b[g] = W / (S[g] * S[g])
    cum_a = np.empty(m + 1)
    cum_b = np.empty(m + 1)
    cum_a[0] = 0.0
    cum_b[0] = 0.0
    for g in range(m):
        cum_a[g + 1] = cum_a[g] + a[g]
        cum_b[g + 1] = cum_b[g] + b[g]
    for i in range(n):
        # each row's values in float64, stored once (so a float32 output is one rounding)
        lo = row_fail_entry[i]
        hi = row_fail_exit[i]
        ri = r[i]
        A = cum_a[hi] - cum_a[lo]
        B = cum_b[hi] - cum_b[lo]
        gi = ri * A
        hi_ = ri * A - ri * ri * B
        g = row_group[i]
        if g >= 0:  # the row ends in a failure
            gi -= weights[i]
            if efron:
                # its own term: d/d eta of -(k/d) E carries an extra (1 - k/d)
                gi -= ri * a2[g]
                hi_ += -ri * a2[g] + ri * ri * (2.0 * b2[g] - b3[g])
        grad[i] = gi
        hess[i] = hi_ if hi_ > 0.0 else 0.0


if njit is not None:
    _compiled = njit(cache=True, nogil=True)(_gradient_hessian_loops)
else:  # pragma: no cover
    _compiled = None


def gradient_hessian(rs, eta: np.ndarray, dtype=np.float64) -> tuple[np.ndarray, np.ndarray]:
    """``(grad, hess)``, both shape (n,), for prepared risk sets ``rs`` and
    log relative risks ``eta`` (n,); see ``cox_gradient_hessian`` for the
    formulas. ``dtype`` of the outputs: float32 stores the float64 results
    rounded, as ``astype(np.float32)`` would (what LightGBM takes).
    Raises ``RuntimeError`` when numba is missing."""
    if _compiled is None:  # pragma: no cover
        raise RuntimeError("the compiled Cox kernel needs numba; pip install numba")
    eta = np.asarray(eta, dtype=np.float64)
    weights = np.ascontiguousarray(rs.weights, dtype=np.float64)
    r = np.exp(eta - (float(eta.max()) if eta.size else 0.0))
    r *= weights
    grad = np.empty(rs.n, dtype=dtype)
    hess = np.empty(rs.n, dtype=dtype)
    _compiled(weights, r,
              rs.row_fail_entry, rs.row_fail_exit, rs.event_rows, rs.event_group, rs.event_rank,
              rs.group_count, rs.group_weight, rs.row_group, rs.ties == "efron", grad, hess)
    return grad, hess
