"""wearcast's survival forest beside scikit-survival's RandomSurvivalForest.

Data: the invented scenario (wearcast.scenario), read through the real export
loader (wearcast.io.load_export). Training fleets of 2,000, 10,000 and
100,000 positions (scenario seeds 101, 102, 103); one separate 10,000-position
test fleet (seed 202) scores both models.

* wearcast forest: 100 trees, mode random_forest (√p predictors per split),
  min_events_per_leaf 5, max_depth 12, 200 grid ages, 2 threads; fitted on the
  full life table (counting-process rows with delayed entry); splits chosen on
  one point per episode (grow_on="episodes", the default), leaf hazards on
  every row.
* wearcast-rows: the same, with splits chosen on every row (grow_on="rows").
* wearcast-lives: the same forest on one row per life (covariates of the
  life's last row, entry = the life's first entry age): the peer's rows, with
  delayed entry kept.
* scikit-survival RandomSurvivalForest: 100 trees, min_samples_leaf=15,
  max_features="sqrt", n_jobs=2. It has no delayed entry, so it gets one row
  per life (covariates of the life's last row, outcome at its last exit age,
  entry ignored): the usual way such a library is fed this data.
* Scoring, on each test life's last row: Harrell's C (entry ignored),
  truncation-aware C (a pair counts only when the longer-lived unit was
  watched at the earlier failure age) and the same two for the scenario's true
  log risk (oracle). Then the time-dependent C on every row of 1,000 test
  units (each row scored with its own readings; each failure compared with
  the rows at risk at its age), for each model and the oracle.

Memory: each model runs in its own child process; "peak RSS" is the child's
``ru_maxrss`` (whole process: Python, libraries and data included) and
"fit+predict RSS" is that peak minus the RSS measured after the data were
loaded, before fitting. Times are wall-clock (time.perf_counter). The machine
is shared with other work, so times are indicative.

Usage: ``python bench/bench_forest.py [--cache DIR] [--skip-100k] [--no-readme]``;
prints a Markdown table and writes the ``forest`` section of bench/README.md
with pass/fail per target (``--from-json FILE`` re-renders saved results). Life tables are cached in DIR (default
/tmp/wearcast-bench-forest) because loading a 100,000-position export takes
minutes.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

TRAIN = {2_000: 101, 10_000: 102, 100_000: 103}
TEST = (10_000, 202)
N_TREES = 100
ROW_C_UNITS = 1_000  # test units whose every row scores the time-dependent C


def _cache_paths(cache: Path, n_units: int, seed: int) -> tuple[Path, Path, Path]:
    stem = cache / f"fleet_{n_units}_{seed}"
    return stem.with_suffix(".csv"), stem.with_suffix(".json"), stem / "truth.csv"


def prepare(cache: Path, n_units: int, seed: int) -> float:
    """Generate the scenario, load it through wearcast.io, cache the life table."""
    from wearcast.config import load_config
    from wearcast.io import load_export
    from wearcast.scenario import generate_scenario

    table_csv, meta_json, _ = _cache_paths(cache, n_units, seed)
    if table_csv.exists():
        return 0.0
    start = time.perf_counter()
    files = generate_scenario(cache / f"fleet_{n_units}_{seed}", n_units=n_units, seed=seed)
    table = load_export(load_config(files.config)).table
    table.frame.to_csv(table_csv, index=False)
    meta_json.write_text(json.dumps({"covariates": table.covariates, "categorical": table.categorical,
                                     "summary": table.summary()}))
    return time.perf_counter() - start


def read_table(cache: Path, n_units: int, seed: int):
    from wearcast import LifeTable

    table_csv, meta_json, _ = _cache_paths(cache, n_units, seed)
    meta = json.loads(meta_json.read_text())
    frame = pd.read_csv(table_csv, dtype={"unit_id": str, "mode": str}, keep_default_na=False,
                        na_values={c: [""] for c in meta["covariates"] if c not in meta["categorical"]})
    return LifeTable.from_frame(frame, meta["covariates"], meta["categorical"])


def last_rows(table) -> tuple[np.ndarray, np.ndarray]:
    """Last row of each life and the life's first entry age."""
    from wearcast.models._forest_oob import last_rows_of_lives

    units, life = table.unit_codes(), table.frame["life"].to_numpy()
    rows = last_rows_of_lives(units, life, table.exit)
    first_entry = table.frame.groupby(["unit_id", "life"], sort=False)["entry_age"].transform("min").to_numpy()
    return rows, first_entry[rows]


