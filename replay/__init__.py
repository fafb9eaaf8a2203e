"""Offline auction-log replay engine.

Public entry points are re-exported here lazily so ``import replay`` stays light.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

__version__ = "0.1.0"

_LAZY = {
    "Catalog": "replay.catalog",
    "ingest": "replay.ingest",
    "hindsight": "replay.analysis.hindsight",
    "backtest": "replay.engines.local",
    "BidRule": "replay.rules.base",
}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        return getattr(import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'replay' has no attribute {name!r}")


__all__ = sorted(_LAZY) + ["__version__"]
