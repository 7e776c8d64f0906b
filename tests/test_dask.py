"""The batteries on a dask cluster: same code path, same bytes, the coded table shipped once.

Reference: the serial run (``parallel.jobs=1``) of the same extract and configuration.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from pipeline.api import run_pipeline  # noqa: E402
from pipeline.config import apply_overrides, config_from_dict  # noqa: E402
from pipeline.errors import ConfigError  # noqa: E402
from pipeline.parallel import parallel_context  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "bench"))
import gen_extract  # noqa: E402

ROWS = 8_000


@pytest.fixture(scope="module")
def cluster():
    """A two-process dask cluster on the loopback interface, one thread per worker."""
    lc = distributed.LocalCluster(
        n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1", dashboard_address=None
    )
    try:
        yield lc
    finally:
        lc.close()


def _executed(address: str) -> dict[str, int]:
    """Tasks each worker of the cluster has executed so far."""
    with distributed.Client(address, set_as_default=False) as client:
        return client.run(lambda dask_worker: int(dask_worker.state.executed_count))


@pytest.mark.timeout(120)
def test_dask_run_matches_serial_run_byte_for_byte(cluster, tmp_path, monkeypatch):
    """On a 2-worker cluster the evidence and tests files equal the jobs=1 run's, the table scattered once."""
    scatters: list[tuple[object, object]] = []
    real_scatter = distributed.Client.scatter

    def counting_scatter(self, data, *args, **kwargs):
        scatters.append((data, kwargs.get("broadcast")))
        return real_scatter(self, data, *args, **kwargs)

    monkeypatch.setattr(distributed.Client, "scatter", counting_scatter)
    extract = gen_extract.write_csv(tmp_path / "extract.csv", ROWS, seed=5)
    base = gen_extract.config_dict()
    before = _executed(cluster.scheduler_address)
    serial = run_pipeline(config_from_dict(apply_overrides(base, ["parallel.jobs=1"])), extract,
                          tmp_path / "serial" / "run")
    on_cluster = run_pipeline(
        config_from_dict(apply_overrides(base, ["parallel.backend=dask",
                                                f"parallel.scheduler={cluster.scheduler_address}"])),
        extract, tmp_path / "cluster" / "run",  # another parent: its own stage cache
    )
    after = _executed(cluster.scheduler_address)

    for name in ("evidence.parquet", "tests.parquet"):
        assert (on_cluster.out_dir / name).read_bytes() == (serial.out_dir / name).read_bytes()
    assert not on_cluster.manifest["stages"]["battery"]["reused"]
    assert not on_cluster.manifest["stages"]["skeleton"]["reused"]
    # the batteries ran on the workers, and on both of them
    ran = {w: after[w] - before.get(w, 0) for w in after}
    assert len(ran) == 2 and all(n > 0 for n in ran.values()), ran
    # one scatter for the whole run (battery and every skeleton level), broadcast, holding the table
    assert len(scatters) == 1, [type(d).__name__ for d, _ in scatters]
    payload, broadcast = scatters[0]
    assert broadcast is True
    assert all(isinstance(x, np.ndarray) for x in payload)  # only arrays travel this way
    assert (40, ROWS) in [a.shape for a in payload]  # the coded table, once


def test_dask_backend_without_scheduler_is_a_config_error():
    """`parallel.backend: dask` without `parallel.scheduler` stops with a ConfigError naming the key."""
    with pytest.raises(ConfigError, match="parallel.scheduler"), parallel_context(1, "dask", None):
        pass
