"""Model name → class, for loading saved models and bundles.

Each entry is ``"name": "module:ClassName"``; the module is imported only when
a model of that name is loaded, so this file never pulls in every model. A
model class registered here has a ``name`` attribute equal to its key and a
``load(folder)`` classmethod that reads what its ``save(folder)`` wrote.
Adding a model is one line in :data:`MODEL_CLASSES`.
"""

from __future__ import annotations

import importlib

from wearcast.exceptions import BundleError

MODEL_CLASSES: dict[str, str] = {
    "boosted": "wearcast.models.boosted:BoostedSurvivalTrees",
    "cox": "wearcast.models.cox:CoxBaseline",
    "forest": "wearcast.models.forest:SurvivalForest",
}


def register(name: str, target: str) -> None:
    """Add or replace an entry at run time (``target`` as ``"module:ClassName"``)."""
    if ":" not in target:
        raise ValueError(f"target must look like 'package.module:ClassName'; got {target!r}")
    MODEL_CLASSES[name] = target


def model_class(name: str):
    """The class saved under ``name``; raises :class:`BundleError` if unknown."""
    target = MODEL_CLASSES.get(name)
    if target is None:
        raise BundleError(
            f"no model class is registered under the name {name!r}; known: {', '.join(sorted(MODEL_CLASSES))}. "
            "The bundle was written by a wearcast version with another model; use that version to read it."
        )
    module_name, class_name = target.split(":")
    try:
        module = importlib.import_module(module_name)
        return getattr(module, class_name)
    except (ImportError, AttributeError) as exc:
        raise BundleError(
            f"model {name!r} is registered as {target}, which cannot be imported ({exc}). "
            "Check that this wearcast installation is complete."
        ) from exc


def known_models() -> list[str]:
    """Names a bundle may carry."""
    return sorted(MODEL_CLASSES)
