"""Bagged survival trees and random survival forests with delayed entry.

Each tree is grown on a bootstrap sample of *units* (whole histories: a unit
drawn k times gives its rows weight k) by least-squares splits on
delayed-entry martingale residuals (see :mod:`wearcast.models._forest_grow`),
chosen by default on one point per episode (a life's rows up to a failure,
residuals summed, covariates of the closing row); every in-bag row is then
routed down the tree. Each leaf keeps the Nelson–Aalen cumulative hazard of its in-bag rows with
delayed entry, shrunk toward its tree's pooled hazard by ``leaf_prior_units`` (so a
leaf with few rows at risk at some age never reads exactly 0 there), on a bounded
grid of ages (:mod:`wearcast.models._forest_leaves`), stored as float32. The
forest's cumulative hazard is the average over trees of the leaf hazards, joined
linearly between grid ages. Past the oldest failure on record it continues with a
power-law tail fitted to the upper part of the records
(:mod:`wearcast.models._tail`), each leaf scaled by its hazard relative to its
tree's over the ages that tail was fitted on.

``mode="bagging"`` tries every predictor at each split; ``"random_forest"``
tries ``predictors_per_split`` of them (a share of the encoded predictors;
default √p). The risk score is the ensemble cumulative hazard summed over the
grid ages (higher = riskier), the "ensemble mortality" of random survival
forests. Out-of-bag risk and Harrell's C against the number of trees are kept
in ``oob_risk_``, ``oob_concordance_`` and ``oob_curve_``. Details and
references: docs/forest.md.
"""

from __future__ import annotations

import io
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from wearcast import _atomic
from wearcast.exceptions import BundleError, ConfigError, ModelError
from wearcast.models._forest_encode import encode, encoded_names, learn_levels
from wearcast.models._forest_grow import FlatTree, apply_tree, episodes, grow_on_points, route
from wearcast.models._forest_leaves import (
    GroupTerms, RiskIndex, failure_age_grid, grid_column, grid_weights, group_terms, leaf_hazards_indexed,
    leaf_tail_ratio, pooled_cumulative_hazard, pooled_hazard_of_groups, risk_index,
)
from wearcast.models._tail import NO_TAIL, PowerTail, fit_power_tail, sparse_end
from wearcast.models._forest_oob import (
    MAX_SCORED_LIVES, OOBAccumulator, bootstrap_draw, harrell_c, last_rows_of_lives,
)
from wearcast.models.base import SurvivalModel, conditional_failure_probability

MODES = ("random_forest", "bagging")
GROW_ON = ("episodes", "rows")
SETTINGS_FILE = "forest.json"
ARRAYS_FILE = "forest_arrays.npz"
# 2 added the grow_on setting; 3 shrunk leaves, linear between grid ages and the tail.
# Versions 1 and 2 still load and predict as they did (step, no tail).
FORMAT_VERSION = 3
READABLE_VERSIONS = (1, 2, 3)


@dataclass(frozen=True)
class _FitData:
    """Everything a tree needs that does not depend on its bootstrap draw (built once per fit)."""

    X: np.ndarray  # float32 (n_rows, p), C order
    event: np.ndarray  # float64 (n_rows,) 1 = failed
    units: np.ndarray  # int (n_rows,) unit code
    n_units: int
    index: RiskIndex
    lives: np.ndarray  # (n_lives,) last row of each life
    point_rows: np.ndarray | None  # (n_episodes,) closing row of each episode; None when growing on rows
    point_X: np.ndarray | None  # float32 (n_episodes, p) covariates of the closing rows
    point_terms: GroupTerms | None  # the episodes' at-risk starts and stops


@dataclass(frozen=True)
class _GrownTree:
    tree: FlatTree
    leaf_hazard: np.ndarray  # float32 (n_leaves, n_grid)
    tail_ratio: np.ndarray  # float64 (n_leaves,) the leaf's multiple of the forest's tail
    life_risk: np.ndarray  # float64 (n_lives,) the tree's risk at each life's last row
    counts: np.ndarray  # int32 (n_units,) the tree's bootstrap draw


