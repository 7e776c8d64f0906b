"""The one key of an unordered pair of signals: its two names in sorted order.

Every table keyed by pair (evidence, comparisons, histories, stability shares, knowledge) uses
`pair_key`; `pair_keys` is the same rule over two columns at once.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["Pair", "pair_key", "pair_keys"]

Pair = tuple[str, str]


def pair_key(a: str, b: str) -> Pair:
    """The unordered pair as a sorted tuple: ``pair_key("b", "a") == ("a", "b")``."""
    return (a, b) if a <= b else (b, a)


def pair_keys(a: Any, b: Any) -> tuple[np.ndarray, np.ndarray]:
    """`pair_key` over two equal-length columns of names: the smaller names, then the larger."""
    x, y = np.asarray(a, dtype=object).astype(str), np.asarray(b, dtype=object).astype(str)
    first = x <= y
    return np.where(first, x, y), np.where(first, y, x)
