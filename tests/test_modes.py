"""Forecast by failure mode: the mode mix, its shrinkage, the split forecast and its interval."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from wearcast._poisson_binomial import count_pmf, pmf_quantile
from wearcast.exceptions import ConfigError
from wearcast.lifetable import LifeTable
from wearcast.modes import NOT_RECORDED, mode_forecast, mode_mix_by_age, mode_shares


def _table(modes_by_seal: dict[str, list[str]], running: dict[str, int]) -> LifeTable:
    """One failed life per listed mode (seal type as given) plus running units."""
    rows = []
    for seal, modes in modes_by_seal.items():
        for k, mode in enumerate(modes):
            rows.append({"unit_id": f"{seal}-f{k}", "entry_age": 0.0, "exit_age": 100.0 + k, "failed": True,
                         "mode": mode, "seal": seal})
    for seal, n in running.items():
        for k in range(n):
            rows.append({"unit_id": f"{seal}-r{k}", "entry_age": 0.0, "exit_age": 500.0, "failed": False,
                         "mode": "", "seal": seal, "in_service": True})
    frame = pd.DataFrame(rows)
    frame["in_service"] = frame["in_service"].eq(True)
    return LifeTable.from_frame(frame)


def test_fleet_mix_and_shrunk_level_mix_by_hand():
    table = _table({"packed": ["seal_leak"] * 6 + ["bearing"] * 2, "mech": ["bearing"] * 2 + [""]},
                   {"packed": 1, "mech": 1, "new": 1})
    shares = mode_shares(table, by="seal", prior_failures=10.0)
    fleet = shares[shares["level"].isna()].set_index("mode")
    # fleet: seal_leak 6, bearing 4, not recorded 1 of 11 failures, most frequent first
    assert fleet.index.tolist() == ["seal_leak", "bearing", NOT_RECORDED]
    assert fleet["share"].tolist() == pytest.approx([6 / 11, 4 / 11, 1 / 11])
    packed = shares[shares["level"] == "packed"].set_index("mode")["share"]
    # (n_lm + w f_m) / (n_l + w) with n_l = 8, w = 10
    assert packed["seal_leak"] == pytest.approx((6 + 10 * 6 / 11) / 18)
    assert packed["bearing"] == pytest.approx((2 + 10 * 4 / 11) / 18)
    new = shares[shares["level"] == "new"].set_index("mode")["share"]  # no failures: the fleet mix
    assert new.tolist() == pytest.approx(fleet["share"].tolist())
    for level, part in shares.fillna({"level": "fleet"}).groupby("level"):
        assert part["share"].sum() == pytest.approx(1.0), level
    # without shrinkage the level keeps its own mix
    # failures without any recorded mode give no mix to split by
    assert mode_shares(_table({"packed": ["", ""]}, {"packed": 1})).empty
    raw = mode_shares(table, by="seal", prior_failures=0.0)
    assert raw.loc[(raw["level"] == "mech") & (raw["mode"] == "bearing"), "share"].item() == pytest.approx(2 / 3)


def test_forecast_splits_the_expected_count_and_keeps_poisson_binomial_intervals():
    rng = np.random.default_rng(5)
    n = 400
    units = pd.DataFrame({"unit_id": [f"u{i}" for i in range(n)],
                          "site": rng.choice(["north", "south"], n), "seal": rng.choice(["packed", "mech"], n),
                          "p_fail_90d": rng.uniform(0, 0.2, n), "p_fail_365d": rng.uniform(0.1, 0.6, n)})
    shares = pd.DataFrame({"level": [None] * 2 + ["packed"] * 2 + ["mech"] * 2,
                           "mode": ["seal_leak", "bearing"] * 3, "failures": [0] * 6,
                           "share": [0.5, 0.5, 0.8, 0.2, 0.3, 0.7]})
    out = mode_forecast(units, [90, 365], shares, by="seal", group_by=["site"])
    assert len(out) == 3 * 2 * 2  # (fleet + 2 sites) x 2 horizons x 2 modes
    for (group, h), part in out.groupby(["group", "horizon_days"]):
        idx = units.index if group == "all" else units.index[units["site"] == group]
        assert part["expected_failures"].sum() == pytest.approx(units.loc[idx, f"p_fail_{h}d"].sum())
        assert part["mode_share"].sum() == pytest.approx(1.0)
    fleet_leak = out[(out["group"] == "all") & (out["horizon_days"] == 365) & (out["mode"] == "seal_leak")].iloc[0]
    s = np.where(units["seal"] == "packed", 0.8, 0.3)
    p = units["p_fail_365d"].to_numpy() * s
    assert fleet_leak["expected_failures"] == pytest.approx(p.sum())
    # Reference: simulation of the thinned unit failures (independent Bernoulli(p_i s_i)), 20,000 draws
    sims = (rng.random((20_000, n)) < p).sum(axis=1)
    low, high = np.quantile(sims, [0.05, 0.95])
    assert abs(fleet_leak["chance_only_low"] - low) <= 1 and abs(fleet_leak["chance_only_high"] - high) <= 1
    assert (fleet_leak["chance_only_low"], fleet_leak["chance_only_high"]) == tuple(pmf_quantile(count_pmf(p), (0.05, 0.95)))


def test_one_mode_reproduces_the_fleet_count():
    units = pd.DataFrame({"p_fail_30d": [0.1, 0.2, 0.3, 0.05]})
    shares = pd.DataFrame({"level": [None], "mode": ["wear"], "failures": [3], "share": [1.0]})
    out = mode_forecast(units, [30], shares)
    assert out["expected_failures"].item() == pytest.approx(0.65)
    assert (out["chance_only_low"].item(), out["chance_only_high"].item()) == \
        tuple(pmf_quantile(count_pmf(units["p_fail_30d"].to_numpy()), (0.05, 0.95)))


def test_mode_mix_shift_with_age_is_flagged():
    young = [{"unit_id": f"y{i}", "entry_age": 0.0, "exit_age": 50.0 + i, "failed": True,
              "mode": "infant" if i % 10 else "wear"} for i in range(60)]
    old = [{"unit_id": f"o{i}", "entry_age": 0.0, "exit_age": 900.0 + i, "failed": True,
            "mode": "wear" if i % 10 else "infant"} for i in range(60)]
    shifted = mode_mix_by_age(LifeTable.from_frame(pd.DataFrame(young + old)))
    assert shifted["p_value"] < 1e-6 and "differs between younger and older" in shifted["statement"]
    steady = [dict(r, mode="wear" if i % 2 else "infant") for i, r in enumerate(young + old)]
    steady_check = mode_mix_by_age(LifeTable.from_frame(pd.DataFrame(steady)))
    assert steady_check["p_value"] > 0.5 and steady_check["statement"].startswith("No clear shift")
    few = mode_mix_by_age(LifeTable.from_frame(pd.DataFrame(young[:5])))
    assert few["p_value"] is None and "Too few" in few["statement"]


def test_unknown_modes_by_column_names_the_key():
    table = _table({"packed": ["seal_leak"]}, {"packed": 1})
    with pytest.raises(ConfigError, match=r"modes_by names 'seal_kind'"):
        mode_shares(table, by="seal_kind")
    with pytest.raises(ConfigError, match=r"modes_by names 'exit_age', which has \d+ distinct values"):
        mode_shares(_table({"packed": ["seal_leak"] * 60}, {"packed": 1}), by="exit_age")


def test_level_labels_cannot_clash_with_the_fleet_mix():
    # a seal type literally called "(all)" is just a level; the fleet's mix is kept apart
    table = _table({"(all)": ["seal_leak"] * 3 + ["bearing"], "mech": ["bearing"] * 2}, {"(all)": 2, "mech": 1})
    shares = mode_shares(table, by="seal", prior_failures=0.0)
    level = shares[shares["level"] == "(all)"].set_index("mode")["share"]
    assert (level["seal_leak"], level["bearing"]) == pytest.approx((0.75, 0.25))
    units = pd.DataFrame({"seal": ["(all)", "mech"], "p_fail_90d": [0.4, 0.2]})
    out = mode_forecast(units, [90], shares, by="seal").set_index("mode")
    assert out.loc["seal_leak", "expected_failures"] == pytest.approx(0.4 * 0.75)
    from wearcast.lifetable import group_labels

    with pytest.raises(ConfigError, match="kept for the whole-fleet rows"):
        group_labels(pd.DataFrame({"fleet": ["all"]}), ["fleet"])


def test_failures_at_one_age_cannot_be_banded():
    rows = [{"unit_id": f"u{i}", "entry_age": 0.0, "exit_age": 365.0, "failed": True,
             "mode": "wear" if i % 2 else "seal"} for i in range(80)]
    check = mode_mix_by_age(LifeTable.from_frame(pd.DataFrame(rows)))
    assert check["p_value"] is None and check["bands"] == 1 and "Too few" in check["statement"]


def test_terminal_lines_show_the_fleet_rows_per_horizon():
    from wearcast.cli._common import mode_lines

    frame = pd.DataFrame({"group_by": ["fleet", "fleet", "site"], "group": ["all", "all", "North"],
                          "horizon_days": [90, 90, 90], "mode": ["seal_leak", "bearing", "seal_leak"],
                          "expected_failures": [4.71, 3.9, 1.0], "chance_only_low": [1, 1, 0],
                          "chance_only_high": [8, 7, 3], "mode_share": [0.55, 0.45, 1.0]})
    assert mode_lines(frame) == ["expected failures by failure mode (chance-only 90 % interval):",
                                 "  within 90 days: seal_leak 4.7 (1-8), bearing 3.9 (1-7)"]
    assert mode_lines(None) == []