def row_sample(table) -> np.ndarray:
    """All rows of ROW_C_UNITS test units drawn once (fixed seed), in table order."""
    units = np.unique(table.unit_codes())
    chosen = np.random.default_rng(2026).choice(units, size=min(ROW_C_UNITS, units.size), replace=False)
    return np.flatnonzero(np.isin(table.unit_codes(), chosen))


def _rss_mb() -> float:
    import psutil

    return psutil.Process().memory_info().rss / 2**20


def child(model: str, cache: Path, n_units: int) -> dict:
    """Fit one model on one training fleet, score the test fleet; runs in a fresh process."""
    from wearcast import metrics
    from wearcast.scenario import read_truth, true_log_risk

    train = read_table(cache, n_units, TRAIN[n_units])
    score_test = n_units != 100_000
    if score_test:
        test = read_table(cache, *TEST)
        test_rows, test_entry = last_rows(test)
        X_test = test.X.iloc[test_rows]
        every_row = row_sample(test)
    baseline = _rss_mb()
    # 1-minute load average when the fit starts: the machine is shared, 2 cores
    out = {"model": model, "n_units": n_units, "train_rows": train.n_rows, "load_avg": os.getloadavg()[0]}
    if model == "wearcast-lives":  # same rows as the peer (one per life), but keeping entry ages
        from wearcast import LifeTable

        rows, first_entry = last_rows(train)
        frame = train.frame.iloc[rows].reset_index(drop=True)
        frame["entry_age"] = first_entry
        train = LifeTable.from_frame(frame, train.covariates, train.categorical)
        out["train_rows"] = train.n_rows
    if model.startswith("wearcast"):
        from wearcast.models.forest import SurvivalForest

        grow_on = "rows" if model == "wearcast-rows" else "episodes"
        forest = SurvivalForest("random_forest", N_TREES, None, 5, 12, 200, seed=1, n_jobs=2, grow_on=grow_on)
        start = time.perf_counter()
        forest.fit(train)
        out["fit_s"] = time.perf_counter() - start
        out["oob_c"] = forest.oob_concordance_
        if score_test:
            start = time.perf_counter()
            risk = forest.risk_score(X_test)
            forest.cumulative_hazard_at(X_test, np.full(len(X_test), 3650.0))
            out["predict_s"] = time.perf_counter() - start
            risk_rows = forest.risk_score(test.X.iloc[every_row])
    else:
        from sksurv.ensemble import RandomSurvivalForest
        from sksurv.util import Surv

        rows, _ = last_rows(train)
        X_train = pd.get_dummies(train.X.iloc[rows], dtype=float)
        y_train = Surv.from_arrays(train.event[rows], train.exit[rows])
        out["train_rows"] = len(rows)
        peer = RandomSurvivalForest(n_estimators=N_TREES, min_samples_leaf=15, max_features="sqrt",
                                    n_jobs=2, random_state=1)
        start = time.perf_counter()
        peer.fit(X_train, y_train)
        out["fit_s"] = time.perf_counter() - start
        start = time.perf_counter()
        X_peer = pd.get_dummies(X_test, dtype=float).reindex(columns=X_train.columns, fill_value=0.0)
        risk = peer.predict(X_peer)
        peer.predict_cumulative_hazard_function(X_peer.iloc[:2000], return_array=True)
        out["predict_s"] = time.perf_counter() - start
        if score_test:  # every row with its own readings (slow for this peer: curves over all times)
            X_rows = pd.get_dummies(test.X.iloc[every_row], dtype=float).reindex(columns=X_train.columns,
                                                                                  fill_value=0.0)
            risk_rows = peer.predict(X_rows)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    out["peak_rss_mb"] = peak
    out["fit_predict_rss_mb"] = peak - baseline
    if score_test:
        exit_, event = test.exit[test_rows], test.event[test_rows]
        out["harrell_c"] = metrics.harrell_c(exit_, event, risk).c
        out["trunc_c"] = metrics.truncation_aware_c(test_entry, exit_, event, risk).c
        truth = read_truth(_cache_paths(cache, *TEST)[2])
        oracle = true_log_risk(truth, test.frame.iloc[test_rows])
        out["oracle_harrell_c"] = metrics.harrell_c(exit_, event, oracle).c
        out["oracle_trunc_c"] = metrics.truncation_aware_c(test_entry, exit_, event, oracle).c
        # Time-dependent C: each failure against the rows at risk at its age, every
        # row scored with its own readings (the truncation-aware C on rows)
        e_rows, x_rows, d_rows = test.entry[every_row], test.exit[every_row], test.event[every_row]
        out["row_c"] = metrics.truncation_aware_c(e_rows, x_rows, d_rows, risk_rows).c
        oracle_rows = true_log_risk(truth, test.frame.iloc[every_row])
        out["oracle_row_c"] = metrics.truncation_aware_c(e_rows, x_rows, d_rows, oracle_rows).c
    return out


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cache", type=Path, default=Path("/tmp/wearcast-bench-forest"))
    parser.add_argument("--skip-100k", action="store_true")
    parser.add_argument("--no-readme", action="store_true")
    parser.add_argument("--from-json", type=Path)
    parser.add_argument("--child", nargs=2, metavar=("MODEL", "N_UNITS"))
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child[0], args.cache, int(args.child[1]))))
        return
    if args.from_json:
        _publish(json.loads(args.from_json.read_text()), args.no_readme)
        return
    args.cache.mkdir(parents=True, exist_ok=True)
    sizes = [2_000, 10_000] + ([] if args.skip_100k else [100_000])
    for n_units, seed in [TEST] + [(n, TRAIN[n]) for n in sizes]:
        spent = prepare(args.cache, n_units, seed)
        print(f"fleet {n_units} (seed {seed}) ready; load took {spent:.0f} s", file=sys.stderr)
    parser_models = ("wearcast", "wearcast-rows", "wearcast-lives", "scikit-survival")
    runs = [(m, n) for n in (2_000, 10_000) for m in parser_models]
    runs += [] if args.skip_100k else [("wearcast", 100_000)]
    results = []
    for model, n_units in runs:
        done = subprocess.run([sys.executable, __file__, "--cache", str(args.cache), "--child", model, str(n_units)],
                              capture_output=True, text=True, check=True)
        results.append(json.loads(done.stdout.strip().splitlines()[-1]))
        print(json.dumps(results[-1]), file=sys.stderr)
    (args.cache / "results.json").write_text(json.dumps(results, indent=2))
    _publish(results, args.no_readme)


