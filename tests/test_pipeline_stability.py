"""Resampling wired into a run: the stability column, the stable graph, and the bootstrap caveat."""

from __future__ import annotations

import pandas as pd

from pipeline.cli import main
from pipeline.demo import generate


def test_stability_in_evidence_and_stable_graph(tmp_path):
    """`search.resamples` fills `stability` for every pair, identically for 1 and 2 workers, and
    writes the stable graph beside the single-run graph."""
    data = generate(tmp_path / "demo", rows_per_snapshot=900, snapshots=1).snapshots[0]
    frames = []
    for jobs in (1, 2):
        out = tmp_path / f"j{jobs}" / "run"
        assert main(["run", "--input", str(data), "--out", str(out), "--quiet", "--set", "search.resamples=6",
                     "--set", f"parallel.jobs={jobs}"]) == 0
        assert (out / "stable_graph.svg").is_file() and (out / "stable_graph.dot").is_file()
        frames.append(pd.read_parquet(out / "evidence.parquet"))
    ev = frames[0]
    assert ev["stability"].between(0, 1).all()
    pd.testing.assert_series_equal(frames[0]["stability"], frames[1]["stability"])
    assert (ev.loc[ev["stable"], "stability"] >= 0.6).all()
    assert ev["explanation"].str.contains("of 6 resamples").all()


def test_bootstrap_carries_its_caveat(tmp_path):
    """Bootstrap resampling is offered only with the warning that it makes tests anti-conservative."""
    data = generate(tmp_path / "demo", rows_per_snapshot=800, snapshots=1).snapshots[0]
    out = tmp_path / "run"
    assert main(["run", "--input", str(data), "--out", str(out), "--quiet", "--set", "search.resamples=3",
                 "--set", "search.resample_method=bootstrap"]) == 0
    assert "anti-conservative" in (out / "report.html").read_text(encoding="utf-8")
