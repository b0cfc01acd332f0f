"""Bootstrap refits: how much the ranked list moves when the data are resampled.

Each refit draws whole unit histories with replacement
(:meth:`SurvivalModel.fit_resampled`: copied units, or the same draw as case
weights for the boosted model), fits a fresh copy of the chosen model
(tuned choices fixed, see :meth:`SurvivalModel.unfitted_copy`) and predicts,
for every unit in service in the *original* table at its current age, the
probability of failing within each horizon. The spread across refits gives
the stability intervals of the ranked list and the model-uncertainty part of
the fleet forecast.

Reproducibility: every refit's two seeds (bootstrap draw, model) are drawn up
front from one ``numpy.random.Generator(seed)``, so results are identical with
one worker, many workers, or a Dask cluster.

Checkpoints: each finished refit is written at once as ``refit_NNNN.npz``
(plain numeric arrays, no pickles, atomic) carrying a fingerprint of the table
contents, the model settings, the seed, the number of refits, the horizons and
the ranking horizon. A rerun with the same fingerprint only computes missing
refits; a file with another fingerprint is recomputed and overwritten. Each
file also holds the refit's failure-count pmf per group and horizon, counted
by the worker, with a key of the groups' units; the summary adds those up and
counts afresh only when the groups differ.

Memory: per refit the parent keeps nothing but the file on disk
(``n_units * (4 * n_horizons + 8)`` bytes plus the pmfs, 8 bytes per count
up to a group's largest likely count). The summary reads the files back in
unit chunks holding at most :data:`CHUNK_BYTES` of refit values at a time, plus
the fleet-count mixtures (``8 * n_horizons * (n_groups + n_units * (1 + len(group_by)))``
bytes) and the per-refit group totals (``8 * n_refits * n_groups * n_horizons``
bytes). Without ``checkpoint_dir`` the files go to a temporary folder that is
removed afterwards.
"""

from __future__ import annotations

import hashlib
import io
import json
import sys
import tempfile
import time
import zipfile
from dataclasses import asdict, dataclass, field, is_dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast._poisson_binomial import count_pmf
from wearcast.exceptions import ConfigError, DataError, ModelError
from wearcast.lifetable import group_labels, group_members

#: Quantiles reported as the interval (5 % and 95 %).
INTERVAL = (0.05, 0.95)
#: Upper bound on refit values held in memory while summarising (bytes).
CHUNK_BYTES = 64 * 2**20
_FORMAT_VERSION = 2  # 2: boosted refits fit the unit draw as case weights


@dataclass(frozen=True)
class RefitSummary:
    """Per-unit stability summaries and per-refit fleet totals.

    Units are the original table's in-service units in the order of
    ``table.in_service()`` (``unit_ids``, shape (n,)). Horizons are
    ``horizons_days`` (H,). Ranks: 1 = highest P(fail within
    ``rank_horizon_days``).

    - ``p_median``, ``p_low``, ``p_high``: (n, H) median, 5 % and 95 % of the
      refits' failure probabilities (linear interpolation between refits).
    - ``rank_median``, ``rank_low``, ``rank_high``: (n,) int, the refits' rank
      quantiles taken as observed ranks (inverted-CDF rule);
      ``rank_low`` is the best (smallest) end.
    - ``top_share``: (n,) share of refits in which the unit is in the top ``top_k``.
    - ``groups``: ((column, level), ...), the fleet first; ``group_units`` (G,).
    - ``group_expected``: (B, G, H) each refit's expected failures ``sum p``.
    - ``count_pmf``: one (H, units + 1) array per group: the failure-count pmf
      averaged over refits (each refit's Poisson-binomial law), i.e. the
      predictive distribution combining chance and model uncertainty.
    """

    unit_ids: np.ndarray
    horizons_days: tuple[int, ...]
    rank_horizon_days: int
    n_refits: int
    seed: int
    top_k: int
    p_median: np.ndarray
    p_low: np.ndarray
    p_high: np.ndarray
    rank_median: np.ndarray
    rank_low: np.ndarray
    rank_high: np.ndarray
    top_share: np.ndarray
    groups: tuple[tuple[str, str], ...]
    group_units: np.ndarray
    group_expected: np.ndarray
    count_pmf: tuple[np.ndarray, ...]
    fingerprint: str
    computed: int = 0  # refits fitted in this call (the rest came from checkpoints)
    meta: dict = field(default_factory=dict, compare=False)


