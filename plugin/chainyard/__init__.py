"""chainyard: reproducible, resumable MCMC sampling steps for data pipelines.

Public API
----------
load_config(path) -> RunConfig
sample(config, store_path, replica=0) -> Store
open_store(path) -> Store
"""

from __future__ import annotations

from importlib import metadata as _metadata
from pathlib import Path

from chainyard.config import RunConfig, json_schema, load_config, parse_config
from chainyard.engine import sample
from chainyard.errors import (
    ChainyardError,
    ConfigError,
    ModelError,
    StoreConflictError,
    StoreError,
    StoreLockedError,
)
from chainyard.store import Store

try:
    __version__ = _metadata.version("chainyard")
except _metadata.PackageNotFoundError:  # running from a source tree
    __version__ = "0+unknown"


def open_store(path: str | Path) -> Store:
    """Open a chainyard store for reading (never executes code from it)."""
    return Store.open(path)


__all__ = [
    "ChainyardError",
    "ConfigError",
    "ModelError",
    "RunConfig",
    "Store",
    "StoreConflictError",
    "StoreError",
    "StoreLockedError",
    "__version__",
    "json_schema",
    "load_config",
    "open_store",
    "parse_config",
    "sample",
]
