"""Which test settings serve small extracts: adjacency F1 by alpha, test, sparse policy and order cap.

On seeded subsamples of 300 and 1,000 rows (and the full 10,000 rows) of the four shared benchmark
sets (tests/data/benchmarks: asia, child, insurance, alarm), run PC-stable (pipeline.search) with every
combination of

* alpha: 0.01, 0.05, 0.1, 0.2
* test: g, chi2
* data-sufficiency policy: flag, independent, dependent (rule: at least test.min_rows_per_cell = 5
  rows per cell of the table, common practice)
* order cap: none, 1, 2, 3

and score the skeleton's adjacency F1 against truth.graph.txt. PC-stable level l depends only on the
adjacencies after level l - 1, so the search capped at order k is the uncapped search stopped after
level k: one uncapped search per (alpha, test, policy) gives all four caps. An uncapped search whose
next level would need more than `--budget` tests is stopped and its "none" cap reported as not finished.

Then the proposed size-dependent rule (`_proposed`) is scored on the same subsamples beside the plain
G-test at alpha 0.05 (policy flag, no cap).

    .venv/bin/python bench/bench_small_samples.py            # 5 seeds per size, writes bench/results/small_samples.md
    .venv/bin/python bench/bench_small_samples.py --quick    # 2 seeds per size
    .venv/bin/python bench/bench_small_samples.py --seed-offset 100   # fresh subsamples, to check the rule
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from itertools import product
from pathlib import Path

import numpy as np

from pipeline.independence.engine import EngineSettings
from pipeline.parallel import parallel_context
from pipeline.search import pc_stable_skeleton

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import true_skeleton  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
BENCHMARKS = Path(__file__).resolve().parents[1] / "tests" / "data" / "benchmarks"
SETS = ("asia", "child", "insurance", "alarm")
ALPHAS = (0.01, 0.05, 0.1, 0.2)
TESTS = ("g", "chi2")
POLICIES = ("flag", "independent", "dependent")
CAPS = (None, 1, 2, 3)
BASELINE = (0.05, "g", "flag", None)


class _OverBudget(Exception):
    """The next level of an uncapped search would need more tests than the budget."""


def _load(name: str):
    """Raw values (rows, variables), names and true adjacencies of a benchmark set."""
    folder = BENCHMARKS / name
    with (folder / "data.txt").open(encoding="utf-8") as fh:
        names = fh.readline().split()
    raw = np.loadtxt(folder / "data.txt", skiprows=1, dtype=np.int64, ndmin=2)
    return raw, names, true_skeleton(name, BENCHMARKS)


def _code(raw: np.ndarray) -> tuple[np.ndarray, list[int]]:
    """Codes shaped (variables, rows) from the levels present in these rows, and the level counts."""
    cols = [np.unique(col, return_inverse=True) for col in raw.T]
    return np.vstack([inv for _, inv in cols]).astype(np.int8), [len(u) for u, _ in cols]


def _f1(edges, truth) -> float:
    """Adjacency F1 of a skeleton against the true graph."""
    tp = len(set(edges) & truth)
    if tp == 0:
        return 0.0
    p, r = tp / len(edges), tp / len(truth)
    return 2 * p * r / (p + r)


def _rows(set_index: int, size: int, seed: int, total: int) -> np.ndarray:
    """The rows of one seeded subsample (without replacement); every row at full size."""
    if size >= total:
        return np.arange(total)
    rng = np.random.default_rng(np.random.SeedSequence([seed, size, set_index]))
    return np.sort(rng.choice(total, size=size, replace=False))


def _next_level_tests(edges: set, names: list[str], level: int) -> int:
    """Upper bound of the candidate sets the next level would test."""
    degree = {n: 0 for n in names}
    for a, b in edges:
        degree[a] += 1
        degree[b] += 1
    return sum(math.comb(degree[a] - 1, level) + math.comb(degree[b] - 1, level) for a, b in edges)


def _sample_worker(shared, task):
    """All (alpha, test, policy) searches on one subsample; F1 for each order cap, plus timings."""
    raws, budget = shared
    set_index, size, seed = task
    raw, names, truth = raws[set_index]
    codes, cards = _code(raw[_rows(set_index, size, seed, len(raw))])
    out = {}
    for alpha, method, policy in product(ALPHAS, TESTS, POLICIES):
        settings = EngineSettings(method=method, alpha=alpha, sparse_policy=policy, min_rows_per_cell=5.0)
        after: dict[int, frozenset] = {}

        def keep(state, after=after):
            after[state.level - 1] = frozenset(state.edges)
            if _next_level_tests(state.edges, names, state.level) > budget:
                raise _OverBudget

        t0 = time.perf_counter()
        finished = True
        try:
            res = pc_stable_skeleton(codes, names, cards, settings, on_level=keep)
            final = res.edges
        except _OverBudget:
            finished, final = False, None
        seconds = time.perf_counter() - t0
        for cap in CAPS:
            if cap is None:
                f1 = _f1(final, truth) if finished else float("nan")
            else:
                edges = after.get(cap, final)  # a search that ended before level `cap` is final
                f1 = _f1(edges, truth) if edges is not None else float("nan")
            out[(alpha, method, policy, cap)] = f1
        out[("seconds", alpha, method, policy)] = seconds
    return {"set": SETS[set_index], "size": size, "seed": seed, "rows": int(codes.shape[1]), "cards": cards,
            "f1": out}


def _proposed(n_rows: int, cards: list[int]) -> tuple[float, str, str, int | None]:
    """The proposed defaults as a function of the rows `n_rows` and the level counts `cards`.

    With k = the median level count (at least 2):

    * test: G-test; sparse policy: flag (the p-value decides; sparse tests are only flagged);
    * alpha: 0.2 when a typical two-variable table has fewer than 100 rows per cell
      (``n_rows / k**2 < 100``), else 0.05;
    * order cap: the largest conditioning-set size whose typical table still has 5 rows per cell is
      ``l = floor(log_k(n_rows / 5)) - 2`` (a table of order l has k ** (l + 2) cells); cap the search
      at 2 when ``l <= 2``, no cap otherwise.
    """
    k = max(2.0, float(np.median(cards)))
    alpha = 0.2 if n_rows / k**2 < 100 else 0.05
    supported = math.floor(math.log(max(n_rows / 5.0, 1.0)) / math.log(k) + 1e-9) - 2
    return alpha, "g", "flag", (2 if supported <= 2 else None)


def _label(setting) -> str:
    alpha, method, policy, cap = setting
    return f"alpha {alpha}, {method}, {policy}, cap {'none' if cap is None else cap}"


def _table(results: list[dict], sizes: list[int]) -> tuple[list[str], dict]:
    """Mean F1 per setting per size (mean over sets of the mean over seeds) and the proposed rule's."""
    means: dict = {}
    for setting in product(ALPHAS, TESTS, POLICIES, CAPS):
        means[setting] = {}
        for size in sizes:
            per_set = []
            for name in SETS:
                vals = [r["f1"][setting] for r in results if r["size"] == size and r["set"] == name]
                per_set.append(np.mean(vals) if vals else float("nan"))
            means[setting][size] = float(np.mean(per_set))
    rule = {}
    for size in sizes:
        per_set = []
        for name in SETS:
            vals = [r["f1"][_proposed(r["rows"], r["cards"])] for r in results
                    if r["size"] == size and r["set"] == name]
            per_set.append(np.mean(vals))
        rule[size] = float(np.mean(per_set))
    return _render(means, rule, sizes), {"means": means, "rule": rule}


