"""Stand-ins for the rules and survival layers, so CLI tests pin down the commands' wiring."""

from __future__ import annotations

from types import SimpleNamespace

import triage.rules
import triage.survival


def use_stand_ins(monkeypatch, evaluate, window_days: int = 3) -> None:
    """Rules: none loaded, ``evaluate`` raises the flags; survival: no saved model."""
    monkeypatch.setattr(triage.rules, "load_rules",
                        lambda dirs, include_defaults=True: SimpleNamespace(rules=[], errors=[],
                                                                            window_days=window_days),
                        raising=False)
    monkeypatch.setattr(triage.rules, "evaluate", evaluate, raising=False)
    monkeypatch.setattr(triage.survival, "latest_model", lambda store: None, raising=False)
