"""Boosted survival trees against their peers on the invented fleet.

Run: ``.venv/bin/python bench/bench_boosted.py`` (full run, writes its section
of bench/README.md) or ``--sizes 2000 --no-million --no-readme`` for a quick look.

Data: :mod:`wearcast.scenario` fleets (known true hazard), read through
``wearcast.io.load_export`` into counting-process life tables (one row per
duty-reading interval; most units enter the records late). Training fleets of
``--sizes`` units (seeds 101, 102, ...); one separate test fleet
(``--test-units``, seed 999) evaluated as a one-year backtest: units in
service one year before its export date, their covariates and ages then, and
what happened to them in the following 365 days.

Peers, all with the same training rows:

* wearcast ``BoostedSurvivalTrees`` (delayed entry), fixed B;
* XGBoost ``survival:cox`` (no entry ages: every row is treated as observed
  from age 0), its one-year probability from a Breslow baseline on its own
  training scores with the same no-entry view;
* scikit-survival ``GradientBoostingSurvivalAnalysis`` (no entry ages either;
  only up to ``--sksurv-max`` units, it is slow);
* lifelines ``CoxPHFitter`` with ``entry_col`` (linear, delayed entry),
  baseline from wearcast's delayed-entry Breslow on its scores.

Metrics on the backtest (n ≈ in-service test units): Harrell C and Uno C
(scikit-survival ``concordance_index_ipcw``, tau = 360 days) of the one-year
probability against days-to-failure after the cut; a truncation-aware C on the
age scale (a pair counts only if the longer-lived unit was under observation,
entry < the earlier failure age) of the relative risk; the same for the
oracle (the scenario's true hazard with duty held at its last reading); and
mean predicted vs observed (Kaplan–Meier) one-year failure probability.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import sys
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import markdown_table, measure, reexec_with_returning_allocator, write_section  # noqa: E402

from wearcast.config import load_config  # noqa: E402
from wearcast.io import load_export  # noqa: E402
from wearcast.lifetable import LifeTable  # noqa: E402
from wearcast.metrics import harrell_c, truncation_aware_c  # noqa: E402
from wearcast.models._hazard import breslow_cumulative_hazard, step_at  # noqa: E402
from wearcast.models.base import conditional_failure_probability  # noqa: E402
from wearcast.models.baseline import BaselineHazard  # noqa: E402
from wearcast.models.boosted import BoostedSurvivalTrees, BoostSettings  # noqa: E402
from wearcast.scenario import generate_scenario, read_truth, true_cumulative_hazard, true_log_risk  # noqa: E402

HORIZON = 365.0
TEST_SEED = 999


# -- data ----------------------------------------------------------------------------
def fleet(n_units: int, seed: int, cache: Path, as_of: dt.date | None = None):
    """(LifeTable, scenario folder); life tables cached as parquet."""
    folder = cache / f"fleet-{n_units}-{seed}"
    if not (folder / "wearcast.toml").exists():
        generate_scenario(folder, n_units=n_units, seed=seed)
    tag = "export" if as_of is None else as_of.isoformat()
    parquet, meta = folder / f"table-{tag}.parquet", folder / f"table-{tag}.json"
    if parquet.exists() and meta.exists():
        info = json.loads(meta.read_text())
        frame = pd.read_parquet(parquet)
        table = LifeTable(frame, tuple(info["covariates"]), tuple(info["categorical"]), pd.Timestamp(info["as_of"]))
        return table, folder
    table = load_export(load_config(folder / "wearcast.toml"), as_of=as_of).table
    table.frame.to_parquet(parquet)
    meta.write_text(json.dumps({"covariates": table.covariates, "categorical": table.categorical,
                                "as_of": str(table.as_of)}))
    return table, folder


def backtest_set(cache: Path, n_units: int):
    """In-service units one year before the test fleet's export, and their next year."""
    full, folder = fleet(n_units, TEST_SEED, cache)
    as_of = full.as_of.date()
    cut = as_of - dt.timedelta(days=int(HORIZON))
    at_cut, _ = fleet(n_units, TEST_SEED, cache, as_of=cut)
    rows = at_cut.in_service().frame.reset_index(drop=True)
    events = pd.read_csv(folder / "events.csv", parse_dates=["event_date"], dtype={"unit_id": str})
    register = pd.read_csv(folder / "register.csv", parse_dates=["decommission_date"], dtype={"unit_id": str})
    cut_ts = pd.Timestamp(cut)
    after = events[(events["event_date"] > cut_ts) & (events["event_date"] <= cut_ts + pd.Timedelta(days=HORIZON))]
    first_fail = after[after["event_kind"] == "failure"].groupby("unit_id")["event_date"].min()
    decom = register.set_index("unit_id")["decommission_date"]
    fail_day = (rows["unit_id"].map(first_fail) - cut_ts).dt.days
    decom_day = (rows["unit_id"].map(decom) - cut_ts).dt.days
    decom_day = decom_day.where((decom_day > 0) & (decom_day <= HORIZON))
    event = fail_day.notna().to_numpy()
    days = np.where(event, fail_day, np.where(decom_day.notna(), decom_day, HORIZON)).astype(float)
    days = np.maximum(days, 1.0)
    truth = read_truth(folder / "truth.csv")
    age = rows["exit_age"].to_numpy(float)
    true_eta = true_log_risk(truth, rows)
    ahead = rows.assign(entry_age=age, exit_age=age + HORIZON)
    true_p = -np.expm1(-true_cumulative_hazard(truth, ahead))
    return {"X": rows.loc[:, list(at_cut.covariates)], "age": age, "days": days, "event": event,
            "true_eta": true_eta, "true_p": true_p}


