"""The invented demo scenario: nightly snapshots of an online service with a known true graph.

The service and every name in it are made up. The signals come from `pipeline.simulate.nightly_logs`:
six nodes each log one row per five-minute window (288 windows a night), most signals persist from one
window to the next, traffic follows a daily cycle, every mechanism acts on raw values (linear, tanh,
exponential, logistic), and three signals drift on their own, linked to nothing (``gc_pause_ms``,
``disk_used_pct``, ``region_mix``). The true links:

    traffic_rps -> queue_depth, traffic_rps -> cpu_util <- batch_job
    deploy_window -> cache_hit_rate
    queue_depth -> latency_ms <- cache_hit_rate                      (collider)
    queue_depth -> conn_wait_ms                                      (common cause of latency, conn wait)
    latency_ms -> error_burst <- deploy_window
    error_burst -> alert_level, error_burst -> retry_rate

From snapshot ``changed_snapshot`` on, an (invented) release makes garbage-collection pauses slow the
requests down: the link ``gc_pause_ms -> latency_ms`` is added (``change="link"``, the default). With
``change="mechanism"`` the queue's response to traffic doubles instead and the graph stays the same.

The files carry the dirt a real extract has: a unique ID column (``node_window_id``), a constant
column (``schema_version``), a few missing cache hit rates, three ragged lines (a row cut short or
with a stray field) and one row whose ``traffic_rps`` is written as text. The rows are in time order,
node after node within a window; ``window_start`` and ``node`` are the time and series columns
(configs/demo.yaml declares them).

No scenario key is picked by hand: any seed is a fair draw. How the demo behaves over 20 seeds is
measured by bench/bench_demo.py and stated in the README.

Examples
--------
>>> import tempfile
>>> scenario = generate(tempfile.mkdtemp(), nodes=2, windows=48, snapshots=2, changed_snapshot=1)
>>> [p.name for p in scenario.snapshots]
['2026-11-01.csv', '2026-11-02.csv']
>>> scenario.changed_edge
('gc_pause_ms', 'latency_ms')
"""

from __future__ import annotations

import argparse
import csv
import datetime as _dt
import io
import json
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import ConfigError
from .simulate import nightly_logs

__all__ = ["DemoScenario", "generate", "main"]

_START_DATE = _dt.date(2026, 11, 1)
_ID_COLUMNS = ("window_start", "node", "node_window_id", "schema_version")
_COMMON_CAUSE = ("latency_ms", "conn_wait_ms", "queue_depth")
_COLLIDER = ("queue_depth", "cache_hit_rate", "latency_ms")
_CHANGED_EDGE = ("gc_pause_ms", "latency_ms")  # the link nightly_logs plants with change="link"
_CHANGED_SIGNAL = "queue_depth"  # the mechanism nightly_logs changes with change="mechanism"
_CHANGES = ("link", "mechanism")


@dataclass(frozen=True)
class DemoScenario:
    """Where the demo snapshots and their known true graph were written.

    Attributes
    ----------
    inbox : Path
        Folder holding the snapshot CSV files.
    snapshots : list of Path
        The snapshot files in time order.
    truth_path : Path
        ``truth.json`` beside the inbox.
    true_edges : list of (str, str)
        Directed edges of the first snapshot's generating graph.
    true_edges_by_snapshot : dict
        Snapshot name (file stem) -> its directed true edges.
    common_cause : (str, str, str)
        ``(a, b, cause)``: a and b are dependent, but independent given cause.
    collider : (str, str, str)
        ``(a, b, effect)``: a and b are independent and both cause effect.
    change : str
        ``"link"`` (``changed_edge`` appears) or ``"mechanism"`` (``changed_signal``'s response changes).
    changed_edge : (str, str)
        The link added from ``changed_snapshot_name`` on (empty for a mechanism change).
    changed_signal : str
        The signal whose mechanism changes ("" for a link change).
    changed_snapshot_name : str
        The first snapshot (file stem) with the change ("" when no snapshot has it).
    time_column, series : str, tuple of str
        The columns that order the rows in time and name one series.
    """

    inbox: Path
    snapshots: list[Path]
    truth_path: Path
    true_edges: list[tuple[str, str]]
    true_edges_by_snapshot: dict[str, list[tuple[str, str]]]
    common_cause: tuple[str, str, str]
    collider: tuple[str, str, str]
    change: str
    changed_edge: tuple[str, ...]
    changed_signal: str
    changed_snapshot_name: str
    time_column: str = "window_start"
    series: tuple[str, ...] = ("node",)


