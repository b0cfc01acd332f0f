"""Bootstrap refits: reproducible across backends, resumable, flat in memory.

Data: the German Breast Cancer Study Group 2 trial data (686 patients, 299
recurrences, follow-up in days) as shipped by scikit-survival
(``sksurv.datasets.load_gbsg2``; Schumacher et al. 1994). Censored patients
play the part of units still in service at their last follow-up age.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from sksurv.datasets import load_gbsg2

from wearcast import LifeTable
from wearcast import resample as rs
from wearcast.exceptions import ConfigError
from wearcast.models.boosted import BoostedSurvivalTrees, BoostSettings
from wearcast.ranking import rank_units, write_ranking

HORIZONS = [90, 365]
COVARIATES = ["age", "estrec", "horTh", "menostat", "pnodes", "progrec", "tgrade", "tsize"]


@pytest.fixture(scope="module")
def gbsg2() -> LifeTable:
    X, y = load_gbsg2()
    frame = X.copy()
    frame.insert(0, "unit_id", [f"p{i:03d}" for i in range(len(X))])
    frame["entry_age"] = 0.0
    frame["exit_age"] = y["time"]
    frame["failed"] = y["cens"]
    frame["in_service"] = ~y["cens"]
    return LifeTable.from_frame(frame, COVARIATES, ["horTh", "menostat", "tgrade"])


class CountingBoosted(BoostedSurvivalTrees):
    """Counts fits across copies; ``fail_at`` makes that fit raise (a killed run)."""

    fits = 0
    fail_at: int | None = None

    def _fit(self, data, weights, bins=None):  # both fit and fit_resampled come through here
        if CountingBoosted.fail_at is not None and CountingBoosted.fits >= CountingBoosted.fail_at:
            raise RuntimeError("injected stop")
        CountingBoosted.fits += 1
        return super()._fit(data, weights, bins)

    def unfitted_copy(self, seed):
        base = super().unfitted_copy(seed)
        return CountingBoosted(base.settings, seed=seed)


@pytest.fixture(scope="module")
def boosted(gbsg2) -> BoostedSurvivalTrees:
    return BoostedSurvivalTrees(BoostSettings(n_trees=25, tree_depth=2, min_events_per_leaf=5), seed=3).fit(gbsg2)


@pytest.fixture(scope="module")
def serial(gbsg2, boosted) -> rs.RefitSummary:
    return rs.bootstrap_refits(gbsg2, boosted, 12, 2026, HORIZONS, jobs=1, top_k=30, group_by=["tgrade"])


def _ranked_csv(table, model, refits, tmp_path, name) -> bytes:
    ranked = rank_units(table, model, refits, HORIZONS, 30, 0.8, ["tgrade"])
    return write_ranking(ranked, tmp_path / name)["ranked_units"].read_bytes()


def assert_same_summary(a: rs.RefitSummary, b: rs.RefitSummary) -> None:
    for key in ("p_median", "p_low", "p_high", "rank_median", "rank_low", "rank_high", "top_share",
                "group_expected", "group_units"):
        assert np.array_equal(getattr(a, key), getattr(b, key)), key
    assert all(np.array_equal(x, y) for x, y in zip(a.count_pmf, b.count_pmf))
    assert a.groups == b.groups and a.fingerprint == b.fingerprint


def test_summary_shapes_and_ordering(gbsg2, serial):
    n = gbsg2.in_service().n_rows
    assert serial.p_median.shape == serial.p_low.shape == (n, 2)
    assert np.all(serial.p_low <= serial.p_median) and np.all(serial.p_median <= serial.p_high)
    assert np.all((serial.rank_low >= 1) & (serial.rank_low <= serial.rank_median)
                  & (serial.rank_median <= serial.rank_high) & (serial.rank_high <= n))
    assert serial.groups[0] == ("fleet", "all") and serial.group_expected.shape == (12, 4, 2)
    # Groups partition the fleet: their refit totals add up to the fleet's.
    assert np.allclose(serial.group_expected[:, 1:].sum(axis=1), serial.group_expected[:, 0], rtol=1e-5)
    assert all(abs(m.sum(axis=1) - 1).max() < 1e-9 for m in serial.count_pmf)
    # Longer horizon, higher probability (the survival function never increases).
    assert np.all(serial.p_median[:, 1] >= serial.p_median[:, 0] - 1e-7)
    assert serial.computed == 12 and serial.rank_horizon_days == 365


def test_one_worker_two_workers_and_dask_give_identical_bytes(gbsg2, boosted, serial, tmp_path):
    # Seeds are drawn up front, so the worker count and the backend cannot matter.
    two = rs.bootstrap_refits(gbsg2, boosted, 12, 2026, HORIZONS, jobs=2, top_k=30, group_by=["tgrade"])
    assert_same_summary(serial, two)
    from dask.distributed import Client

    with Client(processes=False, n_workers=1, threads_per_worker=2, dashboard_address=None) as client:
        on_dask = rs.bootstrap_refits(gbsg2, boosted, 12, 2026, HORIZONS, scheduler=client.scheduler.address,
                                      top_k=30, group_by=["tgrade"])
    assert_same_summary(serial, on_dask)
    csv = [_ranked_csv(gbsg2, boosted, s, tmp_path, name) for s, name in
           ((serial, "one"), (two, "two"), (on_dask, "dask"))]
    assert csv[0] == csv[1] == csv[2]


def test_other_seed_gives_other_refits(gbsg2, boosted, serial):
    other = rs.bootstrap_refits(gbsg2, boosted, 12, 2027, HORIZONS, jobs=1, top_k=30, group_by=["tgrade"])
    assert not np.array_equal(other.p_low, serial.p_low)


def test_resume_computes_only_missing_refits(gbsg2, boosted, serial, tmp_path):
    model = CountingBoosted(boosted.settings, seed=3).fit(gbsg2)
    CountingBoosted.fits = 0
    CountingBoosted.fail_at = 5  # the run is killed during the sixth refit
    with pytest.raises(RuntimeError, match="injected stop"):
        rs.bootstrap_refits(gbsg2, model, 12, 2026, HORIZONS, jobs=1, top_k=30, group_by=["tgrade"],
                            checkpoint_dir=tmp_path)
    assert sorted(p.name for p in tmp_path.glob("refit_*.npz")) == [f"refit_{i:04d}.npz" for i in range(5)]
    CountingBoosted.fail_at = None
    CountingBoosted.fits = 0
    resumed = rs.bootstrap_refits(gbsg2, model, 12, 2026, HORIZONS, jobs=1, top_k=30, group_by=["tgrade"],
                                  checkpoint_dir=tmp_path)
    assert CountingBoosted.fits == 7 and resumed.computed == 7
    # Same numbers as one uninterrupted run (the counting subclass fits the same trees).
    for key in ("p_low", "p_high", "rank_low", "rank_high", "top_share", "group_expected"):
        assert np.array_equal(getattr(resumed, key), getattr(serial, key)), key

    (tmp_path / "refit_0003.npz").unlink()
    (tmp_path / "refit_0010.npz").write_bytes(b"damaged")
    CountingBoosted.fits = 0
    again = rs.bootstrap_refits(gbsg2, model, 12, 2026, HORIZONS, jobs=1, top_k=30, group_by=["tgrade"],
                                checkpoint_dir=tmp_path)
    assert CountingBoosted.fits == 2
    assert np.array_equal(again.p_high, resumed.p_high)


def test_changed_table_or_settings_never_reuse_checkpoints(gbsg2, boosted, tmp_path):
    model = CountingBoosted(boosted.settings, seed=3).fit(gbsg2)
    CountingBoosted.fits, CountingBoosted.fail_at = 0, None
    rs.bootstrap_refits(gbsg2, model, 4, 1, HORIZONS, jobs=1, checkpoint_dir=tmp_path)
    frame = gbsg2.frame.copy()
    frame.loc[5, "tsize"] += 1.0  # one value changed in one row
    changed = LifeTable(frame, gbsg2.covariates, gbsg2.categorical)
    CountingBoosted.fits = 0
    rs.bootstrap_refits(changed, model, 4, 1, HORIZONS, jobs=1, checkpoint_dir=tmp_path)
    assert CountingBoosted.fits == 4
    CountingBoosted.fits = 0
    rs.bootstrap_refits(changed, model, 4, 1, [90, 180, 365], jobs=1, checkpoint_dir=tmp_path)
    assert CountingBoosted.fits == 4
    deeper = CountingBoosted(BoostSettings(n_trees=25, tree_depth=3, min_events_per_leaf=5), seed=3).fit(changed)
    CountingBoosted.fits = 0
    rs.bootstrap_refits(changed, deeper, 4, 1, [90, 180, 365], jobs=1, checkpoint_dir=tmp_path)
    assert CountingBoosted.fits == 4


def test_checkpoint_files_are_plain_numeric_arrays(gbsg2, boosted, tmp_path):
    rs.bootstrap_refits(gbsg2, boosted, 3, 9, HORIZONS, jobs=1, checkpoint_dir=tmp_path)
    with np.load(tmp_path / "refit_0002.npz", allow_pickle=False) as data:
        # no group_by: one group (the fleet), its count pmf per horizon counted in the worker
        assert set(data.files) == {"fingerprint", "index", "p_fail", "rank", "log_risk", "members_key",
                                   "pmf_0_0", "pmf_0_1"}
        assert data["p_fail"].dtype == np.float32 and data["p_fail"].shape == (gbsg2.in_service().n_rows, 2)
        assert sorted(data["rank"].tolist()) == list(range(1, gbsg2.in_service().n_rows + 1))
    assert not list(tmp_path.glob("*.wearcast-tmp"))


def test_counts_from_workers_equal_counts_made_in_the_summary(gbsg2, boosted, serial, tmp_path):
    # Each refit stores its groups' count pmfs; a rerun with other groups must
    # not use them (it counts afresh, refitting nothing) and a rerun with the
    # same groups must give what counting in the summary gives.
    first = rs.bootstrap_refits(gbsg2, boosted, 12, 2026, HORIZONS, jobs=1, top_k=30, group_by=["tgrade"],
                                checkpoint_dir=tmp_path)
    assert_same_summary(serial, first)
    by_menopause = rs.bootstrap_refits(gbsg2, boosted, 12, 2026, HORIZONS, jobs=1, top_k=30,
                                       group_by=["menostat"], checkpoint_dir=tmp_path)
    assert by_menopause.computed == 0 and by_menopause.groups[1][0] == "menostat"
    fresh = rs.bootstrap_refits(gbsg2, boosted, 12, 2026, HORIZONS, jobs=1, top_k=30, group_by=["menostat"])
    assert_same_summary(fresh, by_menopause)
    for stored, counted in zip(fresh.count_pmf, by_menopause.count_pmf):
        assert np.array_equal(stored, counted)
    # the stored pmfs are what count_pmf gives on the refit's float32 probabilities
    from wearcast._poisson_binomial import count_pmf

    with np.load(tmp_path / "refit_0004.npz", allow_pickle=False) as data:
        expected = count_pmf(data["p_fail"][:, 1].astype(float))
        np.testing.assert_array_equal(data["pmf_0_1"], np.trim_zeros(expected, "b"))


def test_unit_chunks_give_the_same_summary(gbsg2, boosted, serial, monkeypatch):
    # Force chunks of a few units: the memory bound must not change any number.
    monkeypatch.setattr(rs, "CHUNK_BYTES", 12 * 3 * 4 * 37)
    chunked = rs.bootstrap_refits(gbsg2, boosted, 12, 2026, HORIZONS, jobs=1, top_k=30, group_by=["tgrade"])
    assert_same_summary(serial, chunked)


def test_progress_is_quiet_off_a_terminal_and_shown_on_request(gbsg2, boosted, capsys):
    rs.bootstrap_refits(gbsg2, boosted, 2, 1, HORIZONS, jobs=1)
    assert capsys.readouterr().err == ""
    rs.bootstrap_refits(gbsg2, boosted, 2, 1, HORIZONS, jobs=1, progress=True)
    assert "refits 2/2" in capsys.readouterr().err


def test_the_library_does_not_import_click():
    # Convention of the project: only wearcast.cli imports click.
    code = "import sys, wearcast.resample, wearcast.ranking; print('click' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_missing_dask_is_a_clear_error(gbsg2, boosted, monkeypatch):
    monkeypatch.setitem(sys.modules, "dask.distributed", None)
    with pytest.raises(ConfigError, match=r"pip install wearcast\[dask\]"):
        rs.bootstrap_refits(gbsg2, boosted, 2, 1, HORIZONS, scheduler="tls://127.0.0.1:8786")


def test_bad_settings_are_config_errors(gbsg2, boosted):
    with pytest.raises(ConfigError, match="at least 2"):
        rs.bootstrap_refits(gbsg2, boosted, 1, 1, HORIZONS)
    with pytest.raises(ConfigError, match="not one of horizons_days"):
        rs.bootstrap_refits(gbsg2, boosted, 2, 1, HORIZONS, rank_horizon_days=30)
    with pytest.raises(ConfigError, match="not a column"):
        rs.bootstrap_refits(gbsg2, boosted, 2, 1, HORIZONS, group_by=["ward"])


def test_risk_ranks_order_and_ties():
    # Rank 1 is the highest probability; ties keep table order (common practice: ordinal ranking).
    assert rs.risk_ranks(np.array([0.1, 0.5, 0.1, 0.9])).tolist() == [3, 2, 4, 1]


def test_fingerprint_ignores_row_labels_but_not_values(gbsg2, boosted):
    base = rs.refit_fingerprint(gbsg2, boosted, 1, 10, HORIZONS, 365)
    relabelled = LifeTable(gbsg2.frame.set_axis(pd.RangeIndex(5, 5 + gbsg2.n_rows)), gbsg2.covariates,
                           gbsg2.categorical)
    assert rs.refit_fingerprint(relabelled, boosted, 1, 10, HORIZONS, 365) == base
    assert rs.refit_fingerprint(gbsg2, boosted, 2, 10, HORIZONS, 365) != base
    assert rs.refit_fingerprint(gbsg2, boosted, 1, 11, HORIZONS, 365) != base
