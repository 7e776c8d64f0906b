"""Counting by row partitions: partial contingency tables add up to the whole-table count.

References: the whole-table count itself (``partition_rows`` at least the number of rows), and
``pandas.crosstab`` as an outside count of the same tables.
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from pipeline.api import run_pipeline
from pipeline.config import apply_overrides, config_from_dict
from pipeline.independence.counting import count_flat, count_table
from pipeline.independence.engine import CIEngine, EngineSettings

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "bench"))
import gen_extract  # noqa: E402

ROWS = 20_000


def _coded(rows: int, seed: int = 0) -> tuple[np.ndarray, list[str], list[int]]:
    """The generated extract coded the way its configuration cuts it (-1 = missing)."""
    table = pa.concat_tables(list(gen_extract.blocks(rows, seed)))
    cfg = gen_extract.config_dict()["columns"]
    out, names, cards = [], [], []
    for s in gen_extract.SIGNALS:
        col = table.column(s.name).to_pandas()
        if s.kind == "numeric":
            values = col.to_numpy(dtype=float, na_value=np.nan)
            code = np.digitize(values, cfg[s.name]["edges"]).astype(np.int8)
            code[np.isnan(values)] = -1
        elif s.kind == "boolean":
            code = col.to_numpy(dtype=np.int8)
        else:
            code = pd.Categorical(col, categories=list(s.categories)).codes.astype(np.int8)
        out.append(code)
        names.append(s.name)
        cards.append(s.n_states)
    return np.vstack(out), names, cards


@pytest.fixture(scope="module")
def coded():
    """A 20,000-row coded table of the generated 40-column extract."""
    return _coded(ROWS)


def _sets(names: list[str]) -> list[tuple[str, str, tuple[str, ...]]]:
    """Tests of every conditioning-set size 0 to 3, with and without missing values involved."""
    return [
        ("region", "zone_tier", ()),
        ("cache_hit_rate_pct", "disk_iops", ()),  # disk_iops has missing values
        ("link_util_pct", "rtt_ms", ("packet_loss_ppm",)),
        ("latency_p50_ms", "latency_p99_ms", ("queue_depth", "gc_pause_ms")),
        ("mem_pressure_pct", "gc_pause_ms", ("node_class", "region", "deploy_window")),
        ("error_burst", "retry_rate_pct", ("config_drift", "timeouts_per_min", "traffic_class")),
    ]


@pytest.mark.parametrize("partition_rows", [1_000, 1_777, 7_001])
def test_partition_counts_add_up_to_the_whole_table(coded, partition_rows):
    """Counting 1,000 / 1,777 / 7,001 rows at a time gives exactly the whole-table counts."""
    data, names, cards = coded
    idx = {n: i for i, n in enumerate(names)}
    for x, y, given in _sets(names):
        g = [idx[n] for n in given]
        whole = count_table(data, cards, idx[x], idx[y], g, partition_rows=ROWS)
        part = count_table(data, cards, idx[x], idx[y], g, partition_rows=partition_rows)
        assert part.n == whole.n
        np.testing.assert_array_equal(part.counts, whole.counts)
        flat_whole, n_whole = count_flat(data, cards, idx[x], idx[y], g, partition_rows=ROWS)
        flat_part, n_part = count_flat(data, cards, idx[x], idx[y], g, partition_rows=partition_rows)
        assert n_part == n_whole == whole.n
        np.testing.assert_array_equal(flat_part, flat_whole)


def test_sparse_partition_counts_add_up(coded):
    """A table with more possible cells than rows is counted sparsely per partition and merged exactly."""
    data, names, cards = coded
    idx = {n: i for i, n in enumerate(names)}
    given = [idx[n] for n in ("region", "link_util_pct", "cpu_util_pct", "queue_depth",
                                 "latency_p50_ms", "request_rate", "payload_kb")]
    x, y = idx["cache_hit_rate_pct"], idx["backend_reads"]
    assert cards[x] * cards[y] * math.prod(cards[k] for k in given) > 4 * ROWS  # the sparse branch
    whole = count_table(data, cards, x, y, given, partition_rows=ROWS)
    part = count_table(data, cards, x, y, given, partition_rows=1_000)
    assert part.n == whole.n
    np.testing.assert_array_equal(part.counts, whole.counts)


def _crosstab_counts(frame: pd.DataFrame, x: str, y: str, given: tuple[str, ...], kx: int, ky: int) -> np.ndarray:
    """pandas.crosstab of x by y within each observed stratum of `given`, in stratum order."""
    rows = frame[(frame[[x, y, *given]] >= 0).all(axis=1)]
    if not given:
        ct = pd.crosstab(rows[x], rows[y]).reindex(index=range(kx), columns=range(ky), fill_value=0)
        return ct.to_numpy()[None]
    ct = pd.crosstab([rows[g] for g in given] + [rows[x]], rows[y]).reindex(columns=range(ky), fill_value=0)
    strata = sorted({key[:-1] for key in ct.index})
    out = []
    for stratum in strata:
        block = ct.xs(stratum, level=list(range(len(given))))
        out.append(block.reindex(index=range(kx), fill_value=0).to_numpy())
    return np.stack(out)


def test_partitioned_counts_match_pandas_crosstab(coded):
    """Partitioned counts equal pandas.crosstab of the same rows (rows with a missing value left out)."""
    data, names, cards = coded
    idx = {n: i for i, n in enumerate(names)}
    frame = pd.DataFrame(data.T, columns=names)
    for x, y, given in _sets(names)[:5]:
        table = count_table(data, cards, idx[x], idx[y], [idx[g] for g in given], partition_rows=1_000)
        ref = _crosstab_counts(frame, x, y, given, cards[idx[x]], cards[idx[y]])
        np.testing.assert_array_equal(table.counts, ref)
        assert table.n == int(ref.sum())


@pytest.mark.parametrize("method", ["g", "chi2"])
def test_engine_statistics_do_not_depend_on_partition_size(coded, method):
    """CIEngine gives the same statistic, dof, p-value and n counting 1,000 rows at a time as all at once."""
    data, names, cards = coded
    whole = CIEngine(data, names, cards, EngineSettings(method=method, partition_rows=ROWS))
    part = CIEngine(data, names, cards, EngineSettings(method=method, partition_rows=1_000))
    for x, y, given in _sets(names):
        a, b = whole.test(x, y, given), part.test(x, y, given)
        assert (a.statistic, a.dof, a.pvalue, a.n, a.cmi_bits, a.sparse, a.independent) == (
            b.statistic, b.dof, b.pvalue, b.n, b.cmi_bits, b.sparse, b.independent
        )


def test_pipeline_evidence_identical_with_small_partitions(tmp_path):
    """`run_pipeline` with --set parallel.partition_rows=1000 writes the same evidence and tests bytes as the default."""
    extract = gen_extract.write_csv(tmp_path / "extract.csv", 30_000, seed=3)
    base = gen_extract.config_dict()
    runs = {}
    for label, overrides in (("whole", []), ("parts", ["parallel.partition_rows=1000"])):
        cfg = config_from_dict(apply_overrides(base, overrides))
        # separate parents: separate stage caches, so both runs count every table themselves
        runs[label] = run_pipeline(cfg, extract, tmp_path / label / "run")
    for res in runs.values():
        assert not res.manifest["stages"]["battery"]["reused"]
        assert not res.manifest["stages"]["skeleton"]["reused"]
    assert runs["parts"].manifest["config"]["parallel"]["partition_rows"] == 1000
    assert runs["whole"].manifest["config"]["parallel"]["partition_rows"] >= 30_000
    for name in ("evidence.parquet", "tests.parquet"):
        assert (runs["parts"].out_dir / name).read_bytes() == (runs["whole"].out_dir / name).read_bytes()
    assert len(runs["whole"].tests) > 780  # the marginal battery and further levels ran
