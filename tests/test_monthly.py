"""The unattended monthly run: gate both ways, idempotency, crash safety, lock, tampering.

These are end-to-end checks of the run's mechanics on the invented demo fleet
(the statistics behind each stage are checked against published data in the
stage's own tests). Seeds are fixed, so every run here is deterministic.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from click.testing import CliRunner

from _fleet import copy_fleet, light_fleet, set_key
from wearcast._lock import RunLock
from wearcast.cli.main import main

OCTOBER = "2026-10-31"


def _monthly(config: Path, *args: str):
    return CliRunner().invoke(main, ["monthly", str(config), *args])


def _noise_only(config: Path) -> None:
    """A deliberately worse model: its only covariate is the scenario's pure-noise column."""
    set_key(config, "fleet", "covariates", '["survey_score"]')
    set_key(config, "fleet", "categorical", "[]")


def _tree_digest(folder: Path, skip=("timings.json",)) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*")) if p.is_file() and p.name not in skip
    }


@pytest.fixture(scope="module")
def good_champion(tmp_path_factory):
    """October with the full covariates (champion), then November with a noise-only challenger."""
    config = light_fleet(tmp_path_factory.mktemp("gate_reject"), n_units=1000)
    set_key(config, "monthly", "c_tolerance", "0.005")
    first = _monthly(config, "--as-of", OCTOBER)
    _noise_only(config)
    second = _monthly(config)
    return config, first, second


def test_first_run_promotes(good_champion):
    config, first, _ = good_champion
    assert first.exit_code == 0, first.output
    assert "decision: first run" in first.output
    registry = config.parent / "registry"
    pointer = json.loads((registry / "current").read_text())
    assert (registry / "models" / pointer["model_id"] / "manifest.json").exists()


def test_worse_challenger_is_rejected_with_exit_3(good_champion):
    config, first, second = good_champion
    assert second.exit_code == 3, second.output
    assert "decision: kept champion" in second.output
    assert "worse than the tolerance" in second.output
    registry = config.parent / "registry"
    history = json.loads((registry / "history.json").read_text())
    assert [e["decision"] for e in history] == ["first run", "kept champion"]
    assert history[1]["model_used"] == history[0]["challenger"]  # the champion ranked this month
    run_dir = registry / history[1]["run_dir"]
    gate = json.loads((run_dir / "gate.json").read_text())
    assert gate["c_challenger"] < gate["c_champion"] - 0.005
    # the demo fleet has monthly readings (start/stop rows): the gate compares the same C as the choice
    assert gate["concordance"] == "c_time_dependent_365d"
    assert "time-dependent truncation-aware C" in gate["reasons"][0]
    assert (run_dir / "ranked_units.csv").exists() and (run_dir / "report.html").exists()
    changes = json.loads((run_dir / "monthly_changes.json").read_text())
    assert changes["previous_run"] == Path(history[0]["run_dir"]).name
    mover = changes["largest_movers"][0]
    assert set(mover) == {"unit_id", "before", "now", "change", "drivers_now", "drivers_before"}
    assert abs(mover["now"] - mover["before"] - mover["change"]) < 1e-5


def test_rerunning_a_month_changes_nothing(good_champion):
    config, _, second = good_champion
    registry = config.parent / "registry"
    before_runs = _tree_digest(config.parent / "wearcast-output")
    before_registry = _tree_digest(registry, skip=("monthly.lock",))
    again = _monthly(config)
    assert again.exit_code == 3
    assert "already recorded" in again.output
    assert _tree_digest(config.parent / "wearcast-output") == before_runs
    assert _tree_digest(registry, skip=("monthly.lock",)) == before_registry
    assert len(json.loads((registry / "history.json").read_text())) == 2


def test_better_challenger_is_promoted(tmp_path):
    config = light_fleet(tmp_path, n_units=1000)
    set_key(config, "monthly", "c_tolerance", "0.005")
    full = config.read_text()
    _noise_only(config)
    assert _monthly(config, "--as-of", OCTOBER).exit_code == 0
    config.write_text(full)
    result = _monthly(config)
    assert result.exit_code == 0, result.output
    assert "decision: promoted" in result.output
    history = json.loads((tmp_path / "registry" / "history.json").read_text())
    pointer = json.loads((tmp_path / "registry" / "current").read_text())
    assert pointer["model_id"] == history[1]["challenger"] != history[0]["challenger"]


def test_same_inputs_in_two_places_give_identical_files(tmp_path):
    first = light_fleet(tmp_path / "a", n_units=400)
    second = copy_fleet(first, tmp_path / "b")
    for config in (first, second):
        assert _monthly(config, "--as-of", OCTOBER).exit_code == 0
    runs_a = _tree_digest(tmp_path / "a" / "wearcast-output")
    runs_b = _tree_digest(tmp_path / "b" / "wearcast-output")
    assert runs_a == runs_b and any(name.endswith("ranked_units.csv") for name in runs_a)
    assert _tree_digest(tmp_path / "a" / "registry", skip=("monthly.lock",)) == \
        _tree_digest(tmp_path / "b" / "registry", skip=("monthly.lock",))


def test_second_run_while_locked_exits_75(tmp_path):
    config = light_fleet(tmp_path, n_units=200)
    with RunLock(tmp_path / "registry" / "monthly.lock"):
        result = _monthly(config)
    assert result.exit_code == 75
    assert f"process {os.getpid()}" in result.output


def test_tampered_champion_is_refused(tmp_path):
    config = light_fleet(tmp_path, n_units=400)
    assert _monthly(config, "--as-of", OCTOBER).exit_code == 0
    registry = tmp_path / "registry"
    bundle = registry / "models" / json.loads((registry / "current").read_text())["model_id"]
    (bundle / "extra.pkl").write_bytes(b"\x80\x04K\x01.")
    result = _monthly(config)
    assert result.exit_code == 65
    assert "extra.pkl" in result.output
    (bundle / "extra.pkl").unlink()
    target = next(p for p in sorted(bundle.iterdir()) if p.name != "manifest.json")
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0x01
    target.write_bytes(bytes(data))
    result = _monthly(config)
    assert result.exit_code == 65
    assert target.name in result.output


def test_sigkill_mid_run_leaves_previous_month_and_champion_intact(tmp_path):
    config = light_fleet(tmp_path, n_units=600)
    assert _monthly(config, "--as-of", OCTOBER).exit_code == 0
    registry = tmp_path / "registry"
    runs = tmp_path / "wearcast-output" / "runs"
    before = _tree_digest(runs, skip=())
    pointer = (registry / "current").read_bytes()
    proc = subprocess.Popen([sys.executable, "-m", "wearcast", "monthly", str(config)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 120
    while time.time() < deadline and not any(runs.glob(".staging-*/life_table.csv")):
        time.sleep(0.05)
    time.sleep(1.0)  # well inside the fit stage
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    assert any(runs.glob(".staging-*")), "the kill came too late to test a half-finished run"
    after_kill = {k: v for k, v in _tree_digest(runs, skip=()).items() if not k.startswith(".staging-")}
    assert after_kill == before
    assert (registry / "current").read_bytes() == pointer
    assert len(json.loads((registry / "history.json").read_text())) == 1
    result = _monthly(config)
    assert result.exit_code in (0, 3), result.output
    assert not any(runs.glob(".staging-*"))
    assert not list(tmp_path.rglob("*.wearcast-tmp"))
    after_rerun = _tree_digest(runs, skip=())
    for name, digest in before.items():
        assert after_rerun[name] == digest
    assert len(json.loads((registry / "history.json").read_text())) == 2
