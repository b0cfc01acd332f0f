"""Cox partial-likelihood kernels: against a naive reference, finite
differences, published coefficients and lifelines."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import minimize

from wearcast.models._cox_kernels import (
    cox_gradient_hessian,
    cox_loss,
    cox_loss_gradient_hessian,
    prepare_risk_sets,
)


def naive_cox_loss(entry, exit, event, eta, strata=None, weights=None, ties="efron"):
    """Reference written with plain loops, straight from the definitions:
    Breslow: -sum_t [sum_D w eta - W log S]; Efron (R coxph's weighting):
    -sum_t [sum_D w eta - (W/d) sum_k log(S - k/d E)]."""
    n = len(exit)
    strata = [0] * n if strata is None else list(strata)
    weights = [1.0] * n if weights is None else list(weights)
    loss = 0.0
    keys = sorted({(strata[i], exit[i]) for i in range(n) if event[i]})
    for s, t in keys:
        risk = [j for j in range(n) if strata[j] == s and entry[j] < t <= exit[j]]
        dead = [j for j in risk if event[j] and exit[j] == t]
        S = sum(weights[j] * math.exp(eta[j]) for j in risk)
        E = sum(weights[j] * math.exp(eta[j]) for j in dead)
        W = sum(weights[j] for j in dead)
        d = len(dead)
        loss -= sum(weights[j] * eta[j] for j in dead)
        if ties == "breslow":
            loss += W * math.log(S)
        else:
            for k in range(d):
                loss += (W / d) * math.log(S - k / d * E)
    return loss


def random_data(rng, n=40, n_strata=3):
    """Small data with many ties, delayed entry, strata and weights."""
    entry = rng.integers(0, 5, n).astype(float)
    exit = entry + rng.integers(1, 6, n).astype(float)
    event = rng.random(n) < 0.6
    strata = rng.integers(0, n_strata, n)
    weights = rng.integers(1, 4, n) * rng.choice([0.5, 1.0, 1.5], n)
    eta = rng.normal(scale=0.8, size=n)
    return entry, exit, event, strata, weights, eta


@pytest.mark.parametrize("ties", ["breslow", "efron"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_loss_matches_naive_reference(ties, seed):
    # Reference: naive O(n^2) loops above (definition in the module docstring).
    rng = np.random.default_rng(seed)
    entry, exit, event, strata, weights, eta = random_data(rng)
    rs = prepare_risk_sets(entry, exit, event, strata=strata, weights=weights, ties=ties)
    expected = naive_cox_loss(entry, exit, event, eta, strata, weights, ties)
    assert cox_loss(rs, eta) == pytest.approx(expected, rel=1e-12, abs=1e-10)
    # Shifting eta by a constant leaves the partial likelihood unchanged, and a
    # huge shift must not overflow (common practice: subtract max before exp).
    assert cox_loss(rs, eta + 700.0) == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("ties", ["breslow", "efron"])
@pytest.mark.parametrize("seed", [3, 4])
def test_gradient_and_hessian_match_finite_differences(ties, seed):
    rng = np.random.default_rng(seed)
    entry, exit, event, strata, weights, eta = random_data(rng, n=30)
    rs = prepare_risk_sets(entry, exit, event, strata=strata, weights=weights, ties=ties)
    loss, grad, hess = cox_loss_gradient_hessian(rs, eta)  # the NumPy version
    g2, h2 = cox_gradient_hessian(rs, eta)  # the compiled one when numba is installed
    np.testing.assert_allclose(grad, g2, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(hess, h2, rtol=1e-12, atol=1e-14)
    assert loss == cox_loss(rs, eta)
    h = 1e-5
    fd_grad = np.empty(rs.n)
    fd_hess = np.empty(rs.n)
    fd_hess_loss = np.empty(rs.n)
    for j in range(rs.n):
        step = np.zeros(rs.n)
        step[j] = h
        up, down = cox_loss(rs, eta + step), cox_loss(rs, eta - step)
        fd_grad[j] = (up - down) / (2 * h)
        # diagonal Hessian as central differences of the gradient ...
        fd_hess[j] = (cox_gradient_hessian(rs, eta + step)[0][j] - cox_gradient_hessian(rs, eta - step)[0][j]) / (2 * h)
        # ... and as second differences of the loss (larger step: rounding ~ eps/h^2)
        big = step * 100
        fd_hess_loss[j] = (cox_loss(rs, eta + big) - 2 * loss + cox_loss(rs, eta - big)) / (100 * h) ** 2
    np.testing.assert_allclose(grad, fd_grad, atol=1e-7)
    np.testing.assert_allclose(hess, fd_hess, atol=1e-7)
    np.testing.assert_allclose(hess, fd_hess_loss, atol=1e-5)
    assert (hess >= 0).all()
    # The gradient of a loss invariant to a shared shift sums to zero per stratum.
    for s in np.unique(strata):
        assert grad[strata == s].sum() == pytest.approx(0.0, abs=1e-10)


@pytest.mark.parametrize("ties", ["breslow", "efron"])
def test_compiled_kernel_equals_the_numpy_kernel(ties):
    # Larger data than the finite-difference test: many ties, strata, weights,
    # delayed entry and a large shift of eta (no overflow in either version).
    from wearcast.models import _cox_fused
    from wearcast.models._cox_kernels import _gradient_hessian, _pieces

    if not _cox_fused.available():
        pytest.skip("numba is not installed; the NumPy kernel is the only one")
    rng = np.random.default_rng(9)
    entry, exit, event, strata, weights, eta = random_data(rng, n=3000, n_strata=4)
    rs = prepare_risk_sets(entry, exit, event, strata=strata, weights=weights, ties=ties)
    for shift in (0.0, 600.0):
        expected = _gradient_hessian(rs, _pieces(rs, eta + shift, derivatives=True)[1])
        got = _cox_fused.gradient_hessian(rs, eta + shift)
        np.testing.assert_allclose(got[0], expected[0], rtol=1e-11, atol=1e-12)
        np.testing.assert_allclose(got[1], expected[1], rtol=1e-11, atol=1e-12)
    with pytest.raises(ValueError, match="non-finite"):
        cox_gradient_hessian(rs, np.full(rs.n, np.nan))


def test_age_ranks_of_a_parent_table_give_the_same_risk_sets():
    # A bootstrap refit prepares risk sets for a subset of rows using the age
    # ranks of the whole table; every field must equal sorting the subset afresh.
    import dataclasses

    from wearcast.models._cox_kernels import age_ranks_of

    rng = np.random.default_rng(21)
    entry, exit, event, strata, weights, _ = random_data(rng, n=400)
    ages, entry_rank, exit_rank = age_ranks_of(entry, exit)
    rows = np.flatnonzero(rng.random(400) < 0.6)
    for ties in ("breslow", "efron"):
        fresh = prepare_risk_sets(entry[rows], exit[rows], event[rows], strata=strata[rows],
                                  weights=weights[rows], ties=ties)
        reused = prepare_risk_sets(entry[rows], exit[rows], event[rows], strata=strata[rows],
                                   weights=weights[rows], ties=ties,
                                   age_ranks=(ages, entry_rank[rows], exit_rank[rows]))
        for field in dataclasses.fields(fresh):
            a, b = getattr(fresh, field.name), getattr(reused, field.name)
            assert np.array_equal(np.asarray(a), np.asarray(b)), field.name


def test_strata_loss_is_sum_of_per_stratum_losses():
    rng = np.random.default_rng(5)
    entry, exit, event, strata, weights, eta = random_data(rng, n=60)
    rs = prepare_risk_sets(entry, exit, event, strata=strata, weights=weights)
    parts = 0.0
    for s in np.unique(strata):
        keep = strata == s
        parts += cox_loss(
            prepare_risk_sets(entry[keep], exit[keep], event[keep], weights=weights[keep]), eta[keep]
        )
    assert cox_loss(rs, eta) == pytest.approx(parts, rel=1e-12)
    g, _ = cox_gradient_hessian(rs, eta)
    for s in np.unique(strata):
        keep = strata == s
        g_s, _ = cox_gradient_hessian(
            prepare_risk_sets(entry[keep], exit[keep], event[keep], weights=weights[keep]), eta[keep]
        )
        np.testing.assert_allclose(g[keep], g_s, atol=1e-12)


def test_integer_weights_equal_row_duplication_breslow():
    # Common practice (R coxph weights = case frequencies under Breslow ties).
    rng = np.random.default_rng(6)
    entry, exit, event, _, _, eta = random_data(rng, n=50)
    counts = rng.integers(1, 4, entry.size)
    rs_w = prepare_risk_sets(entry, exit, event, weights=counts.astype(float), ties="breslow")
    rep = np.repeat(np.arange(entry.size), counts)
    rs_dup = prepare_risk_sets(entry[rep], exit[rep], event[rep], ties="breslow")
    assert cox_loss(rs_w, eta) == pytest.approx(cox_loss(rs_dup, eta[rep]), rel=1e-12)
    g_w, h_w = cox_gradient_hessian(rs_w, eta)
    g_d, _ = cox_gradient_hessian(rs_dup, eta[rep])
    np.testing.assert_allclose(g_w, np.bincount(rep, weights=g_d), atol=1e-12)


def test_no_failures_and_bad_rows():
    rs = prepare_risk_sets([0, 1], [2, 3], [False, False])
    assert cox_loss(rs, np.zeros(2)) == 0.0
    g, h = cox_gradient_hessian(rs, np.array([0.3, -1.0]))
    assert not g.any() and not h.any()
    with pytest.raises(ValueError, match="row 1"):
        prepare_risk_sets([0, 3], [2, 3], [True, True])
    with pytest.raises(ValueError, match="ties"):
        prepare_risk_sets([0], [1], [True], ties="exact")


def fit_linear_cox(entry, exit, event, X, ties="efron", strata=None):
    """Minimise the kernel's loss over beta (gradient X^T g)."""
    rs = prepare_risk_sets(entry, exit, event, ties=ties, strata=strata)

    def fun(beta):
        loss, g, _ = cox_loss_gradient_hessian(rs, X @ beta)
        return loss, X.T @ g

    res = minimize(fun, np.zeros(X.shape[1]), jac=True, method="BFGS", options={"gtol": 1e-6})
    # BFGS may stop on "precision loss" right at the optimum; check the score instead.
    assert np.abs(fun(res.x)[1]).max() < 1e-4, res.message
    return res.x


def test_rossi_coefficients_match_published_values():
    from lifelines.datasets import load_rossi

    rossi = load_rossi()
    cols = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]
    X = rossi[cols].to_numpy(float)
    beta = fit_linear_cox(np.zeros(len(rossi)), rossi["week"].to_numpy(float), rossi["arrest"].to_numpy(bool), X)
    # Fox & Weisberg, "Cox Proportional-Hazards Regression for Survival Data in R"
    # (appendix to An R Companion to Applied Regression), Efron ties
    # (recalled from memory).
    published = [-0.3794, -0.0574, 0.3139, -0.1498, -0.4337, -0.0849, 0.0915]
    np.testing.assert_allclose(beta, published, atol=1e-3)