def _render(means: dict, rule: dict, sizes: list[int]) -> list[str]:
    """Markdown rows, best settings at small sizes first; baseline and proposed rule marked."""
    head = "| setting | " + " | ".join(f"F1 @ {s}" for s in sizes) + " | mean small |"
    lines = [head, "|---|" + "---:|" * (len(sizes) + 1)]
    small = [s for s in sizes if s < 10_000] or sizes

    def row(label: str, vals: dict) -> str:
        cells = " | ".join("n/f" if math.isnan(vals[s]) else f"{vals[s]:.3f}" for s in sizes)
        m = np.mean([vals[s] for s in small])
        return f"| {label} | {cells} | {'n/f' if math.isnan(m) else f'{m:.3f}'} |"

    lines.append(row("**proposed rule (`_proposed`)**", rule))
    lines.append(row(f"**baseline: {_label(BASELINE)}**", means[BASELINE]))
    order = sorted(means, key=lambda s: -np.nan_to_num(np.mean([means[s][z] for z in small]), nan=-1))
    for s in order:
        lines.append(row(_label(s), means[s]))
    return lines


def main(argv: list[str] | None = None) -> str:
    """Run the study and return the Markdown written to bench/results/small_samples.md."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="2 seeded subsamples per size instead of 5")
    ap.add_argument("--seeds", type=int, default=None)
    ap.add_argument("--seed-offset", type=int, default=0)
    ap.add_argument("--sizes", type=int, nargs="+", default=[300, 1000, 10_000])
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--budget", type=int, default=50_000, help="most tests in one level of a search")
    ap.add_argument("--dump", type=Path, default=None, help="also write every F1 as JSON here")
    ap.add_argument("--out", type=Path, default=ROOT / "bench" / "results" / "small_samples.md")
    args = ap.parse_args(argv)
    seeds = args.seeds or (2 if args.quick else 5)

    raws = [_load(name) for name in SETS]
    tasks = [(i, size, args.seed_offset + s) for i in range(len(SETS)) for size in args.sizes
             for s in range(seeds if size < 10_000 else 1)]
    t0 = time.perf_counter()
    with parallel_context(jobs=args.jobs) as ctx:
        results = ctx.map(_sample_worker, (raws, args.budget), tasks)
    elapsed = time.perf_counter() - t0
    if args.dump is not None:
        args.dump.write_text(json.dumps([{**r, "f1": [[list(k), v] for k, v in r["f1"].items()]}
                                         for r in results]), encoding="utf-8")
    table, _ = _table(results, args.sizes)
    per_set = _per_set(results, args.sizes)
    text = "\n".join([
        "# Test settings for small extracts: adjacency F1 against the true graph",
        "",
        (f"Sets: {', '.join(SETS)} (tests/data/benchmarks). Sizes {args.sizes}; {seeds} seeded subsamples "
        f"(without replacement, seed offset {args.seed_offset}) per size below 10,000, the full sample "
        "at 10,000. Codes from the levels present in each subsample. F1 is the mean over the four sets "
        "of the mean over the subsamples. `n/f`: an uncapped search stopped for needing more than "
        f"{args.budget} tests in one level. Sparse rule: 5 rows per cell (common practice). "
        f"Run time {elapsed:.0f} s with jobs = {args.jobs}."),
        "",
        *table,
        "",
        "## Per set: baseline against the proposed rule",
        "",
        *per_set,
        "",
    ])
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text, encoding="utf-8")
    print(text)
    return text


def _per_set(results: list[dict], sizes: list[int]) -> list[str]:
    """F1 of the baseline and of the proposed rule per set and size, with the rule's choice."""
    lines = ["| set | rows | baseline F1 | proposed F1 | proposed setting |", "|---|---:|---:|---:|---|"]
    for name in SETS:
        for size in sizes:
            rs = [r for r in results if r["set"] == name and r["size"] == size]
            if not rs:
                continue
            base = np.mean([r["f1"][BASELINE] for r in rs])
            chosen = [_proposed(r["rows"], r["cards"]) for r in rs]
            prop = np.mean([r["f1"][c] for r, c in zip(rs, chosen)])
            labels = sorted({_label(c) for c in chosen})
            lines.append(f"| {name} | {size} | {base:.3f} | {prop:.3f} | {'; '.join(labels)} |")
    return lines


if __name__ == "__main__":
    main()
