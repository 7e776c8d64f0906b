"""Numeric signals (issue 14): false and true links before (G-test on 4 quantile bins) and after (the
default `test.method: auto`), and the cost of one numeric test beside one G-test.

Study: `pipeline.simulate.smooth_extract` (independent rows, numeric common causes, smooth monotone
mechanisms on raw values, numeric and categorical signals; its true links are known). Every run is a
real run (`pipeline.api.run_pipeline`: ingest to report) in its own process, so its time and peak
resident memory (``os.wait4``) are its own:

* 16 columns at 10,000 and 100,000 rows (target: at most 1 false link, every true link);
* 40 columns at 1,000,000 rows with 2 workers (target: at most 5 false links, at least 95% of the true
  links, under 60 s and 4 GB).

Cost per test: one `MixedEngine` over a 40-column extract, the same tests (conditioning sets of 0, 1
and 2 signals, each set new so no residual is reused) timed with the numeric test and with the G-test
on the 4 bins, at 10,000 and 1,000,000 rows.

    python bench/bench_numeric.py [--quick] [--seeds 6] [--seeds-100k 2] [--skip-million]

``--quick``: 10,000 rows only. Prints a Markdown table and writes it to bench/results/numeric.md.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(HERE))

from _common import RESULTS, emit, machine, run_child  # noqa: E402

CASES = {"before: `test.method=g`, 4 bins, alpha 0.05": ["test.method=g", "test.alpha=0.05"],
         "after: default (`auto` test and alpha)": []}
# alpha's share of the false links (below 1,000,000 rows: there every case costs minutes): the residual
# test at the flat alpha 0.05 the default used before it was shared over the pairs
SMALL_ONLY = {"after, flat `test.alpha=0.05`": ["test.alpha=0.05"]}
GB = 1024**3


def _child(args: argparse.Namespace) -> int:
    """Inside the measured process: one run, its links against the truth as one JSON line."""
    from pipeline.api import run_pipeline
    from pipeline.config import load_config

    truth = {tuple(sorted(e)) for e in json.loads(Path(args.truth).read_text())["edges"]}
    cfg = load_config(None, args.set)
    t0 = time.perf_counter()
    res = run_pipeline(cfg, args.input, args.out)
    seconds = time.perf_counter() - t0
    ev = res.evidence[res.evidence["linked"]]
    found = {tuple(sorted(p)) for p in zip(ev["var_a"], ev["var_b"])}
    print(json.dumps({"seconds": seconds, "false": len(found - truth), "true_found": len(found & truth),
                      "true_total": len(truth), "tests": len(res.tests),
                      "false_pairs": sorted(map(list, found - truth)), "missed": sorted(map(list, truth - found))}))
    return 0


def run_case(rows: int, columns: int, seed: int, overrides: list[str], work: Path) -> dict:
    """One real run on a generated extract in a child process: its links, seconds and peak memory."""
    from pipeline.simulate import smooth_extract

    ex = smooth_extract(rows, seed, columns=columns)
    data = work / f"extract-{rows}-{columns}-{seed}.parquet"
    if not data.exists():
        ex.frame.to_parquet(data, index=False)
    truth = work / f"truth-{columns}-{seed}.json"
    truth.write_text(json.dumps({"edges": [list(e) for e in ex.edges]}))
    del ex
    out = work / f"run-{rows}-{columns}-{seed}-{abs(hash(tuple(overrides))) % 10**6}"
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", "--input", str(data), "--truth", str(truth),
           "--out", str(out)]
    for item in overrides:
        cmd += ["--set", item]
    doc, wall, usage = run_child(cmd, work / f"{out.name}.log")
    doc["wall"] = wall
    doc["peak_rss"] = usage.ru_maxrss * 1024  # Linux reports kilobytes
    return doc


def cost_per_test(rows: int, tests: int = 12) -> tuple[float, float]:
    """Seconds per test (numeric test, G-test on 4 bins) over the same fresh tests of a 40-column extract."""
    import pandas as pd

    from pipeline.independence.engine import CIEngine, EngineSettings
    from pipeline.independence.mixed import MixedEngine
    from pipeline.independence.residual import normal_scores
    from pipeline.simulate import smooth_extract

    ex = smooth_extract(rows, 0, columns=40)
    names = [c for c in ex.frame.columns]
    numeric = [c for c in names if ex.kinds[c] == "numeric"]
    codes = []
    for c in names:
        v = ex.frame[c].to_numpy()
        if ex.kinds[c] == "numeric":
            codes.append(np.searchsorted(np.quantile(v, [0.25, 0.5, 0.75]), v, side="right"))
        else:
            codes.append(pd.factorize(v, sort=True)[0])
    data = np.vstack(codes).astype(np.int8)
    cards = [int(c.max()) + 1 for c in data]
    scores = [normal_scores(ex.frame[c].to_numpy()) if ex.kinds[c] == "numeric" else None for c in names]
    del ex
    rng = np.random.default_rng(0)
    plan = []
    for k in range(tests):
        picked = rng.choice(len(numeric), size=2 + k % 3, replace=False)
        x, y, *given = [numeric[i] for i in picked]
        plan.append((x, y, tuple(given)))
    out = []
    for engine in (MixedEngine(data, names, cards, EngineSettings(method="auto"), scores=scores),
                   CIEngine(data, names, cards, EngineSettings(method="g"))):
        t0 = time.perf_counter()
        for x, y, given in plan:
            engine.test(x, y, list(given))
        out.append((time.perf_counter() - t0) / len(plan))
    return out[0], out[1]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--input")
    ap.add_argument("--truth")
    ap.add_argument("--out")
    ap.add_argument("--set", action="append", default=[])
    ap.add_argument("--quick", action="store_true", help="10,000 rows only")
    ap.add_argument("--seeds", type=int, default=6, help="extracts at 10,000 rows")
    ap.add_argument("--seeds-100k", type=int, default=2,
                    help="extracts at 100,000 rows (the binned G-test's dense searches take minutes each there)")
    ap.add_argument("--skip-million", action="store_true", help="leave out the 1,000,000-row run")
    args = ap.parse_args(argv)
    if args.child:
        return _child(args)
    sizes = [(10_000, 16, args.seeds, [])]
    if not args.quick:
        sizes += [(100_000, 16, args.seeds_100k, [])]
        if not args.skip_million:
            sizes += [(1_000_000, 40, 1, ["parallel.jobs=2"])]
    lines = [
        "| rows | columns | case | extracts | false links (each) | true links found | seconds a run | peak memory |",
        "|---:|---:|---|---:|---|---:|---:|---:|",
    ]
    with tempfile.TemporaryDirectory(prefix="bench-numeric-") as tmp:
        work = Path(tmp)
        for rows, columns, seeds, extra in sizes:
            for label, overrides in {**CASES, **(SMALL_ONLY if rows < 1_000_000 else {})}.items():
                docs = [run_case(rows, columns, seed, overrides + extra, work) for seed in range(seeds)]
                found = sum(d["true_found"] for d in docs) / sum(d["true_total"] for d in docs)
                lines.append(
                    f"| {rows:,} | {columns} | {label}{' (2 workers)' if extra else ''} | {seeds} "
                    f"| {', '.join(str(d['false']) for d in docs)} | {100 * found:.1f}% "
                    f"| {np.mean([d['seconds'] for d in docs]):.1f} | {max(d['peak_rss'] for d in docs) / GB:.2f} GB |")
                _write(lines, [], partial=True)
                for d in docs:
                    print(f"  false: {d['false_pairs']} missed: {d['missed']}", file=sys.stderr, flush=True)
    cost = ["", "| rows | numeric test (ms per test) | G-test on 4 bins (ms per test) | ratio |", "|---:|---:|---:|---:|"]
    for rows in [10_000] + ([] if args.quick or args.skip_million else [1_000_000]):
        gcm, g = cost_per_test(rows)
        cost.append(f"| {rows:,} | {1000 * gcm:.1f} | {1000 * g:.1f} | {gcm / g:.1f} |")
        _write(lines, cost, partial=True)
    _write(lines, cost, partial=False)
    return 0


def _write(lines: list[str], cost: list[str], partial: bool) -> None:
    """The table so far in bench/results/numeric.md (rewritten after every row: long runs leave their rows)."""
    text = "\n".join([
        f"Machine: {machine()}; BLAS threads: {os.environ.get('OPENBLAS_NUM_THREADS', 'library default')}.",
        "Generated extracts `pipeline.simulate.smooth_extract(rows, seed, columns)` (seeds 0, 1, ...); real runs "
        "with default settings apart from the case; seconds = `run_pipeline` in its own process; peak memory = "
        "that process's maximum resident set with its reaped workers (`os.wait4`: the largest one, not the sum).",
        *(["", "**Partial: the script was still running.**"] if partial else []), "", *lines, *cost, ""])
    if partial:
        (RESULTS / "numeric.md").parent.mkdir(parents=True, exist_ok=True)
        (RESULTS / "numeric.md").write_text(text, encoding="utf-8")
        print((lines + cost)[-1], flush=True)
    else:
        emit("numeric", text)


if __name__ == "__main__":
    raise SystemExit(main())
