"""Link history over nightly runs: the planted demo change on its night, and the table's rules."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from pipeline import history
from pipeline.config import load_config
from pipeline.errors import DataError

REPO = Path(__file__).resolve().parents[1]
DEMO_CONFIG = REPO / "configs" / "demo.yaml"


@pytest.fixture(scope="module")
def demo_root(demo_nights):
    """The demo at its default settings (seed 7, 4 nights of 6 nodes x 288 windows), run by `nightly`
    (the session fixture of conftest.py)."""
    return demo_nights


def test_planted_change_shows_on_the_right_night(demo_root, capsys):
    """The demo's changed link flips exactly once, on the demo's changed night (demo truth.json).

    Seed 7; over 20 seeds the planted link's pattern is exactly ssLL on most seeds, not all (measured by
    bench/bench_demo.py, README demo section)."""
    scenario, cfg, root = demo_root
    assert history.history_main(cfg) == 0
    printed = capsys.readouterr().out
    a, b = scenario.changed_edge
    night = scenario.changed_snapshot_name
    table = pd.read_csv(root / "history.csv")
    row = table[(table["var_a"] == min(a, b)) & (table["var_b"] == max(a, b))].iloc[0]
    nights = [p.stem for p in scenario.snapshots]
    k = nights.index(night)
    gained = tuple(scenario.changed_edge) in {tuple(e) for e in scenario.true_edges_by_snapshot[night]}
    assert row["changes"] == ("+" if gained else "-") + night
    expected = "s" * k + "L" * (4 - k) if gained else "L" * k + "s" * (4 - k)
    assert row["pattern"] == expected
    assert f"{min(a, b)} -- {max(a, b)}" in printed
    page = (root / "history.html").read_text()
    assert "\u25cf" in page and "\u25cb" in page and "flip" in page
    assert [c for c in table.columns if c.startswith("pvalue_")] == [f"pvalue_{n}" for n in nights]
    assert [c for c in table.columns if c.startswith("cmi_bits_")] == [f"cmi_bits_{n}" for n in nights]
    assert row[f"cmi_bits_{nights[-1 if gained else 0]}"] > 0  # the effect size of the night it was linked
    text = (root / "history.csv").read_text()
    assert not any(set(cell) == {"#"} for line in text.splitlines() for cell in line.split(","))
    assert "bits" in page and "structural" not in page


def test_last_n_limits_the_nights(demo_root, tmp_path):
    """`--last 2` shows the two most recent runs only."""
    scenario, cfg, _root = demo_root
    hist = history.run(cfg, last=2)
    assert hist.nights == tuple(p.stem for p in scenario.snapshots[-2:])
    assert history.history_main(cfg, last=2, out_dir=tmp_path) == 0
    assert (tmp_path / "history.csv").is_file() and (tmp_path / "history.html").is_file()


def test_history_rules_on_invented_nights():
    """Pattern, first/last seen and changes follow the documented rules; untested nights break no run."""
    def ev(rows):
        return pd.DataFrame(rows, columns=["var_a", "var_b", "linked", "pvalue"])

    nights = [
        ("d1", ev([("x", "y", True, 1e-6), ("x", "z", False, 0.4)])),
        ("d2", ev([("y", "x", False, 0.2), ("x", "z", True, 1e-3)])),  # pair order may differ
        ("d3", ev([("x", "z", True, 1e-4)])),  # y not kept that night
        ("d4", ev([("x", "y", True, 1e-8), ("x", "z", True, 1e-5)])),
    ]
    h = history.edge_history(nights)
    xy, xz = h.row("x", "y"), h.row("z", "x")
    assert (xy["pattern"], xy["nights_present"], xy["first_seen"], xy["last_seen"]) == ("Ls?L", 2, "d1", "d4")
    assert xy["changes"] == "-d2"  # the untested night d3 is not counted as a change
    assert pd.isna(xy["pvalue_d3"]) and xy["pvalue_d2"] == 0.2
    assert (xz["pattern"], xz["changes"], xz["first_seen"]) == ("sLLL", "+d2", "d2")
    with pytest.raises(DataError, match="repeat"):
        history.edge_history([("d1", nights[0][1]), ("d1", nights[1][1])])


def test_no_runs_yet_is_reported(tmp_path):
    """History before any successful run names the output root and the command to run."""
    cfg = load_config(DEMO_CONFIG, [f"output.root={tmp_path}"])
    with pytest.raises(DataError, match="edgeproof nightly"):
        history.run(cfg)
