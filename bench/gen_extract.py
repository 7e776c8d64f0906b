"""A seeded generator of a 40-column operations extract whose true graph is known.

Every signal has a hidden state (2 levels for a flag, 3-5 for a category, 4 for a measurement) drawn
from the states of its parents plus independent noise, so the conditional independences of the graph
hold exactly. A measurement's value lies strictly inside the band of its state
(``base + step * (state + u)``, ``u`` in [0.05, 0.95]); cutting it at the band boundaries, which the
generated configuration does with ``discretise: fixed``, recovers the state, so the graph can be
found again from the data. The scenario (node signals of an invented service fleet) is made up.

Rows are made in blocks of ``BLOCK_ROWS`` with child seeds ``SeedSequence([seed, 2, block])``: the same
seed and row count give the same rows whether they are written as one CSV or a folder of Parquet
partitions, and memory stays bounded by one block whatever the size.

Examples
--------
    python bench/gen_extract.py --rows 100000 --out /tmp/extract.csv \\
        --config-out /tmp/extract.yaml --truth-out /tmp/truth.json
    python bench/gen_extract.py --rows 10000000 --format parquet --out /tmp/extract-10m
"""

from __future__ import annotations

import argparse
import json
import os
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

__all__ = [
    "BLOCK_ROWS",
    "SIGNALS",
    "Signal",
    "blocks",
    "config_dict",
    "main",
    "truth_edges",
    "write_csv",
    "write_parquet_folder",
]

BLOCK_ROWS = 250_000
_MISSING_FRACTION = 0.005


@dataclass(frozen=True)
class Signal:
    """One column: its kind, its levels (categories) or value band, and its parents."""

    name: str
    kind: str  # "numeric" | "categorical" | "boolean"
    parents: tuple[str, ...] = ()
    categories: tuple[str, ...] = ()  # categorical only
    base: float = 0.0  # numeric only: state s covers [base + s*step, base + (s+1)*step)
    step: float = 1.0
    missing: bool = False  # a small share of values missing completely at random

    @property
    def n_states(self) -> int:
        """Number of hidden states."""
        if self.kind == "boolean":
            return 2
        if self.kind == "categorical":
            return len(self.categories)
        return 4


def _num(name: str, parents: tuple[str, ...], base: float, step: float, missing: bool = False) -> Signal:
    return Signal(name, "numeric", parents, base=base, step=step, missing=missing)


def _cat(name: str, parents: tuple[str, ...], categories: tuple[str, ...]) -> Signal:
    return Signal(name, "categorical", parents, categories=categories)


def _flag(name: str, parents: tuple[str, ...]) -> Signal:
    return Signal(name, "boolean", parents)


