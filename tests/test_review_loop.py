"""The review loop: verdicts in a reviewed evidence.csv shape the next run (invented demo data: properties only)."""

from __future__ import annotations

import json

import pandas as pd
import pytest

from pipeline.api import run_pipeline
from pipeline.config import load_config
from pipeline.demo import generate
from pipeline.errors import DataError
from pipeline.report import read_review_file, review_knowledge


@pytest.fixture(scope="module")
def first_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("review")
    data = generate(tmp / "demo", rows_per_snapshot=1500, snapshots=1).snapshots[0]
    return tmp, data, run_pipeline(load_config(None), data, tmp / "runs" / "first")


def _european(frame: pd.DataFrame, path, encoding: str = "utf-8-sig") -> None:
    """Save as a spreadsheet in a European locale does: semicolons, decimal commas, a BOM (or cp1252)."""
    text = frame.to_csv(index=False, sep=";", decimal=",", lineterminator="\r\n")
    path.write_bytes(text.encode(encoding))


def test_reject_and_confirm_change_the_next_run(first_run):
    """From a semicolon-separated, BOM-prefixed review file: `reject` separates a linked pair (still tested,
    the data disagreeing is reported), `confirm` keeps an unlinked one, comments reach the report, and a
    verdict on a signal that no longer exists is reported rather than dropped."""
    tmp, data, first = first_run
    ev = first.evidence
    linked = ev[ev["linked"]].sort_values("pvalue").iloc[0]  # the strongest link: tonight's data support it
    unlinked = ev[~ev["linked"]].iloc[0]
    review = pd.read_csv(first.out_dir / "evidence.csv", dtype=str, keep_default_na=False)
    assert list(review.columns[:5]) == ["signal A", "signal B", "outcome", "verdict", "comment"]

    def mark(a: str, b: str, verdict: str, comment: str) -> None:
        hit = (review["signal A"] == a) & (review["signal B"] == b)
        assert hit.sum() == 1
        review.loc[hit, "verdict"] = verdict
        review.loc[hit, "comment"] = comment

    mark(linked["var_a"], linked["var_b"], "reject", "known artefact of the log shipper; zürich team")
    mark(unlinked["var_a"], unlinked["var_b"], "confirm", "the runbook says these move together")
    ghost = review.iloc[[0]].copy()
    ghost["signal A"], ghost["verdict"], ghost["comment"] = "retired_signal", "reject", "old"
    review = pd.concat([review, ghost], ignore_index=True)
    reviewed = tmp / "reviewed.csv"
    _european(review, reviewed)
    assert reviewed.read_bytes().startswith(b"\xef\xbb\xbfsignal A;signal B;")

    second = run_pipeline(load_config(None, [f"knowledge.review_file={reviewed}"]), data, tmp / "runs" / "second")
    ev2 = second.evidence.set_index(["var_a", "var_b"])
    rejected = ev2.loc[(linked["var_a"], linked["var_b"])]
    confirmed = ev2.loc[(unlinked["var_a"], unlinked["var_b"])]
    assert not rejected["linked"] and rejected["knowledge"] == "rejected" and rejected["n_tests"] >= 1
    assert rejected["data_disagrees"] and "reviewer_rejected" in rejected["flags"].split(";")
    assert rejected["pvalue"] < 1e-6  # the data strongly say dependent
    assert "tonight's data disagree" in rejected["explanation"]
    assert confirmed["linked"] and confirmed["knowledge"] == "required" and confirmed["data_disagrees"]
    tests = second.tests
    assert ((tests["var_a"] == linked["var_a"]) & (tests["var_b"] == linked["var_b"])).any()  # still tested
    html = (second.out_dir / "report.html").read_text(encoding="utf-8")
    assert "known artefact of the log shipper; zürich team" in html
    assert "the runbook says these move together" in html
    assert "rejected by the reviewer" in html and "tonight&#x27;s data disagree" in html
    manifest = json.loads((second.out_dir / "manifest.json").read_text())
    assert any("retired_signal" in w for w in manifest["warnings"])
    assert "retired_signal" in html
    # the graph draws no line for the rejected pair
    assert second.graph.has_edge(linked["var_a"], linked["var_b"]) is False


def test_legacy_encoding_and_unknown_words_make_one_line(first_run, tmp_path):
    """A cp1252 file with semicolons and decimal commas is read; 1,000 unknown verdict words make one warning
    line naming the first rows, the count and the allowed words."""
    _, _, first = first_run
    review = pd.read_csv(first.out_dir / "evidence.csv", dtype=str, keep_default_na=False)
    names = sorted(set(review["signal A"]) | set(review["signal B"]))
    rows = pd.concat([review.iloc[[0]]] * 1000, ignore_index=True)
    rows["verdict"] = "keep"
    rows.loc[0, "verdict"], rows.loc[0, "comment"] = "reject", "café – ok"
    path = tmp_path / "r.csv"
    _european(rows, path, encoding="cp1252")
    frame = read_review_file(path)
    assert len(frame) == 1000 and frame.loc[0, "comment"] == "café – ok"
    confirm, reject, comments, warnings = review_knowledge(path, names)
    assert reject == [(rows.loc[0, "signal A"], rows.loc[0, "signal B"])] and not confirm
    assert len(warnings) == 1
    line = warnings[0]
    assert "\n" not in line and "999 rows" in line and "row 3 `keep`" in line and "confirm, reject" in line


@pytest.mark.parametrize("content, why", [
    (b"", "empty"),
    (b"\x7fELF\x02\x01\x01\x00\x00\x00\x00", "not a text file"),
    (b"pair,outcome\nx,y\n", "`var_a`, `var_b`, `verdict`, `comment`"),
    (b'signal A;signal B;verdict;comment\n"x;y;confirm;ok\n', "cannot be read"),
])
def test_unreadable_review_file_is_refused_in_one_line(tmp_path, content, why):
    """A review file that cannot be read is refused with one DataError line saying why and how to save it."""
    path = tmp_path / "r.csv"
    path.write_bytes(content)
    with pytest.raises(DataError) as err:
        read_review_file(path)
    text = str(err.value)
    assert "\n" not in text and why in text and "save it from the spreadsheet as CSV" in text
