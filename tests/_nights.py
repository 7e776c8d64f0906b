"""Run the pipeline on simulated nights (`pipeline.simulate.nightly_logs`) as a time-aware nightly run would.

The nights are invented: they serve property, size and power checks of the change test only. Every
night of one seed shares the node levels (the same system), so two nights of a seed differ by chance
alone unless a change is planted (``change="link"`` or ``"mechanism"``, see `pipeline.simulate`).
The runs are real pipeline runs with ``time.column: window_start`` and ``time.series: [node]``; their
``timeline.parquet`` (series, order, time and numeric values) is the pipeline's own.
"""

from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Optional, Sequence

from pipeline import compare
from pipeline.api import run_pipeline
from pipeline.config import config_from_dict
from pipeline.simulate import nightly_logs

TIME = {"column": "window_start", "series": ["node"]}


def run_night(seed: int, day: int, folder: Path, *, change: Optional[str] = None,
              reuse: Optional[Path] = None, **simulate: object) -> Path:
    """Write the night of (`seed`, `day`) as Parquet under `folder` and run the pipeline on it; the run folder."""
    folder.mkdir(parents=True, exist_ok=True)
    src = folder / f"night-{seed}-{day}.parquet"
    nightly_logs(seed, day=day, change=change, **simulate).frame.to_parquet(src, index=False)  # type: ignore[arg-type]
    conf: dict = {"output": {"png": False}, "time": dict(TIME)}
    if reuse is not None:
        conf["discretise"] = {"reuse_from": str(reuse)}
    res = run_pipeline(config_from_dict(conf), src, folder / f"run-{seed}-{day}")
    return Path(res.out_dir)


def nights(seed: int, days: int, folder: Path, *, change: Optional[str] = None, **simulate: object) -> list[Path]:
    """Runs of `days` consecutive nights of one seed, the bins of the first reused; `change` on the last night."""
    runs: list[Path] = []
    for day in range(days):
        last = day == days - 1
        runs.append(run_night(seed, day, folder, change=change if last else None,
                              reuse=runs[0] if runs else None, **simulate))
    return runs


def study(change: Optional[str], seeds: Sequence[int], days: int = 2, **simulate: object) -> list[compare.Comparison]:
    """Every consecutive pair of `days` nights per seed compared (`change` planted on each seed's last night)."""
    out = []
    for seed in seeds:
        runs = nights(seed, days, Path(tempfile.mkdtemp(prefix="edgeproof-change-")), change=change, **simulate)
        out += [compare.run(a, b) for a, b in zip(runs, runs[1:])]
    return out


def planted_study(seeds: Sequence[int]) -> dict[str, list[compare.Comparison]]:
    """Per seed, night 0 against night 1 as it is (``quiet``), with the new link (``link``) and with
    the changed mechanism (``mechanism``): three comparisons sharing night 0 (its bins reused)."""
    out: dict[str, list[compare.Comparison]] = {"quiet": [], "link": [], "mechanism": []}
    for seed in seeds:
        folder = Path(tempfile.mkdtemp(prefix="edgeproof-change-"))
        first = run_night(seed, 0, folder)
        for change in out:
            after = run_night(seed, 1, folder / change, change=None if change == "quiet" else change, reuse=first)
            out[change].append(compare.run(first, after))
    return out
