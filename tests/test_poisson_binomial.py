"""The fleet failure-count kernel against the binomial law, brute force and
textbook identities.

Sources: the Poisson-binomial mean ``sum p`` and variance ``sum p (1 - p)``
are textbook identities (sums of independent Bernoulli variables); the
refined normal approximation and its accuracy are from Hong 2013, "On
computing the distribution function for the Poisson binomial distribution",
Comput. Stat. Data Anal. 59, 41-51 (formula recalled from memory).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from wearcast._poisson_binomial import (
    count_moments,
    count_pmf,
    pmf_quantile,
    poisson_binomial_pmf,
    refined_normal_pmf,
)


def brute_force_pmf(p):
    """Enumerate all 2**n outcomes (definition of the distribution)."""
    n = len(p)
    out = np.zeros(n + 1)
    for outcome in itertools.product((0, 1), repeat=n):
        x = np.array(outcome)
        out[int(x.sum())] += np.prod(np.where(x == 1, p, 1 - p))
    return out


@pytest.mark.parametrize("n,prob", [(1, 0.3), (10, 0.05), (57, 0.5), (300, 0.02), (400, 0.93), (2000, 0.3)])
def test_equal_probabilities_give_the_binomial(n, prob):
    # Reference library: scipy.stats.binom is the Poisson-binomial with equal p.
    ours = poisson_binomial_pmf(np.full(n, prob))
    expected = stats.binom.pmf(np.arange(n + 1), n, prob)
    assert np.max(np.abs(ours - expected)) < 1e-12


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(0.0, 1.0, allow_nan=False), min_size=0, max_size=11))
def test_matches_brute_force_enumeration(p):
    # Definition: enumerate every outcome of n <= 11 independent units.
    p = np.array(p, float)
    assert np.allclose(poisson_binomial_pmf(p), brute_force_pmf(p), atol=1e-13, rtol=0)


def test_long_mixed_vector_sums_to_one_and_has_textbook_moments():
    # Textbook identities: E K = sum p, Var K = sum p (1 - p); a pmf sums to 1.
    rng = np.random.default_rng(7)
    p = np.concatenate([rng.beta(0.3, 6.0, 5000), rng.uniform(0.6, 1.0, 700)])
    pmf = poisson_binomial_pmf(p)
    k = np.arange(len(pmf))
    mean = (k * pmf).sum()
    var = ((k - mean) ** 2 * pmf).sum()
    assert abs(pmf.sum() - 1) < 1e-10
    assert abs(mean - p.sum()) < 1e-7
    assert abs(var - (p * (1 - p)).sum()) < 1e-6
    assert pmf.min() >= 0


def test_degenerate_probabilities():
    # p = 0 and p = 1 units: the count is the number of sure failures (definition).
    pmf = poisson_binomial_pmf(np.array([1.0, 0.0, 1.0, 0.0, 0.0]))
    assert pmf.tolist() == [0, 0, 1, 0, 0, 0]
    assert poisson_binomial_pmf(np.array([])).tolist() == [1.0]
    with pytest.raises(ValueError):
        poisson_binomial_pmf(np.array([0.2, 1.5]))


def test_refined_normal_close_to_exact_for_a_large_fleet():
    # Hong 2013 reports the refined normal CDF error falling well below 1e-3
    # for n in the thousands (recalled from memory); we check 2e-3 on the CDF.
    rng = np.random.default_rng(3)
    p = rng.beta(0.5, 4.0, 8000)
    exact = np.cumsum(poisson_binomial_pmf(p))
    approx = np.cumsum(refined_normal_pmf(p))
    assert np.max(np.abs(exact - approx)) < 2e-3
    assert abs(refined_normal_pmf(p).sum() - 1) < 1e-12


def test_count_pmf_switches_on_variance():
    rng = np.random.default_rng(4)
    small = rng.uniform(0, 0.01, 3000)  # variance ~15: exact
    assert np.array_equal(count_pmf(small), poisson_binomial_pmf(small))
    big = rng.uniform(0, 0.5, 3000)
    assert count_moments(big)[1] > 400
    assert np.array_equal(count_pmf(big), refined_normal_pmf(big))


def test_quantiles_follow_the_binomial_ppf():
    # Reference library: scipy.stats.binom.ppf gives the smallest k with CDF >= q.
    pmf = poisson_binomial_pmf(np.full(200, 0.1))
    q = np.array([0.05, 0.5, 0.95])
    assert pmf_quantile(pmf, q).tolist() == stats.binom.ppf(q, 200, 0.1).astype(int).tolist()


@pytest.mark.parametrize("n, scale", [(1, 0.3), (40, 0.4), (1500, 0.03), (6000, 0.02)])
def test_compiled_recursion_equals_the_product_tree(n, scale):
    # Two exact algorithms for the same pmf (one unit at a time vs a tree of
    # polynomial products); both truncate at the same count, where the
    # recursion is exact below the cut.
    from wearcast import _poisson_binomial as pb

    if pb._recursion is None:
        pytest.skip("numba is not installed")
    p = np.clip(np.random.default_rng(n).gamma(2.0, scale / 2.0, n), 0.0, 0.5)
    k_max = pb._truncation(p)
    np.testing.assert_allclose(pb._product_pmf(p, k_max), pb._product_tree(p, k_max), rtol=0, atol=1e-12)
    np.testing.assert_allclose(pb._product_pmf(p, 3), pb._product_tree(p, 3), rtol=0, atol=1e-12)