# Parents come before children. 28 measurements, 6 categories, 6 flags; 39 true links.
SIGNALS: tuple[Signal, ...] = (
    # network
    _cat("region", (), ("north", "south", "east", "west", "central")),
    _cat("zone_tier", ("region",), ("edge", "core", "backbone")),
    _num("link_util_pct", ("zone_tier",), 10.0, 20.0),
    _num("packet_loss_ppm", ("link_util_pct",), 0.0, 50.0),
    _num("rtt_ms", ("packet_loss_ppm", "zone_tier"), 5.0, 15.0),
    # compute
    _cat("node_class", (), ("small", "medium", "large", "xlarge")),
    _num("cpu_util_pct", ("node_class",), 5.0, 22.0),
    _num("mem_pressure_pct", ("node_class",), 10.0, 20.0, missing=True),
    _num("gc_pause_ms", ("mem_pressure_pct",), 1.0, 12.0),
    _num("thread_count", ("cpu_util_pct",), 32.0, 64.0),
    # cache
    _num("cache_size_gb", (), 4.0, 8.0),
    _num("cache_hit_rate_pct", ("cache_size_gb", "node_class"), 40.0, 14.0),
    _num("cache_evictions", ("cache_hit_rate_pct",), 0.0, 300.0),
    _num("backend_reads", ("cache_hit_rate_pct",), 100.0, 900.0),
    _num("disk_iops", ("backend_reads",), 200.0, 1500.0, missing=True),
    # queueing
    _num("queue_depth", ("backend_reads", "cpu_util_pct"), 0.0, 40.0),
    _num("worker_busy_pct", ("queue_depth",), 20.0, 18.0),
    _num("latency_p50_ms", ("queue_depth",), 8.0, 20.0),
    _num("latency_p99_ms", ("latency_p50_ms", "gc_pause_ms"), 40.0, 90.0),
    _num("timeouts_per_min", ("latency_p99_ms",), 0.0, 6.0),
    # change management
    _flag("deploy_window", ()),
    _flag("config_drift", ("deploy_window",)),
    _num("canary_share_pct", ("deploy_window",), 0.0, 12.0),
    _cat("feature_flag_set", (), ("set_a", "set_b", "set_c", "set_d")),
    _num("restart_count", ("config_drift",), 0.0, 3.0),
    # errors
    _flag("error_burst", ("timeouts_per_min", "config_drift")),
    _num("retry_rate_pct", ("error_burst",), 0.0, 2.5, missing=True),
    _flag("alert_fired", ("error_burst",)),
    _flag("pager_escalation", ("alert_fired",)),
    _num("upstream_errors", ("retry_rate_pct",), 0.0, 40.0),
    # traffic
    _cat("traffic_class", (), ("batch", "interactive", "stream")),
    _num("request_rate", ("traffic_class",), 500.0, 2500.0),
    _num("payload_kb", ("traffic_class",), 1.0, 16.0),
    _num("bandwidth_mbps", ("request_rate", "payload_kb"), 50.0, 300.0),
    _num("open_connections", ("request_rate",), 100.0, 800.0),
    # storage
    _cat("storage_backend", (), ("ssd", "hdd", "object")),
    _num("write_latency_ms", ("storage_backend",), 0.5, 6.0),
    _flag("compaction_running", ("write_latency_ms",)),
    _num("disk_free_pct", ("compaction_running",), 5.0, 22.0),
    _num("fs_inodes_used_pct", ("disk_free_pct",), 10.0, 20.0),
)


def truth_edges() -> list[list[str]]:
    """The true links as ``[parent, child]`` pairs (the report's ``truth_file`` format)."""
    return [[p, s.name] for s in SIGNALS for p in s.parents]


@dataclass(frozen=True)
class _Mechanism:
    root_probs: dict[str, np.ndarray]
    effects: dict[str, dict[str, np.ndarray]]  # child -> parent -> effect per parent state
    cuts: dict[str, np.ndarray]  # child -> thresholds on the score


def _mechanism(seed: int) -> _Mechanism:
    """Draw the effect sizes and score thresholds once per seed (from a pilot sample)."""
    rng = np.random.default_rng(np.random.SeedSequence([seed, 1]))
    root_probs: dict[str, np.ndarray] = {}
    effects: dict[str, dict[str, np.ndarray]] = {}
    cuts: dict[str, np.ndarray] = {}
    by_name = {s.name: s for s in SIGNALS}
    pilot: dict[str, np.ndarray] = {}
    n_pilot = 40_000
    for s in SIGNALS:
        k = s.n_states
        if not s.parents:
            p = rng.uniform(0.6, 1.4, size=k)
            root_probs[s.name] = p / p.sum()
            pilot[s.name] = rng.choice(k, size=n_pilot, p=root_probs[s.name])
            continue
        eff = {}
        for par in s.parents:
            kp = by_name[par].n_states
            e = np.linspace(-1.0, 1.0, kp) * rng.choice([-1.0, 1.0]) * 1.6
            eff[par] = e[rng.permutation(kp)] if by_name[par].kind == "categorical" else e
        effects[s.name] = eff
        score = sum(eff[par][pilot[par]] for par in s.parents) + rng.logistic(size=n_pilot)
        cuts[s.name] = np.quantile(score, np.linspace(0, 1, k + 1)[1:-1])
        pilot[s.name] = np.searchsorted(cuts[s.name], score)
    return _Mechanism(root_probs, effects, cuts)