def _publish(results: list[dict], no_readme: bool) -> None:
    print(render(results))
    print(verdicts(results))
    if not no_readme:
        sys.path.insert(0, str(Path(__file__).resolve().parent))
        from _common import write_section

        write_section("forest", section(results))


_ROLES = {
    "wearcast-lives": "Same rows as the peer (one per life, as `wearcast fit` gets from an export without "
                      "readings; wearcast keeps each life's entry age, the peer cannot): the like-for-like "
                      "comparison the targets are read on",
    "wearcast": "wearcast on the full reading history (what `wearcast fit` does when readings are given; "
                "the peer cannot take it, so its Harrell C on last rows is not like for like: see below)",
    "wearcast-rows": "Diagnostic: splits chosen on every row",
}


def verdicts(results: list[dict]) -> str:
    """Pass/fail per target at 10,000 units (and the 100,000-unit memory bound)."""
    by = {(r["model"], r["n_units"]): r for r in results}
    peer = by.get(("scikit-survival", 10_000))
    lines = []
    for model, role in _ROLES.items():
        ours = by.get((model, 10_000))
        if not (ours and peer):
            continue
        speed = peer["fit_s"] / ours["fit_s"]
        gap = ours["harrell_c"] - peer["harrell_c"]
        memory = peer["peak_rss_mb"] / ours["peak_rss_mb"]
        lines.append(
            f"- {role} (`{model}`): fit {speed:.1f} x faster than the peer (target >= 20: "
            f"**{'pass' if speed >= 20 else 'fail'}**); Harrell C {gap:+.4f} against the peer (target >= -0.005: "
            f"**{'pass' if gap >= -0.005 else 'fail'}**); truncation-aware C {ours['trunc_c'] - peer['trunc_c']:+.4f}; "
            f"peak memory 1/{memory:.0f} of the peer's (target <= 1/8: **{'pass' if memory >= 8 else 'fail'}**)"
            + (f"; time-dependent C {ours['row_c'] - peer['row_c']:+.4f}." if "row_c" in ours and "row_c" in peer
               else ".")
        )
    big = by.get(("wearcast", 100_000))
    if big:
        lines.append(f"- wearcast at 100,000 units, full reading history: peak {big['peak_rss_mb']:,.0f} MB "
                     f"(target < 2,048 MB: **{'pass' if big['peak_rss_mb'] < 2048 else 'fail'}**), "
                     f"fit {big['fit_s']:.1f} s.")
    return "\n".join(lines)


