"""Where a store keeps its saved models: ``<store>/models/fleet-risk-v<N>-<stamp>/``, one folder
per fit (written whole by ``triage.survival.model.FleetRiskModel.save``). Here, apart from the
survival layer, so that finding the newest one needs no statistics imports."""

from __future__ import annotations

import re
from pathlib import Path

MODEL_DIR = re.compile(r"^fleet-risk-v(\d+)-(\d{8}T\d{6}Z)$")


def latest_model_dir(store) -> Path | None:
    """The folder of the newest saved model of ``store`` (a ``Store``, or a store root path), or
    None. Newest = highest fit number ``N`` in ``fleet-risk-v<N>-<stamp>``."""
    models_dir = Path(store.models_dir) if hasattr(store, "models_dir") else Path(store) / "models"
    if not models_dir.is_dir():
        return None
    found = []
    for entry in models_dir.iterdir():
        match = MODEL_DIR.match(entry.name)
        if match and entry.is_dir():
            found.append((int(match.group(1)), match.group(2), entry))
    return max(found)[2] if found else None
