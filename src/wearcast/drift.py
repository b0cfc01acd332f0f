"""Covariate drift between the data a model was trained on and this month's fleet.

The population stability index (PSI) compares two distributions binned on the
reference's deciles::

    PSI = sum_b (a_b - e_b) * ln(a_b / e_b)

with ``e_b``, ``a_b`` the reference and current shares in bin ``b``. Reading it
with 0.1 (moderate shift) and 0.25 (large shift) is common practice in credit
and model-risk monitoring, not a statistical test.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

#: PSI above this is reported as a moderate shift (common practice).
PSI_MODERATE = 0.1
#: PSI above this is reported as a large shift (common practice).
PSI_LARGE = 0.25
_FLOOR = 1e-4  # share floor so an empty bin does not give an infinite PSI


def population_stability_index(reference, current, bins: int = 10) -> float:
    """PSI of ``current`` against ``reference`` (1-D numeric or categorical).

    Numeric values are binned on the reference's quantiles (``bins`` bins,
    duplicate edges merged); missing values form their own bin. Categorical
    values (object/category dtype) use one bin per level.
    """
    ref = pd.Series(reference)
    cur = pd.Series(current)
    if len(ref) == 0 or len(cur) == 0:
        return float("nan")
    if isinstance(ref.dtype, pd.CategoricalDtype) or ref.dtype == object or cur.dtype == object:
        ref_s = ref.astype(str).where(ref.notna(), "<missing>")
        cur_s = cur.astype(str).where(cur.notna(), "<missing>")
        levels = sorted(set(ref_s) | set(cur_s))
        e = ref_s.value_counts(normalize=True).reindex(levels, fill_value=0.0).to_numpy()
        a = cur_s.value_counts(normalize=True).reindex(levels, fill_value=0.0).to_numpy()
    else:
        r = ref.to_numpy(dtype=float)
        c = cur.to_numpy(dtype=float)
        finite = r[np.isfinite(r)]
        if len(finite) == 0:
            return float("nan")
        edges = np.unique(np.quantile(finite, np.linspace(0, 1, bins + 1)[1:-1]))
        e = _shares(r, edges)
        a = _shares(c, edges)
    e = np.maximum(e, _FLOOR)
    a = np.maximum(a, _FLOOR)
    return float(np.sum((a - e) * np.log(a / e)))


def _shares(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    missing = ~np.isfinite(values)
    idx = np.searchsorted(edges, values[~missing], side="right")
    counts = np.bincount(idx, minlength=len(edges) + 1).astype(float)
    counts = np.append(counts, missing.sum())
    return counts / max(len(values), 1)


def drift_table(reference: pd.DataFrame, current: pd.DataFrame, columns) -> pd.DataFrame:
    """One row per covariate: ``covariate``, ``psi``, ``level`` (none/moderate/large)."""
    rows = []
    for col in columns:
        psi = population_stability_index(reference[col], current[col])
        level = "large" if psi > PSI_LARGE else "moderate" if psi > PSI_MODERATE else "none"
        rows.append({"covariate": col, "psi": psi, "level": level})
    return pd.DataFrame(rows, columns=["covariate", "psi", "level"])
