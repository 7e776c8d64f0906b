"""False and true links a night on simulated realistic logs: today's default against time-aware tests.

Each night is `pipeline.simulate.nightly_logs` (6 nodes x 288 five-minute windows, 14 signals, 11 true
links, persistence 0.8-0.995, a daily cycle, smooth mechanisms on raw values, independent drifting
signals). Every night runs the real data stages (clean, discretise, timeline) and the PC-stable search.

    python bench/bench_timeseries.py [--nights 7] [--quick] [--out bench/results/timeseries.md]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pipeline.config import load_config, resolve_auto  # noqa: E402
from pipeline.independence.engine import EngineSettings  # noqa: E402
from pipeline.search.knowledge import Knowledge  # noqa: E402
from pipeline.search.skeleton import SignalExtras, pc_stable_skeleton  # noqa: E402
from pipeline.simulate import nightly_logs  # noqa: E402
from pipeline.stages import clean, discretise, timeline  # noqa: E402
from pipeline.stages._data_common import empty_rejected  # noqa: E402
from pipeline.stages.ingest import Ingested  # noqa: E402


def search_night(frame, overrides: list[str], max_order: int | None = None):
    """The skeleton edges of one simulated night under a configuration (real data stages)."""
    cfg = load_config(None, overrides)
    table = frame.copy()
    table["window_start"] = table["window_start"].astype(str)
    table = table.astype(str)
    cleaned = clean.run(Ingested(table, empty_rejected(), len(table), ["night.csv"], {}), cfg)
    disc = discretise.run(cleaned, cfg)
    cards = {k: max(1, len(v)) for k, v in disc.levels.items()}
    timed = timeline.run(cleaned.table, cleaned.times, cleaned.kinds, disc.codes, cards, cfg,
                         {c: v.get("method") for c, v in disc.summary["columns"].items()})
    cfg, _ = resolve_auto(cfg, *timeline.auto_inputs(timed.doc(), len(disc.codes)))  # as a run resolves them
    settings = EngineSettings.from_config(cfg)
    extras = None
    if cfg.test.method in ("auto", "gcm") or timed.timeline is not None:
        numeric = tuple(s is not None for s in timed.scores)
        scores = np.vstack([s if s is not None else np.full(timed.codes.shape[1], np.nan) for s in timed.scores])
        extras = SignalExtras(scores=scores, numeric=numeric,
                              prev=None if timed.timeline is None else timed.timeline.prev,
                              series_length=0.0 if timed.timeline is None else timed.timeline.series_length,
                              own_past=tuple(timed.own_past))
    res = pc_stable_skeleton(timed.codes, timed.names, timed.cards, settings, knowledge=Knowledge(),
                             extras=extras, max_order=max_order)
    return {tuple(sorted(e)) for e in res.edges}, timed.summary


CASES = {
    "before (G-test on 4 bins, rows independent, alpha 0.05; the old default)": [
        "test.method=g", "time.serial=off", "time.test_series=true", "test.alpha=0.05"],
    "auto tests, no time declared (rows independent)": ["test.method=auto", "time.serial=off"],
    "default + time and series declared": ["time.column=window_start", "time.series=[node]"],
    "time and series declared, flat `test.alpha=0.05` (not shared over the pairs)": [
        "time.column=window_start", "time.series=[node]", "test.alpha=0.05"],
}


DRIFTING = ("gc_pause_ms", "disk_used_pct", "region_mix")  # independent of every other signal in the scenario


def marginal_size(nights: int, first_seed: int = 500) -> tuple[int, int]:
    """How often the time-aware marginal test (level 0 only) links a drifting signal, which is
    independent of everything, to another signal: (rejections, pairs tested) over `nights` new nights."""
    from itertools import combinations

    rejected = tested = 0
    overrides = CASES["time and series declared, flat `test.alpha=0.05` (not shared over the pairs)"]
    for night in range(nights):
        sim = nightly_logs(seed=first_seed + night, persistence=True)
        names = [c for c in sim.frame.columns if c not in ("window_start", "node")]
        edges, _ = search_night(sim.frame, overrides, max_order=0)
        for a, b in combinations(sorted(names), 2):
            if a in DRIFTING or b in DRIFTING:
                tested += 1
                rejected += (a, b) in edges
    return rejected, tested


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nights", type=int, default=7)
    ap.add_argument("--quick", action="store_true", help="3 nights instead of 7")
    ap.add_argument("--persistence", choices=["on", "off", "both"], default="both")
    ap.add_argument("--out", default=str(Path(__file__).resolve().parent / "results" / "timeseries.md"))
    ap.add_argument("--size-nights", type=int, default=40,
                    help="nights of the marginal size check on drifting signals (0: leave it out)")
    args = ap.parse_args(argv)
    if args.quick:
        args.nights = 3
    lines = ["| rows | case | false links a night | true links found | seconds a night |", "|---|---|---:|---:|---:|"]
    modes = {"on": [True], "off": [False], "both": [True, False]}[args.persistence]
    for persistent in modes:
        for label, overrides in CASES.items():
            false, found, secs = [], [], []
            for night in range(args.nights):
                sim = nightly_logs(seed=100 + night, persistence=persistent)
                truth = {tuple(sorted(e)) for e in sim.edges}
                t0 = time.perf_counter()
                edges, _ = search_night(sim.frame, overrides)
                secs.append(time.perf_counter() - t0)
                edges = {e for e in edges if "node" not in e}
                false.append(len(edges - truth))
                found.append(len(edges & truth) / len(truth))
            rows = "persistent series" if persistent else "independent rows"
            lines.append(f"| {rows} | {label} | {np.mean(false):.2f} (max {max(false)}) | {100 * np.mean(found):.0f}% | {np.mean(secs):.1f} |")
            print(lines[-1], flush=True)
    if args.size_nights:
        rej, tot = marginal_size(args.size_nights)
        lines += ["", f"Size of the time-aware marginal test (level 0 only, alpha 0.05) on pairs with one of the "
                  f"three drifting signals, which are independent of every other signal: {rej} of {tot} pairs linked "
                  f"({100 * rej / tot:.1f}%) over {args.size_nights} new nights (seeds 500 on)."]
        print(lines[-1], flush=True)
    text = "\n".join(lines) + "\n"
    if args.out:
        Path(args.out).write_text(text, encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
