"""Structure search: PC-stable skeleton, orientation, background knowledge."""

from .knowledge import Knowledge
from .orient import Orientation, orient
from .skeleton import SkeletonResult, TestRecord, pc_stable_skeleton

__all__ = ["Knowledge", "Orientation", "orient", "SkeletonResult", "TestRecord", "pc_stable_skeleton"]