# -- pieces shared with the ranked list ------------------------------------------
def risk_ranks(p: np.ndarray) -> np.ndarray:
    """Ordinal ranks, shape (n,) int32: 1 = highest ``p``; ties keep table order."""
    p = np.asarray(p, float)
    order = np.argsort(-p, kind="stable")
    ranks = np.empty(len(p), dtype=np.int32)
    ranks[order] = np.arange(1, len(p) + 1, dtype=np.int32)
    return ranks


def current_units(table) -> tuple[pd.DataFrame, np.ndarray, np.ndarray]:
    """The in-service units: (their rows, unit ids (n,), current ages in days (n,)).

    Raises :class:`DataError` when a unit has more than one open interval.
    """
    rows = table.in_service().frame
    ids = rows["unit_id"].to_numpy().astype(str)
    if len(pd.unique(ids)) != len(ids):
        dup = pd.Series(ids)[pd.Series(ids).duplicated()].iloc[0]
        raise DataError(
            f"life table: unit {dup} has more than one in-service row; only its last open "
            "interval may be marked in_service. Check the register for a duplicated unit."
        )
    return rows, ids, rows["exit_age"].to_numpy(dtype=float)


def members_key(members) -> str:
    """SHA-256 of the groups and their units: whether stored per-group counts still apply."""
    h = hashlib.sha256()
    for key, idx in members:
        h.update(json.dumps(list(key)).encode())
        h.update(np.asarray(idx, np.int64).tobytes())
    return h.hexdigest()


def _group_pmfs(p: np.ndarray, members) -> list[list[np.ndarray]]:
    """Per group, per horizon: the failure-count pmf of one refit, trailing zeros cut."""
    p64 = np.asarray(p, float)
    return [[np.trim_zeros(count_pmf(p64[idx, h]), "b") for h in range(p64.shape[1])] for _, idx in members]


# -- fingerprint -------------------------------------------------------------------
def table_hash(table) -> str:
    """SHA-256 of the life table's contents, column names, covariates and export date."""
    h = hashlib.sha256()
    frame = table.frame
    h.update(json.dumps([list(map(str, frame.columns)), [str(t) for t in frame.dtypes],
                         list(table.covariates), list(table.categorical),
                         None if table.as_of is None else str(table.as_of)]).encode())
    h.update(pd.util.hash_pandas_object(frame, index=False).to_numpy().tobytes())
    return h.hexdigest()


def _plain(value):
    if is_dataclass(value) and not isinstance(value, type):
        return _plain(asdict(value))
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in sorted(value.items(), key=lambda kv: str(kv[0]))}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    text = repr(value)
    return type(value).__qualname__ if " at 0x" in text else text


def model_settings(model) -> dict:
    """The settings of a fresh copy (public attributes other than ``seed``), JSON-able."""
    fresh = model.unfitted_copy(0)
    settings = {"class": f"{type(fresh).__module__}.{type(fresh).__qualname__}",
                "name": getattr(fresh, "name", "")}
    for key, value in sorted(vars(fresh).items()):
        if key == "seed" or key.startswith("_") or key.endswith("_"):
            continue
        settings[key] = _plain(value)
    return settings


def refit_fingerprint(table, model, seed: int, n_refits: int, horizons_days, rank_horizon_days, *,
                      table_key: str | None = None) -> str:
    """SHA-256 naming everything a refit file depends on (``table_key``: :func:`table_hash`
    of ``table`` when the caller has it already)."""
    key = {
        "format": _FORMAT_VERSION,
        "table": table_hash(table) if table_key is None else table_key,
        "model": model_settings(model),
        "seed": int(seed),
        "n_refits": int(n_refits),
        "horizons_days": [float(h) for h in horizons_days],
        "rank_horizon_days": float(rank_horizon_days),
    }
    return hashlib.sha256(json.dumps(key, sort_keys=True, default=str).encode()).hexdigest()