class SurvivalForest(SurvivalModel):
    """Bagged survival trees / random survival forest.

    Settings: ``mode`` ("random_forest" or "bagging"), ``n_trees``,
    ``predictors_per_split`` (share in (0, 1]; None = √p for random_forest),
    ``min_events_per_leaf`` (weighted failures each side of a split),
    ``max_depth``, ``time_grid_points`` (at most this many grid ages),
    ``bootstrap`` (False: every tree sees every unit once; no OOB), ``seed``,
    ``n_jobs`` (threads; results do not depend on it), ``grow_on``
    ("episodes": splits are chosen on one point per episode, the rows of a
    life up to a failure, with the episode's summed residual and its closing
    row's covariates; "rows": on every counting-process row). Leaf hazards
    always use every in-bag row. ``leaf_prior_units``: the weight, in units at
    risk, of the tree's pooled hazard in each leaf's (0: plain Nelson–Aalen).
    """

    name = "forest"

    def __init__(
        self,
        mode: str = "random_forest",
        n_trees: int = 200,
        predictors_per_split: float | None = None,
        min_events_per_leaf: int = 5,
        max_depth: int = 12,
        time_grid_points: int = 200,
        *,
        bootstrap: bool = True,
        seed: int = 0,
        n_jobs: int = 1,
        grow_on: str = "episodes",
        leaf_prior_units: float = 10.0,
    ):
        if mode not in MODES:
            raise ConfigError(f"[model.forest] mode = {mode!r} is not known; use one of {', '.join(MODES)}.")
        if n_trees < 1:
            raise ConfigError(f"[model.forest] n_trees = {n_trees}; a forest needs at least 1 tree.")
        if predictors_per_split is not None and not 0 < predictors_per_split <= 1:
            raise ConfigError(
                f"[model.forest] predictors_per_split = {predictors_per_split}; give a share in (0, 1] "
                "or leave it out for √p."
            )
        if min_events_per_leaf < 1 or max_depth < 0 or time_grid_points < 2:
            raise ConfigError(
                "[model.forest] min_events_per_leaf must be >= 1, max_depth >= 0 and time_grid_points >= 2; "
                f"got {min_events_per_leaf}, {max_depth}, {time_grid_points}."
            )
        if not leaf_prior_units >= 0:
            raise ConfigError(f"[model.forest] leaf_prior_units = {leaf_prior_units}; give a number of units >= 0.")
        if grow_on not in GROW_ON:
            raise ConfigError(f"grow_on = {grow_on!r} is not known; use one of {', '.join(GROW_ON)}.")
        self.mode = mode
        self.grow_on = grow_on
        self.n_trees = int(n_trees)
        self.predictors_per_split = predictors_per_split
        self.min_events_per_leaf = int(min_events_per_leaf)
        self.max_depth = int(max_depth)
        self.time_grid_points = int(time_grid_points)
        self.bootstrap = bool(bootstrap)
        self.seed = int(seed)
        self.n_jobs = int(n_jobs)
        self.leaf_prior_units = float(leaf_prior_units)
        self.interpolation_ = "linear"  # "step" for forests saved before format 3
        self.tail_ = NO_TAIL

    @classmethod
    def from_config(cls, section, seed: int, n_jobs: int = 1) -> "SurvivalForest":
        """Build from a :class:`wearcast.config.ForestSection`."""
        return cls(section.mode, section.n_trees, section.predictors_per_split, section.min_events_per_leaf,
                   section.max_depth, section.time_grid_points, seed=seed, n_jobs=n_jobs,
                   grow_on=section.grow_on, leaf_prior_units=section.leaf_prior_units)

    def settings(self) -> dict:
        return {"mode": self.mode, "n_trees": self.n_trees, "predictors_per_split": self.predictors_per_split,
                "min_events_per_leaf": self.min_events_per_leaf, "max_depth": self.max_depth,
                "time_grid_points": self.time_grid_points, "bootstrap": self.bootstrap,
                "seed": self.seed, "n_jobs": self.n_jobs, "grow_on": self.grow_on,
                "leaf_prior_units": self.leaf_prior_units}

    def unfitted_copy(self, seed: int) -> "SurvivalForest":
        return type(self)(**{**self.settings(), "seed": int(seed)})

    def _max_features(self):
        if self.mode == "bagging":
            return None
        return "sqrt" if self.predictors_per_split is None else float(self.predictors_per_split)

    # -- fitting -----------------------------------------------------------
    def fit(self, table) -> "SurvivalForest":
        """Grow the forest on a :class:`wearcast.LifeTable`; returns self."""
        if table.n_failures == 0:
            raise ModelError("the life table has no failures, so no hazard can be estimated; "
                             "check the failure event kinds in [fleet] failure_kinds.")
        self.covariates_ = tuple(table.covariates)
        self.levels_ = learn_levels(table.X, tuple(table.categorical))
        self.feature_names_ = encoded_names(self.covariates_, self.levels_)
        X = encode(table.X, self.covariates_, self.levels_)
        entry, exit, event = table.entry, table.exit, table.event
        units = table.unit_codes()
        life = table.frame["life"].to_numpy()
        n_units = int(units.max()) + 1
        self.grid_ = failure_age_grid(exit, event, self.time_grid_points)
        # the curve takes over at the grid age at or before the sparse end of the records
        self.tail_ = fit_power_tail(entry, exit, event, anchor=float(
            self.grid_[max(int(grid_column(self.grid_, sparse_end(exit[event]))), 0)]))
        self.interpolation_ = "linear"
        rng = np.random.default_rng(self.seed)
        self.tree_seeds_ = rng.integers(0, 2**63 - 1, size=self.n_trees, dtype=np.int64)
        scoring_seed = int(rng.integers(0, 2**63 - 1))
        lives = last_rows_of_lives(units, life, exit)
        scored = np.arange(len(lives))
        if len(lives) > MAX_SCORED_LIVES:
            scored = np.sort(np.random.default_rng(scoring_seed).choice(len(lives), MAX_SCORED_LIVES, replace=False))
        index = risk_index(entry, exit, event, self.grid_)
        point_rows = point_X = point_terms = None
        if self.grow_on == "episodes":
            point_of_row, point_rows = episodes(units, life, exit, event)
            point_X = np.ascontiguousarray(X[point_rows])
            point_terms = group_terms(index, point_of_row)
        data = _FitData(np.ascontiguousarray(X), np.asarray(event, float), units, n_units, index, lives,
                        point_rows, point_X, point_terms)
        oob = OOBAccumulator(event[lives], exit[lives], units[lives], self.n_trees, scored)
        jobs = (delayed(self._grow_one)(int(s), data) for s in self.tree_seeds_)
        trees, hazards, ratios = [], [], []
        for grown in Parallel(n_jobs=self.n_jobs, prefer="threads", return_as="generator")(jobs):
            trees.append(grown.tree)
            hazards.append(grown.leaf_hazard)
            ratios.append(grown.tail_ratio)
            if self.bootstrap:
                oob.add(grown.life_risk, grown.counts)
        self._set_trees(trees, hazards, ratios)
        self.oob_risk_ = oob.risk() if self.bootstrap else np.full(len(lives), np.nan)
        self.oob_concordance_ = oob.curve[-1][1] if oob.curve else float("nan")
        self.oob_curve_ = pd.DataFrame(oob.curve, columns=["trees", "oob_concordance", "lives_scored"])
        self.n_training_units_ = n_units
        return self

    def _draw(self, seed: int, n_units: int) -> tuple[np.ndarray, int]:
        counts, tree_seed = bootstrap_draw(seed, n_units)
        return (counts if self.bootstrap else np.ones(n_units, np.int32)), tree_seed

    def _grow_one(self, seed: int, data: _FitData) -> _GrownTree:
        counts, tree_seed = self._draw(seed, data.n_units)
        weights = counts[data.units].astype(float)
        # delayed-entry martingale residuals under the tree's pooled Nelson-Aalen
        if data.point_rows is None:
            pooled = pooled_cumulative_hazard(data.index, weights)
            residual = data.event - (pooled[data.index.stop] - pooled[data.index.first])
            points = np.flatnonzero(weights > 0)
            point_X, point_residual, point_rows = np.ascontiguousarray(data.X[points]), residual[points], points
        else:  # an episode's residual: its failure minus the expected failures summed over its rows
            point_weights = counts[data.units[data.point_rows]].astype(float)
            pooled, expected = pooled_hazard_of_groups(data.index, data.point_terms, point_weights)
            points = np.flatnonzero(point_weights > 0)
            point_rows = data.point_rows[points]
            point_X, point_residual = data.point_X[points], data.event[point_rows] - expected[points]
        tree, regressor, node_to_leaf = grow_on_points(  # a failure always closes its episode
            point_X, point_residual, weights[point_rows], data.event[point_rows], max_features=self._max_features(),
            max_depth=self.max_depth, min_events=self.min_events_per_leaf, random_state=tree_seed)
        leaf = route(regressor, node_to_leaf, data.X)
        hazard = leaf_hazards_indexed(data.index, leaf, tree.n_leaves, weights, np.diff(pooled), self.leaf_prior_units)
        tail_ratio = leaf_tail_ratio(hazard, pooled[data.index.grid_at + 1],
                                     int(grid_column(self.grid_, self.tail_.from_age)),
                                     int(grid_column(self.grid_, self.tail_.anchor)))
        life_risk = hazard.sum(axis=1, dtype=np.float64)[leaf[data.lives]]
        return _GrownTree(tree, hazard, tail_ratio, life_risk, counts)

    def _set_trees(self, trees: list[FlatTree], hazards: list[np.ndarray], tail_ratios: list[np.ndarray]) -> None:
        self.trees_ = trees
        self.leaf_hazards_ = hazards
        self.leaf_tail_ratios_ = tail_ratios
        self.leaf_risks_ = [h.sum(axis=1, dtype=np.float64) for h in hazards]

    # -- prediction ----------------------------------------------------------
    def _encode(self, X: pd.DataFrame) -> np.ndarray:
        if not hasattr(self, "trees_"):
            raise ModelError("the forest is not fitted yet; call fit(table) or SurvivalForest.load(folder).")
        return encode(X, self.covariates_, self.levels_)

    def _route(self, X: pd.DataFrame, ages: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Risk score (n,) and ``H(ages[i, j] | x_i)`` (n, k) in one pass of each tree.

        ``ages``: days, shape (n, k).
        """
        Xe = self._encode(X)
        ages = np.asarray(ages, float).reshape(len(Xe), -1)
        risk = np.zeros(len(Xe))
        hazard_at = np.zeros(ages.shape)
        tail_ratio = np.zeros(len(Xe))
        read = self._reader(ages)
        for tree, hazard, leaf_risk, ratio in zip(self.trees_, self.leaf_hazards_, self.leaf_risks_,
                                                  self.leaf_tail_ratios_):
            leaf = apply_tree(tree, Xe)
            risk += leaf_risk[leaf]
            hazard_at += read(hazard, leaf[:, None])
            tail_ratio += ratio[leaf]
        hazard_at += tail_ratio[:, None] * self.tail_.increment(ages)
        return risk / len(self.trees_), hazard_at / len(self.trees_)

    def _reader(self, ages: np.ndarray):
        """``read(hazard, leaf)``: a tree's leaf hazards (n_leaves, m) at ``ages``
        for the rows' leaves ``leaf`` (broadcasting with ``ages``); linear
        between grid ages (0 at age 0), or the step of forests saved before
        format 3. Past the tail's anchor the leaves stay at their anchor value
        (the tail adds the rest)."""
        if self.tail_.active:
            ages = np.minimum(ages, self.tail_.anchor)
        if self.interpolation_ == "step":
            column = grid_column(self.grid_, ages)
            inside = column >= 0
            safe = np.where(inside, column, 0)
            return lambda hazard, leaf: np.where(inside, hazard[leaf, safe], 0.0)
        lo, hi, f = grid_weights(self.grid_, ages)
        lo_in, hi_in = lo > 0, hi > 0
        lo_col, hi_col = np.maximum(lo - 1, 0), np.maximum(hi - 1, 0)

        def read(hazard, leaf):
            low = np.where(lo_in, hazard[leaf, lo_col], 0.0)
            high = np.where(hi_in, hazard[leaf, hi_col], 0.0)
            return low + f * (high - low)
        return read

    def risk_score(self, X: pd.DataFrame) -> np.ndarray:
        """Ensemble cumulative hazard summed over the grid ages, shape (n,)."""
        return self._route(X, np.zeros((len(X), 0)))[0]

    def cumulative_hazard_at(self, X: pd.DataFrame, ages: np.ndarray) -> np.ndarray:
        """``H(age_i | x_i)``, shape (n,); ages in days, shape (n,) (step between grid ages)."""
        ages = np.broadcast_to(np.asarray(ages, float), (len(X),))
        return self._route(X, ages[:, None])[1][:, 0]

    def fail_probabilities(self, X: pd.DataFrame, age: np.ndarray, horizons_days) -> np.ndarray:
        """P(fail within each horizon | working at ``age``), shape (n, H); the trees route ``X`` once."""
        return self.score_units(X, age, horizons_days)[1]

    def score_units(self, X: pd.DataFrame, age: np.ndarray, horizons_days) -> tuple[np.ndarray, np.ndarray]:
        """``(log risk score (n,), P(fail within each horizon) (n, H))`` from one routing pass."""
        age = np.broadcast_to(np.asarray(age, float), (len(X),))
        ends = age[:, None] + np.asarray([float(h) for h in horizons_days])[None, :]
        risk, hazard = self._route(X, np.column_stack([age, ends]))
        p = conditional_failure_probability(hazard[:, :1], hazard[:, 1:])
        return np.log(np.maximum(risk, np.finfo(float).tiny)), p

    def cumulative_hazard(self, X: pd.DataFrame, times: np.ndarray) -> np.ndarray:
        """``H(t_j | x_i)`` on a shared age grid, shape (n, m), float64."""
        Xe = self._encode(X)
        times = np.asarray(times, float)
        read = self._reader(times[None, :])
        out = np.zeros((len(Xe), len(times)))
        tail_ratio = np.zeros(len(Xe))
        for tree, hazard, ratio in zip(self.trees_, self.leaf_hazards_, self.leaf_tail_ratios_):
            leaf = apply_tree(tree, Xe)
            out += read(hazard, leaf[:, None])
            tail_ratio += ratio[leaf]
        out += tail_ratio[:, None] * self.tail_.increment(times)[None, :]
        return out / len(self.trees_)

    def oob_risk(self, table) -> np.ndarray:
        """Recompute the OOB risk of each life of the *training* table from the stored trees.

        Shape (n_lives,), lives in the order of their last rows in the table;
        NaN for a life whose unit was in every bootstrap. Used to check that OOB
        values use only trees that did not see the unit.
        """
        Xe = self._encode(table.X)
        units = table.unit_codes()
        lives = last_rows_of_lives(units, table.frame["life"].to_numpy(), table.exit)
        acc = OOBAccumulator(table.event[lives], table.exit[lives], units[lives], len(self.trees_), np.array([], int))
        acc.marks = set()
        for seed, tree, leaf_risk in zip(self.tree_seeds_, self.trees_, self.leaf_risks_):
            counts, _ = self._draw(int(seed), int(units.max()) + 1)
            acc.add(leaf_risk[apply_tree(tree, Xe[lives])], counts)
        return acc.risk()

    @staticmethod
    def concordance(event: np.ndarray, time: np.ndarray, risk: np.ndarray) -> float:
        """Harrell's C (scikit-survival's ``concordance_index_censored``)."""
        return harrell_c(event, time, risk)

    # -- saving ------------------------------------------------------------
    def save(self, folder: Path) -> list[Path]:
        """Write ``forest.json`` (settings, covariates, levels, OOB curve) and
        ``forest_arrays.npz`` (numeric arrays only; read back with
        ``allow_pickle=False``). Returns the two paths."""
        folder = Path(folder)
        nodes = np.array([len(t.feature) for t in self.trees_], np.int64)
        arrays = {
            "grid": np.asarray(self.grid_, np.float64),
            "tree_seeds": np.asarray(self.tree_seeds_, np.int64),
            "tree_nodes": nodes,
            "feature": np.concatenate([t.feature for t in self.trees_]),
            "threshold": np.concatenate([t.threshold for t in self.trees_]),
            "left": np.concatenate([t.left for t in self.trees_]),
            "right": np.concatenate([t.right for t in self.trees_]),
            "missing_left": np.concatenate([t.missing_left for t in self.trees_]),
            "leaf": np.concatenate([t.leaf for t in self.trees_]),
            "leaf_hazard": np.concatenate(self.leaf_hazards_, axis=0).astype(np.float32),
            "leaf_tail_ratio": np.concatenate(self.leaf_tail_ratios_).astype(np.float64),
        }
        buffer = io.BytesIO()
        np.savez(buffer, **arrays)
        settings = {
            "format_version": FORMAT_VERSION, "model": self.name, "settings": self.settings(),
            "covariates": list(self.covariates_), "levels": self.levels_, "feature_names": self.feature_names_,
            "oob_concordance": self.oob_concordance_, "oob_curve": self.oob_curve_.to_dict(orient="list"),
            "n_training_units": self.n_training_units_, "tail": self.tail_.to_dict(),
        }
        return [_atomic.write_json(folder / SETTINGS_FILE, settings),
                _atomic.write_bytes(folder / ARRAYS_FILE, buffer.getvalue())]

    @classmethod
    def load(cls, folder: Path) -> "SurvivalForest":
        """Read a forest written by :meth:`save`."""
        folder = Path(folder)
        try:
            meta = json.loads((folder / SETTINGS_FILE).read_text(encoding="utf-8"))
            with np.load(folder / ARRAYS_FILE, allow_pickle=False) as data:
                arrays = {k: data[k] for k in data.files}
        except (OSError, ValueError, KeyError) as exc:
            raise BundleError(f"cannot read the forest in {folder}: {exc}. Re-save the model.") from exc
        version = meta.get("format_version")
        if version not in READABLE_VERSIONS:
            raise BundleError(f"{folder / SETTINGS_FILE}: format_version {version!r} is not one this wearcast "
                              f"reads ({', '.join(map(str, READABLE_VERSIONS))}); refit and save with this "
                              "wearcast version, or load it with the version that wrote it.")
        # forests saved before format 3 had plain leaves (prior 0), a step between grid ages and no tail
        model = cls(**{"grow_on": "rows" if version == 1 else "episodes", "leaf_prior_units": 0.0,
                       **meta["settings"]})
        model.interpolation_ = "linear" if version >= 3 else "step"
        try:
            model.tail_ = PowerTail.from_dict(meta["tail"]) if version >= 3 else NO_TAIL
        except (KeyError, TypeError, ValueError) as exc:
            raise BundleError(f"{folder / SETTINGS_FILE}: the tail past the last failure age is damaged ({exc}); "
                              "re-save the model.") from exc
        model.covariates_ = tuple(meta["covariates"])
        model.levels_ = {k: list(v) for k, v in meta["levels"].items()}
        model.feature_names_ = list(meta["feature_names"])
        model.grid_ = arrays["grid"]
        model.tree_seeds_ = arrays["tree_seeds"]
        model.oob_concordance_ = meta["oob_concordance"] if meta["oob_concordance"] is not None else math.nan
        model.oob_curve_ = pd.DataFrame(meta["oob_curve"])
        model.n_training_units_ = meta["n_training_units"]
        node_ends = np.cumsum(arrays["tree_nodes"])
        trees, hazards, ratios, leaf_start = [], [], [], 0
        tail_ratios = arrays.get("leaf_tail_ratio")
        for start, end in zip(np.concatenate([[0], node_ends[:-1]]), node_ends):
            tree = FlatTree(*(arrays[k][start:end] for k in ("feature", "threshold", "left", "right",
                                                                  "missing_left", "leaf")))
            trees.append(tree)
            hazards.append(arrays["leaf_hazard"][leaf_start:leaf_start + tree.n_leaves])
            ratios.append(np.ones(tree.n_leaves) if tail_ratios is None
                          else tail_ratios[leaf_start:leaf_start + tree.n_leaves])
            leaf_start += tree.n_leaves
        model._set_trees(trees, hazards, ratios)
        return model
