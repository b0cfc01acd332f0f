"""Cox partial likelihood with delayed entry, ties, strata and case weights.

Pure functions on arrays. Rows are ``(entry, exit]`` intervals (ages in days);
row ``i`` is at risk at a failure age ``t`` of its own stratum when
``entry_i < t <= exit_i`` (counting-process form, so left truncation and
time-varying covariates need nothing extra).

Notation for one stratum and one distinct failure age ``t``:

* ``R(t)`` rows at risk, ``D(t)`` rows failing at ``t`` (``d = |D(t)|`` rows),
* ``w_i`` case weights, ``r_i = w_i * exp(eta_i)``,
* ``S = sum_{R(t)} r_i``, ``E = sum_{D(t)} r_i``, ``W = sum_{D(t)} w_i``.

The loss is the *negative* log partial likelihood, summed (not averaged) over
failures:

Breslow::

    loss = - sum_t [ sum_{i in D(t)} w_i eta_i  -  W log S ]

Efron, with weights as R ``survival::coxph`` does it (``coxfit6``/``agfit4``:
every tied failure carries the mean weight ``W / d``)::

    loss = - sum_t [ sum_{i in D(t)} w_i eta_i  -  (W / d) sum_{k=0}^{d-1} log(S - (k/d) E) ]

With ``d = 1`` the two agree. Derivatives are taken with respect to
``eta`` (shape (n,)); the Hessian is returned as its diagonal only, which is
what gradient-boosting needs (it is >= 0 because the loss is convex).

Cost: :func:`prepare_risk_sets` sorts once (O(n log n)); every loss /
gradient call afterwards is O(n + m): each row is at risk for a contiguous run
of failure groups (those after its entry key up to its exit key), so the
risk-set sums are a difference array over the m groups (two weighted
``bincount`` calls and a cumulative sum, no gathers over the n rows), and each
row's sum over the failure ages it is at risk for is a cumulative sum over
failure groups read at its exit minus the same read at its entry. Strata are folded into one integer
key ``(stratum, age rank)`` so no loop over strata or failure ages is needed.
The gradient and Hessian that boosting asks for once per tree run as one
compiled pass (:mod:`._cox_fused`, numba) when numba is installed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from wearcast.models import _cox_fused

_TIES = ("breslow", "efron")


@dataclass(frozen=True)
class RiskSets:
    """Everything precomputed once per data set (one sort).

    Shapes: ``n`` rows, ``m`` distinct (stratum, failure age) pairs, ``n_events``
    failing rows. Built by :func:`prepare_risk_sets`; treat as read-only.
    """

    n: int
    ties: str
    weights: np.ndarray  # (n,) case weights
    event: np.ndarray  # (n,) bool
    row_fail_exit: np.ndarray  # (n,) number of failure keys <= the row's exit key
    row_fail_entry: np.ndarray  # (n,) number of failure keys <= the row's entry key
    event_rows: np.ndarray  # (n_events,) failing rows grouped by failure key
    event_group: np.ndarray  # (n_events,) failure-group index of each failing row
    event_rank: np.ndarray  # (n_events,) 0..d-1 within its group (Efron's k)
    group_count: np.ndarray  # (m,) d: failing rows per group
    group_weight: np.ndarray  # (m,) W: summed weight of failing rows per group
    row_group: np.ndarray  # (n,) failure group of a failing row, -1 otherwise
    fail_age: np.ndarray  # (m,) failure age of each group (days), increasing within a stratum
    fail_stratum: np.ndarray  # (m,) stratum code of each group (index into stratum_labels)
    stratum_labels: np.ndarray  # (n_strata,) the distinct strata labels, sorted

    @property
    def n_events(self) -> int:
        """Number of failing rows."""
        return int(self.event_rows.size)

    @property
    def event_weight(self) -> float:
        """Summed case weight of failing rows (``sum_i w_i delta_i``)."""
        return float(self.group_weight.sum())


def prepare_risk_sets(
    entry: np.ndarray,
    exit: np.ndarray,
    event: np.ndarray,
    *,
    strata: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    ties: str = "efron",
    age_ranks: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
) -> RiskSets:
    """Sort once and index the risk sets.

    Parameters
    ----------
    entry, exit : (n,) float, ages in days with ``entry < exit`` on every row.
    event : (n,) bool, the row's interval ends in a failure.
    strata : (n,) labels (any hashable dtype) or None; each stratum has its own
        risk sets (and, downstream, its own baseline hazard).
    weights : (n,) non-negative case weights or None (all one).
    ties : "efron" (default, as R's coxph) or "breslow".
    age_ranks : optional ``(ages, entry_rank, exit_rank)``: sorted distinct
        ages (days) of a larger table these rows were taken from and each
        row's position of its entry and exit age in them, (n,) integers
        (:func:`age_ranks`). Saves sorting the ages again for every subset.
    """
    entry = np.asarray(entry, dtype=float).ravel()
    exit = np.asarray(exit, dtype=float).ravel()
    event = np.asarray(event, dtype=bool).ravel()
    n = exit.size
    if entry.size != n or event.size != n:
        raise ValueError(f"entry, exit and event must have the same length; got {entry.size}, {n}, {event.size}")
    if ties not in _TIES:
        raise ValueError(f"ties must be one of {_TIES}; got {ties!r}")
    if not (np.isfinite(entry).all() and np.isfinite(exit).all()):
        raise ValueError("entry and exit ages must be finite numbers of days")
    bad = np.flatnonzero(exit <= entry)
    if bad.size:
        i = int(bad[0])
        raise ValueError(
            f"row {i}: exit age {exit[i]} is not after entry age {entry[i]}; "
            "every (entry, exit] interval must have a positive length"
        )
    weights = np.ones(n) if weights is None else np.asarray(weights, dtype=float).ravel()
    if weights.size != n or not np.isfinite(weights).all() or (weights < 0).any():
        raise ValueError("weights must be n finite, non-negative numbers")
    if strata is None:
        stratum = np.zeros(n, dtype=np.int64)
        labels = np.zeros(1, dtype=np.int64)
    else:
        strata = np.asarray(strata).ravel()
        if strata.size != n:
            raise ValueError(f"strata must have length {n}; got {strata.size}")
        labels, stratum = np.unique(strata, return_inverse=True)
        stratum = stratum.astype(np.int64).ravel()

    # Integer keys (stratum, age rank): exact comparisons, strata kept apart.
    if age_ranks is None:
        ages, entry_rank, exit_rank = age_ranks_of(entry, exit)
    else:
        ages, entry_rank, exit_rank = age_ranks
        if np.shape(entry_rank) != (n,) or np.shape(exit_rank) != (n,):
            raise ValueError(f"age_ranks must hold ranks for the {n} rows")
    span = np.int64(ages.size + 1)
    entry_key = stratum * span + np.asarray(entry_rank, np.int64)
    exit_key = stratum * span + np.asarray(exit_rank, np.int64)

    fail_keys = np.unique(exit_key[event])
    row_fail_exit = np.searchsorted(fail_keys, exit_key, side="right")
    row_fail_entry = np.searchsorted(fail_keys, entry_key, side="right")

    event_rows = np.flatnonzero(event)
    event_rows = event_rows[np.argsort(exit_key[event_rows], kind="mergesort")]
    event_group = np.searchsorted(fail_keys, exit_key[event_rows])
    m = fail_keys.size
    group_count = np.bincount(event_group, minlength=m)
    group_start = np.concatenate([[0], np.cumsum(group_count)[:-1]]) if m else np.zeros(0, np.int64)
    event_rank = np.arange(event_rows.size) - group_start[event_group]
    group_weight = np.bincount(event_group, weights=weights[event_rows], minlength=m)
    row_group = np.full(n, -1, dtype=np.int64)
    row_group[event_rows] = event_group

    return RiskSets(
        n=n,
        ties=ties,
        weights=weights,
        event=event,
        row_fail_exit=row_fail_exit,
        row_fail_entry=row_fail_entry,
        event_rows=event_rows,
        event_group=event_group,
        event_rank=event_rank,
        group_count=group_count,
        group_weight=group_weight,
        row_group=row_group,
        fail_age=ages[fail_keys % span] if m else np.zeros(0),
        fail_stratum=fail_keys // span,
        stratum_labels=labels,
    )


def age_ranks_of(entry: np.ndarray, exit: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(ages, entry_rank, exit_rank)``: the sorted distinct ages of all rows
    and each row's positions in them (for ``prepare_risk_sets(age_ranks=...)``
    on subsets of these rows)."""
    entry = np.asarray(entry, float).ravel()
    ages, inverse = np.unique(np.concatenate([entry, np.asarray(exit, float).ravel()]), return_inverse=True)
    inverse = inverse.ravel().astype(np.int64)
    return ages, inverse[:entry.size], inverse[entry.size:]


def _checked_eta(rs: RiskSets, eta: np.ndarray) -> np.ndarray:
    eta = np.asarray(eta, dtype=float).ravel()
    if eta.size != rs.n:
        raise ValueError(f"eta must have shape ({rs.n},); got {eta.shape}")
    if not np.isfinite(eta).all():
        raise ValueError("eta contains non-finite values")
    return eta


def _pieces(rs: RiskSets, eta: np.ndarray, *, derivatives: bool):
    """Shared work: shifted risks, per-group sums and the loss."""
    eta = _checked_eta(rs, eta)
    shift = float(eta.max()) if eta.size else 0.0
    r = rs.weights * np.exp(eta - shift)  # (n,) w_i exp(eta_i - shift)
    # S per failure group: row i is at risk for the groups g with
    # row_fail_entry[i] <= g < row_fail_exit[i]; a difference array over the m groups
    # (two bincounts into m + 1 bins) avoids gathers over the n rows.
    m = rs.group_weight.size
    bounds = np.bincount(rs.row_fail_entry, weights=r, minlength=m + 1)
    bounds -= np.bincount(rs.row_fail_exit, weights=r, minlength=m + 1)
    S = np.cumsum(bounds[:m])
    E = np.bincount(rs.event_group, weights=r[rs.event_rows], minlength=m)
    # Every failing row is in its own risk set, so S >= E; clamp rounding.
    S = np.maximum(S, E)
    W = rs.group_weight
    linear = float(np.dot(rs.weights[rs.event_rows], eta[rs.event_rows]))
    out = {"r": r, "eta": eta}
    if rs.ties == "breslow" or m == 0:
        with np.errstate(divide="ignore"):
            log_s = np.where(W > 0, np.log(S), 0.0)
        loss = float(np.dot(W, log_s + shift)) - linear
        if derivatives:
            with np.errstate(divide="ignore", invalid="ignore"):
                out["a"] = np.where(W > 0, W / S, 0.0)
                out["b"] = np.where(W > 0, W / S**2, 0.0)
        return loss, out
    # Efron: one term per failing row, k = its rank in the tie group.
    g = rs.event_group
    d = rs.group_count[g].astype(float)
    c = W[g] / d  # mean weight of the tied failures
    f = rs.event_rank / d  # k / d
    D = S[g] - f * E[g]
    D = np.maximum(D, (1.0 - f) * E[g])  # exact value is >= (1 - k/d) E
    positive = c > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        log_d = np.where(positive, np.log(D), 0.0)
    loss = float(np.dot(c, log_d + shift)) - linear
    if derivatives:
        with np.errstate(divide="ignore", invalid="ignore"):
            inv = np.where(positive, c / D, 0.0)
            inv2 = np.where(positive, c / D**2, 0.0)
        out["a"] = np.bincount(g, weights=inv, minlength=m)
        out["b"] = np.bincount(g, weights=inv2, minlength=m)
        out["a2"] = np.bincount(g, weights=inv * f, minlength=m)
        out["b2"] = np.bincount(g, weights=inv2 * f, minlength=m)
        out["b3"] = np.bincount(g, weights=inv2 * f * f, minlength=m)
    return loss, out


def _gradient_hessian(rs: RiskSets, out: dict) -> tuple[np.ndarray, np.ndarray]:
    r = out["r"]
    cum_a = np.concatenate([[0.0], np.cumsum(out["a"])])
    cum_b = np.concatenate([[0.0], np.cumsum(out["b"])])
    # Sum over the failure ages each row is at risk for: entry < t <= exit.
    A = cum_a[rs.row_fail_exit]
    A -= cum_a[rs.row_fail_entry]
    B = cum_b[rs.row_fail_exit]
    B -= cum_b[rs.row_fail_entry]
    grad = np.multiply(r, A, out=A)  # r * A
    B *= r
    B *= r
    hess = np.subtract(grad, B, out=B)  # r * A - r^2 * B
    grad[rs.event_rows] -= rs.weights[rs.event_rows]
    if rs.ties == "efron" and "a2" in out:
        # A failing row's own term: d/d eta_j of -(k/d) E carries an extra (1 - k/d).
        rows, grp = rs.event_rows, rs.event_group
        rj = r[rows]
        grad[rows] -= rj * out["a2"][grp]
        hess[rows] += -rj * out["a2"][grp] + rj * rj * (2.0 * out["b2"][grp] - out["b3"][grp])
    return grad, np.maximum(hess, 0.0)


def baseline_hazard_increments(rs: RiskSets, eta: np.ndarray) -> np.ndarray:
    """Jumps of the baseline cumulative hazard at each failure group, shape (m,).

    Breslow: ``W / S``; Efron: ``sum_{k=0}^{d-1} (W/d) / (S - (k/d) E)`` (the
    tie-corrected estimator R's ``survfit.coxph`` pairs with Efron ties). Risks
    are ``exp(eta)`` (not shifted), so the result is the hazard at ``eta = 0``.
    Ages and strata of the groups are ``rs.fail_age`` and ``rs.fail_stratum``.
    """
    _, out = _pieces(rs, eta, derivatives=True)
    shift = float(out["eta"].max()) if rs.n else 0.0
    return out["a"] * np.exp(-shift)


def cox_loss(rs: RiskSets, eta: np.ndarray) -> float:
    """Negative log partial likelihood (weighted sum over failures), a float.

    ``eta`` is the linear predictor / log relative risk, shape (n,).
    """
    return _pieces(rs, eta, derivatives=False)[0]


def cox_gradient_hessian(rs: RiskSets, eta: np.ndarray, dtype=np.float64) -> tuple[np.ndarray, np.ndarray]:
    """``(d loss / d eta, diag of d2 loss / d eta2)``, both shape (n,); the diagonal is >= 0.

    Breslow, for row ``j`` with ``r_j = w_j exp(eta_j)``::

        grad_j = -w_j delta_j + r_j sum_{t: j in R(t)} W/S
        hess_j =  r_j sum_{t: j in R(t)} W/S  -  r_j^2 sum_{t: j in R(t)} W/S^2

    Efron replaces ``W/S`` by ``sum_k c/D_k`` (``c = W/d``, ``D_k = S - (k/d) E``)
    and ``W/S^2`` by ``sum_k c/D_k^2``; a row failing at ``t`` gets its own
    factor ``(1 - k/d)`` inside those sums.

    Runs the compiled single-pass version (:mod:`._cox_fused`) when numba is
    installed, the NumPy version otherwise; the two agree to rounding.
    ``dtype`` of the outputs: float32 rounds the float64 values once (what
    LightGBM takes without a copy).
    """
    if _cox_fused.available():
        return _cox_fused.gradient_hessian(rs, _checked_eta(rs, eta), dtype)
    _, out = _pieces(rs, eta, derivatives=True)
    grad, hess = _gradient_hessian(rs, out)
    return grad.astype(dtype, copy=False), hess.astype(dtype, copy=False)


def cox_loss_gradient_hessian(rs: RiskSets, eta: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """Loss, gradient (n,) and Hessian diagonal (n,) in one pass."""
    loss, out = _pieces(rs, eta, derivatives=True)
    grad, hess = _gradient_hessian(rs, out)
    return loss, grad, hess
