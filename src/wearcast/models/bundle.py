"""Saved model bundles: data files, golden predictions and a manifest of hashes.

A bundle is a folder::

    <the model's own files>      written by ``model.save(folder)`` (text / JSON)
    golden_inputs.csv            up to 50 rows of covariates and an age (days)
    golden_predictions.csv       risk score and 365-day conditional failure
                                 probability the fitted model gave those rows
    manifest.json                format version, model name, library versions,
                                 every other file with its SHA-256 and size

:func:`read_bundle` trusts nothing it has not checked: the manifest must be
there, every file in the folder must be on it with the recorded hash and size,
nothing may look like a pickle, and the reloaded model must reproduce the
golden predictions to a relative 1e-9. Floats are written with 17 significant
digits, so a reloaded model that is the same model reproduces them exactly.
The manifest carries no timestamp: the same fitted model gives the same
manifest bytes.
"""

from __future__ import annotations

import hashlib
import importlib
import io
import json
from pathlib import Path

import numpy as np
import pandas as pd

from wearcast import _atomic
from wearcast.exceptions import BundleError
from wearcast.models.registry import model_class

MANIFEST = "manifest.json"
GOLDEN_INPUTS = "golden_inputs.csv"
GOLDEN_PREDICTIONS = "golden_predictions.csv"
BUNDLE_FORMAT = 1
GOLDEN_HORIZON_DAYS = 365.0
GOLDEN_MAX_ROWS = 50
RELATIVE_TOLERANCE = 1e-9
AGE_COLUMN = "age_days"
PICKLE_SUFFIXES = (".pkl", ".pickle", ".joblib", ".dill", ".cloudpickle")


