"""Where the store lives: ``--store`` beats ``$TRIAGE_STORE`` beats ``triage.toml`` beats the default.

``triage.toml`` is looked for in the working directory, then in ``$XDG_CONFIG_HOME/triage/``
(``~/.config/triage/``). It is our own small file::

    store = "/srv/triage/store"
"""

from __future__ import annotations

import os
import tomllib
from pathlib import Path

DEFAULT_STORE = Path("triage-store")
ENV_STORE = "TRIAGE_STORE"


def config_paths() -> list[Path]:
    xdg = Path(os.environ.get("XDG_CONFIG_HOME", Path.home() / ".config"))
    return [Path("triage.toml"), xdg / "triage" / "triage.toml"]


def load_config() -> dict:
    """The first config file found, parsed; ``{}`` when there is none."""
    for path in config_paths():
        if path.is_file():
            with path.open("rb") as fh:
                try:
                    return tomllib.load(fh)
                except tomllib.TOMLDecodeError as exc:
                    raise ValueError(f"{path}: {exc}") from None
    return {}


def resolve_store(option: Path | None) -> Path:
    if option is not None:
        return option
    if os.environ.get(ENV_STORE):
        return Path(os.environ[ENV_STORE])
    configured = load_config().get("store")
    return Path(configured) if configured else DEFAULT_STORE