def test_stanford_delayed_entry_matches_r_and_lifelines():
    from lifelines import CoxTimeVaryingFitter
    from lifelines.datasets import load_stanford_heart_transplants

    heart = load_stanford_heart_transplants()
    # Zero-length rows: lifelines' copy has none (checked here). Like R's `heart`
    # data it already moves subject 38's transplant (same day as death) half a
    # day earlier, giving rows (0, 4.5] and (4.5, 5]. Our kernel refuses
    # start >= stop with a ValueError (R's Surv() makes such rows NA, with a
    # warning, and coxph drops them), so nothing needs handling here.
    assert (heart["start"] < heart["stop"]).all()
    assert heart.loc[heart["id"] == 38, "stop"].tolist() == [4.5, 5.0]
    cols = ["age", "year", "surgery", "transplant"]
    X = heart[cols].to_numpy(float)
    beta = fit_linear_cox(
        heart["start"].to_numpy(float), heart["stop"].to_numpy(float), heart["event"].to_numpy(bool), X
    )
    # R survival::coxph(Surv(start, stop, event) ~ age + year + surgery + transplant,
    # data = heart), Efron ties (recalled from memory).
    np.testing.assert_allclose(beta, [0.02717, -0.14635, -0.63721, -0.01025], atol=1e-3)
    # lifelines' CoxTimeVaryingFitter (reference implementation), unpenalised.
    ctv = CoxTimeVaryingFitter(penalizer=0.0)
    ctv.fit(heart[cols + ["id", "start", "stop", "event"]], id_col="id", event_col="event",
            start_col="start", stop_col="stop")
    np.testing.assert_allclose(beta, ctv.params_[cols].to_numpy(), atol=1e-5)
    # Loss at lifelines' optimum equals minus its log partial likelihood.
    rs = prepare_risk_sets(heart["start"], heart["stop"], heart["event"])
    assert -cox_loss(rs, X @ ctv.params_[cols].to_numpy()) == pytest.approx(ctv.log_likelihood_, rel=1e-8)