def _block(mech: _Mechanism, rows: int, rng: np.random.Generator) -> pa.Table:
    states: dict[str, np.ndarray] = {}
    arrays = []
    for s in SIGNALS:
        if not s.parents:
            st = rng.choice(s.n_states, size=rows, p=mech.root_probs[s.name])
        else:
            score = rng.logistic(size=rows)
            for par in s.parents:
                score += mech.effects[s.name][par][states[par]]
            st = np.searchsorted(mech.cuts[s.name], score)
        states[s.name] = st
        if s.kind == "numeric":
            values = np.round(s.base + s.step * (st + rng.uniform(0.05, 0.95, size=rows)), 2)
            mask = rng.random(rows) < _MISSING_FRACTION if s.missing else None
            arrays.append(pa.array(values, type=pa.float64(), mask=mask))
        elif s.kind == "boolean":
            arrays.append(pa.array(st.astype(bool)))
        else:
            cats = pa.array(list(s.categories), type=pa.string())
            arrays.append(cats.take(pa.array(st.astype(np.int32))))
    return pa.table(arrays, names=[s.name for s in SIGNALS])


def blocks(rows: int, seed: int = 0) -> Iterator[pa.Table]:
    """The extract as Arrow tables of at most `BLOCK_ROWS` rows each, in order."""
    mech = _mechanism(seed)
    for i, start in enumerate(range(0, rows, BLOCK_ROWS)):
        n = min(BLOCK_ROWS, rows - start)
        yield _block(mech, n, np.random.default_rng(np.random.SeedSequence([seed, 2, i])))


def write_csv(path: str | os.PathLike[str], rows: int, seed: int = 0) -> Path:
    """Write `rows` rows as one CSV file (header line, ``true``/``false`` flags, empty = missing)."""
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp")
    writer = None
    with open(tmp, "wb") as fh:
        for table in blocks(rows, seed):
            if writer is None:
                writer = pacsv.CSVWriter(fh, table.schema, write_options=pacsv.WriteOptions(quoting_style="needed"))
            writer.write_table(table)
        if writer is not None:
            writer.close()
    os.replace(tmp, out)
    return out


def write_parquet_folder(
    folder: str | os.PathLike[str], rows: int, seed: int = 0, partition_rows: int = 1_000_000
) -> Path:
    """Write `rows` rows as ``part-00000.parquet``, ... of about `partition_rows` rows each."""
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    for old in out.glob("part-*.parquet"):
        old.unlink()
    per_part = max(1, partition_rows // BLOCK_ROWS)
    writer = None
    part = -1
    for i, table in enumerate(blocks(rows, seed)):
        if i % per_part == 0:
            if writer is not None:
                writer.close()
            part += 1
            writer = pq.ParquetWriter(out / f"part-{part:05d}.parquet", table.schema)
        assert writer is not None
        writer.write_table(table)
    if writer is not None:
        writer.close()
    return out


def config_dict() -> dict:
    """An edgeproof configuration for the extract: column kinds and the band boundaries as cut points."""
    columns: dict[str, dict] = {}
    for s in SIGNALS:
        if s.kind == "numeric":
            columns[s.name] = {"type": "numeric", "discretise": "fixed",
                               "edges": [round(s.base + s.step * j, 6) for j in (1, 2, 3)]}
        else:
            columns[s.name] = {"type": s.kind}
    return {"name": "bench-extract", "columns": columns}


def main(argv: list[str] | None = None) -> int:
    """Command line: write an extract (and optionally its configuration and true graph)."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, required=True)
    ap.add_argument("--out", required=True, help="a .csv file, or a folder for --format parquet")
    ap.add_argument("--format", choices=["csv", "parquet"], default="csv")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--partition-rows", type=int, default=1_000_000)
    ap.add_argument("--config-out", help="write the matching YAML configuration here")
    ap.add_argument("--truth-out", help="write the true links as JSON {\"edges\": [[a, b], ...]}")
    args = ap.parse_args(argv)
    if args.format == "csv":
        write_csv(args.out, args.rows, args.seed)
    else:
        write_parquet_folder(args.out, args.rows, args.seed, args.partition_rows)
    if args.config_out:
        import yaml

        Path(args.config_out).write_text(yaml.safe_dump(config_dict(), sort_keys=False), encoding="utf-8")
    if args.truth_out:
        Path(args.truth_out).write_text(json.dumps({"edges": truth_edges()}, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