def _as_text(frame: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    """The night as the strings an extract holds: ID and constant columns, flags as words, a few blanks."""
    out = frame.sort_values(["window_start", "node"], kind="stable").reset_index(drop=True)
    stamp = out["window_start"].dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    text = pd.DataFrame({
        "window_start": stamp,
        "node": out["node"],
        "node_window_id": out["node"].str.replace("node-", "n", regex=False) + "-" + out["window_start"].dt.strftime("%Y%m%d%H%M"),
        "schema_version": "3",
    })
    for name in out.columns:
        if name in ("window_start", "node"):
            continue
        v = out[name]
        if name in ("deploy_window", "batch_job"):
            text[name] = np.where(v.to_numpy() == 1, "yes", "no")
        else:
            text[name] = v.astype(str)
    missing = rng.choice(len(text), size=max(1, len(text) // 300), replace=False)
    text.loc[missing, "cache_hit_rate"] = ""
    return text


def _write_csv(path: Path, text: pd.DataFrame, rng: np.random.Generator) -> None:
    """Write one snapshot with three ragged lines and one number written as words."""
    columns = list(text.columns)
    rows = text.to_numpy(dtype=object).tolist()
    n = len(rows)
    damaged = rng.choice(n, size=min(4, n), replace=False)
    ragged_at, text_at = {int(i): k for k, i in enumerate(damaged[:3])}, int(damaged[3]) if n > 3 else -1
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    for i, row in enumerate(rows):
        if i in ragged_at:  # a line cut short or with a stray field: wrong field count
            row = row[:7] if ragged_at[i] % 2 == 0 else row + ["stray"]
        elif i == text_at:  # a number written as words
            row = list(row)
            row[columns.index("traffic_rps")] = "about three hundred"
        writer.writerow(row)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(buf.getvalue(), encoding="utf-8")
    os.replace(tmp, path)


def generate(
    out_dir: str | Path,
    *,
    seed: int = 7,
    nodes: int = 6,
    windows: int = 288,
    snapshots: int = 4,
    changed_snapshot: int = 2,
    change: str = "link",
    rows_per_snapshot: int | None = None,
) -> DemoScenario:
    """Write the demo snapshots (``out_dir/inbox/YYYY-MM-DD.csv``) and ``out_dir/truth.json``.

    Parameters
    ----------
    out_dir : str or Path
        Folder to write into (created if needed).
    seed : int
        Seed of the whole scenario (``nightly_logs``' seed; each night also mixes in its day); the
        same seed gives byte-identical files. Every seed is a fair draw: none was picked by hand.
    nodes, windows : int
        Series (nodes) and five-minute windows a series per snapshot (288 = one day).
    snapshots : int
        Number of nightly snapshots, one day apart from 2026-11-01.
    changed_snapshot : int
        0-based index of the first snapshot with the change; ``snapshots`` or more means no change.
    change : {"link", "mechanism"}
        The planted change: the new link ``gc_pause_ms -> latency_ms``, or a doubled response of
        ``queue_depth`` to traffic with the graph unchanged.
    rows_per_snapshot : int, optional
        Shorthand for a size in rows: ``windows = ceil(rows_per_snapshot / nodes)``.

    Returns
    -------
    DemoScenario

    Examples
    --------
    >>> import tempfile
    >>> s = generate(tempfile.mkdtemp(), nodes=2, windows=30, snapshots=1)
    >>> s.common_cause
    ('latency_ms', 'conn_wait_ms', 'queue_depth')
    """
    if nodes < 1:
        raise ConfigError(f"Demo `nodes` = {nodes} must be at least 1.")
    if rows_per_snapshot is not None:
        if rows_per_snapshot < 20:
            raise ConfigError(f"Demo `rows_per_snapshot` = {rows_per_snapshot} is too small; use 20 or more.")
        windows = -(-rows_per_snapshot // nodes)
    if windows < 10:
        raise ConfigError(f"Demo `windows` = {windows} is too small; use 10 or more.")
    if snapshots < 1:
        raise ConfigError(f"Demo `snapshots` = {snapshots} must be at least 1.")
    if changed_snapshot < 0:
        raise ConfigError(f"Demo `changed_snapshot` = {changed_snapshot} must be 0 or more.")
    if change not in _CHANGES:
        raise ConfigError(f"Demo `change` = {change!r} is not allowed; use link or mechanism.")
    out = Path(out_dir)
    inbox = out / "inbox"
    inbox.mkdir(parents=True, exist_ok=True)
    paths: list[Path] = []
    by_snapshot: dict[str, list[tuple[str, str]]] = {}
    now = time.time()
    for day in range(snapshots):
        changed = day >= changed_snapshot
        night = nightly_logs(seed, nodes=nodes, windows=windows, day=day, change=change if changed else None,
                             shuffle_rows=False)
        rng = np.random.default_rng([int(seed), day, 5318])  # the dirt's own stream
        name = (_START_DATE + _dt.timedelta(days=day)).isoformat()
        path = inbox / f"{name}.csv"
        _write_csv(path, _as_text(night.frame, rng), rng)
        stamp = now - 3600 - 60 * (snapshots - 1 - day)  # in the past, in time order
        os.utime(path, (stamp, stamp))
        paths.append(path)
        by_snapshot[name] = [tuple(e) for e in night.edges]  # type: ignore[misc]
    changed_name = (
        (_START_DATE + _dt.timedelta(days=changed_snapshot)).isoformat() if changed_snapshot < snapshots else ""
    )
    changed_edge = _CHANGED_EDGE if change == "link" else ()
    changed_signal = _CHANGED_SIGNAL if change == "mechanism" else ""
    truth = {
        "edges": {k: [list(e) for e in v] for k, v in by_snapshot.items()},
        "common_cause": list(_COMMON_CAUSE),
        "collider": list(_COLLIDER),
        "change": change,
        "changed_edge": list(changed_edge),
        "changed_signal": changed_signal,
        "changed_snapshot": changed_name,
        "time_column": "window_start",
        "series": ["node"],
        "seed": seed,
        "nodes": nodes,
        "windows": windows,
    }
    truth_path = out / "truth.json"
    tmp = truth_path.with_name("truth.json.tmp")
    tmp.write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8")
    os.replace(tmp, truth_path)
    first = next(iter(by_snapshot.values()))
    return DemoScenario(
        inbox=inbox,
        snapshots=paths,
        truth_path=truth_path,
        true_edges=list(first),
        true_edges_by_snapshot=by_snapshot,
        common_cause=_COMMON_CAUSE,
        collider=_COLLIDER,
        change=change,
        changed_edge=changed_edge,
        changed_signal=changed_signal,
        changed_snapshot_name=changed_name,
    )


def main(argv: list[str] | None = None) -> int:
    """Command line: ``python -m pipeline.demo OUT_DIR [--seed N] [--nodes N] [--windows N] ...``."""
    parser = argparse.ArgumentParser(
        prog="python -m pipeline.demo",
        description="Write the invented demo snapshots and their known true graph.",
    )
    parser.add_argument("out_dir", help="folder to write inbox/ and truth.json into")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--nodes", type=int, default=6, help="series (nodes) per snapshot")
    parser.add_argument("--windows", type=int, default=288, help="five-minute windows per node and snapshot")
    parser.add_argument("--snapshots", type=int, default=4)
    parser.add_argument("--changed-snapshot", type=int, default=2)
    parser.add_argument("--change", choices=_CHANGES, default="link")
    args = parser.parse_args(argv)
    try:
        scenario = generate(
            args.out_dir, seed=args.seed, nodes=args.nodes, windows=args.windows, snapshots=args.snapshots,
            changed_snapshot=args.changed_snapshot, change=args.change,
        )
    except ConfigError as err:
        print(f"edgeproof demo: {err}", file=sys.stderr)
        return err.exit_code
    for path in scenario.snapshots:
        print(path)
    print(scenario.truth_path)
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
