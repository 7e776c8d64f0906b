"""Conditional-independence tests over discretised columns: counting, statistics, result type.

The names below load on first use, so that importing the light result type does not load the
compiled kernels (numba) and scipy.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from .engine import CIEngine, EngineSettings
    from .result import CITestResult
    from .statistics import chi2_test_table, contingency_statistics, g_test_table

_WHERE = {
    "CIEngine": "engine",
    "EngineSettings": "engine",
    "CITestResult": "result",
    "contingency_statistics": "statistics",
    "g_test_table": "statistics",
    "chi2_test_table": "statistics",
}

__all__ = [
    "CIEngine",
    "EngineSettings",
    "CITestResult",
    "contingency_statistics",
    "g_test_table",
    "chi2_test_table",
]


def __getattr__(name: str) -> Any:
    where = _WHERE.get(name)
    if where is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return getattr(import_module(f".{where}", __name__), name)