# -- peers -----------------------------------------------------------------------------
def one_hot(X: pd.DataFrame, columns=None) -> pd.DataFrame:
    out = pd.get_dummies(X, drop_first=True, dtype=float)
    return out if columns is None else out.reindex(columns=columns, fill_value=0.0)


class Breslow:
    """Breslow baseline on training scores; ``entry=None`` ignores entry ages."""

    def __init__(self, table: LifeTable, eta: np.ndarray, with_entry: bool):
        entry = table.entry if with_entry else np.zeros(table.n_rows)
        self.ages, self.cumhaz = breslow_cumulative_hazard(entry, table.exit, table.event, risk=np.exp(eta))

    def p1y(self, eta, age):
        h0 = step_at(self.ages, self.cumhaz, age), step_at(self.ages, self.cumhaz, age + HORIZON)
        return conditional_failure_probability(np.exp(eta) * h0[0], np.exp(eta) * h0[1])


def fit_wearcast(table, a):
    s = BoostSettings(n_trees=a.trees, learning_rate=a.lr, tree_depth=a.depth, subsample=0.8, threads=a.threads)
    model = BoostedSurvivalTrees(s, seed=7).fit(table)
    return lambda X, age: (model.log_risk(X), model.fail_probability(X, age, HORIZON))


def fit_xgboost(table, a):
    import xgboost as xgb

    label = np.where(table.event, table.exit, -table.exit)
    dtrain = xgb.DMatrix(table.X, label=label, enable_categorical=True, nthread=a.threads)
    params = {"objective": "survival:cox", "eta": a.lr, "max_depth": a.depth, "subsample": 0.8,
              "tree_method": "hist", "nthread": a.threads, "seed": 7, "verbosity": 0}
    booster = xgb.train(params, dtrain, num_boost_round=a.trees)
    base = Breslow(table, booster.predict(dtrain, output_margin=True), with_entry=False)

    def predict(X, age):
        eta = booster.predict(xgb.DMatrix(X, enable_categorical=True, nthread=a.threads), output_margin=True)
        return eta, base.p1y(eta, age)
    return predict


def fit_sksurv(table, a):
    from sksurv.ensemble import GradientBoostingSurvivalAnalysis
    from sksurv.util import Surv

    Xd = one_hot(table.X)
    model = GradientBoostingSurvivalAnalysis(n_estimators=sksurv_trees(a, table.n_units), learning_rate=a.lr,
                                             max_depth=a.depth,
                                             subsample=0.8, random_state=7)
    model.fit(Xd.to_numpy(), Surv.from_arrays(table.event, table.exit))
    base = Breslow(table, model.predict(Xd.to_numpy()), with_entry=False)

    def predict(X, age):
        eta = model.predict(one_hot(X, Xd.columns).to_numpy())
        return eta, base.p1y(eta, age)
    return predict


def sksurv_trees(a, n_units: int) -> int:
    """Trees for scikit-survival: ``--sksurv-trees`` at 2,000 units, fewer on larger
    fleets (its per-tree cost grows faster than the row count)."""
    return max(1, int(round(a.sksurv_trees * min(1.0, (2000 / n_units) ** 2))))


