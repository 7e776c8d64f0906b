"""Background knowledge: validation against the kept signals and lookups."""

from __future__ import annotations

import pytest

from pipeline.errors import ConfigError
from pipeline.search import Knowledge

NAMES = ["cache_hit_rate", "queue_depth", "latency", "region"]


def test_pairs_are_unordered():
    """A required or forbidden pair is found whichever way round it is asked."""
    k = Knowledge.build(NAMES, required=[("latency", "queue_depth")], forbidden=[("region", "latency")])
    assert k.is_required("queue_depth", "latency") and k.is_required("latency", "queue_depth")
    assert k.is_forbidden("latency", "region") and not k.is_forbidden("latency", "queue_depth")


def test_unknown_name_suggests_close_match():
    """A misspelt signal is a ConfigError naming the key, the value and a close match."""
    with pytest.raises(ConfigError, match=r"`knowledge.required` names the signal `latncy`.*`latency`"):
        Knowledge.build(NAMES, required=[("latncy", "region")])


def test_pair_both_required_and_forbidden_refused():
    """The same pair cannot be both required and forbidden."""
    with pytest.raises(ConfigError, match="both required and forbidden"):
        Knowledge.build(NAMES, required=[("latency", "region")], forbidden=[("region", "latency")])


def test_tiers():
    """Tier lookup gives the index, None for signals in no tier; a signal in two tiers is refused."""
    k = Knowledge.build(NAMES, tiers=[["region"], ["cache_hit_rate", "queue_depth"]])
    assert k.tier_of("region") == 0 and k.tier_of("queue_depth") == 1 and k.tier_of("latency") is None
    with pytest.raises(ConfigError, match="more than one tier"):
        Knowledge.build(NAMES, tiers=[["region"], ["region"]])
