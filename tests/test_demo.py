"""Property tests of the invented demo scenario (invented data: properties only, no correctness claim)."""

from __future__ import annotations

import csv
import json
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.demo import generate, main
from pipeline.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
NODES, WINDOWS = 6, 288


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return generate(tmp_path_factory.mktemp("demo"), seed=7)


def _frame(path: Path) -> pd.DataFrame:
    """The well-formed rows of a snapshot, as strings, without the row whose number is text."""
    with path.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    header, body = rows[0], rows[1:]
    df = pd.DataFrame([r for r in body if len(r) == len(header)], columns=header)
    return df[df["traffic_rps"] != "about three hundred"]


def _raw(df: pd.DataFrame, name: str) -> np.ndarray:
    """A numeric signal on the scale its mechanisms are linear in (log, or logit for a rate)."""
    x = pd.to_numeric(df[name].replace("", np.nan)).to_numpy()
    return np.log(x / (1 - x)) if name == "cache_hit_rate" else np.log(x)


def _partial_r(frames: list[pd.DataFrame], a: str, b: str, given: tuple[str, ...] = ()) -> float:
    """Mean over the node series of the nights of the partial correlation of a and b given `given`
    (least-squares residuals within each series; the series have their own levels)."""
    out = []
    for df in frames:
        for _node, g in df.groupby("node"):
            design = np.column_stack([np.ones(len(g))] + [_raw(g, z) for z in given])
            va, vb = _raw(g, a), _raw(g, b)
            ok = ~np.isnan(va) & ~np.isnan(vb) & ~np.isnan(design).any(axis=1)
            ra = va[ok] - design[ok] @ np.linalg.lstsq(design[ok], va[ok], rcond=None)[0]
            rb = vb[ok] - design[ok] @ np.linalg.lstsq(design[ok], vb[ok], rcond=None)[0]
            out.append(np.corrcoef(ra, rb)[0, 1])
    return float(np.mean(out))


def test_same_seed_same_bytes(tmp_path):
    """The generator writes byte-identical snapshots and truth for the same seed, different for another."""
    a = generate(tmp_path / "a", seed=3, nodes=2, windows=60, snapshots=2, changed_snapshot=1)
    b = generate(tmp_path / "b", seed=3, nodes=2, windows=60, snapshots=2, changed_snapshot=1)
    c = generate(tmp_path / "c", seed=4, nodes=2, windows=60, snapshots=2, changed_snapshot=1)
    for pa, pb, pc in zip(a.snapshots, b.snapshots, c.snapshots):
        assert pa.read_bytes() == pb.read_bytes()
        assert pa.read_bytes() != pc.read_bytes()
    assert a.truth_path.read_bytes() == b.truth_path.read_bytes()


def test_snapshots_named_in_time_order_with_past_mtimes(scenario):
    """Snapshots are named by date, in time order, with modification times at least an hour old."""
    names = [p.name for p in scenario.snapshots]
    assert names == ["2026-11-01.csv", "2026-11-02.csv", "2026-11-03.csv", "2026-11-04.csv"]
    assert all(p.parent == scenario.inbox for p in scenario.snapshots)
    mtimes = [p.stat().st_mtime for p in scenario.snapshots]
    assert mtimes == sorted(mtimes)
    assert max(mtimes) < time.time() - 3000


def test_truth_file_matches_scenario(scenario):
    """truth.json holds the per-snapshot edges, the common cause, the collider, the change and the time columns."""
    truth = json.loads(scenario.truth_path.read_text(encoding="utf-8"))
    assert truth["common_cause"] == list(scenario.common_cause)
    assert truth["collider"] == list(scenario.collider)
    assert truth["changed_edge"] == list(scenario.changed_edge) == ["gc_pause_ms", "latency_ms"]
    assert truth["change"] == "link" and truth["changed_signal"] == ""
    assert truth["changed_snapshot"] == scenario.changed_snapshot_name == "2026-11-03"
    assert (truth["time_column"], truth["series"]) == ("window_start", ["node"])
    for name, edges in scenario.true_edges_by_snapshot.items():
        assert truth["edges"][name] == [list(e) for e in edges]
    before = set(scenario.true_edges_by_snapshot["2026-11-02"])
    after = set(scenario.true_edges_by_snapshot["2026-11-03"])
    assert after - before == {scenario.changed_edge} and before - after == set()


def test_graph_has_common_cause_collider_and_unlinked_drifters(scenario):
    """In the true graph the cause points into both a and b (not linked); both collider parents point into
    the effect and share no ancestor; the drifting signals are linked to nothing before the change."""
    edges = set(scenario.true_edges)
    a, b, cause = scenario.common_cause
    assert (cause, a) in edges and (cause, b) in edges
    assert (a, b) not in edges and (b, a) not in edges
    x, y, effect = scenario.collider
    assert (x, effect) in edges and (y, effect) in edges
    assert (x, y) not in edges and (y, x) not in edges

    def ancestors(node: str) -> set[str]:
        found, todo = set(), [node]
        while todo:
            for p, c in edges:
                if c == todo[-1] and p not in found:
                    found.add(p)
                    todo.insert(0, p)
            todo.pop()
        return found | {node}

    assert not ancestors(x) & ancestors(y)
    linked = {v for e in edges for v in e}
    assert {"gc_pause_ms", "disk_used_pct", "region_mix"}.isdisjoint(linked)