# -- one refit -------------------------------------------------------------------------
class _RefitInputs:
    """What every refit reads, prepared once: the table cut to its core and
    covariate columns (cheaper to resample), and the in-service units'
    covariates and current ages (the same for every refit)."""

    def __init__(self, table, group_by: Sequence[str] = ()):
        from wearcast.lifetable import CORE_COLUMNS, LifeTable

        rows, _, ages = current_units(table)
        # the fleet-count groups, so each refit's count pmfs are computed in the worker
        self.members = group_members(group_labels(rows, group_by), len(ages))
        self.members_key = members_key(self.members)
        columns = list(dict.fromkeys([*CORE_COLUMNS, *table.covariates]))
        self.table = LifeTable(table.frame.loc[:, columns], table.covariates, table.categorical,
                               table.as_of, dict(table.meta))
        self.X = rows.loc[:, list(table.covariates)].reset_index(drop=True)
        self.ages = ages
        self.cache: dict = {}  # per-table work models keep between refits (fit_resampled)

    def get(self) -> "_RefitInputs":
        return self


class _SharedTable:
    """A life table handed to local worker processes through one parquet file.

    Pickling a large table for every refit costs more than reading it once per
    worker: the handle pickles as the file's path, and each worker keeps the
    inputs (:class:`_RefitInputs`) of the table it read last.
    """

    _cache: dict = {}

    def __init__(self, table, folder: Path, key: str, group_by: Sequence[str] = ()):
        self.path = folder / f"table-{key[:16]}.parquet"
        self.key = key
        self.parts = (table.covariates, table.categorical, table.as_of)
        self.group_by = tuple(group_by)
        # only what the workers read: the core and covariate columns, and the grouping ones
        from wearcast.lifetable import CORE_COLUMNS

        columns = list(dict.fromkeys([*CORE_COLUMNS, *table.covariates, *self.group_by]))
        table.frame.loc[:, columns].to_parquet(self.path, index=False)
        self._inputs = None

    def __getstate__(self):
        return {"path": self.path, "key": self.key, "parts": self.parts, "group_by": self.group_by,
                "_inputs": None}

    def get(self) -> _RefitInputs:
        if self._inputs is None:
            if (self.key, self.group_by) not in _SharedTable._cache:
                from wearcast.lifetable import LifeTable

                _SharedTable._cache.clear()
                table = LifeTable(pd.read_parquet(self.path), *self.parts)
                _SharedTable._cache[(self.key, self.group_by)] = _RefitInputs(table, self.group_by)
            self._inputs = _SharedTable._cache[(self.key, self.group_by)]
        return self._inputs


def _refit_task(inputs, fresh_model, index: int, draw_seed: int, horizons, rank_column: int):
    """Fit one bootstrap refit; returns (index, p (n, H) float32, ranks (n,), log risk (n,),
    (members key, per-group per-horizon count pmfs)).

    ``inputs``: a :class:`_RefitInputs` or a :class:`_SharedTable` handle to one.
    """
    inputs = inputs.get()
    fresh_model.fit_resampled(inputs.table, np.random.default_rng(draw_seed), cache=inputs.cache)
    score, p = fresh_model.score_units(inputs.X, inputs.ages, horizons)
    p = np.asarray(p, float)
    ranks = risk_ranks(p[:, rank_column])
    p32 = p.astype(np.float32)
    # counts from the stored float32 values, as a summary without these pmfs would
    pmfs = (inputs.members_key, _group_pmfs(p32, inputs.members))
    return index, p32, ranks, np.asarray(score, float).astype(np.float32), pmfs


def _refit_path(folder: Path, index: int) -> Path:
    return folder / f"refit_{index:04d}.npz"


