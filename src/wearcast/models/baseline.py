"""The Breslow baseline cumulative hazard, with delayed entry and strata.

A risk-score model (Cox, boosted trees) gives each row a log relative risk
``eta``; the baseline turns it into a cumulative hazard on the age scale::

    H(a | eta) = H0(a) * exp(eta)

``H0`` is Breslow's estimator over the rows' ``(entry, exit]`` risk sets, so a
unit that entered observation late (left truncation) only counts from its entry
age on. With all ``eta = 0`` it is the Nelson–Aalen estimator. ``H0`` is a right-
continuous step function (or joined linearly between failure ages): 0 before
the first failure age. Past the last one (:attr:`BaselineHazard.max_age`) each
stratum continues with a power-law tail fitted to the upper part of its records
(:mod:`wearcast.models._tail`), so a unit older than every recorded failure is
never given a zero probability; callers flag such ages as resting on the tail.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from wearcast.models._cox_kernels import baseline_hazard_increments, prepare_risk_sets
from wearcast.models._hazard import breslow_cumulative_hazard, linear_at, step_at
from wearcast.models._tail import NO_TAIL, PowerTail, fit_power_tail
from wearcast.models.base import conditional_failure_probability

_FORMAT = "wearcast.baseline_hazard"
_VERSION = 2  # 2 adds the tail past the last failure age; 1 (no tail) still loads
_SINGLE = "all"  # the label of the only stratum when no strata are given


def _labels(strata, shape) -> np.ndarray:
    """Strata labels as strings (the keys used in saved files)."""
    return np.broadcast_to(np.asarray(strata).astype(str), shape)


def _rows(entry, exit, event, eta, weights, strata):
    """The rows as flat arrays: ages, events, scores (default 0), weights (default 1), stratum labels."""
    entry = np.asarray(entry, float).ravel()
    exit = np.asarray(exit, float).ravel()
    event = np.asarray(event, bool).ravel()
    n = exit.size
    eta = np.zeros(n) if eta is None else np.asarray(eta, float).ravel()
    weights = np.ones(n) if weights is None else np.asarray(weights, float).ravel()
    labels = np.full(n, _SINGLE) if strata is None else _labels(strata, (n,))
    return entry, exit, event, eta, weights, labels


@dataclass
class BaselineHazard:
    """Per-stratum step functions ``H0``: ``ages[s]`` (k,) days and ``cumhaz[s]`` (k,).

    Strata are keyed by ``str(label)``; without strata the only key is ``"all"``.
    ``ties`` records the estimator: "breslow" (default) or "efron" (tie-corrected).
    """

    ages: dict[str, np.ndarray] = field(default_factory=dict)
    cumhaz: dict[str, np.ndarray] = field(default_factory=dict)
    ties: str = "breslow"
    #: "step" (right-continuous, jumps at failure ages) or "linear" (joined
    #: linearly between failure ages; equal at them; see _hazard.linear_at).
    interpolation: str = "step"
    #: Per stratum, the power-law continuation past its last failure age
    #: (absent: flat, the behaviour of baselines saved before tails existed).
    tails: dict[str, PowerTail] = field(default_factory=dict)

    def __post_init__(self):
        if self.interpolation not in ("step", "linear"):
            raise ValueError(f"interpolation must be 'step' or 'linear'; got {self.interpolation!r}")

    # -- estimation ---------------------------------------------------------
    @classmethod
    def estimate(
        cls,
        entry: np.ndarray,
        exit: np.ndarray,
        event: np.ndarray,
        eta: np.ndarray | None = None,
        *,
        weights: np.ndarray | None = None,
        strata: np.ndarray | None = None,
        ties: str = "breslow",
        interpolation: str = "step",
    ) -> "BaselineHazard":
        """Estimate from rows: ``entry``/``exit`` ages (days), ``event`` (bool),
        ``eta`` log relative risk (default 0), case ``weights``, ``strata``
        labels; all shape (n,). Returns a new object."""
        return cls(ties=ties, interpolation=interpolation).fit(entry, exit, event, eta, weights=weights,
                                                               strata=strata)

    @classmethod
    def from_risk_sets(cls, rs, eta: np.ndarray, *, interpolation: str = "step") -> "BaselineHazard":
        """Estimate from risk sets already prepared for fitting
        (:func:`prepare_risk_sets`, unstratified) and the rows' ``eta`` (n,);
        saves sorting the rows again. Same values as :meth:`estimate` with the
        risk sets' ties and weights."""
        if rs.stratum_labels.size != 1:
            raise ValueError("from_risk_sets takes unstratified risk sets; use estimate(..., strata=) instead")
        return cls(ties=rs.ties, interpolation=interpolation)._set_from_risk_sets(rs, eta, [_SINGLE])

    def _set_from_risk_sets(self, rs, eta: np.ndarray, names) -> "BaselineHazard":
        """Cumulative hazard per stratum from prepared risk sets; ``names[code]`` keys stratum ``code``."""
        increments = baseline_hazard_increments(rs, eta)
        for code, name in enumerate(names):
            in_stratum = rs.fail_stratum == code
            self.ages[name] = rs.fail_age[in_stratum]
            self.cumhaz[name] = np.cumsum(increments[in_stratum])
        return self

    def fit(self, entry, exit, event, eta=None, *, weights=None, strata=None, ties=None) -> "BaselineHazard":
        """Estimate in place (see :meth:`estimate`); returns self."""
        ties = self.ties if ties is None else ties
        if ties not in ("breslow", "efron"):
            raise ValueError(f"ties must be 'breslow' or 'efron'; got {ties!r}")
        entry, exit, event, eta, weights, labels = _rows(entry, exit, event, eta, weights, strata)
        n = exit.size
        self.ages, self.cumhaz, self.ties = {}, {}, ties
        if ties == "breslow":
            # Shift before exp so large scores cannot overflow; undo on the hazard.
            shift = float(eta.max()) if n else 0.0
            risk = np.exp(eta - shift)
            for label in np.unique(labels):
                keep = labels == label
                ages, cumhaz = breslow_cumulative_hazard(
                    entry[keep], exit[keep], event[keep], risk=risk[keep], weights=weights[keep]
                )
                self.ages[str(label)] = ages
                self.cumhaz[str(label)] = cumhaz * np.exp(-shift)
        else:
            rs = prepare_risk_sets(entry, exit, event, strata=labels, weights=weights, ties="efron")
            self._set_from_risk_sets(rs, eta, [str(label) for label in rs.stratum_labels])
        return self.fit_tails(entry, exit, event, eta, weights=weights, strata=labels)

    def fit_tails(self, entry, exit, event, eta=None, *, weights=None, strata=None) -> "BaselineHazard":
        """Fit each stratum's tail past its last failure age (:func:`fit_power_tail`)
        on the same rows and scores as the steps; returns self."""
        entry, exit, event, eta, weights, labels = _rows(entry, exit, event, eta, weights, strata)
        self.tails = {}
        for label in np.unique(labels):
            keep = labels == label
            self.tails[str(label)] = fit_power_tail(entry[keep], exit[keep], event[keep], eta[keep], weights[keep])
        return self

    # -- evaluation ---------------------------------------------------------
    @property
    def strata(self) -> list[str]:
        return sorted(self.ages)

    @property
    def max_age(self) -> float:
        """The last failure age (days) over all strata; past it ``H0`` rests on the tails."""
        last = [float(a[-1]) for a in self.ages.values() if a.size]
        return max(last) if last else 0.0

    def max_age_of(self, stratum) -> float:
        """The last failure age (days) in one stratum (0 when it had none)."""
        ages = self.ages[self._key(stratum)]
        return float(ages[-1]) if ages.size else 0.0

    def _key(self, stratum) -> str:
        key = str(stratum)
        if key not in self.ages:
            raise ValueError(
                f"stratum {key!r} was not in the data the baseline hazard was estimated on; "
                f"known strata: {', '.join(self.strata)}"
            )
        return key

    def at(self, ages: np.ndarray, strata=None) -> np.ndarray:
        """``H0(age)``, same shape as ``ages`` (days); ``strata`` broadcasts with ``ages``.

        The step estimate up to each stratum's tail anchor, the fitted tail
        past it. Without ``strata`` the baseline must have a single stratum.
        """
        return self._at(ages, strata, with_tail=True)

    def steps_at(self, ages: np.ndarray, strata=None) -> np.ndarray:
        """The Breslow / Nelson–Aalen estimate itself at ``ages`` (no tail: flat
        after the last failure age); shapes as :meth:`at`."""
        return self._at(ages, strata, with_tail=False)

    def _at(self, ages, strata, with_tail: bool) -> np.ndarray:
        ages = np.asarray(ages, float)
        if strata is None:
            if len(self.ages) != 1:
                raise ValueError(
                    f"this baseline hazard has {len(self.ages)} strata ({', '.join(self.strata)}); pass strata="
                )
            (key,) = self.ages
            return self._evaluate(key, ages, with_tail)
        labels = _labels(strata, np.broadcast_shapes(np.shape(strata), ages.shape))
        ages = np.broadcast_to(ages, labels.shape)
        out = np.zeros(labels.shape)
        for label in np.unique(labels):
            mask = labels == label
            key = self._key(label)
            out[mask] = self._evaluate(key, ages[mask], with_tail)
        return out

    def _evaluate(self, key: str, query, with_tail: bool = True):
        ages, cumhaz = self.ages[key], self.cumhaz[key]
        tail = self.tails.get(key) if with_tail else None
        tail = tail if tail is not None and tail.active else None
        upto = query if tail is None else np.minimum(query, tail.anchor)  # the curve takes over there
        steps = linear_at(ages, cumhaz, upto) if self.interpolation == "linear" else step_at(ages, cumhaz, upto)
        return steps if tail is None else steps + tail.increment(query)

    def tail_of(self, stratum=None) -> PowerTail:
        """The tail of one stratum (the only one when ``stratum`` is None); :data:`NO_TAIL` if it has none."""
        key = next(iter(self.ages)) if stratum is None and len(self.ages) == 1 else self._key(stratum)
        return self.tails.get(key, NO_TAIL)

    def cumulative_hazard_at(self, eta: np.ndarray, ages: np.ndarray, strata=None) -> np.ndarray:
        """``H0(age) * exp(eta)``; ``eta`` and ``ages`` broadcast (e.g. (n, 1) with (m,) gives (n, m))."""
        with np.errstate(over="ignore"):
            return self.at(ages, strata) * np.exp(np.asarray(eta, float))

    def survival(self, eta: np.ndarray, ages: np.ndarray, strata=None) -> np.ndarray:
        """``exp(-H0(age) exp(eta))``, broadcast like :meth:`cumulative_hazard_at`; in [0, 1]."""
        return np.exp(-self.cumulative_hazard_at(eta, ages, strata))

    def fail_probability(self, eta: np.ndarray, age: np.ndarray, horizon_days: float, strata=None) -> np.ndarray:
        """P(fail in ``(age, age + horizon_days]`` | working at ``age``), broadcast shape."""
        age = np.asarray(age, float)
        return conditional_failure_probability(
            self.cumulative_hazard_at(eta, age, strata),
            self.cumulative_hazard_at(eta, age + float(horizon_days), strata),
        )

    # -- saving -------------------------------------------------------------
    def to_dict(self) -> dict:
        """JSON-able description; floats are written at full precision (exact round trip)."""
        return {
            "format": _FORMAT,
            "version": _VERSION,
            "ties": self.ties,
            "interpolation": self.interpolation,
            "strata": [
                {
                    "label": key,
                    "ages_days": [float(a) for a in self.ages[key]],
                    "cumulative_hazard": [float(h) for h in self.cumhaz[key]],
                    **({"tail": self.tails[key].to_dict()} if key in self.tails else {}),
                }
                for key in self.strata
            ],
        }

    @classmethod
    def from_dict(cls, data: dict) -> "BaselineHazard":
        """Inverse of :meth:`to_dict`; raises ``ValueError`` on a foreign or damaged dict."""
        if not isinstance(data, dict) or data.get("format") != _FORMAT:
            raise ValueError(f"not a saved baseline hazard (expected format {_FORMAT!r})")
        if data.get("version") not in (1, _VERSION):
            raise ValueError(f"baseline hazard version {data.get('version')!r} is not supported (expected {_VERSION})")
        out = cls(ties=str(data.get("ties", "breslow")), interpolation=str(data.get("interpolation", "step")))
        for item in data["strata"]:
            ages = np.asarray(item["ages_days"], float)
            cumhaz = np.asarray(item["cumulative_hazard"], float)
            if ages.shape != cumhaz.shape or (np.diff(ages) <= 0).any() or (np.diff(cumhaz) < 0).any():
                raise ValueError(f"baseline hazard stratum {item.get('label')!r} is damaged")
            out.ages[str(item["label"])] = ages
            out.cumhaz[str(item["label"])] = cumhaz
            if "tail" in item:
                out.tails[str(item["label"])] = PowerTail.from_dict(item["tail"])
        return out