def test_common_cause_and_collider_show_in_data(scenario):
    """Over the 24 node series of the four nights: a and b correlate but hardly given the cause; the collider
    parents hardly correlate but do given the effect (mean per-series correlations of the raw signals)."""
    frames = [_frame(p) for p in scenario.snapshots]
    a, b, cause = scenario.common_cause
    assert _partial_r(frames, a, b) > 0.3
    assert abs(_partial_r(frames, a, b, (cause,))) < 0.12
    x, y, effect = scenario.collider
    assert abs(_partial_r(frames, x, y)) < 0.12
    assert abs(_partial_r(frames, x, y, (effect,))) > 0.3


def test_rows_are_per_node_series_with_persistence_and_a_daily_cycle(scenario):
    """One row per node and five-minute window in time order; signals persist from window to window
    (lag-1 correlation within a node above 0.8 for traffic and the disk); traffic follows the daily cycle."""
    df = _frame(scenario.snapshots[0])
    stamps = pd.to_datetime(df["window_start"])
    assert stamps.is_monotonic_increasing
    assert df.groupby("node").size().between(WINDOWS - 4, WINDOWS).all() and df["node"].nunique() == NODES
    assert not df.duplicated(["window_start", "node"]).any()
    for name in ("traffic_rps", "disk_used_pct"):
        lag1 = [np.corrcoef(v[:-1], v[1:])[0, 1] for _n, g in df.groupby("node") for v in [_raw(g, name)]]
        assert np.mean(lag1) > 0.8
    hour = stamps.dt.hour
    traffic = _raw(df, "traffic_rps")
    assert traffic[(hour >= 12) & (hour < 18)].mean() > traffic[(hour < 6)].mean() + 0.3


def test_dirt_is_present(scenario):
    """Each snapshot has a unique ID, a constant column, missing values, ragged lines and a number as text."""
    for path in scenario.snapshots:
        with path.open(newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
        header, body = rows[0], rows[1:]
        ragged = [r for r in body if len(r) != len(header)]
        assert len(ragged) == 3
        df = pd.DataFrame([r for r in body if len(r) == len(header)], columns=header)
        assert df["node_window_id"].is_unique
        assert df["schema_version"].nunique() == 1
        assert 0 < (df["cache_hit_rate"] == "").sum() < len(df) // 50
        assert (df["traffic_rps"] == "about three hundred").sum() == 1
        assert len(df) == NODES * WINDOWS - 3
        assert set(df["region_mix"]) <= {"north", "harbour", "uplands", "riverside"}


def test_changed_snapshot_adds_the_link_in_data(scenario):
    """Before the change gc_pause_ms and latency_ms hardly correlate given latency's parents; after, strongly."""
    a, b = scenario.changed_edge
    parents = ("queue_depth", "cache_hit_rate")
    before = _partial_r([_frame(p) for p in scenario.snapshots[:2]], a, b, parents)
    after = _partial_r([_frame(p) for p in scenario.snapshots[2:]], a, b, parents)
    assert abs(before) < 0.1 and after > 0.4


def test_mechanism_change_keeps_the_graph(tmp_path):
    """`change="mechanism"` keeps every night's true graph and names the changed signal."""
    s = generate(tmp_path, nodes=2, windows=40, snapshots=2, changed_snapshot=1, change="mechanism")
    assert s.changed_edge == () and s.changed_signal == "queue_depth"
    graphs = list(s.true_edges_by_snapshot.values())
    assert graphs[0] == graphs[1]


def test_bad_arguments_raise_config_error(tmp_path):
    """Too few windows or rows, no snapshots or an unknown change are refused with a ConfigError naming it."""
    with pytest.raises(ConfigError, match="rows_per_snapshot"):
        generate(tmp_path, rows_per_snapshot=5)
    with pytest.raises(ConfigError, match="windows"):
        generate(tmp_path, windows=3)
    with pytest.raises(ConfigError, match="snapshots"):
        generate(tmp_path, snapshots=0)
    with pytest.raises(ConfigError, match="change"):
        generate(tmp_path, change="both")


def test_rows_per_snapshot_sets_the_windows(tmp_path):
    """`rows_per_snapshot` is shorthand for ceil(rows / nodes) windows a node."""
    s = generate(tmp_path, rows_per_snapshot=100, nodes=3, snapshots=1)
    assert len(_frame(s.snapshots[0])) + 3 + 1 == 3 * 34


def test_main_writes_files(tmp_path, capsys):
    """`python -m pipeline.demo OUT_DIR` writes the inbox and truth.json and lists them."""
    assert main([str(tmp_path), "--nodes", "2", "--windows", "50", "--snapshots", "2"]) == 0
    printed = capsys.readouterr().out.split()
    assert printed[-1].endswith("truth.json")
    assert sorted(p.name for p in (tmp_path / "inbox").iterdir()) == ["2026-11-01.csv", "2026-11-02.csv"]


def test_demo_config_declares_time_and_points_at_inbox():
    """configs/demo.yaml validates, declares the time column and the series, reuses the first night's bins,
    leaves the test method at auto, and points nightly.inbox at outputs/demo/inbox."""
    cfg = load_config(ROOT / "configs" / "demo.yaml")
    assert cfg.name == "demo"
    assert (cfg.time.column, cfg.time.series) == ("window_start", ["node"])
    assert cfg.discretise.reuse_from == "latest" and cfg.test.method == "auto"
    assert cfg.nightly.inbox == "outputs/demo/inbox"
    assert cfg.nightly.settle_seconds < 60
