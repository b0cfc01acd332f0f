"""wearcast's model choice against peers on real datasets, and the choice's runtime.

Run: ``.venv/bin/python bench/bench_choice.py`` (all datasets, then the
10,000-unit runtime; rewrites the "choice" section of bench/README.md), or
e.g. ``--datasets rossi veterans --no-runtime --no-readme`` for a quick look.

Part 1, real data. Each dataset that lifelines or scikit-survival ships becomes
a wearcast :class:`~wearcast.lifetable.LifeTable` (times converted to days:
weeks × 7, years × 365.25, so the validation horizons of 90 and 365 days mean
what they say). Folds: ``wearcast.validation.grouped_folds(table, 5, seed)``
(all rows of a unit in one fold). On each fold:

* wearcast: ``wearcast.fitting.fit_models`` on the training part only (its
  own inner unit-grouped CV over the candidates, calibration guard,
  one-standard-error rule, then the chosen model fitted on the whole training
  part), with the light settings of :data:`LIGHT`; the chosen model's risk
  score is scored on the held-out fold;
* peers fitted on the same training units: lifelines ``CoxPHFitter``
  (penalizer 0.01; with ``entry_col`` on every row where the dataset has
  delayed entry or start/stop rows, which is the time-varying Cox partial
  likelihood), scikit-survival ``GradientBoostingSurvivalAnalysis``
  (100 trees, otherwise defaults), scikit-survival ``RandomSurvivalForest``
  (100 trees, min_samples_leaf 15, max_features "sqrt") and XGBoost
  ``survival:cox`` (200 trees, depth 3, eta 0.05). The three tree peers
  cannot take entry ages: they are trained on one row per unit (first entry
  → last exit, last row's covariates) and treat every unit as observed from
  age 0.

Scoring, the same for all: one row per held-out unit
(``wearcast.validation.score_episodes``: the unit's last row with its first
entry age), Harrell's C (``wearcast.metrics.harrell_c``, entry ignored) and the
truncation-aware C (``wearcast.metrics.truncation_aware_c``). Equal when no
unit enters late. For start/stop data also a time-dependent C: every held-out
row scored with the covariates in force on it and each failure compared with
the rows at risk at its age (the truncation-aware C on the rows), which no
model can win with a patient's later status.

Part 2, runtime: the invented 10,000-unit scenario (seed 7) loaded through
``wearcast.io.load_export``, then ``fit_models`` with the default [validation]
and [model] sections (not the scenario config's lighter ones). The split is
measured by wrapping, inside this script only, the models' fit/predict
methods and the stage functions ``fitting.fit_models`` calls.
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import datetime as dt
import json
import os
import platform
import sys
import tempfile
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import write_section  # noqa: E402

import wearcast.fitting as fitting  # noqa: E402
from wearcast.config import ModelSection, ValidationSection, config_from_dict, load_config  # noqa: E402
from wearcast.io import load_export  # noqa: E402
from wearcast.lifetable import LifeTable  # noqa: E402
from wearcast.metrics import harrell_c, truncation_aware_c  # noqa: E402
from wearcast.scenario import generate_scenario  # noqa: E402
from wearcast.selection import CANDIDATE_ORDER  # noqa: E402
from wearcast.validation import grouped_folds, score_episodes, split_fold  # noqa: E402

SEED = 20260701
K_OUTER = 5
TARGET_GAP = 0.01
RUNTIME_TARGET_S = 120.0

#: Light wearcast settings for part 1 (small data; speed).
LIGHT = {
    "validation": {"folds": 5, "bootstrap": 20},
    "model": {"fit": [], "forest": {"n_trees": 100}, "boosted": {"max_trees": 500, "learning_rate": 0.05}},
}

YEAR = 365.25


# -- datasets --------------------------------------------------------------------------
@dataclass(frozen=True)
class Dataset:
    name: str
    library: str
    source: str
    entry: str  # "none", "delayed" or "start/stop"
    load: Callable[[], tuple[pd.DataFrame, list[str], list[str]]]
    note: str = ""  # what a reader should know about the data when judging the gap


def _binary(frame: pd.DataFrame, cols) -> pd.DataFrame:
    for c in cols:
        frame[c] = frame[c].astype(str).map({"0": 0.0, "1": 1.0, "no": 0.0, "yes": 1.0,
                                              "standard": 0.0, "test": 1.0}).astype(float)
    return frame


def _sksurv(loader, time_field, event_field):
    X, y = loader()
    frame = X.copy()
    frame["exit_age"] = y[time_field].astype(float)
    frame["failed"] = y[event_field].astype(bool)
    return frame


def load_rossi():
    from lifelines.datasets import load_rossi as f

    d = f()
    cov = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]
    out = d[cov].astype(float).assign(unit_id=np.arange(len(d)), entry_age=0.0,
                                      exit_age=d["week"] * 7.0, failed=d["arrest"].astype(bool))
    return out, cov, []


def load_stanford():
    from lifelines.datasets import load_stanford_heart_transplants as f

    d = f()
    cov = ["age", "year", "surgery", "transplant"]
    out = d[cov].astype(float).assign(unit_id=d["id"], entry_age=d["start"].astype(float),
                                      exit_age=d["stop"].astype(float), failed=d["event"].astype(bool))
    return out, cov, []


def load_stanford_baseline():
    """Diagnostic: one row per patient, covariates known at acceptance only (no transplant)."""
    frame, _, _ = load_stanford()
    frame = frame.sort_values(["unit_id", "entry_age"])
    lives = frame.groupby("unit_id", sort=False)
    cov = ["age", "year", "surgery"]
    out = lives[cov].first().assign(entry_age=0.0, exit_age=lives["exit_age"].last(),
                                    failed=lives["failed"].last()).reset_index()
    return out, cov, []


def load_macs():
    from lifelines.datasets import load_multicenter_aids_cohort_study as f

    d = f().reset_index(drop=True)
    out = pd.DataFrame({"unit_id": np.arange(len(d)), "entry_age": d["W"] * YEAR, "exit_age": d["T"] * YEAR,
                        "failed": d["D"].astype(bool), "aids_year": d["AIDSY"].astype(float)})
    return out, ["aids_year"], []


def load_gbsg2():
    from sksurv.datasets import load_gbsg2 as f

    frame = _binary(_sksurv(f, "time", "cens"), ["horTh"])
    frame["menostat"] = (frame["menostat"].astype(str) == "Post").astype(float)
    cov = ["age", "estrec", "horTh", "menostat", "pnodes", "progrec", "tgrade", "tsize"]
    return frame.assign(unit_id=np.arange(len(frame)), entry_age=0.0), cov, ["tgrade"]


def load_whas500():
    from sksurv.datasets import load_whas500 as f

    frame = _sksurv(f, "lenfol", "fstat")
    binary = ["afb", "av3", "chf", "cvd", "gender", "miord", "mitype", "sho"]
    frame = _binary(frame, binary)
    cov = ["age", "bmi", "diasbp", "hr", "los", "sysbp", *binary]
    return frame.assign(unit_id=np.arange(len(frame)), entry_age=0.0), cov, []


def load_veterans():
    from sksurv.datasets import load_veterans_lung_cancer as f

    frame = _binary(_sksurv(f, "Survival_in_days", "Status"), ["Prior_therapy", "Treatment"])
    cov = ["Age_in_years", "Karnofsky_score", "Months_from_Diagnosis", "Prior_therapy", "Treatment", "Celltype"]
    return frame.assign(unit_id=np.arange(len(frame)), entry_age=0.0), cov, ["Celltype"]


def load_lung():
    from lifelines.datasets import load_lung as f

    d = f().drop(columns=["inst"]).dropna().reset_index(drop=True)
    cov = ["age", "sex", "ph.ecog", "ph.karno", "pat.karno", "meal.cal", "wt.loss"]
    out = d[cov].astype(float).assign(unit_id=np.arange(len(d)), entry_age=0.0,
                                      exit_age=d["time"].astype(float), failed=d["status"].astype(bool))
    return out, cov, []


def load_aids():
    from sksurv.datasets import load_aids as f

    frame = _sksurv(f, "time", "censor")
    frame = _binary(frame, ["hemophil", "strat2", "tx"])
    frame["sex"] = (frame["sex"].astype(str) == "2").astype(float)
    frame["karnof"] = frame["karnof"].astype(str).astype(float)
    frame = frame.drop(columns=["txgrp"])  # txgrp repeats tx with the study arms split finer
    cov = ["age", "cd4", "priorzdv", "hemophil", "strat2", "tx", "sex", "karnof", "ivdrug", "raceth"]
    return frame.assign(unit_id=np.arange(len(frame)), entry_age=0.0), cov, ["ivdrug", "raceth"]


def load_flchain():
    from sksurv.datasets import load_flchain as f

    frame = _sksurv(f, "futime", "death")
    # chapter (cause of death) is filled only for those who died: it would leak the outcome.
    frame = frame.drop(columns=["chapter"]).dropna().reset_index(drop=True)
    frame = _binary(frame, ["mgus"])
    frame["sex"] = (frame["sex"].astype(str) == "M").astype(float)
    frame["sample.yr"] = frame["sample.yr"].astype(str).astype(float)
    frame["exit_age"] = frame["exit_age"].clip(lower=0.5)  # a few follow-up times of 0 days
    cov = ["age", "creatinine", "kappa", "lambda", "mgus", "sex", "sample.yr", "flc.grp"]
    return frame.assign(unit_id=np.arange(len(frame)), entry_age=0.0), cov, ["flc.grp"]


DATASETS = {d.name: d for d in [
    Dataset("rossi", "lifelines", "Rossi, Berk and Lenihan 1980, *Money, Work, and Crime* (recidivism; weeks → days)",
            "none", load_rossi),
    Dataset("stanford_heart", "lifelines", "Crowley and Hu 1977, JASA 72:27–36 (Stanford heart transplant; "
            "start/stop rows, transplant status changes)", "start/stop", load_stanford,
            "Scored on the last row's covariates, so a held-out patient's transplant status is the one at the "
            "end of follow-up. Patients had to survive the wait to be transplanted, so 'transplant = 1 at the "
            "end' marks long survivors. The tree peers, trained on one row per patient from day 0, learn that "
            "survivor effect and the scoring rewards it. wearcast's models and the lifelines Cox model use the "
            "start/stop rows, where transplant counts only from the transplant day (its effect on the hazard "
            "is small). The stanford_baseline row below drops transplant and shows the gap without it."),
    Dataset("stanford_baseline", "lifelines", "Crowley and Hu 1977 (as above; diagnostic: one row per patient, "
            "covariates at acceptance, transplant left out)", "none", load_stanford_baseline),
    Dataset("macs", "lifelines", "Multicenter AIDS Cohort Study as in Cole and Hudgens 2010, AIDS 24:2423–31 "
            "(entry W, exit T years after diagnosis → days)", "delayed", load_macs,
            "The only covariate, the calendar date of diagnosis (AIDSY), almost fixes the entry age: AIDSY + W "
            "= 1995.0 for over half the patients (everyone joined the study in 1995 or later). Peers that "
            "ignore entry read an early diagnosis as a long life (corr(AIDSY, T) = −0.86), which is survivor "
            "bias from the late entry. 78 patients and 27 deaths: about 15 units and 5 deaths per held-out "
            "fold, so the fold-to-fold spread is about ±0.1."),
    Dataset("gbsg2", "scikit-survival", "Schumacher et al. 1994, J Clin Oncol 12:2086–2093 (GBSG2 breast cancer)",
            "none", load_gbsg2),
    Dataset("whas500", "scikit-survival", "Hosmer, Lemeshow and May 2008, *Applied Survival Analysis* 2nd ed. "
            "(Worcester Heart Attack Study)", "none", load_whas500),
    Dataset("veterans", "scikit-survival", "Kalbfleisch and Prentice, *The Statistical Analysis of Failure Time "
            "Data* (veterans' lung cancer trial)", "none", load_veterans),
    Dataset("lung", "lifelines", "Loprinzi et al. 1994, J Clin Oncol 12:601–607 (NCCTG lung cancer; rows with "
            "missing values dropped)", "none", load_lung),
    Dataset("aids", "scikit-survival", "Hosmer, Lemeshow and May 2008 (ACTG 320 AIDS trial)", "none", load_aids),
    Dataset("flchain", "scikit-survival", "Dispenzieri et al. 2012, Mayo Clin Proc 87:512–523 (serum free light "
            "chain; chapter column and rows with missing creatinine dropped)", "none", load_flchain),
]}
DEFAULT_DATASETS = ["rossi", "stanford_heart", "stanford_baseline", "macs", "gbsg2", "whas500", "veterans", "lung", "aids"]


def life_table(ds: Dataset) -> LifeTable:
    frame, cov, cat = ds.load()
    return LifeTable.from_frame(frame, cov, cat, source=ds.name)


# -- peers ----------------------------------------------------------------------------
def design(table: LifeTable) -> pd.DataFrame:
    """Numeric design matrix for the peers (categoricals one-hot, first level dropped), all rows."""
    X = pd.get_dummies(table.X, columns=list(table.categorical), drop_first=True, dtype=float)
    X.columns = [str(c).replace(".", "_").replace(" ", "_") for c in X.columns]
    return X.astype(float)


def _sk_y(exit_, event):
    from sksurv.util import Surv

    return Surv.from_arrays(event=event.astype(bool), time=exit_.astype(float))


def peer_models(table: LifeTable, X: pd.DataFrame, train_rows, train_ep, entry_used: bool,
                seed: int) -> dict[str, Callable[[np.ndarray], np.ndarray]]:
    """Each peer fitted on the training rows; name -> risk (higher = fails sooner) of given rows of X."""
    from lifelines import CoxPHFitter
    from sksurv.ensemble import GradientBoostingSurvivalAnalysis, RandomSurvivalForest
    from xgboost import XGBRegressor

    seeds = np.random.default_rng(seed).integers(0, 2**31 - 1, size=3)
    # lifelines Cox on every training row, with entry ages where the data has them.
    rows = X.iloc[train_rows].copy()
    keep = rows.columns[rows.std(ddof=0).to_numpy() > 0]
    rows = rows[keep].assign(entry_age=table.entry[train_rows], exit_age=table.exit[train_rows],
                             failed=table.event[train_rows].astype(int))
    if not entry_used:
        rows = rows.drop(columns="entry_age")  # else lifelines would take it as a covariate
    cph = CoxPHFitter(penalizer=0.01)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cph.fit(rows, duration_col="exit_age", event_col="failed",
                entry_col="entry_age" if entry_used else None)
    # Tree peers: one row per training unit, entry ignored.
    Xtr = X.iloc[train_ep.rows].to_numpy()
    y = _sk_y(train_ep.exit, train_ep.event)
    gb = GradientBoostingSurvivalAnalysis(n_estimators=100, random_state=int(seeds[0])).fit(Xtr, y)
    rsf = RandomSurvivalForest(n_estimators=100, min_samples_leaf=15, max_features="sqrt", n_jobs=2,
                               random_state=int(seeds[1])).fit(Xtr, y)
    label = np.where(train_ep.event, train_ep.exit, -train_ep.exit)
    xgb = XGBRegressor(objective="survival:cox", n_estimators=200, max_depth=3, learning_rate=0.05, n_jobs=2,
                       random_state=int(seeds[2])).fit(Xtr, label)
    return {
        "lifelines_cox": lambda r: np.asarray(cph.predict_partial_hazard(X.iloc[r][keep]), float).ravel(),
        "sksurv_gbsa": lambda r: gb.predict(X.iloc[r].to_numpy()),
        "sksurv_rsf": lambda r: rsf.predict(X.iloc[r].to_numpy()),
        "xgboost_cox": lambda r: xgb.predict(X.iloc[r].to_numpy(), output_margin=True),
    }


PEERS = ["lifelines_cox", "sksurv_gbsa", "sksurv_rsf", "xgboost_cox"]


# -- part 1 ---------------------------------------------------------------------------
def run_dataset(ds: Dataset, config, seed: int, k: int = K_OUTER) -> dict:
    table = life_table(ds)
    X = design(table)
    episodes = score_episodes(table)
    rng = np.random.default_rng(seed)
    fold_seed, *rest = (int(s) for s in rng.integers(0, 2**31 - 1, size=1 + 2 * k))
    folds = grouped_folds(table, k, fold_seed)
    entry_used = ds.entry != "none"
    rows = []
    t0 = time.perf_counter()
    for i, (train_rows, test_rows) in enumerate(folds):
        train_table, test_ep, train_ep = split_fold(table, episodes, train_rows, test_rows)
        with tempfile.TemporaryDirectory() as tmp, warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tw = time.perf_counter()
            outcome = fitting.fit_models(train_table, config, Path(tmp), seed=rest[2 * i])
            wearcast_s = time.perf_counter() - tw
        X_test = table.X.iloc[test_ep.rows].reset_index(drop=True)
        risks = {"wearcast": np.asarray(outcome.main_model.risk_score(X_test), float)}
        # selection diagnostic: every candidate (the config fits them all; the choice does not
        # depend on that list) and the candidate with the best inner-CV mean (no parsimony)
        candidates = outcome.choice.candidates
        eligible = candidates[candidates["eligible"]]
        best_mean = str(eligible["c_mean"].idxmax()) if len(eligible) else outcome.chosen
        for name, model in outcome.models.items():
            risks[f"candidate:{name}"] = np.asarray(model.risk_score(X_test), float)
        risks["best_inner_mean"] = risks[f"candidate:{best_mean}"]
        tp = time.perf_counter()
        peers = peer_models(table, X, train_rows, train_ep, entry_used, rest[2 * i + 1])
        risks.update({name: predict(test_ep.rows) for name, predict in peers.items()})
        peers_s = time.perf_counter() - tp
        # start/stop data: every held-out row scored with the covariates in force on it,
        # each failure against the rows at risk at its age (time-dependent C)
        by_row = None
        if ds.entry == "start/stop":
            X_rows = table.X.iloc[test_rows].reset_index(drop=True)
            by_row = {"wearcast": np.asarray(outcome.main_model.risk_score(X_rows), float)}
            by_row.update({name: predict(test_rows) for name, predict in peers.items()})
        for name, risk in risks.items():
            rows.append({
                "dataset": ds.name, "fold": i + 1, "model": name,
                "chosen": outcome.chosen if name == "wearcast" else (best_mean if name == "best_inner_mean" else None),
                "harrell": harrell_c(test_ep.exit, test_ep.event, risk).c,
                "truncation": truncation_aware_c(test_ep.entry, test_ep.exit, test_ep.event, risk).c,
                "time_dependent": (truncation_aware_c(table.entry[test_rows], table.exit[test_rows],
                                                      table.event[test_rows], by_row[name]).c
                                   if by_row is not None and name in by_row else float("nan")),
                "seconds": wearcast_s if name == "wearcast" else peers_s,
            })
        print(f"  {ds.name} fold {i + 1}: chose {outcome.chosen} ({wearcast_s:.1f} s; peers {peers_s:.1f} s)",
              flush=True)
    s = table.summary()
    return {"dataset": ds.name, "library": ds.library, "source": ds.source, "entry": ds.entry,
            "units": s["units"], "rows": s["rows"], "failures": s["failures"], "delayed": s["delayed_entries"],
            "covariates": len(table.covariates), "per_fold": rows, "seconds": time.perf_counter() - t0}


def summarise_dataset(result: dict) -> dict:
    per = pd.DataFrame(result["per_fold"])
    stats = {}
    for model, part in per.groupby("model", sort=False):
        stats[model] = {m: (float(part[m].mean()), float(part[m].std(ddof=1)))
                        for m in ("harrell", "truncation", "time_dependent") if m in part}
    chosen = per.loc[per["model"] == "wearcast", "chosen"].tolist()
    out = {"stats": stats, "chosen": chosen}
    for m in ("harrell", "truncation"):
        best_peer = max(PEERS, key=lambda p: stats[p][m][0])
        gap = stats["wearcast"][m][0] - stats[best_peer][m][0]
        out[f"best_peer_{m}"] = best_peer
        out[f"gap_{m}"] = gap
    out["pass"] = min(out["gap_harrell"], out["gap_truncation"]) >= -TARGET_GAP
    if "best_inner_mean" in stats:
        cands = {m.split(":", 1)[1]: v["harrell"][0] for m, v in stats.items() if m.startswith("candidate:")}
        hindsight = max(cands, key=cands.get)
        out["diagnostic"] = {
            "best_inner_mean": stats["best_inner_mean"]["harrell"][0],
            "best_inner_mean_chosen": per.loc[per["model"] == "best_inner_mean", "chosen"].tolist(),
            "hindsight": hindsight, "hindsight_c": cands[hindsight],
        }
    td = {m: v["time_dependent"][0] for m, v in stats.items()
          if "time_dependent" in v and (m == "wearcast" or m in PEERS)}
    if td and all(np.isfinite(list(td.values()))):
        best_peer = max(PEERS, key=lambda p: td[p])
        out["best_peer_time_dependent"] = best_peer
        out["gap_time_dependent"] = td["wearcast"] - td[best_peer]
    return out


# -- part 2 ---------------------------------------------------------------------------
class StageClock:
    """Seconds per stage of one ``fit_models`` call, by wrapping what it calls (this script only)."""

    def __init__(self):
        self.seconds: dict[str, float] = {}
        self.phase = "setup"
        self.depth = 0  # only the outermost model call is timed (fit may call risk_score)

    def add(self, key: str, dt_: float) -> None:
        self.seconds[key] = self.seconds.get(key, 0.0) + dt_

    def timed_method(self, model, name: str):
        clock = self
        for meth in ("fit", "risk_score", "fail_probability", "survival"):
            original = getattr(model, meth)

            def wrapper(*a, _orig=original, _meth=meth, **kw):
                t = time.perf_counter()
                clock.depth += 1
                try:
                    return _orig(*a, **kw)
                finally:
                    clock.depth -= 1
                    if clock.depth == 0:
                        kind = "fit" if _meth == "fit" else "predict"
                        clock.add(f"{clock.phase}:{name}:{kind}", time.perf_counter() - t)
            setattr(model, meth, wrapper)
        return model

    @contextlib.contextmanager
    def installed(self):
        clock = self
        saved = {n: getattr(fitting, n) for n in ("make_model", "cross_validate", "compare_models",
                                                   "write_comparison", "_save_bundle", "_model_side_files")}

        def make_model(name, config, seed, **kwargs):
            # Per-candidate times are only seen when the fits run in this process
            # ([validation] jobs = 1); with worker processes they happen elsewhere.
            model = saved["make_model"](name, config, seed, **kwargs)
            copy = model.unfitted_copy

            def unfitted_copy(s, _copy=copy):
                return clock.timed_method(_copy(s), name)
            model.unfitted_copy = unfitted_copy
            return clock.timed_method(model, name)

        def phase(fn, label):
            def wrapper(*a, **kw):
                clock.phase = label
                t = time.perf_counter()
                try:
                    return fn(*a, **kw)
                finally:
                    clock.add(f"{label}:total", time.perf_counter() - t)
                    clock.phase = "final"
            return wrapper

        fitting.make_model = make_model
        fitting.cross_validate = phase(saved["cross_validate"], "cv")
        fitting.compare_models = phase(saved["compare_models"], "compare")
        fitting.write_comparison = phase(saved["write_comparison"], "write")
        fitting._save_bundle = phase(saved["_save_bundle"], "bundles")
        fitting._model_side_files = phase(saved["_model_side_files"], "side_files")
        try:
            yield self
        finally:
            for n, fn in saved.items():
                setattr(fitting, n, fn)


def run_runtime(cache: Path, n_units: int = 10_000, seed: int = 7) -> dict:
    folder = cache / f"choice-{n_units}-{seed}"
    if not (folder / "wearcast.toml").exists():
        generate_scenario(folder, n_units=n_units, seed=seed)
    scenario_cfg = load_config(folder / "wearcast.toml")
    t = time.perf_counter()
    table = load_export(scenario_cfg).table
    load_s = time.perf_counter() - t
    cfg = dataclasses.replace(scenario_cfg, validation=ValidationSection(),
                              model=ModelSection(seed=scenario_cfg.model.seed))
    clock = StageClock()
    with tempfile.TemporaryDirectory() as tmp, clock.installed(), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t, cpu = time.perf_counter(), time.process_time()
        outcome = fitting.fit_models(table, cfg, Path(tmp))
        total, cpu = time.perf_counter() - t, time.process_time() - cpu
    return {"n_units": n_units, "seed": seed, "load_s": load_s, "fit_models_s": total, "fit_models_cpu_s": cpu, "chosen": outcome.chosen,
            "reason": outcome.choice.reason, "table": table.summary(), "stages": clock.seconds,
            "settings": {"validation": dataclasses.asdict(cfg.validation),
                         "boosted": dataclasses.asdict(cfg.model.boosted),
                         "forest": dataclasses.asdict(cfg.model.forest), "fit": cfg.model.fit},
            "candidates": outcome.choice.candidates.reset_index(names="candidate")[
                ["candidate", "c_mean", "c_se", "calibration_ratio", "eligible"]].to_dict(orient="records")}


# -- rendering ------------------------------------------------------------------------
def _ms(pair) -> str:
    return f"{pair[0]:.3f} ± {pair[1]:.3f}"


def render_real(results: list[dict]) -> str:
    lines = []
    summary_rows = []
    summaries = [(r["dataset"], summarise_dataset(r)) for r in results]
    for r, (_, s) in zip(results, summaries):
        lines.append(f"#### {r['dataset']} ({r['library']}): {r['source']}")
        lines.append(f"{r['units']} units, {r['rows']} rows, {r['failures']} failures, {r['delayed']} late "
                     f"entries, {r['covariates']} covariates; entry: {r['entry']}. "
                     f"wearcast chose per fold: {', '.join(s['chosen'])}.\n")
        if DATASETS[r["dataset"]].note:
            lines.append(f"Note: {DATASETS[r['dataset']].note}\n")
        rows_c = "gap_time_dependent" in s
        lines.append("| model | Harrell C | truncation-aware C |" + (" time-dependent C (all rows) |" if rows_c else ""))
        lines.append("|---|---|---|" + ("---|" if rows_c else ""))
        for model in ["wearcast", *PEERS]:
            st = s["stats"][model]
            label = "**wearcast (chosen)**" if model == "wearcast" else model
            extra = f" {_ms(st['time_dependent'])} |" if rows_c else ""
            lines.append(f"| {label} | {_ms(st['harrell'])} | {_ms(st['truncation'])} |{extra}")
        if rows_c:
            lines.append("")
            lines.append(f"Time-dependent C: every held-out row scored with the covariates in force on it, each "
                         f"failure against the rows at risk at its age (the truncation-aware C on the start/stop "
                         f"rows), so no model sees a patient's later status. Gap to the best peer "
                         f"({s['best_peer_time_dependent']}): {s['gap_time_dependent']:+.3f}.")
        lines.append("")
        td = (f"{s['gap_time_dependent']:+.3f} ({s['best_peer_time_dependent']})"
              if "gap_time_dependent" in s else "—")
        summary_rows.append(
            f"| {r['dataset']} | {s['best_peer_harrell']} | {s['gap_harrell']:+.3f} | {s['best_peer_truncation']} | "
            f"{s['gap_truncation']:+.3f} | {'pass' if s['pass'] else 'MISS'} | {td} |")
    head = ["| dataset | best peer (Harrell) | gap | best peer (trunc.) | gap | target (gap ≥ −0.01) "
            "| gap, time-dependent C (start/stop data) |",
            "|---|---|---|---|---|---|---|", *summary_rows, ""]
    return "\n".join(head + _diagnostic(summaries) + lines)


def _diagnostic(summaries: list[tuple[str, dict]]) -> list[str]:
    """How much of each gap is the parsimony rule, how much the noise of choosing on inner folds.

    ``summaries``: (dataset name, :func:`summarise_dataset` result) pairs.
    """
    rows, unreachable, rule_only, mean_only = [], [], [], []
    for name, s in summaries:
        d = s.get("diagnostic")
        if not d:
            continue
        peer = s["stats"][s["best_peer_harrell"]]["harrell"][0]
        ours = s["stats"]["wearcast"]["harrell"][0]
        rows.append(f"| {name} | {ours:.3f} ({ours - peer:+.3f}) | {d['best_inner_mean']:.3f} "
                    f"({d['best_inner_mean'] - peer:+.3f}) | {d['hindsight']} {d['hindsight_c']:.3f} "
                    f"({d['hindsight_c'] - peer:+.3f}) | {s['best_peer_harrell']} {peer:.3f} |")
        one_se_ok = ours - peer >= -TARGET_GAP
        mean_ok = d["best_inner_mean"] - peer >= -TARGET_GAP
        if d["hindsight_c"] - peer < -TARGET_GAP:
            unreachable.append(name)
        if one_se_ok and not mean_ok:
            rule_only.append(name)
        if mean_ok and not one_se_ok:
            mean_only.append(name)
    if not rows:
        return []
    words = lambda names: ", ".join(names) or "none"  # noqa: E731
    return ["#### Where the gaps come from (Harrell C, mean over the outer folds; gap to the best peer)", "",
            f"Even the best wearcast candidate in hindsight is more than {TARGET_GAP} below the best peer on: "
            f"{words(unreachable)} (no selection rule over these candidates can reach the target there). "
            f"Within {TARGET_GAP} with the one-SE rule but not with the best inner mean: {words(rule_only)}; "
            f"the reverse: {words(mean_only)}.", "",
            "One-SE choice: what `wearcast fit` picks (the issue's rule). Best inner mean: the candidate with "
            "the highest inner-CV mean, no parsimony. Best candidate in hindsight: the wearcast candidate "
            "with the best mean on the outer folds themselves, which no rule can know in advance.", "",
            "| dataset | one-SE choice | best inner mean | best candidate in hindsight | best peer |",
            "|---|---|---|---|---|", *rows, ""]


STAGE_LABELS = [
    ("cv:total", "cross-validation, all candidates (total)"),
    ("compare:total", "comparison with Cox (bootstrap of the C indices)"),
    ("write:total", "writing comparison files"),
    ("final", "final fits (chosen + [model] fit list)"),
    ("bundles:total", "saving bundles (golden predictions)"),
    ("side_files:total", "side files (curves, importance)"),
]


def render_runtime(r: dict) -> str:
    st = r["stages"]
    cv_model = sum(v for k, v in st.items() if k.startswith("cv:") and k != "cv:total")
    final = sum(v for k, v in st.items() if k.startswith("final:"))
    in_workers = cv_model == 0.0
    if in_workers:  # fits ran in worker processes: the final fits are what the named stages leave over
        final = r["fit_models_s"] - sum(st.get(k, 0.0) for k, _ in STAGE_LABELS if k != "final")
    ok = r["fit_models_s"] <= RUNTIME_TARGET_S
    lines = [f"Scenario: {r['n_units']:,} units (seed {r['seed']}), {r['table']['rows']:,} rows, "
             f"{r['table']['failures']:,} failures, {r['table']['delayed_entries']:,} late entries.",
             f"Settings: default [validation] (folds {r['settings']['validation']['folds']}, bootstrap "
             f"{r['settings']['validation']['bootstrap']}, horizons {r['settings']['validation']['horizons_days']}) "
             f"and default [model] (fit {r['settings']['fit']}; forest n_trees {r['settings']['forest']['n_trees']}, "
             f"max_depth {r['settings']['forest']['max_depth']}; boosted max_trees "
             f"{r['settings']['boosted']['max_trees']}, learning_rate {r['settings']['boosted']['learning_rate']}, "
             f"inner folds {r['settings']['boosted']['folds']} for the final fit and at most 3 inside the "
             f"selection's folds, threads {r['settings']['boosted']['threads']}).",
             f"Chosen: {r['chosen']} — {r['reason']}", "",
             f"Loading the export (`load_export`, separate): **{r['load_s']:.1f} s**. "
             f"`fit_models`: **{r['fit_models_s']:.1f} s** wall, {r['fit_models_cpu_s']:.1f} s CPU (all threads "
             f"of the process) — target 120 s: **{'pass' if ok else 'MISS'}**.", "",
             "| stage | seconds |", "|---|---|"]
    for name in [] if in_workers else [c["candidate"] for c in r["candidates"]]:
        fit_s = st.get(f"cv:{name}:fit", 0.0)
        pred_s = st.get(f"cv:{name}:predict", 0.0)
        lines.append(f"| CV {name}: fit / predict | {fit_s:.1f} / {pred_s:.1f} |")
    lines.append(f"| CV scoring (metrics on held-out folds) | {st.get('cv:total', 0.0) - cv_model:.1f} |")
    for key, label in STAGE_LABELS:
        value = final if key == "final" else st.get(key, 0.0)
        lines.append(f"| {label} | {value:.1f} |")
    finals = [f"{k.split(':')[1]} {v:.1f} s" for k, v in st.items() if k.startswith("final:") and k.endswith(":fit")]
    lines.append("")
    if in_workers:
        lines.append("The fits ran in [validation] jobs worker processes, so per-candidate fit times are not "
                     "measured here; 'final fits' is the wall time left over by the named stages.")
    else:
        lines.append(f"Final fits: {', '.join(finals)}.")
    parts = {"cross-validation": st.get("cv:total", 0.0), "comparison": st.get("compare:total", 0.0),
             "final fits": final}
    top = max(parts, key=parts.get)
    boosted_cv = sum(v for k, v in st.items() if k.startswith("cv:boosted") and k.endswith(":fit"))
    lines.append(f"Largest part: {top} ({parts[top] / r['fit_models_s']:.0%} of the wall time)."
                 + ("" if in_workers else f" The boosted candidates' fits take {boosted_cv:.0f} s of the "
                    "cross-validation."))
    lines.append("\n| candidate | CV truncation-aware C | se | expected/observed | eligible |\n|---|---|---|---|---|")
    for c in r["candidates"]:
        lines.append(f"| {c['candidate']} | {c['c_mean']:.4f} | {c['c_se']:.4f} | {c['calibration_ratio']:.3f} | "
                     f"{c['eligible']} |")
    return "\n".join(lines)


def machine_line() -> str:
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    return (f"Run {dt.datetime.now():%Y-%m-%d %H:%M} on {os.cpu_count()} cores ({platform.processor() or platform.machine()}), "
            f"Python {platform.python_version()}; the machine was shared with other jobs "
            f"(1-min load average {load:.1f} at the end), so timings are upper bounds.")


# -- main -----------------------------------------------------------------------------
def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--datasets", nargs="*", default=DEFAULT_DATASETS, choices=sorted(DATASETS))
    parser.add_argument("--no-runtime", action="store_true")
    parser.add_argument("--no-real", action="store_true")
    parser.add_argument("--no-readme", action="store_true")
    parser.add_argument("--cache", type=Path, default=Path(os.environ.get("WEARCAST_BENCH_CACHE",
                                                                          "/tmp/wearcast-bench-cache")))
    parser.add_argument("--out", type=Path, default=None, help="also write the raw results as JSON here")
    parser.add_argument("--from-json", type=Path, default=None,
                        help="re-render the README section from a file written by --out (no runs)")
    args = parser.parse_args(argv)
    # every candidate gets a final fit so the selection diagnostic can score it; the choice
    # itself does not depend on the fit list
    config = config_from_dict({**LIGHT, "model": {**LIGHT["model"], "fit": list(CANDIDATE_ORDER)}},
                              source="bench_choice LIGHT")
    seeds = np.random.default_rng(SEED).integers(0, 2**31 - 1, size=len(DATASETS))
    seed_of = dict(zip(DATASETS, (int(s) for s in seeds)))
    results, runtime = [], None
    real_s, machine = 0.0, machine_line()
    t0 = time.perf_counter()
    if args.from_json:
        saved = json.loads(args.from_json.read_text())
        results, runtime = saved["real"], saved["runtime"]
        args.no_real = args.no_runtime = True
        real_s = saved.get("real_seconds", sum(r["seconds"] for r in results))
        machine = saved.get("machine", machine_line())
    if not args.no_real:
        for name in args.datasets:
            print(f"{name} ...", flush=True)
            results.append(run_dataset(DATASETS[name], config, seed_of[name]))
        real_s = time.perf_counter() - t0
    if not args.no_runtime:
        args.cache.mkdir(parents=True, exist_ok=True)
        print("runtime on the 10,000-unit scenario ...", flush=True)
        runtime = run_runtime(args.cache)
    parts = ["## Model choice", "",
             "`bench/bench_choice.py`. Part 1: wearcast's whole choice (`fitting.fit_models`, nested inside "
             "each outer fold) against peers on real datasets, same unit-grouped 5 folds "
             "(`validation.grouped_folds`) for everyone, scored on one row per held-out unit. "
             "Peers: lifelines CoxPHFitter (penalizer 0.01, `entry_col` for delayed-entry and start/stop data), "
             "scikit-survival GradientBoostingSurvivalAnalysis (100 trees) and RandomSurvivalForest (100 trees, "
             "min_samples_leaf 15, max_features sqrt), XGBoost survival:cox (200 trees, depth 3, eta 0.05). "
             "The three tree peers cannot take entry ages: they get one row per unit and treat every unit as "
             "observed from age 0. wearcast settings (light): "
             f"`{json.dumps(LIGHT)}`, except that every candidate gets a final fit for the diagnostic "
             "below (the choice does not depend on it); times converted to days. Values: mean ± sd over the 5 outer folds. "
             f"Gap = wearcast's chosen model minus the best peer (target: never below −{TARGET_GAP}). "
             "Sources are those the shipping library's docstring cites.", "", machine, ""]
    if results:
        parts += [f"### Real datasets ({real_s:.0f} s in all)", "", render_real(results)]
    if runtime:
        parts += ["### Runtime of the whole choice, 10,000-unit invented scenario (2 cores)", "",
                  render_runtime(runtime), ""]
    text = "\n".join(parts)
    print(text)
    if args.out:
        args.out.write_text(json.dumps({"real": results, "runtime": runtime, "real_seconds": real_s,
                                         "machine": machine}, indent=1, default=str))
    if not args.no_readme:
        write_section("choice", text)


if __name__ == "__main__":
    main()
