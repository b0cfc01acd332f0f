"""Saved model bundles (wearcast.models.bundle, wearcast.models.registry).

Data: lifelines' bundled Rossi recidivism data (``load_rossi``; Rossi, Berk &
Lenihan 1980) with an invented categorical column added to exercise category
levels. The refusals are the project's own rules (never load pickles, never
load an unlisted or altered file); they check messages, not numbers.
"""

from __future__ import annotations

import hashlib
import json
import pickle

import numpy as np
import pytest
from lifelines.datasets import load_rossi

from wearcast import LifeTable
from wearcast.exceptions import BundleError
from wearcast.models import registry
from wearcast.models.boosted import BoostedSurvivalTrees, BoostSettings
from wearcast.models.bundle import read_bundle, write_bundle


@pytest.fixture(scope="module")
def fitted():
    frame = load_rossi()
    seal = np.array(["packed_gland", "mechanical_single", "mechanical_double"])[np.arange(len(frame)) % 3]
    table = LifeTable.from_frame(
        frame.assign(unit_id=np.arange(len(frame)), entry_age=0.0, exit_age=frame["week"].astype(float),
                     failed=frame["arrest"], seal=seal),
        ["fin", "age", "prio", "seal"], categorical=["seal"],
    )
    settings = BoostSettings(n_trees=25, learning_rate=0.1, tree_depth=2, subsample=0.8, min_events_per_leaf=5)
    model = BoostedSurvivalTrees(settings, seed=21).fit(table)
    return model, table


@pytest.fixture
def bundle(tmp_path, fitted):
    model, table = fitted
    X = table.X.iloc[:80]
    ages = table.exit[:80] / 2
    return write_bundle(model, tmp_path / "bundle", X, ages)


def test_round_trip_gives_identical_predictions(bundle, fitted):
    model, table = fitted
    loaded = read_bundle(bundle)
    assert isinstance(loaded, BoostedSurvivalTrees)
    X = table.X
    np.testing.assert_array_equal(loaded.risk_score(X), model.risk_score(X))
    ages = np.full(len(X), 30.0)
    np.testing.assert_array_equal(loaded.fail_probability(X, ages, 365), model.fail_probability(X, ages, 365))
    manifest = json.loads((bundle / "manifest.json").read_text())
    assert manifest["model"] == "boosted" and manifest["golden"]["rows"] == 50
    assert {"wearcast", "numpy", "lightgbm"} <= set(manifest["versions"])
    names = {f["name"] for f in manifest["files"]}
    assert names == {"boosted_trees.txt", "boosted_baseline.json", "boosted_settings.json",
                     "golden_inputs.csv", "golden_predictions.csv"}
    for item in manifest["files"]:
        data = (bundle / item["name"]).read_bytes()
        assert item["sha256"] == hashlib.sha256(data).hexdigest() and item["bytes"] == len(data)


def test_same_model_gives_the_same_manifest_bytes(tmp_path, fitted):
    model, table = fitted
    a = write_bundle(model, tmp_path / "a", table.X.iloc[:10], table.exit[:10])
    b = write_bundle(model, tmp_path / "b", table.X.iloc[:10], table.exit[:10])
    assert (a / "manifest.json").read_bytes() == (b / "manifest.json").read_bytes()


def test_missing_manifest_is_refused(bundle):
    (bundle / "manifest.json").unlink()
    with pytest.raises(BundleError, match=r"manifest\.json is missing"):
        read_bundle(bundle)


def test_one_changed_byte_is_refused(bundle):
    path = bundle / "boosted_trees.txt"
    data = bytearray(path.read_bytes())
    i = data.index(b"leaf_value=") + len(b"leaf_value=")
    data[i] = ord("9") if data[i] != ord("9") else ord("8")
    path.write_bytes(bytes(data))
    with pytest.raises(BundleError, match=r"boosted_trees\.txt differs from the SHA-256"):
        read_bundle(bundle)


def test_added_pickle_is_refused(bundle):
    (bundle / "model.pkl").write_bytes(pickle.dumps({"a": 1}))
    with pytest.raises(BundleError, match=r"model\.pkl looks like a pickle"):
        read_bundle(bundle)


def test_pickle_bytes_under_another_name_are_refused(bundle):
    (bundle / "extra_notes.txt").write_bytes(pickle.dumps([1, 2, 3], protocol=4))
    with pytest.raises(BundleError, match=r"extra_notes\.txt looks like a pickle"):
        read_bundle(bundle)


def test_extra_unlisted_file_is_refused(bundle):
    (bundle / "readme.txt").write_text("hello\n")
    with pytest.raises(BundleError, match=r"readme\.txt is not listed in .*manifest\.json"):
        read_bundle(bundle)


def test_golden_mismatch_is_refused(bundle):
    # Change one recorded prediction and re-sign the file in the manifest, so
    # only the reproduction check can catch it.
    path = bundle / "golden_predictions.csv"
    lines = path.read_text().splitlines()
    risk, prob = lines[3].split(",")
    lines[3] = f"{float(risk) * (1 + 1e-6)!r},{prob}"
    path.write_text("\n".join(lines) + "\n")
    manifest_path = bundle / "manifest.json"
    manifest = json.loads(manifest_path.read_text())
    data = path.read_bytes()
    for item in manifest["files"]:
        if item["name"] == "golden_predictions.csv":
            item.update(sha256=hashlib.sha256(data).hexdigest(), bytes=len(data))
    manifest_path.write_text(json.dumps(manifest))
    with pytest.raises(BundleError, match=r"golden_predictions\.csv: row 3, column risk_score"):
        read_bundle(bundle)


def test_listed_file_missing_is_refused(bundle):
    (bundle / "boosted_baseline.json").unlink()
    with pytest.raises(BundleError, match=r"boosted_baseline\.json is listed .* but missing"):
        read_bundle(bundle)


def test_unknown_model_name_is_refused(bundle):
    manifest_path = bundle / "manifest.json"
    manifest = json.loads(manifest_path.read_text())
    manifest["model"] = "mystery"
    manifest_path.write_text(json.dumps(manifest))
    with pytest.raises(BundleError, match="no model class is registered under the name 'mystery'"):
        read_bundle(bundle)


def test_registry_knows_the_three_models():
    assert {"boosted", "cox", "forest"} <= set(registry.known_models())
    assert registry.model_class("boosted") is BoostedSurvivalTrees


def test_cox_and_forest_bundles_round_trip(tmp_path, fitted):
    # The registry's other entries load through the same checks.
    from wearcast.models.cox import CoxBaseline
    from wearcast.models.forest import SurvivalForest
    from wearcast.config import ForestSection

    _, table = fitted
    for model in (CoxBaseline().fit(table),
                  SurvivalForest.from_config(ForestSection(n_trees=5, max_depth=4), seed=3).fit(table)):
        folder = write_bundle(model, tmp_path / model.name, table.X.iloc[:20], table.exit[:20])
        loaded = read_bundle(folder)
        assert type(loaded) is type(model)
        np.testing.assert_allclose(loaded.risk_score(table.X), model.risk_score(table.X), rtol=1e-12)
