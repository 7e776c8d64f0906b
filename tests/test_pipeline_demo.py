"""The whole pipeline on the invented demo scenario (a property check of the demo, not a correctness claim)."""

from __future__ import annotations

import json

import pandas as pd
from _shared import REPO

from pipeline.api import load_run, run_pipeline
from pipeline.config import load_config
from pipeline.demo import generate


def test_demo_snapshot_recovers_the_planted_structure(tmp_path):
    """On the first demo night (seed 7, 6 nodes x 288 windows) the rows are read as per-node series, the
    common-cause pair is separated by its cause, the collider's parents stay unlinked, at least 80% of the
    true links are found with at most one false link (over 20 seeds, bench/bench_demo.py: see the README's
    demo section for the measured rates), and the report shows the recovered graph beside the known one."""
    scenario = generate(tmp_path / "demo", snapshots=1)
    cfg = load_config(REPO / "configs" / "demo.yaml", [f"report.truth_file={scenario.truth_path}"])
    res = run_pipeline(cfg, scenario.snapshots[0], tmp_path / "runs" / "night")
    ev = res.evidence.set_index(["var_a", "var_b"])
    a, b, cause = scenario.common_cause
    row = ev.loc[tuple(sorted((a, b)))]
    assert not row["linked"]
    assert cause in row["given"].split(";")
    p, q, _ = scenario.collider
    assert not ev.loc[tuple(sorted((p, q)))]["linked"]
    linked = {tuple(sorted(e)) for e in res.graph.edges}
    truth = {tuple(sorted(e)) for e in scenario.true_edges}
    assert len(linked & truth) >= 0.8 * len(truth)
    assert len(linked - truth) <= 1
    html = (res.out_dir / "report.html").read_text(encoding="utf-8")
    assert "Known graph" in html
    # the ID and constant columns were dropped with a reason; the malformed rows were quarantined
    manifest = json.loads((res.out_dir / "manifest.json").read_text())
    assert manifest["columns"]["dropped"]
    assert manifest["rows"]["rejected"] + manifest["rows"]["quarantined"] > 0
    assert manifest["time"]["timed"] and manifest["time"]["series"] == ["node"]
    assert manifest["time"]["time_column"] == "window_start" and manifest["time"]["series_count"] == 6
    rows = manifest["rows"]
    assert rows["read"] == rows["kept"] + rows["rejected"] + rows["quarantined"]
    rejected = pd.read_parquet(res.out_dir / "rejected.parquet")
    assert {"source", "line", "reason"} <= set(rejected.columns)
    back = load_run(res.out_dir)
    assert back.evidence.equals(res.evidence)
    assert sorted(back.graph.edges) == sorted(res.graph.edges)
