"""Structure search: PC-stable skeleton, orientation, background knowledge."""

from typing import Any

from .knowledge import Knowledge
from .orient import Orientation, orient

__all__ = ["Knowledge", "Orientation", "orient", "SkeletonResult", "pc_stable_skeleton"]


def __getattr__(name: str) -> Any:  # the skeleton (and the test engine under it) loads on first use
    if name in {"SkeletonResult", "pc_stable_skeleton"}:
        from . import skeleton

        return getattr(skeleton, name)
    raise AttributeError(name)