def write_bundle(model, folder, golden_X: pd.DataFrame, golden_ages) -> Path:
    """Save a fitted ``model`` and its golden predictions into ``folder``.

    ``golden_X``: covariate rows, shape (n, p); ``golden_ages``: ages in days,
    shape (n,). At most :data:`GOLDEN_MAX_ROWS` rows are kept, evenly spread.
    Every file is written atomically; ``manifest.json`` is written last.
    Returns ``folder``.
    """
    folder = Path(folder)
    golden_X = pd.DataFrame(golden_X).reset_index(drop=True)
    golden_ages = np.asarray(golden_ages, dtype=float).ravel()
    if len(golden_X) == 0 or len(golden_X) != golden_ages.size:
        raise BundleError(
            f"golden rows: got {len(golden_X)} covariate rows and {golden_ages.size} ages; "
            "pass at least one row and one age per row."
        )
    if AGE_COLUMN in golden_X.columns:
        raise BundleError(f"golden rows: a covariate is called {AGE_COLUMN!r}, a name the bundle reserves; rename it.")
    if len(golden_X) > GOLDEN_MAX_ROWS:
        keep = np.unique(np.linspace(0, len(golden_X) - 1, GOLDEN_MAX_ROWS).round().astype(int))
        golden_X, golden_ages = golden_X.iloc[keep].reset_index(drop=True), golden_ages[keep]

    written = [Path(p) for p in model.save(folder)]
    text_columns = [c for c in golden_X.columns if not pd.api.types.is_numeric_dtype(golden_X[c])
                    or isinstance(golden_X[c].dtype, pd.CategoricalDtype)]
    inputs = golden_X.copy()
    for col in inputs.columns:
        if pd.api.types.is_bool_dtype(inputs[col]):
            inputs[col] = inputs[col].astype(float)
    inputs[AGE_COLUMN] = golden_ages
    written.append(_atomic.write_text(folder / GOLDEN_INPUTS, _to_csv(inputs)))
    reread = _read_golden_inputs(folder / GOLDEN_INPUTS, text_columns)
    predictions = _golden_predictions(model, reread)
    written.append(_atomic.write_text(folder / GOLDEN_PREDICTIONS, _to_csv(predictions)))

    versions = package_versions()
    files = []
    for path in sorted(set(written), key=lambda p: p.name):
        rel = path.resolve().relative_to(folder.resolve()).as_posix()
        data = path.read_bytes()
        files.append({"name": rel, "sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)})
    manifest = {
        "bundle_format": BUNDLE_FORMAT,
        "model": model.name,
        "versions": versions,
        "files": files,
        "golden": {
            "inputs": GOLDEN_INPUTS,
            "predictions": GOLDEN_PREDICTIONS,
            "rows": int(len(inputs)),
            "horizon_days": GOLDEN_HORIZON_DAYS,
            "text_columns": [str(c) for c in text_columns],
            "relative_tolerance": RELATIVE_TOLERANCE,
        },
    }
    _atomic.write_json(folder / MANIFEST, manifest)
    return folder


def read_bundle(folder):
    """Check a bundle and return its model (a fitted ``SurvivalModel``).

    Raises :class:`BundleError` naming the offending file when the manifest is
    missing or damaged, a file is not on the manifest, a listed file is
    missing or differs from its recorded SHA-256 or size, any file looks like
    a pickle, or the reloaded model does not reproduce the golden predictions.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise BundleError(f"{folder} is not a folder; pass the folder a bundle was written to.")
    manifest_path = folder / MANIFEST
    if not manifest_path.is_file():
        raise BundleError(
            f"{manifest_path} is missing, so nothing in {folder} can be checked; refusing to load it. "
            "Write the bundle again with write_bundle."
        )
    try:
        manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
        listed = {item["name"]: item for item in manifest["files"]}
        model_name = manifest["model"]
        golden = manifest["golden"]
    except (json.JSONDecodeError, KeyError, TypeError, UnicodeDecodeError) as exc:
        raise BundleError(f"{manifest_path} is damaged ({exc}); write the bundle again.") from exc
    if manifest.get("bundle_format") != BUNDLE_FORMAT:
        raise BundleError(
            f"{manifest_path}: bundle_format {manifest.get('bundle_format')!r} is not {BUNDLE_FORMAT}; "
            "use the wearcast version that wrote it, or refit."
        )

    present = sorted(p for p in folder.rglob("*") if p.is_file() and p != manifest_path)
    for path in present:  # pickles first: the most dangerous thing to find
        if path.suffix.lower() in PICKLE_SUFFIXES or _starts_like_pickle(path):
            raise BundleError(
                f"{path} looks like a pickle file; bundles hold data files only and pickles can run code "
                "when loaded. Refusing the bundle; remove the file or write the bundle again."
            )
    for path in present:
        rel = path.relative_to(folder).as_posix()
        if rel not in listed:
            raise BundleError(
                f"{path} is not listed in {manifest_path}; a bundle may hold only the files its manifest "
                "lists. Remove the file or write the bundle again."
            )
    for rel, item in listed.items():
        path = folder / rel
        if Path(rel).is_absolute() or ".." in Path(rel).parts:
            raise BundleError(f"{manifest_path} lists {rel!r}, which points outside the bundle; refusing it.")
        if not path.is_file():
            raise BundleError(f"{path} is listed in {manifest_path} but missing; the bundle is incomplete.")
        data = path.read_bytes()
        if len(data) != item.get("bytes") or hashlib.sha256(data).hexdigest() != item.get("sha256"):
            raise BundleError(
                f"{path} differs from the SHA-256 recorded in {manifest_path} (changed or damaged after "
                "saving); refusing the bundle. Restore the file or write the bundle again."
            )

    model = model_class(model_name).load(folder)
    _check_golden(model, folder, golden)
    return model


# -- golden predictions ------------------------------------------------------------
def _golden_predictions(model, inputs: pd.DataFrame) -> pd.DataFrame:
    X = inputs.drop(columns=[AGE_COLUMN])
    ages = inputs[AGE_COLUMN].to_numpy(dtype=float)
    return pd.DataFrame({
        "risk_score": np.asarray(model.risk_score(X), dtype=float),
        "fail_probability_365d": np.asarray(model.fail_probability(X, ages, GOLDEN_HORIZON_DAYS), dtype=float),
    })


def _check_golden(model, folder: Path, golden: dict) -> None:
    inputs_path = folder / golden["inputs"]
    predictions_path = folder / golden["predictions"]
    inputs = _read_golden_inputs(inputs_path, golden.get("text_columns", []))
    expected = pd.read_csv(predictions_path, dtype=float)
    got = _golden_predictions(model, inputs)
    for column in expected.columns:
        want = expected[column].to_numpy()
        have = got[column].to_numpy()
        scale = np.maximum(np.abs(want), np.finfo(float).tiny)
        rel = np.abs(have - want) / scale
        bad = ~(rel <= float(golden.get("relative_tolerance", RELATIVE_TOLERANCE)))
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            raise BundleError(
                f"{predictions_path}: row {row + 1}, column {column}: the reloaded {model.name!r} model gives "
                f"{have[row]!r} but the bundle recorded {want[row]!r} (relative difference {rel[row]:.3g}). "
                "The model files or the library versions changed; refit or use the versions in the manifest."
            )


def _read_golden_inputs(path: Path, text_columns) -> pd.DataFrame:
    text_columns = [str(c) for c in text_columns]
    frame = pd.read_csv(
        path,
        dtype={c: str for c in text_columns},
        keep_default_na=False,
        na_values={c: [""] for c in pd.read_csv(path, nrows=0).columns},
    )
    for col in frame.columns:
        if col in text_columns:
            frame[col] = frame[col].astype("category")
        else:
            frame[col] = pd.to_numeric(frame[col]).astype(float)
    return frame


def _to_csv(frame: pd.DataFrame) -> str:
    buffer = io.StringIO()
    frame.to_csv(buffer, index=False, float_format="%.17g", lineterminator="\n")
    return buffer.getvalue()


def _starts_like_pickle(path: Path) -> bool:
    """Pickle protocols 2–5 start with the PROTO opcode 0x80 and the protocol number."""
    with open(path, "rb") as handle:
        head = handle.read(2)
    return len(head) == 2 and head[0] == 0x80 and 1 <= head[1] <= 5


def package_versions() -> dict[str, str]:
    """Versions of wearcast and the packages its results depend on."""
    import wearcast

    versions = {"wearcast": wearcast.__version__, "numpy": np.__version__, "pandas": pd.__version__}
    for name, module in (("lightgbm", "lightgbm"), ("scikit-learn", "sklearn"), ("lifelines", "lifelines")):
        try:
            versions[name] = importlib.import_module(module).__version__
        except ImportError:  # pragma: no cover - all are dependencies
            pass
    return versions
