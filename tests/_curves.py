"""Shared checks for survival outputs (common practice, as scikit-survival's
tests check every predicted curve).

Import from a test module with ``from _curves import assert_valid_survival``
(pytest puts ``tests/`` on ``sys.path``; there is no ``tests/__init__.py``).
"""

from __future__ import annotations

import numpy as np


def assert_valid_survival(curves, *, atol: float = 1e-12) -> None:
    """``curves``: shape (n, m) (rows = units, columns = increasing times) or (m,).

    Checks: finite, within [0, 1], non-increasing along time.
    """
    curves = np.atleast_2d(np.asarray(curves, dtype=float))
    assert curves.size > 0, "no survival values to check"
    assert np.isfinite(curves).all(), "survival contains NaN or inf"
    assert (curves >= -atol).all() and (curves <= 1 + atol).all(), (
        f"survival outside [0, 1]: min {curves.min()}, max {curves.max()}"
    )
    steps = np.diff(curves, axis=1)
    assert (steps <= atol).all(), f"survival increases along time by up to {steps.max()}"


def assert_valid_probability(p, *, atol: float = 1e-12) -> None:
    """Any shape: finite and within [0, 1]."""
    p = np.asarray(p, dtype=float)
    assert p.size > 0, "no probabilities to check"
    assert np.isfinite(p).all(), "probability contains NaN or inf"
    assert (p >= -atol).all() and (p <= 1 + atol).all(), f"probability outside [0, 1]: min {p.min()}, max {p.max()}"
