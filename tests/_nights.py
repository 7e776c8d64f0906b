"""A small generator of realistic nights for the change tests (invented; property and size checks only).

Several nodes, one row per node and five-minute window, persistent signals (AR(1) noise and sticky
flags), a daily cycle and smooth mechanisms on raw values. Node levels depend on the seed only, so two
nights of one seed differ by chance alone unless a change is planted:

* ``change="link"``: ``gc_pause_ms -> latency_ms`` with coefficient `link` on standardised values;
* ``change="mechanism"``: the response of ``queue_depth`` to traffic is multiplied by `gain`.

`write_night` runs the pipeline on a night and adds the run's ``timeline.parquet`` (series, order and
the numeric values) the way a time-aware run keeps it.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import numpy as np
import pandas as pd


def _ar1(rng: np.random.Generator, n: int, phi: float) -> np.ndarray:
    e = rng.standard_normal(n) * np.sqrt(1.0 - phi**2)
    out = np.empty(n)
    out[0] = rng.standard_normal()
    for i in range(1, n):
        out[i] = phi * out[i - 1] + e[i]
    return out


def _flag(rng: np.random.Generator, n: int, stay: float, on: float) -> np.ndarray:
    out = np.empty(n, dtype=np.int64)
    state = int(rng.random() < on)
    u = rng.random(n)
    for i in range(n):
        if state == 1 and u[i] > stay:
            state = 0
        elif state == 0 and u[i] > 1.0 - (1.0 - stay) * on / (1.0 - on):
            state = 1
        out[i] = state
    return out


def night(seed: int, day: int, *, nodes: int = 6, windows: int = 288, change: Optional[str] = None,
          link: float = 0.5, gain: float = 2.0) -> pd.DataFrame:
    """One night: columns node, window and eight signals (six numeric, a flag, a 3-level category)."""
    levels = np.random.default_rng([seed, 99]).normal(0.0, 1.0, nodes)
    rng = np.random.default_rng([seed, day, 7])
    parts = []
    for k in range(nodes):
        n = windows
        hours = (np.arange(n) * 5.0 / 60.0) % 24.0
        cycle = np.sin(2 * np.pi * (hours - 9.0) / 24.0)
        lt = 0.3 * levels[k] + 0.6 * cycle + 0.5 * _ar1(rng, n, 0.9)
        batch = _flag(rng, n, 0.98, 0.25)
        queue = (gain if change == "mechanism" else 1.0) * 0.8 * np.tanh(lt) + 0.5 * _ar1(rng, n, 0.85)
        cpu = 0.7 * lt + 0.8 * batch + 0.6 * _ar1(rng, n, 0.8)
        cache = 2.0 + 0.3 * _ar1(rng, n, 0.95)
        gc = _ar1(rng, n, 0.95)
        lat = 0.7 * queue - 0.6 * (cache - 2.0) / 0.3 + 0.6 * _ar1(rng, n, 0.8)
        if change == "link":
            lat = lat + link * gc
        err_score = 0.9 * lat + 0.6 * _ar1(rng, n, 0.8)
        cuts = np.quantile(err_score, [0.6, 0.9])
        error = np.array(["quiet", "some", "many"], dtype=object)[np.searchsorted(cuts, err_score)]
        parts.append(pd.DataFrame({
            "node": f"node-{k + 1}", "window": np.arange(n),
            "traffic_rps": np.exp(5.0 + 0.5 * lt).round(2), "batch_job": batch.astype(bool),
            "queue_depth": np.exp(1.0 + queue).round(3), "cpu_util": (100 / (1 + np.exp(-cpu))).round(2),
            "cache_hit_rate": (1 / (1 + np.exp(-cache))).round(4), "gc_pause_ms": np.exp(2 + 0.5 * gc).round(2),
            "latency_ms": (40 * np.exp(0.3 * lat)).round(2), "error_burst": error,
        }))
    return pd.concat(parts, ignore_index=True)


def write_night(frame: pd.DataFrame, folder: Path, name: str, reuse: Optional[Path] = None) -> Path:
    """Run the pipeline on `frame` (node and window kept aside) and keep its time table beside it."""
    from pipeline.api import run_pipeline
    from pipeline.config import config_from_dict

    folder.mkdir(parents=True, exist_ok=True)
    src = folder / f"{name}.csv"
    frame.drop(columns=["node", "window"]).to_csv(src, index=False)
    conf: dict = {"output": {"png": False}}
    if reuse is not None:
        conf["discretise"] = {"reuse_from": str(reuse)}
    res = run_pipeline(config_from_dict(conf), src, folder / name)
    codes = pd.read_parquet(Path(res.out_dir) / "discretised.parquet")
    assert len(codes) == len(frame)
    numeric = [c for c in frame.columns if c not in ("node", "window", "batch_job", "error_burst")]
    timeline = frame[numeric].assign(series=frame["node"].to_numpy(), order=frame["window"].to_numpy())
    timeline.to_parquet(Path(res.out_dir) / "timeline.parquet", index=False)
    return Path(res.out_dir)
