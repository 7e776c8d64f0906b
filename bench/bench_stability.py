"""Single-run graph against the stable graph (edges linked in >= threshold of the resamples) on CHILD.

Prints a Markdown table of adjacency precision / recall / F1 against the true graph
(tests/data/benchmarks/child/truth.graph.txt) and writes it to bench/results/stability.md.

    .venv/bin/python bench/bench_stability.py                  # B = 20, fraction 0.5, threshold 0.6
    .venv/bin/python bench/bench_stability.py --resamples 50 --jobs 2
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

from pipeline.independence.engine import EngineSettings
from pipeline.parallel import parallel_context
from pipeline.search import Knowledge, pc_stable_skeleton
from pipeline.stages import stability

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import true_skeleton  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
BENCHMARKS = Path(__file__).resolve().parents[1] / "tests" / "data" / "benchmarks"


def _load(name: str):
    """Coded data (variables, rows), names, level counts and true adjacencies of a benchmark set."""
    folder = BENCHMARKS / name
    with (folder / "data.txt").open(encoding="utf-8") as fh:
        names = fh.readline().split()
    raw = np.loadtxt(folder / "data.txt", skiprows=1, dtype=np.int64, ndmin=2)
    codes = np.vstack([np.unique(col, return_inverse=True)[1] for col in raw.T]).astype(np.int8)
    cards = [int(row.max()) + 1 for row in codes]
    return codes, names, cards, set(true_skeleton(name, BENCHMARKS))


def _scores(edges, truth) -> tuple[float, float, float]:
    """Adjacency precision, recall and F1 against the true graph."""
    tp = len(set(edges) & truth)
    p = tp / len(edges) if edges else 1.0
    r = tp / len(truth)
    return p, r, (2 * p * r / (p + r) if p + r else 0.0)


def _spin(shared, task) -> int:
    """A CPU-bound loop without data: what the machine gives two workers right now."""
    total = 0
    for i in range(2_000_000):
        total += i
    return total


def main(argv: list[str] | None = None) -> str:
    """Run the comparison and return the Markdown written to bench/results/stability.md."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--resamples", type=int, default=20)
    ap.add_argument("--fraction", type=float, default=0.5)
    ap.add_argument("--threshold", type=float, default=0.6)
    ap.add_argument("--rows", type=int, nargs="+", default=[1000, 2000, 10000])
    ap.add_argument("--alpha", type=float, nargs="+", default=[0.05, 0.2])
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)

    codes, names, cards, truth = _load("child")
    lines = [
        "# Edge stability on CHILD: single run against the stable graph",
        "",
        (f"Data: `tests/data/benchmarks/child` (CHILD network, Spiegelhalter & Cowell 1992; {len(names)} "
        f"variables, {len(truth)} true edges), first `rows` rows. G-test, no order cap. Stable graph: pairs "
        f"linked in at least {args.threshold} of B = {args.resamples} subsamples of {args.fraction} of the "
        f"rows drawn without replacement (seed {args.seed}); jobs = {args.jobs}."),
        "",
        "| rows | alpha | graph | B | fraction | threshold | edges | precision | recall | F1 | seconds |",
        "|---:|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    timing: list[str] = []
    with parallel_context(jobs=args.jobs) as ctx:
        # warm-up: start the workers and load the compiled kernels before anything is timed
        stability.run(codes[:, :500], names, cards, EngineSettings(), Knowledge(),
                      resamples=2 * max(1, args.jobs), context=ctx)
        for rows in args.rows:
            sub = np.ascontiguousarray(codes[:, :rows])
            for alpha in args.alpha:
                st = EngineSettings(alpha=alpha)
                t0 = time.perf_counter()
                single = pc_stable_skeleton(sub, names, cards, st)
                t_single = time.perf_counter() - t0
                t0 = time.perf_counter()
                res = stability.run(
                    sub, names, cards, st, Knowledge(), resamples=args.resamples, fraction=args.fraction,
                    seed=args.seed, context=ctx, threshold=args.threshold,
                )
                t_stable = time.perf_counter() - t0
                for label, edges, b, fr, th, secs in (
                    ("single run", single.edges, "", "", "", t_single),
                    ("stable", res.stable_edges, args.resamples, args.fraction, args.threshold, t_stable),
                ):
                    p, r, f = _scores(edges, truth)
                    lines.append(
                        f"| {rows} | {alpha} | {label} | {b} | {fr} | {th} | {len(edges)} | {p:.3f} | "
                        f"{r:.3f} | {f:.3f} | {secs:.2f} |"
                    )
                t0 = time.perf_counter()
                serial = stability.run(
                    sub, names, cards, st, Knowledge(), resamples=args.resamples, fraction=args.fraction,
                    seed=args.seed, context=None, threshold=args.threshold,
                )
                t_serial = time.perf_counter() - t0
                assert serial == res, "resampling figures differ between serial and parallel runs"
                timing.append(
                    f"| {rows} | {alpha} | {t_serial:.2f} | {t_stable:.2f} | {t_stable / t_serial:.2f} |"
                )
        t0 = time.perf_counter()
        [_spin(None, t) for t in range(args.resamples)]
        t_serial = time.perf_counter() - t0
        t0 = time.perf_counter()
        ctx.map(_spin, None, list(range(args.resamples)))
        t_par = time.perf_counter() - t0
        timing.append(f"| reference: CPU loop, no data | | {t_serial:.2f} | {t_par:.2f} | {t_par / t_serial:.2f} |")
    lines += [
        "",
        (f"Time of the {args.resamples} resamples run serially in this process (B single searches) "
        f"against the same resamples on jobs = {args.jobs} workers (identical figures checked); on an "
        f"idle machine the ratio should be about 1/{args.jobs}. Load average at the end: "
        f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores (the machine is shared)."),
        "",
        "| rows | alpha | B searches serially (s) | on the workers (s) | ratio |",
        "|---:|---:|---:|---:|---:|",
        *timing,
        "",
    ]
    text = "\n".join(lines)
    out = ROOT / "bench" / "results" / "stability.md"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    print(text)
    return text


if __name__ == "__main__":
    main()