def section(results: list[dict]) -> str:
    return "\n".join([
        "## Survival forest (bench/bench_forest.py)",
        "",
        f"Run {time.strftime('%Y-%m-%d')} on a 2-core machine (1-minute load average at each fit start in "
        "the last column; other work may have shared the machine), so times are indicative. "
        "100 trees each; one separate 10,000-position test fleet (11,000 lives) scores every model on each "
        "life's last row. Peer: scikit-survival `RandomSurvivalForest` (min_samples_leaf=15, "
        "max_features=\"sqrt\", n_jobs=2) on one row per life, entry ignored. `wearcast`: the forest on the "
        "full life table (counting-process rows, delayed entry), splits chosen on episodes (default); "
        "`wearcast-rows`: splits chosen on every row; `wearcast-lives`: the forest on the peer's rows (one "
        "per life) with the life's first entry age kept. Peak RSS = child process `ru_maxrss`; "
        "fit+predict = peak minus RSS after loading the data.",
        "",
        render(results),
        "",
        "Targets at 10,000 units (computed from the table above):",
        "",
        verdicts(results),
        "",
        "Reading the C columns: Harrell's C ignores entry ages, and the last row's vibration reading grows "
        "with a unit's age, so a model fitted without entry can rank by \"looks old, so it lived long\" and "
        f"beat the scenario's true hazard on Harrell's C (oracle {_oracle(results, 'oracle_harrell_c')}). "
        f"The truncation-aware C (oracle {_oracle(results, 'oracle_trunc_c')}) only compares a failure with "
        "units watched at that age and is the fair yardstick for this data. Harrell's C takes one covariate "
        "vector per unit, so it compares two forests cleanly only when both are fed the same one-row-per-life "
        "data (`wearcast-lives` against the peer). The full-table forest models the "
        "hazard at each row's own readings, which is what the ranked list of in-service units needs; the "
        "one-row-per-life forest gives every age of a life its last readings. "
        f"The time-dependent C (oracle {_oracle(results, 'oracle_row_c')}) scores every row of "
        f"{ROW_C_UNITS:,} test units with the readings in force on it: each failure is compared with the "
        "units at risk at that age as they were then (the truncation-aware C on counting-process rows), "
        "which is how the ranked list is used; last-row scoring instead lets a unit's final readings stand "
        "for its whole life.",
    ])


def _oracle(results: list[dict], key: str) -> str:
    values = {round(r[key], 4) for r in results if key in r}
    return ", ".join(f"{v:.4f}" for v in sorted(values)) or "—"


def render(results: list[dict]) -> str:
    def f(r, key, fmt):
        return format(r[key], fmt) if key in r and r[key] == r[key] else "—"

    lines = ["| model | training units (rows) | fit s | predict s | peak RSS MB | fit+predict RSS MB "
             "| Harrell C | truncation-aware C | oracle Harrell C | oracle trunc. C | time-dependent C "
             "| oracle time-dep. C | load avg |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in results:
        lines.append(f"| {r['model']} | {r['n_units']:,} ({r['train_rows']:,}) | {f(r, 'fit_s', '.1f')} | "
                     f"{f(r, 'predict_s', '.2f')} | {f(r, 'peak_rss_mb', '.0f')} | {f(r, 'fit_predict_rss_mb', '.0f')} | "
                     f"{f(r, 'harrell_c', '.4f')} | {f(r, 'trunc_c', '.4f')} | {f(r, 'oracle_harrell_c', '.4f')} | "
                     f"{f(r, 'oracle_trunc_c', '.4f')} | {f(r, 'row_c', '.4f')} | {f(r, 'oracle_row_c', '.4f')} | "
                     f"{f(r, 'load_avg', '.1f')} |")
    return "\n".join(lines)


if __name__ == "__main__":
    main()
