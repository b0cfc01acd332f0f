"""The model registry the monthly run keeps between months.

Layout under the registry folder::

    models/<model_id>/      one saved bundle per model (data files + manifest)
    current                 JSON text naming the promoted model; replaced atomically
    history.json            one entry per recorded month, keyed by run id

A bundle is written into a temporary folder and renamed into place, and
``current`` is replaced with an atomic rename, so a run killed at any point
leaves the previous champion usable.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path

from wearcast import _atomic
from wearcast.exceptions import BundleError

_TMP_PREFIX = ".incoming-"


class ModelRegistry:
    def __init__(self, root: str | os.PathLike):
        self.root = Path(root)
        self.models = self.root / "models"
        self.pointer = self.root / "current"
        self.history_path = self.root / "history.json"

    # -- housekeeping --------------------------------------------------------
    def clean_stale(self) -> list[Path]:
        """Remove half-written bundles and temp files a killed run left."""
        removed = _atomic.remove_stale_temporaries(self.root)
        if self.models.exists():
            for folder in self.models.glob(f"{_TMP_PREFIX}*"):
                shutil.rmtree(folder, ignore_errors=True)
                removed.append(folder)
        return removed

    # -- models --------------------------------------------------------------
    def add(self, bundle: Path, name: str) -> str:
        """Store a copy of a written bundle folder; return its id (``<name>-<sha12>``).

        The fit stage has already written and checked the bundle, so it is copied,
        not saved again. The id is the SHA-256 of the bundle's manifest, so the
        same fitted model added twice gets the same id and is stored once.
        """
        bundle = Path(bundle)
        digest = hashlib.sha256((bundle / "manifest.json").read_bytes()).hexdigest()[:12]
        model_id = f"{name}-{digest}"
        final = self.models / model_id
        if final.exists():
            return model_id
        self.models.mkdir(parents=True, exist_ok=True)
        staging = self.models / f"{_TMP_PREFIX}{os.getpid()}"
        shutil.rmtree(staging, ignore_errors=True)
        shutil.copytree(bundle, staging)
        os.replace(staging, final)
        _atomic._fsync_dir(self.models)
        return model_id

    def load(self, model_id: str):
        """Load and verify a stored bundle (hashes, file list, golden predictions)."""
        from wearcast.models.bundle import read_bundle

        folder = self.models / model_id
        if not folder.is_dir():
            raise BundleError(
                f"model {model_id} is not in the registry {self.models}; the 'current' pointer "
                "names a bundle that is missing. Restore it from backup or delete 'current' to "
                "let the next run promote a fresh model."
            )
        return read_bundle(folder)

    # -- champion pointer ------------------------------------------------------
    def current_id(self) -> str | None:
        if not self.pointer.exists():
            return None
        try:
            return json.loads(self.pointer.read_text(encoding="utf-8"))["model_id"]
        except (ValueError, KeyError) as exc:
            raise BundleError(
                f"{self.pointer} is not a valid pointer file; it should hold "
                '{"model_id": "..."}. Fix or delete it.'
            ) from exc

    def promote(self, model_id: str, run_id: str) -> None:
        """Make ``model_id`` the champion (atomic replace of ``current``)."""
        if not (self.models / model_id).is_dir():
            raise BundleError(f"cannot promote {model_id}: no such bundle in {self.models}.")
        _atomic.write_json(self.pointer, {"model_id": model_id, "promoted_by_run": run_id})

    # -- history ---------------------------------------------------------------
    def history(self) -> list[dict]:
        if not self.history_path.exists():
            return []
        return json.loads(self.history_path.read_text(encoding="utf-8"))

    def record(self, entry: dict) -> None:
        """Add or replace the entry with the same ``run_id`` (no duplicates)."""
        entries = [e for e in self.history() if e.get("run_id") != entry["run_id"]]
        entries.append(entry)
        entries.sort(key=lambda e: (str(e.get("as_of")), e["run_id"]))
        _atomic.write_json(self.history_path, entries)
