"""Conditional-independence tests over discretised columns: counting, statistics, result type."""

from .engine import CIEngine, EngineSettings
from .result import CITestResult
from .statistics import chi2_test_table, contingency_statistics, g_test_table

__all__ = [
    "CIEngine",
    "EngineSettings",
    "CITestResult",
    "contingency_statistics",
    "g_test_table",
    "chi2_test_table",
]
