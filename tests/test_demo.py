"""Property tests of the invented demo scenario (invented data: properties only, no correctness claim)."""

from __future__ import annotations

import csv
import json
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import chi2_contingency

from pipeline.config import load_config
from pipeline.demo import generate, main
from pipeline.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return generate(tmp_path_factory.mktemp("demo"), seed=7, rows_per_snapshot=4000)


def _frame(path: Path) -> pd.DataFrame:
    """The well-formed rows of a snapshot, as strings."""
    with path.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    header, body = rows[0], rows[1:]
    good = [r for r in body if len(r) == len(header)]
    return pd.DataFrame(good, columns=header)


def _quartiles(values: pd.Series) -> np.ndarray:
    x = pd.to_numeric(values.replace("", np.nan)).to_numpy()
    cuts = np.nanquantile(x, [0.25, 0.5, 0.75])
    return np.where(np.isnan(x), -1, np.searchsorted(cuts, x, side="right"))


def _g_pvalue(x: np.ndarray, y: np.ndarray, z: np.ndarray | None = None) -> float:
    """Conditional G-test p-value (stratified sum of scipy's log-likelihood statistics)."""
    from scipy.stats import chi2

    strata = [slice(None)] if z is None else [z == v for v in np.unique(z)]
    stat, dof = 0.0, 0
    for mask in strata:
        table = pd.crosstab(x[mask], y[mask]).to_numpy()
        table = table[table.sum(1) > 0][:, table.sum(0) > 0]
        if min(table.shape) < 2:
            continue
        g, _, d, _ = chi2_contingency(table, correction=False, lambda_="log-likelihood")
        stat, dof = stat + g, dof + d
    return float(chi2.sf(stat, dof)) if dof else 1.0


def test_same_seed_same_bytes(tmp_path):
    """The generator writes byte-identical snapshots and truth for the same seed, different for another."""
    a = generate(tmp_path / "a", seed=3, rows_per_snapshot=300, snapshots=2, changed_snapshot=1)
    b = generate(tmp_path / "b", seed=3, rows_per_snapshot=300, snapshots=2, changed_snapshot=1)
    c = generate(tmp_path / "c", seed=4, rows_per_snapshot=300, snapshots=2, changed_snapshot=1)
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
    """truth.json holds the per-snapshot edges, the common cause, the collider and the change."""
    truth = json.loads(scenario.truth_path.read_text(encoding="utf-8"))
    assert truth["common_cause"] == list(scenario.common_cause)
    assert truth["collider"] == list(scenario.collider)
    assert truth["changed_edge"] == list(scenario.changed_edge)
    assert truth["changed_snapshot"] == scenario.changed_snapshot_name == "2026-11-03"
    for name, edges in scenario.true_edges_by_snapshot.items():
        assert truth["edges"][name] == [list(e) for e in edges]
    before = set(scenario.true_edges_by_snapshot["2026-11-02"])
    after = set(scenario.true_edges_by_snapshot["2026-11-03"])
    assert after - before == {scenario.changed_edge} and before - after == set()


def test_graph_has_common_cause_and_collider(scenario):
    """In the true graph the cause points into both a and b (not linked); both collider parents point into the effect."""
    edges = set(scenario.true_edges)
    a, b, cause = scenario.common_cause
    assert (cause, a) in edges and (cause, b) in edges
    assert (a, b) not in edges and (b, a) not in edges
    x, y, effect = scenario.collider
    assert (x, effect) in edges and (y, effect) in edges
    assert (x, y) not in edges and (y, x) not in edges
    parents_of = {n: {p for p, c in edges if c == n} for n in {x, y}}
    assert not parents_of[y]  # deploy_window is a root: independent of db_wait's ancestors


def test_common_cause_and_collider_show_in_data(scenario):
    """In the data, a and b are dependent but independent given the cause; the collider parents are independent."""
    df = _frame(scenario.snapshots[0])
    df = df[df["traffic_rps"] != "about three hundred"]
    a, b, cause = scenario.common_cause
    qa, qb, qc = _quartiles(df[a]), _quartiles(df[b]), _quartiles(df[cause])
    ok = (qa >= 0) & (qb >= 0)
    assert _g_pvalue(qa[ok], qb[ok]) < 1e-6
    assert _g_pvalue(qa[ok], qb[ok], qc[ok]) > 0.01
    x, y, effect = scenario.collider
    qx, qy, qe = _quartiles(df[x]), df[y].to_numpy(), _quartiles(df[effect])
    assert _g_pvalue(qx, qy) > 0.01
    assert _g_pvalue(qx, qy, qe) < 1e-6


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
        assert len(df) == 4000 + 1
        assert set(df["region"]) <= {"north", "harbour", "uplands", "riverside"}


def test_changed_snapshot_adds_the_link_in_data(scenario):
    """Before the change deploy_window and error_burst are independent given latency; after, dependent."""
    a, b = scenario.changed_edge
    pvals = []
    for path in scenario.snapshots[1:3]:
        df = _frame(path)
        df = df[df["traffic_rps"] != "about three hundred"]
        pvals.append(_g_pvalue(df[a].to_numpy(), df[b].to_numpy(), _quartiles(df["latency_ms"])))
    assert pvals[0] > 0.01 and pvals[1] < 1e-6


def test_bad_arguments_raise_config_error(tmp_path):
    """Too few rows or no snapshots are refused with a ConfigError naming the argument."""
    with pytest.raises(ConfigError, match="rows_per_snapshot"):
        generate(tmp_path, rows_per_snapshot=5)
    with pytest.raises(ConfigError, match="snapshots"):
        generate(tmp_path, snapshots=0)


def test_main_writes_files(tmp_path, capsys):
    """`python -m pipeline.demo OUT_DIR` writes the inbox and truth.json and lists them."""
    assert main([str(tmp_path), "--rows", "100", "--snapshots", "2"]) == 0
    printed = capsys.readouterr().out.split()
    assert printed[-1].endswith("truth.json")
    assert sorted(p.name for p in (tmp_path / "inbox").iterdir()) == ["2026-11-01.csv", "2026-11-02.csv"]


def test_demo_config_points_at_inbox():
    """configs/demo.yaml validates and points nightly.inbox at outputs/demo/inbox."""
    cfg = load_config(ROOT / "configs" / "demo.yaml")
    assert cfg.name == "demo"
    assert cfg.nightly.inbox == "outputs/demo/inbox"
    assert cfg.nightly.settle_seconds < 60