def _save_refit(folder: Path, fingerprint: str, result) -> None:
    index, p, ranks, score, (key, pmfs) = result
    counts = {f"pmf_{g}_{h}": pmf for g, per_h in enumerate(pmfs) for h, pmf in enumerate(per_h)}
    buffer = io.BytesIO()
    np.savez(buffer, fingerprint=np.array(fingerprint), index=np.array(index, dtype=np.int64),
             p_fail=p, rank=ranks, log_risk=score, members_key=np.array(key), **counts)
    _atomic.write_bytes(_refit_path(folder, index), buffer.getvalue())


def _load_refit(folder: Path, index: int, fingerprint: str | None = None, shape=None, *, with_pmfs: bool = False):
    """The refit's ``p_fail`` and ``rank`` (and, with ``with_pmfs``, its stored per-group
    count pmfs and their ``members_key``), or None when the file is missing, damaged or stale."""
    path = _refit_path(folder, index)
    try:
        with np.load(path, allow_pickle=False) as data:
            if fingerprint is not None and (str(data["fingerprint"]) != fingerprint
                                            or int(data["index"]) != index):
                return None
            arrays = {k: data[k] for k in ("p_fail", "rank")}
            if with_pmfs and "members_key" in data.files:
                arrays["members_key"] = str(data["members_key"])
                arrays["pmfs"] = {k: data[k] for k in data.files if k.startswith("pmf_")}
    except (OSError, ValueError, KeyError, zipfile.BadZipFile, EOFError):
        return None
    if shape is not None and arrays["p_fail"].shape != shape:
        return None
    return arrays


# -- progress on stderr -----------------------------------------------------------------
class _Progress:
    """``refits 12/200 0:05 elapsed`` on one stderr line; silent unless enabled."""

    def __init__(self, total: int, done: int, enabled: bool | None):
        self.total, self.done = total, done
        self.enabled = sys.stderr.isatty() if enabled is None else bool(enabled)
        self.start = self.last = time.monotonic()
        self._show(force=True)

    def _show(self, force: bool = False) -> None:
        now = time.monotonic()
        if not self.enabled or (not force and now - self.last < 0.2 and self.done < self.total):
            return
        self.last = now
        elapsed = int(now - self.start)
        sys.stderr.write(f"\rrefits {self.done}/{self.total}  {elapsed // 60}:{elapsed % 60:02d} elapsed")
        sys.stderr.flush()

    def step(self) -> None:
        self.done += 1
        self._show()

    def close(self) -> None:
        if self.enabled:
            self._show(force=True)
            sys.stderr.write("\n")
            sys.stderr.flush()


# -- running the refits -----------------------------------------------------------------------
def _run_joblib(table, table_key, group_by, copies, draws, todo, horizons, rank_column, jobs, on_result) -> None:
    if jobs == 1 or len(todo) <= 1:
        inputs = _RefitInputs(table, group_by)
        for i in todo:
            on_result(_refit_task(inputs, copies[i], i, draws[i], horizons, rank_column))
        return
    from joblib import Parallel, delayed

    n_jobs = -1 if jobs == 0 else jobs
    with tempfile.TemporaryDirectory(prefix="wearcast-table-") as folder:
        shared = _SharedTable(table, Path(folder), table_key, group_by)
        parallel = Parallel(n_jobs=n_jobs, return_as="generator_unordered")
        for result in parallel(delayed(_refit_task)(shared, copies[i], i, draws[i], horizons, rank_column)
                               for i in todo):
            on_result(result)


def _run_dask(scheduler, table, group_by, copies, draws, todo, horizons, rank_column, on_result) -> None:
    try:
        from dask.distributed import Client, as_completed
    except ImportError as exc:
        raise ConfigError(
            "refits on a Dask cluster need dask.distributed, which is not installed; "
            "pip install wearcast[dask], or leave the scheduler unset to use local cores."
        ) from exc
    own_client = not hasattr(scheduler, "submit")
    try:
        client = Client(scheduler) if own_client else scheduler
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConfigError(
            f"cannot reach the Dask scheduler at {scheduler!r}: {exc}. Check the address "
            "(for example tls://host:8786) and that the scheduler is running."
        ) from exc
    try:
        shared = client.scatter(_RefitInputs(table, group_by), broadcast=True)
        futures = [client.submit(_refit_task, shared, copies[i], i, draws[i], horizons, rank_column,
                                 pure=False) for i in todo]
        for _, result in as_completed(futures, with_results=True):
            on_result(result)
    finally:
        if own_client:
            client.close()