def fit_lifelines(table, a):
    from lifelines import CoxPHFitter

    Xd = one_hot(table.X)
    df = Xd.assign(entry_age=table.entry, exit_age=table.exit, failed=table.event.astype(int))
    cph = CoxPHFitter().fit(df, duration_col="exit_age", event_col="failed", entry_col="entry_age")
    eta_train = cph.predict_log_partial_hazard(Xd).to_numpy()
    base = BaselineHazard.estimate(table.entry, table.exit, table.event, eta_train)

    def predict(X, age):
        eta = cph.predict_log_partial_hazard(one_hot(X, Xd.columns)).to_numpy()
        return eta, base.fail_probability(eta, age, HORIZON)
    return predict


PEERS = {"wearcast boosted": fit_wearcast, "xgboost survival:cox": fit_xgboost,
         "sksurv GBSA": fit_sksurv, "lifelines Cox (entry)": fit_lifelines}


# -- metrics -----------------------------------------------------------------------------
def km_one_year(days, event) -> float:
    from lifelines import KaplanMeierFitter

    km = KaplanMeierFitter().fit(days, event)
    return float(1.0 - km.survival_function_at_times(HORIZON - 1e-9).iloc[0])


def score(ev, eta, p) -> dict:
    from sksurv.metrics import concordance_index_ipcw
    from sksurv.util import Surv

    y = Surv.from_arrays(ev["event"], ev["days"])
    return {
        "Harrell C": harrell_c(ev["days"], ev["event"], p).c,
        "Uno C": float(concordance_index_ipcw(y, y, p, tau=360.0)[0]),
        "trunc C": truncation_aware_c(ev["age"], ev["age"] + ev["days"], ev["event"], eta).c,
        "mean p1y": float(np.mean(p)),
    }


def run(a) -> tuple[list[dict], dict]:
    cache = Path(a.cache)
    cache.mkdir(parents=True, exist_ok=True)
    ev = backtest_set(cache, a.test_units)
    observed = km_one_year(ev["days"], ev["event"])
    oracle = score(ev, ev["true_eta"], ev["true_p"])
    print(f"backtest: {len(ev['days'])} units, {int(ev['event'].sum())} failures, observed p1y {observed:.4f}; "
          f"oracle {oracle}", flush=True)
    rows = []
    warm = warm_up(fleet(a.sizes[0], 101, cache)[0], a)
    for k, n in enumerate(a.sizes):
        table, _ = fleet(n, 101 + k, cache)
        print(f"-- {n} units: {table.n_rows} rows, {table.n_failures} failures", flush=True)
        for name, fitter in PEERS.items():
            if name == "sksurv GBSA" and n > a.sksurv_max:
                continue
            fit = measure(fitter, table, a)
            pred = measure(fit.result, ev["X"], ev["age"])
            eta, p = pred.result
            fit_s = fit.seconds
            if name == "sksurv GBSA":
                k_trees = sksurv_trees(a, table.n_units)
                name = f"sksurv GBSA ({k_trees} trees, time ×{a.trees / k_trees:g})"
                fit_s *= a.trees / k_trees
            row = {"units": n, "rows": table.n_rows, "model": name, "fit s": fit_s,
                   "predict s": pred.seconds, "peak MiB": fit.peak_mib, **score(ev, eta, p),
                   "observed p1y": observed, "oracle Harrell C": oracle["Harrell C"],
                   "oracle trunc C": oracle["trunc C"]}
            rows.append(row)
            print({k2: (round(v, 4) if isinstance(v, float) else v) for k2, v in row.items()}, flush=True)
    extra = {"oracle": oracle, "observed": observed, "n_backtest": int(len(ev["days"])),
             "backtest_failures": int(ev["event"].sum()), "warm_up": warm}
    if a.cv_size:
        table, _ = fleet(a.cv_size, 101 + a.sizes.index(a.cv_size) if a.cv_size in a.sizes else 150, cache)
        s = BoostSettings(max_trees=1000, learning_rate=a.lr, tree_depth=a.depth, subsample=0.8,
                          early_stopping_trees=50, threads=a.threads)
        fit = measure(lambda: BoostedSurvivalTrees(s, seed=7).fit(table))
        model = fit.result
        eta, p = model.log_risk(ev["X"]), model.fail_probability(ev["X"], ev["age"], HORIZON)
        extra["cv"] = {"units": a.cv_size, "B": model.n_trees_, "seconds": fit.seconds,
                       "curve_min": float(np.nanmin(model.cv_curve_)), **score(ev, eta, p)}
        print("CV:", extra["cv"], flush=True)
    if a.million:
        base, _ = fleet(max(a.sizes), 101 + a.sizes.index(max(a.sizes)), cache)
        big = big_table(base, 1_000_000)
        extra["million"] = {}
        for name in ("wearcast boosted", "xgboost survival:cox"):
            fit = measure(PEERS[name], big, a)
            extra["million"][name] = {"rows": big.n_rows, "fit s": fit.seconds, "peak MiB": fit.peak_mib}
            print("1M:", name, extra["million"][name], flush=True)
            del fit
    return rows, extra


