"""Survival layer: observation table (entry age, exit age, event) -> AFR, curves, Weibull, Cox.

The fitted ``FleetRiskModel`` is what ``triage rank`` scores drives with; ``latest_model(store)``
loads the newest one saved in a store. See docs/survival.md for the methods and their sources.
"""

from triage.survival.model import FleetRiskModel, ModelFormatError, latest_model, latest_model_dir, readable_latest_model

__all__ = ["FleetRiskModel", "ModelFormatError", "latest_model", "latest_model_dir", "readable_latest_model"]


def fit_and_save(store, horizon_days: float = 30, by=("model",), count_proactive: bool = False, say=None,
                 engine=None):
    """Fit the fleet risk model on ``store`` and save it under ``<store>/models``; returns the path.
    ``engine``: where the map steps run (``fit_store``; None: this process).

    Raises ``triage.survival.run.EmptyStore`` when nothing is stored and
    ``triage.survival.cox.CoxFitError`` (a ValueError) when no drive has failed yet.
    """
    from triage.survival.run import fit_store

    _, path = fit_store(store, horizon_days=horizon_days, by=by, count_proactive=count_proactive, say=say,
                        engine=engine)
    return path


__all__ += ["fit_and_save"]
