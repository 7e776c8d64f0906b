"""The default alpha shared over the pairs against a flat 0.05, on the four shared benchmark networks.

`test.alpha: auto` is min(0.05, 2 / pairs) above the small-extract rows (`pipeline.config.resolve_auto`).
This bench runs the PC-stable skeleton (G-test, sparse tables flagged, no order cap) on the 10,000-row
samples and on seeded subsamples of 1,000 and 3,000 rows of asia, child, insurance and alarm
(tests/data/benchmarks), at the alpha the rule resolves and at a flat 0.05, and counts false links,
missed links and adjacency F1 against the true graphs.

    .venv/bin/python bench/bench_alpha.py [--seeds 3] [--out bench/results/alpha.md]
"""

from __future__ import annotations

import argparse
import sys
import time
from math import comb
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench_small_samples import SETS, _code, _f1, _load, _rows  # noqa: E402

from pipeline.config import load_config, resolve_auto  # noqa: E402
from pipeline.independence.engine import EngineSettings  # noqa: E402
from pipeline.search import pc_stable_skeleton  # noqa: E402

SIZES = (1_000, 3_000, 10_000)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=3, help="subsamples per size below 10,000 rows")
    ap.add_argument("--out", default=str(Path(__file__).resolve().parent / "results" / "alpha.md"))
    args = ap.parse_args(argv)
    cfg = load_config(None, ["search.max_order=none"])
    t_start = time.perf_counter()
    rows = []
    f1_by_size: dict[tuple[int, str], list[float]] = {}
    for i, name in enumerate(SETS):
        raw, names, truth = _load(name)
        for size in SIZES:
            stats: dict[str, list[tuple[int, int, float]]] = {"flat": [], "shared": []}
            alphas = set()
            for seed in range(1 if size >= len(raw) else args.seeds):
                codes, cards = _code(raw[_rows(i, size, seed, len(raw))])
                resolved, _ = resolve_auto(cfg, codes.shape[1], cards, comb(len(names), 2))
                for label, alpha in (("flat", 0.05), ("shared", float(resolved.test.alpha))):
                    if label == "shared":
                        alphas.add(alpha)
                    settings = EngineSettings(method="g", alpha=alpha, sparse_policy="flag", min_rows_per_cell=5.0)
                    edges = set(pc_stable_skeleton(codes, names, cards, settings).edges)
                    stats[label].append((len(edges - truth), len(truth - edges), _f1(edges, truth)))
            cells = []
            for label in ("flat", "shared"):
                arr = np.array(stats[label], dtype=float)
                f1_by_size.setdefault((size, label), []).append(float(arr[:, 2].mean()))
                cells += [f"{arr[:, 0].mean():.2f}", f"{arr[:, 1].mean():.2f}", f"{arr[:, 2].mean():.3f}"]
            rows.append(f"| {name} | {len(names)} ({comb(len(names), 2)} pairs) | {size:,} | "
                        f"{len(stats['flat'])} | {', '.join(f'{a:g}' for a in sorted(alphas))} | " + " | ".join(cells) + " |")
            print(rows[-1], flush=True)
    head = ["# `test.alpha: auto` (0.05 shared over the pairs) against a flat 0.05",
            "",
            f"Shared benchmark networks (tests/data/benchmarks), G-test, sparse tables flagged, no order cap; "
            f"subsamples seeded as in bench_small_samples.py, {args.seeds} per size below 10,000 rows. "
            f"Means per sample. `python bench/bench_alpha.py --seeds {args.seeds}` ({time.perf_counter() - t_start:.0f} s).",
            "",
            "| network | signals | rows | samples | auto alpha | false links (0.05) | missed (0.05) | F1 (0.05) "
            "| false links (auto) | missed (auto) | F1 (auto) |",
            "|---|---|---:|---:|---|---:|---:|---:|---:|---:|---:|"]
    means = ["", "Mean F1 over the four networks (each the mean over its samples):", "",
             "| rows | F1 (0.05) | F1 (auto) |", "|---:|---:|---:|"]
    means += [f"| {size:,} | {np.mean(f1_by_size[(size, 'flat')]):.3f} | {np.mean(f1_by_size[(size, 'shared')]):.3f} |"
              for size in SIZES]
    text = "\n".join(head + rows + means) + "\n"
    if args.out:
        Path(args.out).write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