def warm_up(table: LifeTable, a, n_units: int = 200) -> dict:
    """Fit every peer once on the first ``n_units`` units, untimed in the table: one-time costs
    (imports, compiled kernels loaded from numba's cache, library start-up) then fall on no
    measured fit. Returns each peer's seconds for this first fit, which the report states."""
    small = table.take_units(pd.unique(table.frame["unit_id"])[:n_units])
    return {name: measure(fitter, small, a).seconds for name, fitter in PEERS.items()}


def big_table(table: LifeTable, n_rows: int) -> LifeTable:
    """Whole-unit bootstrap copies of ``table`` until ``n_rows`` rows (cut at a unit boundary)."""
    rng = np.random.default_rng(5)
    parts, total = [], 0
    while total < n_rows:
        part = table.bootstrap_units(rng).frame
        part["unit_id"] = part["unit_id"] + f"/{len(parts)}"
        parts.append(part)
        total += len(part)
    frame = pd.concat(parts, ignore_index=True).iloc[:n_rows]
    return LifeTable(frame, table.covariates, table.categorical, table.as_of)


# -- report -------------------------------------------------------------------------------
def targets(rows: list[dict], extra: dict) -> list[str]:
    df = pd.DataFrame(rows)
    out = []

    def get(n, model, col):
        hit = df[(df["units"] == n) & (df["model"] == model)]
        return None if hit.empty else float(hit[col].iloc[0])

    for n in sorted(df["units"].unique()):
        mine, xgb_t = get(n, "wearcast boosted", "fit s"), get(n, "xgboost survival:cox", "fit s")
        limit = 1.0 if n >= 50_000 else 1.5
        if mine is not None and xgb_t is not None:
            ok = mine <= limit * xgb_t
            out.append(f"- fit time at {n:,} units ≤ {limit} × XGBoost: {mine:.2f} s vs {xgb_t:.2f} s "
                       f"({mine / xgb_t:.2f} ×) — **{'pass' if ok else 'FAIL'}**")
        sk_rows = df[(df["units"] == n) & df["model"].str.startswith("sksurv")]
        sk = None if sk_rows.empty else float(sk_rows["fit s"].iloc[0])
        if n == 10_000 and sk is not None and mine is not None:
            ok = sk >= 100 * mine
            out.append(f"- ≥ 100 × faster than scikit-survival's booster at 10,000: {sk / mine:.0f} × — "
                       f"**{'pass' if ok else 'FAIL'}**")
        c_mine = get(n, "wearcast boosted", "Harrell C")
        peers = df[(df["units"] == n) & (df["model"] != "wearcast boosted")
                   & ~df["model"].str.startswith("sksurv")]["Harrell C"]
        if c_mine is not None and len(peers):
            ok = c_mine >= peers.max() - 0.003
            out.append(f"- Harrell C at {n:,} ≥ best peer − 0.003: {c_mine:.4f} vs best peer {peers.max():.4f} — "
                       f"**{'pass' if ok else 'FAIL'}**")
        if n >= 50_000 and c_mine is not None:
            oc = extra["oracle"]["Harrell C"]
            ok = abs(c_mine - oc) <= 0.005
            out.append(f"- Harrell C at {n:,} within 0.005 of the oracle: {c_mine:.4f} vs {oc:.4f} — "
                       f"**{'pass' if ok else 'FAIL'}**")
        if n in (10_000, 50_000):
            p = get(n, "wearcast boosted", "mean p1y")
            tol = 0.10 if n == 10_000 else 0.05
            rel = p / extra["observed"] - 1
            ok = abs(rel) <= tol
            out.append(f"- mean predicted one-year probability at {n:,} within ±{tol:.0%} of observed: "
                       f"{p:.4f} vs {extra['observed']:.4f} ({rel:+.1%}) — **{'pass' if ok else 'FAIL'}**")
    return out