def bootstrap_refits(
    table,
    model,
    n_refits: int,
    seed: int,
    horizons_days: Sequence[float],
    *,
    jobs: int = 0,
    scheduler=None,
    checkpoint_dir: Path | None = None,
    progress: bool | None = None,
    top_k: int = 50,
    group_by: Sequence[str] = (),
    rank_horizon_days: float | None = None,
) -> RefitSummary:
    """Refit ``model`` on ``n_refits`` unit bootstraps of ``table`` and summarise.

    ``model`` is the fitted main model; each refit uses
    ``model.unfitted_copy(model_seed)``. ``horizons_days``: planning horizons
    in days. ``rank_horizon_days`` (default: the longest horizon) orders units.
    ``jobs``: local worker processes (0 = all cores, 1 = in this process).
    ``scheduler``: a Dask scheduler address (``tls://host:8786``) or client;
    when given, refits run there instead. ``checkpoint_dir``: keep each refit
    as a file there and reuse matching files on a rerun. ``progress``: a
    one-line counter on stderr (default: only when stderr is a terminal).
    ``group_by``: in-service columns for per-group fleet totals.
    """
    if n_refits < 2:
        raise ConfigError(f"[ranking] refits must be at least 2 for an interval; got {n_refits}.")
    horizons = tuple(float(h) for h in horizons_days)
    if not horizons or any(h <= 0 for h in horizons):
        raise ConfigError(f"[ranking] horizons_days must be positive days; got {list(horizons_days)}.")
    rank_h = max(horizons) if rank_horizon_days is None else float(rank_horizon_days)
    if rank_h not in horizons:
        raise ConfigError(f"ranking horizon {rank_h:g} days is not one of horizons_days {list(horizons_days)}.")
    rank_column = horizons.index(rank_h)
    rows, unit_ids, _ = current_units(table)
    if len(unit_ids) == 0:
        raise DataError("life table: no unit is in service at the export date, so there is nothing to rank.")
    groupings = group_labels(rows, group_by)

    table_key = table_hash(table)
    fingerprint = refit_fingerprint(table, model, seed, n_refits, horizons, rank_h, table_key=table_key)
    seeds = np.random.default_rng(seed).integers(0, 2**31 - 1, size=(n_refits, 2))
    draws = [int(s) for s in seeds[:, 0]]
    shape = (len(unit_ids), len(horizons))

    temporary = None
    if checkpoint_dir is None:
        temporary = tempfile.TemporaryDirectory(prefix="wearcast-refits-")
        folder = Path(temporary.name)
    else:
        folder = Path(checkpoint_dir)
        folder.mkdir(parents=True, exist_ok=True)
        _atomic.remove_stale_temporaries(folder)
    try:
        todo = [i for i in range(n_refits) if _load_refit(folder, i, fingerprint, shape) is None]
        if todo and checkpoint_dir is not None:
            _atomic.write_json(folder / "refits.json", {
                "fingerprint": fingerprint, "n_refits": n_refits, "seed": int(seed),
                "horizons_days": list(horizons), "rank_horizon_days": rank_h,
                "model": model_settings(model), "units": len(unit_ids)})
        copies = {i: model.unfitted_copy(int(seeds[i, 1])) for i in todo}
        bar = _Progress(n_refits, n_refits - len(todo), progress)

        def on_result(result) -> None:
            _save_refit(folder, fingerprint, result)
            bar.step()

        try:
            if scheduler is not None:
                _run_dask(scheduler, table, group_by, copies, draws, todo, horizons, rank_column, on_result)
            else:
                _run_joblib(table, table_key, group_by, copies, draws, todo, horizons, rank_column, jobs,
                            on_result)
        finally:
            bar.close()
        summary = _summarise(folder, fingerprint, n_refits, shape, groupings, top_k)
    finally:
        if temporary is not None:
            temporary.cleanup()
    return RefitSummary(unit_ids=unit_ids, horizons_days=tuple(plain_number(h) for h in horizons),
                        rank_horizon_days=plain_number(rank_h), n_refits=n_refits, seed=int(seed),
                        top_k=int(top_k), fingerprint=fingerprint, computed=len(todo), **summary)


