"""Population stability index."""

import numpy as np
import pandas as pd
from scipy.stats import entropy

from wearcast.drift import drift_table, population_stability_index


def test_psi_is_symmetrised_kullback_leibler_divergence():
    # PSI = KL(a||e) + KL(e||a) on the binned shares; scipy.stats.entropy is the reference.
    rng = np.random.default_rng(1)
    ref = rng.normal(0, 1, 5000)
    cur = rng.normal(0.4, 1.2, 4000)
    psi = population_stability_index(ref, cur, bins=10)
    edges = np.unique(np.quantile(ref, np.linspace(0, 1, 11)[1:-1]))
    e = np.bincount(np.searchsorted(edges, ref, side="right"), minlength=10) / len(ref)
    a = np.bincount(np.searchsorted(edges, cur, side="right"), minlength=10) / len(cur)
    assert psi == np.float64(psi)
    np.testing.assert_allclose(psi, entropy(a, e) + entropy(e, a), rtol=1e-9)


def test_psi_near_zero_for_same_distribution_and_large_for_shift():
    rng = np.random.default_rng(2)
    same = population_stability_index(rng.normal(size=20000), rng.normal(size=20000))
    shifted = population_stability_index(rng.normal(size=20000), rng.normal(1.0, 1, size=20000))
    assert same < 0.01
    assert shifted > 0.25


def test_categorical_and_missing_values():
    ref = pd.Series(["a"] * 50 + ["b"] * 50)
    cur = pd.Series(["a"] * 90 + [None] * 10)
    psi = population_stability_index(ref, cur)
    assert np.isfinite(psi) and psi > 0.25
    table = drift_table(pd.DataFrame({"x": ref}), pd.DataFrame({"x": cur}), ["x"])
    assert table.loc[0, "level"] == "large"
