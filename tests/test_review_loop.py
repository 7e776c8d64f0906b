"""The review loop: verdicts in a reviewed evidence.csv shape the next run."""

from __future__ import annotations

import json

import pandas as pd

from pipeline.api import run_pipeline
from pipeline.config import load_config
from pipeline.demo import generate


def test_reject_and_confirm_change_the_next_run(tmp_path):
    """`reject` removes a linked pair, `confirm` keeps an unlinked one, the comments reach the report,
    and a verdict on a signal that no longer exists is reported rather than dropped."""
    data = generate(tmp_path / "demo", rows_per_snapshot=1500, snapshots=1).snapshots[0]
    first = run_pipeline(load_config(None), data, tmp_path / "runs" / "first")
    ev = first.evidence
    linked = ev[ev["linked"]].iloc[0]
    unlinked = ev[~ev["linked"]].iloc[0]
    review = pd.read_csv(first.out_dir / "evidence.csv", dtype=str, keep_default_na=False)
    a_col, b_col = review.columns[0], review.columns[1]

    def mark(a: str, b: str, verdict: str, comment: str) -> None:
        hit = (review[a_col] == a) & (review[b_col] == b)
        assert hit.sum() == 1
        review.loc[hit, "verdict"] = verdict
        review.loc[hit, "comment"] = comment

    mark(linked["var_a"], linked["var_b"], "reject", "known artefact of the log shipper")
    mark(unlinked["var_a"], unlinked["var_b"], "confirm", "the runbook says these move together")
    ghost = review.iloc[[0]].copy()
    ghost[a_col], ghost[b_col], ghost["verdict"], ghost["comment"] = "retired_signal", review.iloc[0][b_col], "reject", "old"
    review = pd.concat([review, ghost], ignore_index=True)
    reviewed = tmp_path / "reviewed.csv"
    review.to_csv(reviewed, index=False)

    second = run_pipeline(load_config(None, [f"knowledge.review_file={reviewed}"]), data, tmp_path / "runs" / "second")
    ev2 = second.evidence.set_index(["var_a", "var_b"])
    rejected = ev2.loc[(linked["var_a"], linked["var_b"])]
    confirmed = ev2.loc[(unlinked["var_a"], unlinked["var_b"])]
    assert not rejected["linked"] and rejected["knowledge"] == "forbidden" and rejected["n_tests"] == 0
    assert confirmed["linked"] and confirmed["knowledge"] == "required" and confirmed["data_disagrees"]
    tests = second.tests
    assert not ((tests["var_a"] == linked["var_a"]) & (tests["var_b"] == linked["var_b"])).any()
    html = (second.out_dir / "report.html").read_text(encoding="utf-8")
    assert "known artefact of the log shipper" in html and "the runbook says these move together" in html
    manifest = json.loads((second.out_dir / "manifest.json").read_text())
    assert any("retired_signal" in w for w in manifest["warnings"])
    assert "retired_signal" in html