def plain_number(h: float):
    """A horizon as written in outputs: 90 for 90.0, 0.5 stays 0.5."""
    return int(h) if float(h).is_integer() else float(h)


# -- summaries from the files ----------------------------------------------------------------
def _summarise(folder, fingerprint, n_refits, shape, groupings, top_k) -> dict:
    n_units, n_h = shape
    members = group_members(groupings, n_units)
    key = members_key(members)
    group_expected = np.zeros((n_refits, len(members), n_h))
    mixtures = [np.zeros((n_h, len(idx) + 1)) for _, idx in members]

    per_unit = n_refits * (n_h + 1) * 4
    chunk = max(1, min(n_units, CHUNK_BYTES // per_unit))
    out = {k: np.empty(shape) for k in ("p_median", "p_low", "p_high")}
    out.update({k: np.empty(n_units, dtype=np.int64) for k in ("rank_median", "rank_low", "rank_high")})
    out["top_share"] = np.empty(n_units)
    for start in range(0, n_units, chunk):
        stop = min(n_units, start + chunk)
        p_block = np.empty((n_refits, stop - start, n_h), dtype=np.float32)
        r_block = np.empty((n_refits, stop - start), dtype=np.int32)
        for b in range(n_refits):
            data = _load_refit(folder, b, fingerprint, shape, with_pmfs=start == 0)
            if data is None:  # pragma: no cover - another process removed it meanwhile
                raise ModelError(f"refit file {_refit_path(folder, b)} vanished or changed while summarising; rerun.")
            p = data["p_fail"]
            if start == 0:
                p64 = p.astype(float)
                stored = data.get("pmfs") if data.get("members_key") == key else None
                for g, (_, idx) in enumerate(members):
                    group_expected[b, g] = p64[idx].sum(axis=0)
                    for h in range(n_h):
                        # counted in the worker when the groups were the same; else here
                        pmf = stored[f"pmf_{g}_{h}"] if stored else count_pmf(p64[idx, h])
                        mixtures[g][h][:len(pmf)] += pmf
            p_block[b] = p[start:stop]
            r_block[b] = data["rank"][start:stop]
        q = np.quantile(p_block.astype(float), [INTERVAL[0], 0.5, INTERVAL[1]], axis=0)
        out["p_low"][start:stop], out["p_median"][start:stop], out["p_high"][start:stop] = q
        rq = np.quantile(r_block, [INTERVAL[0], 0.5, INTERVAL[1]], axis=0, method="inverted_cdf")
        out["rank_low"][start:stop], out["rank_median"][start:stop], out["rank_high"][start:stop] = rq
        out["top_share"][start:stop] = (r_block <= top_k).mean(axis=0)
    for m in mixtures:
        m /= n_refits
    out.update(groups=tuple(key for key, _ in members),
               group_units=np.array([len(idx) for _, idx in members]),
               group_expected=group_expected, count_pmf=tuple(mixtures))
    return out


def refits_for_config(table, model, ranking_section, seed: int, group_by: Sequence[str] = (),
                      **kwargs) -> RefitSummary:
    """:func:`bootstrap_refits` with the ``[ranking]`` settings of the config."""
    return bootstrap_refits(table, model, ranking_section.refits, seed, ranking_section.horizons_days,
                            jobs=ranking_section.jobs, top_k=ranking_section.top_k, group_by=group_by,
                            **kwargs)


__all__ = ["RefitSummary", "bootstrap_refits", "refits_for_config", "risk_ranks", "refit_fingerprint",
           "INTERVAL"]
