"""Choosing the model for a fleet: grouped cross-validation and a parsimony rule.

Candidates, simplest first (this order breaks near-ties):

====  ==================  ==============================================
rank  name                what it is
====  ==================  ==============================================
0     ``cox``             lifelines Cox model, delayed-entry baseline
1     ``boosted_d1``      boosted stumps (additive effects only)
2     ``boosted_d2``      boosted trees of depth 2 (pairwise interactions)
3     ``boosted_d3``      boosted trees of depth 3
4     ``forest_bagging``  bagged survival trees (all predictors per split)
5     ``forest_sqrt``     random survival forest (√p predictors per split)
====  ==================  ==============================================

Rule: each candidate is scored by unit-grouped K-fold cross-validation on a
concordance index: the time-dependent truncation-aware C when the life table
has start/stop rows (each failure against the units at risk at its age, with
the readings in force then), the truncation-aware C on each unit's last row
otherwise (:func:`wearcast.validation.choice_concordance`). A candidate whose
cross-validated expected failure count is off the observed count by more than
``calibration_share`` is not eligible, nor is one whose held-out score was
constant in every fold (a booster that kept no tree: C exactly 0.5 with no
spread, which would otherwise beat any model that is honestly scored). Among eligible candidates whose mean C is within one standard
error of the best, the simplest is chosen — the one-standard-error rule
(Breiman, Friedman, Olshen and Stone 1984, *Classification and Regression
Trees*; Hastie, Tibshirani and Friedman, *The Elements of Statistical
Learning*, 2nd ed., §7.10).

Small fleets: with fewer than ``10 × p`` failures (p covariates) only ``cox``
and ``boosted_d1`` are tried — about ten events per estimated effect is the
usual floor for stable survival regression (Peduzzi et al. 1995, *J Clin
Epidemiol* 48:1503–1510).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

#: Candidate names, simplest first.
CANDIDATE_ORDER = ("cox", "boosted_d1", "boosted_d2", "boosted_d3", "forest_bagging", "forest_sqrt")
SMALL_FLEET_CANDIDATES = ("cox", "boosted_d1")
EVENTS_PER_COVARIATE = 10


#: The C that ranks candidates by default (one row per unit).
DEFAULT_CONCORDANCE = ("c_truncation", "truncation-aware C (one row per unit)")


@dataclass(frozen=True)
class Choice:
    name: str
    reason: str
    candidates: pd.DataFrame  # one row per candidate: c_mean, c_se, calibration, eligible, within_1se
    concordance: str = DEFAULT_CONCORDANCE[0]  # the column c_mean was taken from
    concordance_words: str = DEFAULT_CONCORDANCE[1]  # the same in words, for people


def candidate_names(n_failures: int, n_covariates: int) -> tuple[tuple[str, ...], str | None]:
    """Which candidates to evaluate, and why the list was cut (None if not)."""
    floor = EVENTS_PER_COVARIATE * max(n_covariates, 1)
    if n_failures < floor:
        return SMALL_FLEET_CANDIDATES, (
            f"only {n_failures} failures for {n_covariates} covariates (fewer than "
            f"{EVENTS_PER_COVARIATE} per covariate), so only the Cox model and boosted stumps were tried"
        )
    return CANDIDATE_ORDER, None


def choose(summary: pd.DataFrame, *, calibration_share: float = 0.25, note: str | None = None,
           concordance: tuple[str, str] = DEFAULT_CONCORDANCE) -> Choice:
    """Apply the constant-score and calibration guards and the one-standard-error rule.

    ``summary`` is indexed by candidate name with columns ``c_mean``, ``c_se``
    (cross-validated C and its standard error over folds), ``expected_failures``
    and ``observed_failures`` (summed over held-out folds) and optionally
    ``constant_score`` (bool: the held-out score was constant in every fold).
    ``concordance``: ``(column, words)`` of the C in ``c_mean``; the words go
    into the reason and the column into the result.
    """
    column, words = concordance
    table = summary.copy()
    order = {name: i for i, name in enumerate(CANDIDATE_ORDER)}
    table["simplicity_rank"] = [order.get(n, len(order)) for n in table.index]
    observed = table["observed_failures"].astype(float)
    ratio = table["expected_failures"].astype(float) / observed.where(observed > 0, np.nan)
    table["calibration_ratio"] = ratio
    constant = (table["constant_score"].fillna(False).astype(bool) if "constant_score" in table
                else pd.Series(False, index=table.index))
    table["constant_score"] = constant
    table["eligible"] = ratio.sub(1.0).abs().le(calibration_share) & table["c_mean"].notna() & ~constant
    dropped = [str(n) for n in table.index[constant]]
    if dropped:
        extra = (f"{', '.join(dropped)} gave every held-out unit the same score (no tree kept), "
                 "so C is 0.5 by construction and not eligible")
        note = extra if note is None else f"{note}; {extra}"
    if not table["eligible"].any():
        # Nothing is calibrated well enough: fall back to the best-calibrated model that ranks
        # units at all (any model if none does), say so.
        off = (ratio - 1).abs().fillna(np.inf)
        fallback = (off[~constant] if (~constant).any() else off).idxmin()
        table["within_1se"] = False
        reason = (
            f"no candidate's expected failure count was within {calibration_share:.0%} of the observed; "
            f"chose {fallback}, the best calibrated (expected/observed {ratio[fallback]:.2f}). Treat the "
            "probabilities with extra caution."
        )
        return Choice(fallback, _with_note(reason, note), table.sort_values("simplicity_rank"), column, words)
    eligible = table[table["eligible"]]
    best = eligible["c_mean"].idxmax()
    threshold = eligible.loc[best, "c_mean"] - eligible.loc[best, "c_se"]
    table["within_1se"] = table["eligible"] & (table["c_mean"] >= threshold)
    chosen = table[table["within_1se"]].sort_values("simplicity_rank").index[0]
    if chosen == best:
        reason = (
            f"chose {chosen}: highest cross-validated {words} "
            f"({table.loc[chosen, 'c_mean']:.3f} ± {table.loc[chosen, 'c_se']:.3f}) and no simpler model "
            "within one standard error."
        )
    else:
        reason = (
            f"chose {chosen} (C {table.loc[chosen, 'c_mean']:.3f}): the simplest model within one standard "
            f"error of the best, {best} (C {table.loc[best, 'c_mean']:.3f} ± {table.loc[best, 'c_se']:.3f}); "
            f"C is the cross-validated {words}."
        )
    return Choice(chosen, _with_note(reason, note), table.sort_values("simplicity_rank"), column, words)


def _with_note(reason: str, note: str | None) -> str:
    return reason if note is None else f"{reason} Note: {note}."


def pinned(name: str, summary: pd.DataFrame | None = None,
           concordance: tuple[str, str] = DEFAULT_CONCORDANCE) -> Choice:
    """The config pins a model: no selection, say so (``concordance`` names the C in ``c_mean``)."""
    table = summary if summary is not None else pd.DataFrame(index=pd.Index([name]))
    return Choice(name, f"{name} is pinned in the config (model.choose); no selection was made.", table,
                  *concordance)


def as_dict(choice: Choice) -> dict:
    """JSON-able view for metrics.json."""
    cand = choice.candidates.reset_index(names="candidate")
    return {
        "chosen": choice.name,
        "reason": choice.reason,
        "concordance": choice.concordance,
        "concordance_words": choice.concordance_words,
        "candidates": cand.replace({np.nan: None}).to_dict(orient="records"),
    }


__all__ = ["Choice", "choose", "candidate_names", "pinned", "as_dict", "CANDIDATE_ORDER"]
