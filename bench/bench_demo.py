"""The demo over many seeds: false and true links a night, and what the compare of the planted change reports.

For each seed the whole demo flow runs as `edgeproof demo` runs it (configs/demo.yaml, without the
PNG pictures): `pipeline.demo.generate` writes four nights (6 nodes x 288 five-minute windows, the link
``gc_pause_ms -> latency_ms`` planted on the third night), `nightly` processes them, and `compare`
tests the night before the change against the night of it. The first two nights (nothing changed
between them) are compared too. No seed is left out.

    python bench/bench_demo.py [--seeds 20] [--first-seed 1] [--jobs 2] [--out bench/results/demo.md]
    python bench/bench_demo.py --quick          # 4 seeds
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

# one BLAS thread a worker: the seeds run side by side in processes (set before numpy loads)
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _common import RESULTS, machine  # noqa: E402

from pipeline import compare, nightly  # noqa: E402
from pipeline.api import load_run  # noqa: E402
from pipeline.config import load_config  # noqa: E402
from pipeline.demo import generate  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
DEMO_CONFIG = REPO / "configs" / "demo.yaml"


def _pairs(edges) -> set[tuple[str, str]]:
    return {tuple(sorted(e)) for e in edges}


def _supported(cmp: compare.Comparison) -> list[str]:
    """Every supported change of a comparison, as text (``+a--b``, ``-a--b``, ``~signal``)."""
    return ([f"+{a}--{b}" for a, b in cmp.added] + [f"-{a}--{b}" for a, b in cmp.removed]
            + [f"~{s}" for s in cmp.mechanism_changes])


def one_seed(seed: int) -> dict:
    """Run the demo flow for one seed; the figures of its nights and of its two compares."""
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        scenario = generate(Path(tmp) / "demo", seed=seed)
        cfg = load_config(DEMO_CONFIG, [
            f"nightly.inbox={scenario.inbox}", f"output.root={Path(tmp) / 'runs'}", "nightly.settle_seconds=0",
            f"report.truth_file={scenario.truth_path}", "output.png=false",
        ])
        result = nightly.run(cfg, log=lambda line: None)
        if result.exit_code != 0:
            raise RuntimeError(f"seed {seed}: nightly exit {result.exit_code}")
        root = Path(tmp) / "runs"
        names = [p.stem for p in scenario.snapshots]
        k = names.index(scenario.changed_snapshot_name)
        planted = tuple(sorted(scenario.changed_edge))
        false_links, found, pattern = [], [], ""
        for name in names:
            linked = _pairs(load_run(root / name).graph.edges)
            truth = _pairs(scenario.true_edges_by_snapshot[name])
            false_links.append(len(linked - truth))
            found.append(len(linked & truth) / len(truth))
            pattern += "L" if planted in linked else "s"
        cmp = compare.run(root / names[k - 1], root / names[k], change_alpha=cfg.compare.alpha)
        quiet = compare.run(root / names[0], root / names[1], change_alpha=cfg.compare.alpha)
    others = [c for c in _supported(cmp) if c != f"+{planted[0]}--{planted[1]}"]
    endpoint = [c for c in others if c in (f"~{planted[0]}", f"~{planted[1]}")]
    return {
        "seed": seed, "false": false_links, "found": found, "planted_added": planted in cmp.added,
        "planted_unconfirmed": planted in cmp.unconfirmed, "others": others,
        "others_not_endpoint": [c for c in others if c not in endpoint],
        "quiet": _supported(quiet), "pattern": pattern, "exact_pattern": pattern == "s" * k + "L" * (len(names) - k),
        "seconds": time.perf_counter() - t0,
    }


def table(rows: list[dict]) -> str:
    """The Markdown summary and the per-seed lines."""
    n = len(rows)
    false = np.array([r["false"] for r in rows], dtype=float)
    found = np.array([r["found"] for r in rows], dtype=float)
    added = sum(r["planted_added"] for r in rows)
    clean = sum(r["planted_added"] and not r["others"] for r in rows)
    clean_links = sum(r["planted_added"] and not r["others_not_endpoint"] for r in rows)
    others = np.array([len(r["others"]) for r in rows], dtype=float)
    elsewhere = np.array([len(r["others_not_endpoint"]) for r in rows], dtype=float)
    other_links = np.array([sum(not c.startswith("~") for c in r["others"]) for r in rows], dtype=float)
    quiet_links = np.array([sum(not c.startswith("~") for c in r["quiet"]) for r in rows], dtype=float)
    quiet = np.array([len(r["quiet"]) for r in rows], dtype=float)
    seeds = f"{rows[0]['seed']}-{rows[-1]['seed']}" if n > 1 else str(rows[0]["seed"])
    lines = [
        f"Demo flow (configs/demo.yaml, 4 nights of 6 nodes x 288 windows, link planted on night 3), seeds {seeds} "
        f"({n} seeds, none left out). Machine: {machine()}.",
        "",
        "| measure | value |",
        "|---|---:|",
        f"| false links a night (mean over {false.size} nights; max) | {false.mean():.2f} ({false.max():.0f}) |",
        f"| nights with no false link | {(false == 0).sum():.0f} of {false.size} |",
        f"| true links found a night (mean; min) | {100 * found.mean():.0f}% ({100 * found.min():.0f}%) |",
        f"| planted link reported as a supported `added` (night 2 vs 3) | {added} of {n} seeds |",
        f"| planted link linked exactly from the night of the change on (history pattern ssLL) | "
        f"{sum(r['exact_pattern'] for r in rows)} of {n} seeds |",
        f"| planted link listed as `unconfirmed` | {sum(r['planted_unconfirmed'] for r in rows)} of {n} seeds |",
        f"| other supported changes in that compare (mean; max) | {others.mean():.2f} ({others.max():.0f}) |",
        f"| ... of them a mechanism change of the planted link's two ends (the new link changes them; mean) | "
        f"{(others - elsewhere).mean():.2f} |",
        f"| ... of them another link added or removed (mean; max) | {other_links.mean():.2f} ({other_links.max():.0f}) |",
        f"| ... of them a mechanism change elsewhere (mean; max) | {(elsewhere - other_links).mean():.2f} "
        f"({(elsewhere - other_links).max():.0f}) |",
        f"| seeds with the planted link and nothing else | {clean} of {n} |",
        f"| seeds with the planted link and nothing else but its ends' mechanism changes | {clean_links} of {n} |",
        f"| supported changes between nights 1 and 2 (nothing changed; mean; max) | {quiet.mean():.2f} "
        f"({quiet.max():.0f}) |",
        f"| ... of them links added or removed (mean) | {quiet_links.mean():.2f} |",
        f"| seconds a seed (whole flow, mean) | {np.mean([r['seconds'] for r in rows]):.0f} |",
        "",
        "| seed | false links per night | planted link per night | planted added | other supported changes "
        "| nights 1 vs 2 |",
        "|---:|---|---|:---:|---|---|",
    ]
    for r in rows:
        lines.append(f"| {r['seed']} | {' '.join(str(f) for f in r['false'])} | {r['pattern']} | {'yes' if r['planted_added'] else 'no'} "
                     f"| {' '.join(r['others']) or '-'} | {' '.join(r['quiet']) or '-'} |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--first-seed", type=int, default=1)
    ap.add_argument("--jobs", type=int, default=1, help="seeds run side by side in worker processes")
    ap.add_argument("--quick", action="store_true", help="4 seeds")
    ap.add_argument("--out", type=Path, default=RESULTS / "demo.md", help="the table; the per-seed figures go "
                    "beside it as .json")
    args = ap.parse_args(argv)
    seeds = list(range(args.first_seed, args.first_seed + (4 if args.quick else args.seeds)))
    rows: list[dict] = []
    with ProcessPoolExecutor(max_workers=max(1, args.jobs)) as pool:
        for r in pool.map(one_seed, seeds):
            rows.append(r)
            print(f"seed {r['seed']}: false {r['false']} found {[round(f, 2) for f in r['found']]} "
                  f"planted {r['planted_added']} others {r['others']} quiet {r['quiet']} "
                  f"{r['seconds']:.0f} s", file=sys.stderr, flush=True)
    text = table(rows)
    args.out.with_suffix(".json").write_text(json.dumps(rows, indent=1) + "\n", encoding="utf-8")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text, encoding="utf-8")
    sys.stdout.write(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
