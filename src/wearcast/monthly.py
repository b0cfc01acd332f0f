"""The unattended monthly run: lock, check, fit, promotion gate, rank, report, record.

``run_monthly(config, as_of=None)``:

1. takes a non-blocking lock (``<registry>/monthly.lock``; a second run gets
   :class:`LockHeldError`, exit 75) and removes what a killed run left behind;
2. checks the export (quarantine; too many bad rows stop the run, exit 65);
3. fits the challenger (the fit stage: cross-validated choice, bundles);
4. **promotion gate**: refits the champion's and the challenger's settings on
   the export as it stood ``holdout_days`` before ``as_of`` and scores both on
   the failures recorded since (an as-of backtest, so neither has seen the
   holdout). The challenger is promoted when its concordance is not lower than
   the champion's by more than ``c_tolerance`` and its expected failure count
   is within ``calibration_bound`` of the observed (or the observed count lies
   inside its 95 % Poisson-binomial interval). The first run promotes;
5. ranks with the promoted model and writes the report;
6. records the month: changes since the previous month, covariate drift, a
   ``manifest.json`` and a history entry.

Everything is built in a staging folder and renamed into
``<output>/runs/<as_of>_<fingerprint>/`` only when complete; the ``current``
pointer is replaced atomically after that. A run killed at any point leaves
earlier months and the champion intact, and the next run cleans up and
completes. The run id is a fingerprint of the input files, the config and
``as_of``: rerunning a month with the same inputs finds it recorded and
changes nothing; changed inputs make a new run folder.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import json
import os
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast._lock import RunLock
from wearcast.config import Config
from wearcast.drift import drift_table
from wearcast.fitting import MODELS_DIR
from wearcast.pipeline import JobState, check_stage, fit_stage, rank_stage, report_stage, run_stage
from wearcast.models.bundle import package_versions
from wearcast.ranking import main_probability_column
from wearcast.registry import ModelRegistry

EXIT_DONE = 0
EXIT_KEPT_CHAMPION = 3
RUNS_DIR = "runs"
_STAGING = ".staging-"
N_MOVERS = 10


@dataclass(frozen=True)
class MonthlyOutcome:
    run_id: str
    run_dir: Path
    promoted: bool
    decision: str  # "first run", "promoted", "kept champion"
    reasons: list[str]
    exit_code: int
    already_recorded: bool = False
    warnings: tuple[str, ...] = ()  # the fit stage's warnings (wearcast.fitting.fit_warnings)


def run_monthly(config: Config, *, as_of: dt.date | None = None, jobs: int | None = None,
                scheduler: str | None = None) -> MonthlyOutcome:
    """Run one month; see the module docstring. Returns what was decided."""
    if as_of is not None:
        config = dataclasses.replace(config, fleet=dataclasses.replace(config.fleet, as_of=as_of))
    registry_root = config.path(config.monthly.registry)
    runs_root = config.path(config.output.folder) / RUNS_DIR
    with RunLock(registry_root / "monthly.lock"):
        registry = ModelRegistry(registry_root)
        registry.clean_stale()
        _clean_runs(runs_root)
        inputs = input_fingerprints(config)
        run_id = _run_id(config, inputs)
        run_dir = runs_root / run_id
        recorded = {e["run_id"]: e for e in registry.history()}
        if run_id in recorded and (run_dir / "manifest.json").exists():
            e = recorded[run_id]
            return MonthlyOutcome(run_id, run_dir, e["promoted"], e["decision"], e["reasons"], e["exit_code"], True)
        if run_dir.exists():  # a run killed after publishing its folder but before recording it
            shutil.rmtree(run_dir)
        staging = runs_root / f"{_STAGING}{run_id}"
        staging.mkdir(parents=True)
        outcome = _run_into(config, registry, staging, run_id, inputs, jobs, scheduler)
        os.replace(staging, run_dir)
        _atomic._fsync_dir(runs_root)
        if outcome["promote"]:
            registry.promote(outcome["challenger_id"], run_id)
        decision = outcome["decision"]
        code = EXIT_DONE if outcome["promote"] else EXIT_KEPT_CHAMPION
        registry.record({
            "run_id": run_id, "as_of": outcome["as_of"], "run_dir": os.path.relpath(run_dir, registry_root),
            "promoted": outcome["promote"], "decision": decision, "reasons": outcome["reasons"],
            "champion": outcome["champion_id"], "challenger": outcome["challenger_id"],
            "model_used": outcome["model_used"], "exit_code": code,
        })
        return MonthlyOutcome(run_id, run_dir, outcome["promote"], decision, outcome["reasons"], code,
                              warnings=tuple(outcome["warnings"]))


def _run_into(config: Config, registry: ModelRegistry, out: Path, run_id: str, inputs: dict,
              jobs: int | None, scheduler: str | None) -> dict:
    state = JobState(jobs=jobs, scheduler=scheduler)
    run_stage("check", check_stage, config, out, state)
    run_stage("fit", fit_stage, config, out, state)
    table = state.export.table
    challenger = state.fit.main_model
    challenger_id = registry.add(out / MODELS_DIR / state.fit.chosen, challenger.name)
    champion_id = registry.current_id()

    start = time.perf_counter()
    if champion_id is None:
        promote, decision, reasons, gate = True, "first run", ["no champion yet: the first run promotes its model"], {}
        champion = None
    elif champion_id == challenger_id:
        promote, decision, reasons, gate = True, "promoted", ["the challenger is identical to the champion"], {}
        champion = None
    else:
        champion = registry.load(champion_id)
        gate = promotion_gate(config, champion, challenger)
        promote, reasons = gate["promote"], gate["reasons"]
        decision = "promoted" if promote else "kept champion"
    state.timings["gate"] = time.perf_counter() - start

    used = challenger if promote else champion
    state.rank_model = used
    if not promote and tuple(model_covariates(champion)) != tuple(table.covariates):
        # The champion was trained on other covariates than this month's config names: rank it on its own.
        from wearcast.io import load_export

        state.export = load_export(config_for_model(config, champion))
        table = state.export.table
    run_stage("rank", rank_stage, config, out, state)
    previous = _previous_run(registry, str(table.as_of.date()) if table.as_of is not None else "", run_id)
    changes = month_changes(previous, state.ranked.ranked_units, config.ranking.top_k) if previous else None
    if changes is not None:
        _atomic.write_json(out / "monthly_changes.json", changes)
    in_service = table.in_service()
    drift = drift_table(table.X, in_service.X, table.covariates) if in_service.n_rows else pd.DataFrame()
    _atomic.write_csv(out / "drift.csv", drift)
    _atomic.write_json(out / "gate.json", {"decision": decision, "reasons": reasons, **_plain(gate)})
    # Refit checkpoints serve a killed run's resume; a finished month does not keep them.
    shutil.rmtree(out / "refits", ignore_errors=True)
    run_stage("report", report_stage, config, out, state)

    as_of = table.as_of.date().isoformat() if table.as_of is not None else None
    manifest = {
        "run_id": run_id,
        "as_of": as_of,
        "inputs": inputs,
        "config": _plain(dataclasses.asdict(config)),
        "versions": package_versions(),
        "seeds": {"model": config.model.seed},
        "chosen_model": state.fit.chosen,
        "choice_reason": state.fit.choice.reason,
        "metrics": _plain(_choice_metrics(state.fit)),
        "champion": champion_id,
        "challenger": challenger_id,
        "model_used": champion_id if not promote else challenger_id,
        "decision": decision,
        "reasons": reasons,
        "gate": _plain(gate),
        "check": {k: v for k, v in state.summaries["check"].items() if not k.endswith("_path")},
        "drift_warnings": drift[drift["level"] != "none"].to_dict(orient="records") if len(drift) else [],
    }
    _atomic.write_json(out / "manifest.json", manifest)
    # Wall-clock times differ between reruns, so they live apart from the manifest.
    _atomic.write_json(out / "timings.json", {k: round(v, 3) for k, v in state.timings.items()})
    return {"promote": promote, "decision": decision, "reasons": reasons, "challenger_id": challenger_id,
            "champion_id": champion_id, "model_used": manifest["model_used"], "as_of": as_of,
            "warnings": list(state.fit.warnings)}


def _choice_metrics(fit) -> dict:
    """Cross-validated metrics of every candidate (the comparison table's point values)."""
    from wearcast.selection import as_dict

    comparison = fit.comparison
    point = [c for c in comparison.columns if c == "model" or not c.endswith(("_low", "_high"))]
    return {"candidates": as_dict(fit.choice)["candidates"],
            "comparison": json.loads(comparison[point].to_json(orient="records"))}


def promotion_gate(config: Config, champion, challenger) -> dict:
    """Score both models' settings on the most recent holdout; decide promotion."""
    from wearcast.backtest import gate_concordance, run_backtest

    h = int(config.monthly.holdout_days)
    end = config.fleet.as_of
    if end is None:
        raise ValueError("the promotion gate needs fleet.as_of")
    origin = end - dt.timedelta(days=h)
    # Each model is refitted with its own covariates on the same as-of export, scored on the same units.
    rows = pd.concat([
        run_backtest(config_for_model(config, model), {role: model.unfitted_copy}, origin, h, origins=1,
                     top_k=config.ranking.top_k, seed=config.model.seed).per_origin
        for role, model in (("champion", champion), ("challenger", challenger))
    ]).set_index("model")
    (c_col, c_words), e_col, o_col = gate_concordance(rows, h), f"expected_failures_{h}d", f"observed_failures_{h}d"
    c_champ, c_chall = float(rows.loc["champion", c_col]), float(rows.loc["challenger", c_col])
    expected, observed = float(rows.loc["challenger", e_col]), float(rows.loc["challenger", o_col])
    low, high = float(rows.loc["challenger", f"{e_col}_low"]), float(rows.loc["challenger", f"{e_col}_high"])
    tol, bound = config.monthly.c_tolerance, config.monthly.calibration_bound
    reasons = []
    c_ok = not (c_chall < c_champ - tol)
    reasons.append(
        f"concordance ({c_words}) on the holdout since {origin}: challenger {c_chall:.3f}, champion {c_champ:.3f} "
        f"({'within' if c_ok else 'worse than'} the tolerance {tol:g})"
    )
    ratio = expected / observed if observed > 0 else float("inf") if expected > 0 else 1.0
    cal_ok = abs(ratio - 1) <= bound or low <= observed <= high
    reasons.append(
        f"challenger expected {expected:.1f} failures, observed {observed:.0f} "
        f"(95 % interval {low:.0f}–{high:.0f}; {'within' if cal_ok else 'outside'} the bound {bound:g})"
    )
    return {"promote": bool(c_ok and cal_ok), "reasons": reasons, "holdout_start": origin.isoformat(),
            "holdout_days": h, "concordance": c_col, "c_champion": c_champ, "c_challenger": c_chall,
            "expected_challenger": expected, "observed": observed}


def model_covariates(model) -> list[str]:
    """The covariates a fitted model was trained on."""
    found = getattr(model, "covariates_", None)
    if found is None:
        found = getattr(model, "covariates", ())
    return list(found)


def config_for_model(config: Config, model) -> Config:
    """``config`` with the fleet's covariates set to those ``model`` was trained on."""
    covariates = model_covariates(model)
    categorical = [c for c in config.fleet.categorical if c in covariates]
    for c in covariates:
        levels = getattr(model, "category_levels_", None) or getattr(model, "levels", None) or {}
        if c in levels and c not in categorical and c not in config.fleet.covariates:
            categorical.append(c)
    fleet = dataclasses.replace(config.fleet, covariates=covariates, categorical=categorical)
    return dataclasses.replace(config, fleet=fleet)


def month_changes(previous_dir: Path, ranked: pd.DataFrame, top_k: int) -> dict | None:
    """What changed since the previous month's ranked list (``None`` without one)."""
    path = Path(previous_dir) / "ranked_units.csv"
    if not path.exists():
        return None
    before = pd.read_csv(path, dtype={"unit_id": str})
    main = main_probability_column(ranked)
    if main is None or main not in before.columns:
        return None
    top_now = set(ranked.loc[ranked["rank"] <= top_k, "unit_id"])
    top_before = set(before.loc[before["rank"] <= top_k, "unit_id"])
    drivers = [c for c in ("driver_1", "driver_2") if c in ranked and c in before]
    merged = ranked[["unit_id", main] + drivers].merge(
        before[["unit_id", main] + drivers], on="unit_id", suffixes=("", "_before"))
    merged["change"] = merged[main] - merged[f"{main}_before"]
    movers = merged.reindex(merged["change"].abs().sort_values(ascending=False, kind="mergesort").index)
    movers = movers.head(N_MOVERS)
    return {
        "previous_run": Path(previous_dir).name,
        "probability_column": main,
        "entered_top": sorted(top_now - top_before),
        "left_top": sorted(top_before - top_now),
        "largest_movers": [
            {"unit_id": r["unit_id"], "before": round(float(r[f"{main}_before"]), 6),
             "now": round(float(r[main]), 6), "change": round(float(r["change"]), 6),
             "drivers_now": [r[c] for c in drivers if isinstance(r[c], str)],
             "drivers_before": [r[f"{c}_before"] for c in drivers if isinstance(r[f"{c}_before"], str)]}
            for _, r in movers.iterrows()
        ],
    }


def _previous_run(registry: ModelRegistry, as_of: str, run_id: str) -> Path | None:
    earlier = [e for e in registry.history() if str(e.get("as_of")) < as_of and e["run_id"] != run_id]
    if not earlier:
        return None
    return registry.root / earlier[-1]["run_dir"]


def input_fingerprints(config: Config) -> dict:
    """SHA-256 of every input file named in the config (name -> hex digest)."""
    out = {}
    for key in ("register", "events", "readings", "life_table"):
        rel = getattr(config.input, key)
        path = config.path(rel)
        if path is not None and path.exists():
            out[key] = {"path": str(rel), "sha256": hashlib.sha256(path.read_bytes()).hexdigest()}
    return out


def _run_id(config: Config, inputs: dict) -> str:
    payload = json.dumps({"inputs": inputs, "config": _plain(dataclasses.asdict(config))}, sort_keys=True)
    digest = hashlib.sha256(payload.encode()).hexdigest()[:10]
    as_of = config.fleet.as_of.isoformat() if config.fleet.as_of else "latest"
    return f"{as_of}_{digest}"


def _clean_runs(runs_root: Path) -> None:
    if not runs_root.exists():
        return
    _atomic.remove_stale_temporaries(runs_root)
    for folder in runs_root.glob(f"{_STAGING}*"):
        shutil.rmtree(folder, ignore_errors=True)


def _plain(obj):
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items() if k not in ("base_dir", "source")}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (dt.date, Path)):
        return str(obj)
    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    return obj
