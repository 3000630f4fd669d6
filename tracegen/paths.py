"""Where the catalog lives when the user does not say."""

from __future__ import annotations

import os
from pathlib import Path

ENV_CATALOG = "TRACEGEN_CATALOG"


def checkout_root() -> Path | None:
    """The source checkout this package runs from, or None when installed elsewhere."""
    top = Path(__file__).resolve().parent.parent
    if (top / "pyproject.toml").is_file() and (top / "catalog" / "README.md").is_file():
        return top
    return None


def default_catalog() -> Path:
    """``$TRACEGEN_CATALOG``, else the checkout's ``catalog/``, else a per-user data directory."""
    env = os.environ.get(ENV_CATALOG)
    if env:
        return Path(env)
    top = checkout_root()
    if top is not None:
        return top / "catalog"
    data = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(data) / "tracegen" / "catalog"
