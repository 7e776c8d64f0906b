"""Shared fixtures."""

from __future__ import annotations

from pathlib import Path

import pytest

DEMO_CONFIG = Path(__file__).resolve().parents[1] / "configs" / "demo.yaml"


@pytest.fixture(scope="session")
def demo_nights(tmp_path_factory):
    """The demo at its default settings (seed 7: 4 nights of 6 nodes x 288 windows, the link
    gc_pause_ms -> latency_ms planted on the third), run once by `nightly` for every test that reads
    its runs (test_compare, test_history): (scenario, configuration, output root)."""
    from pipeline import nightly
    from pipeline.config import load_config
    from pipeline.demo import generate

    base = tmp_path_factory.mktemp("demo-nights")
    scenario = generate(base / "demo")
    cfg = load_config(DEMO_CONFIG, [
        f"nightly.inbox={scenario.inbox}", f"output.root={base / 'runs'}",
        "nightly.settle_seconds=0", f"report.truth_file={scenario.truth_path}", "output.png=false",
    ])
    result = nightly.run(cfg, log=lambda line: None)
    assert result.exit_code == 0, result.outcomes
    return scenario, cfg, base / "runs"