def report(rows, extra, a) -> str:
    cols = ["units", "rows", "model", "fit s", "predict s", "peak MiB", "Harrell C", "Uno C", "trunc C", "mean p1y"]
    lines = [
        "## Boosted survival trees (`bench/bench_boosted.py`)",
        "",
        f"Fixed B = {a.trees} trees of depth {a.depth}, λ = {a.lr}, subsample 0.8 (wearcast: of units, whole histories; XGBoost and scikit-survival: of rows), {a.threads} thread(s) "
        f"for every booster. Backtest: {extra['n_backtest']:,} units in service one year before the export of a "
        f"separate {a.test_units:,}-unit test fleet; {extra['backtest_failures']} failed within the year; "
        f"observed (Kaplan–Meier) one-year failure probability {extra['observed']:.4f}. Oracle (true hazard, "
        f"duty held at the cut): Harrell C {extra['oracle']['Harrell C']:.4f}, Uno C "
        f"{extra['oracle']['Uno C']:.4f}, truncation-aware C {extra['oracle']['trunc C']:.4f}, mean p1y "
        f"{extra['oracle']['mean p1y']:.4f}.",
        "",
        markdown_table(rows, cols),
        "",
        "Peak MiB: rise of resident memory during the fit (psutil, sampled every 5 ms). Fit time of XGBoost and "
        "scikit-survival excludes their Breslow baseline; wearcast's includes it. XGBoost and scikit-survival "
        "cannot take entry ages, so they see every row as observed from age 0. scikit-survival's booster "
        "costs many seconds per tree, growing faster than the row count, so it is fitted with few trees and "
        "its fit time is scaled linearly to B (per-tree cost does not change with the tree number); its C "
        "and probabilities are those of the small model and are left out of 'best peer'.",
    ]
    if "warm_up" in extra:
        lines += ["", "Every booster is first fitted once, untimed, on 200 units, so one-time costs (imports, "
                      "compiled kernels loaded from cache, library start-up) fall on no measured fit. That first "
                      "fit in a fresh process took: "
                      + ", ".join(f"{name} {sec:.2f} s" for name, sec in extra["warm_up"].items()) + "."]
    if "cv" in extra:
        cv = extra["cv"]
        lines += ["", f"Cross-validated B at {cv['units']:,} units (5 unit-grouped folds, patience 50, up to 1000): "
                      f"B = {cv['B']}, {cv['seconds']:.1f} s including the refit; Harrell C {cv['Harrell C']:.4f}, "
                      f"Uno C {cv['Uno C']:.4f}, mean p1y {cv['mean p1y']:.4f}."]
    if "million" in extra:
        lines += ["", "One fit at 1,000,000 rows (whole-unit bootstrap copies of the largest training fleet):"]
        for name, m in extra["million"].items():
            lines.append(f"- {name}: {m['fit s']:.1f} s, peak {m['peak MiB']:.0f} MiB")
    lines += ["", "Targets:", *targets(rows, extra), "",
              f"Machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}. "
              + a.note]
    return "\n".join(lines)


def main(argv=None):
    reexec_with_returning_allocator()
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="2000,10000,50000", help="training fleet sizes in units")
    parser.add_argument("--test-units", type=int, default=10_000)
    parser.add_argument("--trees", type=int, default=200)
    parser.add_argument("--depth", type=int, default=3)
    parser.add_argument("--lr", type=float, default=0.05)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--sksurv-max", type=int, default=10_000)
    parser.add_argument("--sksurv-trees", type=int, default=10,
                        help="trees scikit-survival fits; its fit time is scaled to --trees")
    parser.add_argument("--cv-size", type=int, default=10_000, help="0 to skip the cross-validated fit")
    parser.add_argument("--million", action=argparse.BooleanOptionalAction, default=True)
    parser.add_argument("--readme", action=argparse.BooleanOptionalAction, default=True)
    parser.add_argument("--cache", default=os.environ.get("WEARCAST_BENCH_CACHE", "/tmp/wearcast-bench-cache"))
    parser.add_argument("--note", default="")
    a = parser.parse_args(argv)
    a.sizes = [int(s) for s in a.sizes.split(",")]
    rows, extra = run(a)
    text = report(rows, extra, a)
    print(text)
    if a.readme:
        write_section("boosted", text)


if __name__ == "__main__":
    main()
