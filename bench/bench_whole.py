"""The whole process as a user runs it: `edgeproof run ...` in a fresh process beside causal-learn.

Run as ``.venv/bin/python bench/bench_whole.py [--quick] [--only NAME ...]``; prints Markdown, and a
whole run (neither option) also writes bench/results/whole.md. Every edgeproof run is ``python -m pipeline run --input <csv> --out
<folder> --quiet`` with the settings of the comparison (below) in a fresh process with a fresh stage
cache; causal-learn is ``pc(data, 0.05, "gsq", stable=True)`` in a fresh process that reads the same
CSV. Wall times include start-up and reading the file for both. Peak memory is the largest sum of
the resident sets of the process and its workers, sampled every 50 ms (psutil).

Sets: the four published networks in tests/data/benchmarks (10,000 rows each, written out as CSV),
two generated networks shaped like HEPAR2 and BARLEY (bench/gen_network.py, invented tables),
ALARM forward-sampled to 100,000 rows from its true graph (tables fitted on the 10,000-row sample)
with two workers, the generated 1,000,000 x 40 extract (bench/gen_extract.py) with two workers, and
a dense generated set whose search runs millions of tests (peak memory per test).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
sys.path.insert(0, str(HERE))
from _common import emit, load, machine  # noqa: E402

SETTINGS = ["discretise.default=categorical", "test.method=g", "test.alpha=0.05", "search.max_order=none",
            "test.sparse_policy=flag"]
CAUSAL_LEARN = """
import sys, time
import numpy as np, pyarrow.csv as pacsv
from causallearn.search.ConstraintBased.PC import pc
t = pacsv.read_csv(sys.argv[1])
data = np.column_stack([c.to_numpy() for c in t.columns]).astype(float)
t0 = time.perf_counter()
cg = pc(data, 0.05, "gsq", stable=True, show_progress=False)
print(time.perf_counter() - t0, int(((cg.G.graph != 0) | (cg.G.graph.T != 0)).sum() // 2))
"""


def _tree_rss(proc) -> int:
    import psutil

    try:
        p = psutil.Process(proc.pid)
        procs = [p, *p.children(recursive=True)]
    except psutil.Error:
        return 0
    total = 0
    for q in procs:
        try:
            total += q.memory_info().rss
        except psutil.Error:
            pass
    return total


def timed(cmd: list[str], cwd: Path = REPO) -> tuple[float, float, str]:
    """Run `cmd`; wall seconds, peak resident GB of it and its children, stdout."""
    # as an installed copy runs: the project's modules load from bytecode (an environment that sets
    # PYTHONDONTWRITEBYTECODE would make every run compile them from source again)
    env = {k: v for k, v in dict(os.environ, PYTHONPATH=str(REPO)).items() if k != "PYTHONDONTWRITEBYTECODE"}
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, cwd=cwd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = [0]

    def watch() -> None:
        while proc.poll() is None:
            peak[0] = max(peak[0], _tree_rss(proc))
            time.sleep(0.05)

    th = threading.Thread(target=watch, daemon=True)
    th.start()
    out, err = proc.communicate()
    wall = time.perf_counter() - t0
    th.join()
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed ({proc.returncode}):\n{err[-2000:]}")
    return wall, peak[0] / 1e9, out


def edgeproof(csv: Path, out: Path, jobs: int = 1, extra: tuple[str, ...] = ()) -> dict:
    """One `edgeproof run`; wall, peak GB, the manifest's stage seconds and the test count."""
    sets = [*SETTINGS, f"parallel.jobs={jobs}", *extra]
    cmd = [sys.executable, "-m", "pipeline", "run", "--input", str(csv), "--out", str(out), "--quiet"]
    for s in sets:
        cmd += ["--set", s]
    wall, peak, _ = timed(cmd)
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    stages = {k: float(v.get("seconds", 0.0)) for k, v in manifest.get("stages", {}).items()}
    import pyarrow.parquet as pq

    n_tests = pq.read_metadata(out / "tests.parquet").num_rows
    html = (out / "report.html").stat().st_size
    links = int(pq.read_table(out / "evidence.parquet", columns=["linked"]).column(0).to_numpy().sum())
    return {"wall": wall, "peak": peak, "stages": stages, "tests": n_tests, "html": html, "links": links}


def causal_learn(csv: Path) -> tuple[float, float, int]:
    """causal-learn's pc in a fresh process: wall seconds, seconds inside pc, links."""
    wall, _, out = timed([sys.executable, "-c", CAUSAL_LEARN, str(csv)])
    inside, links = out.split()
    return wall, float(inside), int(links)


def _write_csv(path: Path, names: list[str], codes_rows_by_cols: np.ndarray) -> Path:
    from gen_network import write_csv

    return write_csv(path, names, codes_rows_by_cols)


def _published(name: str, folder: Path) -> Path:
    _, names, raw = load(name)
    return _write_csv(folder / f"{name}.csv", names, raw)


def _generated(shape: str, folder: Path, rows: int = 10_000) -> Path:
    from gen_network import make_network, sample

    net = make_network(shape, seed=0)
    return _write_csv(folder / f"{shape}.csv", net.names, sample(net, rows, seed=0))


def _alarm_forward(folder: Path, rows: int) -> Path:
    from bench_search import _forward_sample, _parents

    codes, names, _ = load("alarm")
    cards = [int(c.max()) + 1 for c in codes]
    fwd = _forward_sample(codes, cards, _parents("alarm", names), rows, seed=2024)
    return _write_csv(folder / f"alarm-{rows}.csv", names, fwd.T)


def _dense(folder: Path, signals: int, rows: int) -> Path:
    """Every signal a noisy copy of one hidden 4-level state: all pairs stay dependent given small
    sets, so the search runs every candidate set (invented data, for memory per test only)."""
    rng = np.random.default_rng(7)
    hidden = rng.integers(0, 4, rows)
    cols = [np.where(rng.random(rows) < 0.75, hidden, rng.integers(0, 4, rows)) for _ in range(signals)]
    names = [f"d{i:02d}" for i in range(signals)]
    return _write_csv(folder / f"dense-{signals}.csv", names, np.column_stack(cols))


SEARCH_ONLY = """
import sys, tempfile, time
from pathlib import Path
import numpy as np
from pipeline.independence.engine import EngineSettings
from pipeline.parallel import parallel_context
from pipeline.search.knowledge import Knowledge
from pipeline.stages import battery, skeleton
p, rows = int(sys.argv[1]), int(sys.argv[2])
rng = np.random.default_rng(7)  # the same draws as _dense
hidden = rng.integers(0, 4, rows)
codes = np.vstack([np.where(rng.random(rows) < 0.75, hidden, rng.integers(0, 4, rows)) for _ in range(p)]).astype(np.int8)
names = [f"d{i:02d}" for i in range(p)]
st = EngineSettings(method="g", alpha=0.05, sparse_policy="flag")
with tempfile.TemporaryDirectory() as tmp, parallel_context(jobs=2) as ctx:
    m = battery.run(codes, names, [4] * p, st, Knowledge(), ctx)
    t0 = time.perf_counter()
    out = skeleton.run(codes, names, [4] * p, st, Knowledge(), m.state, max_order=2, context=ctx, checkpoint=Path(tmp),
                       tests_to=Path(tmp) / "tests.parquet")  # as the run's stage writes it
    print(len(out.skeleton.tests), time.perf_counter() - t0, out.tests.stat().st_size)
"""


def _search_only(signals: int, rows: int = 2_000) -> dict:
    """Peak memory of the search stages alone on the dense set (fresh process, two workers)."""
    _, peak, out = timed([sys.executable, "-c", SEARCH_ONLY, str(signals), str(rows)])
    n, sec, size = out.split()
    return {"signals": signals, "tests": int(n), "seconds": float(sec), "parquet": int(size), "peak": peak}


def _kernel_seconds(run: Path, csv: Path, phases: tuple[str, ...] = ("skeleton",), stat: str = "best") -> float:
    """The time the skeleton stage's tests take in the kernels alone: the same tests (from
    tests.parquet, phase ``skeleton``) in one `test_columns` call (`test_many` where there is none) on an
    engine built outside the timing; the best of 3 calls, or with `stat` "median" the median of 5."""
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    from pipeline.independence.engine import CIEngine, EngineSettings

    t = pacsv.read_csv(csv)
    names = t.column_names
    codes = np.vstack([np.unique(c.to_numpy(), return_inverse=True)[1] for c in t.columns]).astype(np.int8)
    cards = [int(c.max()) + 1 for c in codes]
    tests = pq.read_table(run / "tests.parquet", columns=["phase", "var_a", "var_b", "given"]).to_pandas()
    tests = tests[tests["phase"].isin(phases)]
    queries = [(a, b, tuple(g for g in str(s).split(";") if g)) for a, b, s in
               zip(tests["var_a"], tests["var_b"], tests["given"])]
    engine = CIEngine(codes, names, cards, EngineSettings(method="g", alpha=0.05, sparse_policy="flag"))
    run = "test_columns" if hasattr(engine, "test_columns") else "test_many"  # columns: no object per test
    getattr(engine, run)(queries[:50])  # compiled kernels loaded outside the timing
    times = []
    for _ in range(5 if stat == "median" else 3):
        engine = CIEngine(codes, names, cards, EngineSettings(method="g", alpha=0.05, sparse_policy="flag"))
        t0 = time.perf_counter()
        getattr(engine, run)(queries)
        times.append(time.perf_counter() - t0)
    return float(np.median(times)) if stat == "median" else min(times)


def _repeated(csv: Path, out: Path, jobs: int, repeat: int) -> tuple[dict, tuple[float, float, int], list[float], list[float]]:
    """`repeat` rounds of one edgeproof run (each into its own folder, so with a fresh stage cache) then one
    causal-learn run, interleaved: the edgeproof run of median wall time (kept at `out`), causal-learn's
    median wall time with its seconds inside pc and links, and every wall time of both."""
    mine, theirs = [], []
    for i in range(repeat):
        folder = out if i == 0 else out.parent / f"repeat-{i}" / "run"
        mine.append((edgeproof(csv, folder, jobs=jobs), folder))
        theirs.append(causal_learn(csv))
    order = sorted(range(repeat), key=lambda i: mine[i][0]["wall"])
    middle = order[(repeat - 1) // 2]
    ours, folder = mine[middle]
    if folder != out:  # the median run's folder takes the first one's place
        shutil.rmtree(out.parent / ".edgeproof-cache", ignore_errors=True)
        shutil.rmtree(out)
        shutil.move(str(folder), str(out))
        shutil.move(str(folder.parent / ".edgeproof-cache"), str(out.parent / ".edgeproof-cache"))
    for i in range(1, repeat):
        shutil.rmtree(out.parent / f"repeat-{i}", ignore_errors=True)
    walls = sorted(t[0] for t in theirs)
    cl = next(t for t in theirs if t[0] == walls[(repeat - 1) // 2])
    return ours, cl, [m[0]["wall"] for m in mine], [t[0] for t in theirs]


def _row(name: str, rows: int, jobs: int, ours: dict, cl: tuple[float, float, int] | None, target: float | None) -> str:
    st = ours["stages"]
    data = st.get("ingest", 0) + st.get("clean", 0) + st.get("discretise", 0)
    search = st.get("battery", 0) + st.get("skeleton", 0)
    if cl is None:
        theirs = ratio = "not run"
        met = ""
    else:
        theirs, r = f"{cl[0]:.1f}", cl[0] / ours["wall"]
        ratio = f"{r:.1f}x"
        met = "" if target is None else ("met" if r >= target else "missed") + f" (>= {target:g}x)"
    return (f"| {name} | {rows:,} | {jobs} | {ours['wall']:.1f} | {data:.1f} | {search:.1f} | {st.get('report', 0):.1f} | "
            f"{ours['tests']:,} | {ours['links']} | {ours['peak']:.2f} | {theirs} | "
            f"{'' if cl is None else cl[2]} | {ratio} | {met} |")


def _floor(runs: dict[str, tuple[Path, Path, dict]], cls: dict[str, float] | None = None) -> list[str]:
    """What any run pays before and after its work: starting Python with the libraries a run needs,
    the command's own imports, and Graphviz laying out the drawn graph (median of 5 fresh processes)."""
    import statistics

    def median_of(cmd: list[str], cwd: Path = REPO) -> float:
        return statistics.median(timed(cmd, cwd)[0] for _ in range(5))

    py = sys.executable
    rows = [("`python -c pass`", median_of([py, "-c", "pass"])),
            ("`python -c 'import numpy, pandas, pyarrow.parquet'`",
             median_of([py, "-c", "import numpy, pandas, pyarrow.parquet"])),
            ("`python -c 'import pipeline.api'` (what `edgeproof run` loads before it reads a file)",
             median_of([py, "-c", "import pipeline.api"])),
            ("`python -m pipeline --help`", median_of([py, "-m", "pipeline", "--help"])),
            ("`python -c 'import numpy'`", median_of([py, "-c", "import numpy"])),
            ("`python -c '...warm_worker(None, 0)'` (numpy, numba and the engine's compiled kernels, loaded from "
             "numba's cache, with a few tiny tests)",
             median_of([py, "-c", "from pipeline.search.warm import warm_worker; warm_worker(None, 0)"]))]
    for name in ("hepar2-like", "alarm"):
        if name in runs:
            from pipeline.report._graph import layout_engine

            csv, out = runs[name][0], runs[name][1]
            engine = layout_engine(len(csv.open(encoding="utf-8").readline().split(",")))
            rows.append((f"Graphviz `{engine} -Tsvg -Tpng` of the {name} graph",
                         median_of([engine, "-Tsvg", "-o/dev/null", "-Tpng", "-o/dev/null", str(out / "graph.dot")])))
    lines = ["", "## The floor: start-up and drawing", "",
             "Fresh processes, median of 5. A whole run cannot take less than Python with its libraries plus "
             "the drawing; at 10x, a run must finish in a tenth of causal-learn's seconds in the table above.", "",
             "| what | seconds |", "|---|---:|"]
    lines += [f"| {what} | {sec:.2f} |" for what, sec in rows]
    libs = rows[1][1]
    kernels_load = max(rows[5][1] - rows[4][1], 0.0)  # loading numba and the compiled kernels, beyond numpy
    workers = {"alarm-100k": 2}
    ceiling = [(name, cl, _kernel_seconds(runs[name][1], runs[name][0], ("battery", "skeleton", "orientation")))
               for name, cl in (cls or {}).items() if name in ("hepar2-like", "barley-like", "alarm-100k")]
    if ceiling:
        lines += ["", "What 10x would need: the run's wall seconds at most a tenth of causal-learn's. Any run pays at "
                  "least the libraries it loads (the row above: numpy, pandas, pyarrow) plus its tests in the kernels "
                  "(every test of the run, battery, skeleton and orientation, in one `test_columns` call, best of 3); "
                  "the drawing runs beside the page in its own process; with `parallel.jobs=2` the tests are counted as "
                  "split evenly between two processes (the best two could do). The best ratio a run could reach is causal-learn's seconds over that "
                  "floor (targets: 10x one worker, 5x for alarm-100k with two). This engine also loads numba and its "
                  f"compiled kernels from numba's cache ({kernels_load:.2f} s: the warm_worker row less `import numpy`); "
                  "the last column counts that too.", "",
                  "| set | jobs | causal-learn s | libraries s | every test in the kernels s | floor s | best ratio possible "
                  "| with the kernels' loading |",
                  "|---|---:|---:|---:|---:|---:|---:|---:|"]
        for name, cl, kern in ceiling:
            jobs = workers.get(name, 1)
            floor = libs + kern / jobs
            lines.append(f"| {name} | {jobs} | {cl:.1f} | {libs:.2f} | {kern:.2f} | {floor:.2f} | {cl / floor:.1f}x "
                         f"| {cl / (floor + kernels_load):.1f}x |")
    return lines


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="the 10,000-row sets only, no 1,000,000-row extract")
    ap.add_argument("--only", nargs="+", default=None, help="set names to run (e.g. hepar2-like alarm)")
    ap.add_argument("--extract-rows", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=3,
                    help="rounds of each whole run and of causal-learn, interleaved; medians are reported (default 3)")
    ap.add_argument("--dense-signals", type=int, default=50)
    ap.add_argument("--search-signals", type=int, default=85,
                    help="signals of the dense set whose search stages alone are measured (85: about 12 million tests)")
    ap.add_argument("--dense-large", type=int, default=0,
                    help="signals of one more whole run on the dense set, measured rather than extrapolated "
                         "(80: about 9.7 million tests, three minutes on two cores); 0: not run")
    args = ap.parse_args(argv)

    def want(name: str) -> bool:
        return args.only is None or name in args.only

    started = time.perf_counter()
    lines = ["# The whole process: `edgeproof run` beside causal-learn `pc(data, 0.05, \"gsq\", stable=True)`", "",
             f"Machine: {machine()}; load average at start {os.getloadavg()[0]:.1f}.", "",
             "Each figure is one fresh process (edgeproof: `python -m pipeline run --input <csv> --out <folder> "
             "--quiet` with `--set " + " --set ".join(SETTINGS) + "` and `parallel.jobs` (jobs = n: the run's process "
             "and n - 1 workers; a search too small to repay a worker's start-up runs in the run's process alone); a fresh stage "
             "cache; without PYTHONDONTWRITEBYTECODE, so the project's modules load from bytecode as in an installed copy). Wall seconds include start-up and reading the CSV, for both. Stage seconds are "
             "from the run's manifest (data = ingest + clean + discretise; search = battery + "
             "skeleton). Peak GB: resident memory of the process and its workers, sampled every 50 ms.", "",
             "| set | rows | jobs | edgeproof s | data s | search s | report s | tests | links | peak GB | "
             "causal-learn s | links | ratio | target |",
             "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|"]
    notes: list[str] = []
    with tempfile.TemporaryDirectory(prefix="edgeproof-bench-") as tmp:
        root = Path(tmp)
        runs: dict[str, tuple[Path, Path, dict]] = {}
        cl_walls: dict[str, float] = {}
        cases = [(n, lambda n=n: _generated(n, root), 10.0) for n in ("hepar2-like", "barley-like")]
        cases += [(n, lambda n=n: _published(n, root), None) for n in ("asia", "child", "insurance", "alarm")]
        spread: list[str] = []
        for name, make, target in cases:
            if not want(name):
                continue
            csv = make()
            out = root / name / "run"
            ours, cl, mine, theirs = _repeated(csv, out, 1, args.repeat)
            runs[name] = (csv, out, ours)
            cl_walls[name] = cl[0]
            lines.append(_row(name, 10_000, 1, ours, cl, target))
            spread.append(f"| {name} | {', '.join(f'{w:.1f}' for w in mine)} | {', '.join(f'{w:.1f}' for w in theirs)} |")
        if not args.quick and want("alarm-100k"):
            csv = _alarm_forward(root, 100_000)
            out = root / "alarm-100k" / "run"
            ours, cl, mine, theirs = _repeated(csv, out, 2, args.repeat)
            runs["alarm-100k"] = (csv, out, ours)
            cl_walls["alarm-100k"] = cl[0]
            lines.append(_row("alarm forward-sampled", 100_000, 2, ours, cl, 5.0))
            spread.append(f"| alarm-100k | {', '.join(f'{w:.1f}' for w in mine)} | {', '.join(f'{w:.1f}' for w in theirs)} |")
        lines += ["", "Targets of issue 16: at least 10x on HEPAR2 and BARLEY (one worker), at least 5x on "
                  "ALARM forward-sampled to 100,000 rows (two workers).", ""]
        if args.repeat > 1:
            lines += [f"Each row is the median of {args.repeat} rounds (an edgeproof run, then a causal-learn run), "
                      "for both sides: the ratio is of the two medians. Every round's wall seconds:", "",
                      "| set | edgeproof s | causal-learn s |", "|---|---|---|", *spread, ""]

        # cached rerun: the same input and settings into a new folder beside the first
        lines += ["## A cached rerun", "", "The same command into a new run folder beside the first (the "
                  "stage cache is found); target: under 1 s plus the report.", "",
                  f"Median of {args.repeat} reruns (each round's figure in brackets).", "",
                  "| set | first run s | rerun s | its report s | rerun minus report s | target |",
                  "|---|---:|---:|---:|---:|---|"]
        for name, (csv, out, ours) in runs.items():
            # the median of `repeat` reruns by their seconds besides the report
            agains = [edgeproof(csv, out.parent / f"rerun-{i}", jobs=2 if name == "alarm-100k" else 1)
                      for i in range(args.repeat)]
            again = sorted(agains, key=lambda a: a["wall"] - a["stages"].get("report", 0.0))[(args.repeat - 1) // 2]
            rest = again["wall"] - again["stages"].get("report", 0.0)
            every = ", ".join(f"{a['wall'] - a['stages'].get('report', 0.0):.2f}" for a in agains)
            lines.append(f"| {name} | {ours['wall']:.1f} | {again['wall']:.1f} | {again['stages'].get('report', 0):.1f} | "
                         f"{rest:.2f} ({every}) | {'met' if rest < 1.0 else 'missed'} (< 1 s) |")

        # the skeleton stage beside the time its tests take in the kernels
        lines += ["", "## The skeleton stage beside its tests in the kernels", "",
                  "Both sides are medians of five, since one figure of tens of milliseconds on this shared "
                  "machine varies by half. Stage seconds: the skeleton stage in the manifest of five fresh runs "
                  "(the run above and four more, each with a fresh stage cache), one worker. Kernel seconds: the "
                  "skeleton phase's tests (read back from tests.parquet) in one `CIEngine.test_columns` call on an "
                  "engine built outside the timing, five calls. Target: the stage within 1.5x of that.", "",
                  "| set | skeleton stage s (five runs) | its tests | kernels s | ratio | target |",
                  "|---|---:|---:|---:|---:|---|"]
        for name in ("hepar2-like", "barley-like", "alarm"):
            if name in runs:
                csv, out, ours = runs[name]
                k = _kernel_seconds(out, csv, stat="median")
                stage = [ours["stages"].get("skeleton", 0.0)]
                for i in range(4):
                    stage.append(edgeproof(csv, root / name / f"again-{i}" / "run")["stages"].get("skeleton", 0.0))
                    shutil.rmtree(root / name / f"again-{i}")  # its own stage cache goes with it
                s = float(np.median(stage))
                shown = f"{s:.2f} ({', '.join(f'{x:.2f}' for x in stage)})"
                import pyarrow.parquet as pq

                n = int((pq.read_table(out / "tests.parquet", columns=["phase"]).column(0).to_numpy(zero_copy_only=False) == "skeleton").sum())
                lines.append(f"| {name} | {shown} | {n:,} | {k:.2f} | {s / max(k, 1e-9):.1f}x | "
                             f"{'met' if s <= 1.5 * k else 'missed'} (<= 1.5x) |")

        if not args.quick and want("extract"):
            sys.path.insert(0, str(HERE))
            import gen_extract
            import yaml

            csv = root / "extract.csv"
            gen_extract.write_csv(csv, args.extract_rows, seed=0)
            cfg = root / "extract.yaml"
            cfg.write_text(yaml.safe_dump(gen_extract.config_dict()), encoding="utf-8")
            floor_code = ("import sys, time\nimport pyarrow.csv as pacsv\nt0 = time.perf_counter()\n"
                          "pacsv.read_csv(sys.argv[1])\nprint(time.perf_counter() - t0)\n")
            rounds = []
            for i in range(args.repeat):  # each round: a fresh run (its own stage cache), then the CSV read alone
                out = root / f"extract-{i}" / "run"
                cmd = [sys.executable, "-m", "pipeline", "run", "--input", str(csv), "--config", str(cfg), "--out",
                       str(out), "--quiet", "--set", "parallel.jobs=2"]
                wall, peak, _ = timed(cmd)
                st = {k: float(v.get("seconds", 0)) for k, v in json.loads(
                    (out / "manifest.json").read_text())["stages"].items()}
                shutil.rmtree(out.parent)
                # the floor beside it: the same file read by pyarrow's multithreaded CSV reader alone, in a
                # fresh process right after the run (import excluded), with the program's allocator
                floor = subprocess.run([sys.executable, "-c", floor_code, str(csv)], capture_output=True, text=True,
                                       check=True, env=dict(os.environ, ARROW_DEFAULT_MEMORY_POOL="system"))
                rounds.append((wall, peak, st, float(floor.stdout.split()[0])))
            lines += ["", f"## The generated {args.extract_rows:,} x 40 extract end to end, two workers", "",
                      "`python -m pipeline run --input extract.csv --config extract.yaml --set parallel.jobs=2` "
                      f"(bench/gen_extract.py, seed 0, its configuration), {args.repeat} rounds, each with a fresh "
                      "stage cache. Targets: under 60 s and 4 GB; ingest + clean + discretise under 4 s, judged on "
                      "the medians. Stage seconds include waiting for the stage's cache entry when a later step "
                      "needs it. CSV read: `pyarrow.csv.read_csv` of the same file alone, in a fresh process right "
                      "after the run, with the allocator the program gives Arrow (the floor of ingest).", "",
                      "| round | wall s | CSV read | ingest | clean | discretise | data total | timeline | battery | skeleton "
                      "| report | peak GB |",
                      "|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
            datas = []
            for i, (wall, peak, st, read_s) in enumerate(rounds, 1):
                data = st.get("ingest", 0) + st.get("clean", 0) + st.get("discretise", 0)
                datas.append(data)
                lines.append(f"| {i} | {wall:.1f} | {read_s:.1f} | {st.get('ingest', 0):.1f} | {st.get('clean', 0):.1f} | "
                             f"{st.get('discretise', 0):.1f} | {data:.1f} | {st.get('timeline', 0):.1f} | "
                             f"{st.get('battery', 0):.1f} | {st.get('skeleton', 0):.1f} | {st.get('report', 0):.1f} | "
                             f"{peak:.2f} |")
            wall_m = float(np.median([r[0] for r in rounds]))
            peak_m = float(np.median([r[1] for r in rounds]))
            data_m = float(np.median(datas))
            lines += ["", f"Medians: wall {wall_m:.1f} s, peak {peak_m:.2f} GB, data stages {data_m:.1f} s. Targets: end "
                      f"to end {'met' if wall_m < 60 and peak_m < 4 else 'missed'}; data stages "
                      f"{'met' if data_m < 4 else 'missed'} (under 4 s in {sum(d < 4 for d in datas)} of "
                      f"{len(datas)} rounds)."]

        if want("dense"):
            sizes_p = (12, args.dense_signals if not args.quick else 40)
            dense = []
            for p in sizes_p:
                csv = _dense(root, p, 2_000)
                dense.append(edgeproof(csv, root / f"dense-{p}" / "run", jobs=2, extra=("search.max_order=2",)))
            (s0, s1) = dense
            per = (s1["peak"] - s0["peak"]) * 1e9 / max(s1["tests"] - s0["tests"], 1)
            lines += ["", "## Peak memory of a search with many tests", "",
                      "Dense generated sets (each signal a noisy copy of one hidden state, 2,000 rows; "
                      "`search.max_order=2`, two workers) of two sizes; bytes per test = the rise in peak "
                      "memory over the rise in tests. The 10,000,000-test figure is extrapolated from it; "
                      "`--dense-large 80` also measures one whole run of about that size.", "",
                      "| signals | tests | wall s | skeleton s | peak GB |", "|---:|---:|---:|---:|---:|"]
            lines += [f"| {p} | {r['tests']:,} | {r['wall']:.1f} | {r['stages'].get('skeleton', 0):.1f} | {r['peak']:.2f} |"
                      for p, r in zip(sizes_p, dense)]
            est = s0["peak"] + per * (1e7 - s0["tests"]) / 1e9
            verdict = "the measured run below decides" if args.dense_large else ("met" if est < 2 else "missed")
            lines += ["", f"Bytes per test: **{per:,.0f}**; 10,000,000 tests at that rate: about **{est:.1f} GB** "
                      f"(target < 2 GB: {verdict}). The small set's search is too small to start a worker process "
                      "(the run's process computes alone), the large one's starts one, so this slope also holds "
                      "that worker's start (its interpreter and libraries, about 0.3 GB)."]
            if args.dense_large:
                p = args.dense_large
                big_run = edgeproof(_dense(root, p, 2_000), root / f"dense-{p}" / "run", jobs=2,
                                    extra=("search.max_order=2",))
                st = big_run["stages"]
                lines += ["", f"Measured, the whole run at {p} signals: {big_run['tests']:,} tests, peak "
                          f"**{big_run['peak']:.2f} GB**, {big_run['wall']:.0f} s wall (skeleton {st.get('skeleton', 0):.0f} s, "
                          f"report {st.get('report', 0):.0f} s); target (10,000,000 tests under 2 GB): "
                          f"{'met' if big_run['peak'] < 2 and big_run['tests'] >= 9e6 else 'see the figures'}."]
            # the search stages alone (what the run's search holds; the run above adds what reads tests.parquet back)
            small, big = _search_only(12), _search_only(args.search_signals if not args.quick else 50)
            per_s = (big["peak"] - small["peak"]) * 1e9 / max(big["tests"] - small["tests"], 1)
            lines += ["", "The search stages alone, in a fresh process with two workers: the battery and the skeleton "
                      "stage (`stages.battery.run`, `stages.skeleton.run` with its per-level checkpoint parts, the "
                      "evidence table and tests.parquet written to a file as the run's stage writes it), on the same "
                      "dense sets with `search.max_order=2`.", "",
                      "| signals | tests | skeleton s | tests.parquet MB | peak GB |", "|---:|---:|---:|---:|---:|"]
            lines += [f"| {r['signals']} | {r['tests']:,} | {r['seconds']:.1f} | {r['parquet'] / 1e6:.1f} | {r['peak']:.2f} |"
                      for r in (small, big)]
            lines += ["", f"Bytes per test of the search: **{per_s:,.0f}**; target (a search of 10,000,000 tests under "
                      f"2 GB): {'met' if big['tests'] >= 1e7 and big['peak'] < 2 else 'see the figures'}."]
        if runs:
            lines += _floor(runs, cl_walls)
        sizes = [(name, ours["tests"], ours["html"]) for name, (_, _, ours) in runs.items()]
        if sizes:
            lines += ["", "## report.html size", "", "| set | tests | report.html bytes | bytes per test |", "|---|---:|---:|---:|"]
            lines += [f"| {n} | {t:,} | {h:,} | {h / max(t, 1):.0f} |" for n, t, h in sizes]
    lines += ["", f"Bench wall time {time.perf_counter() - started:.0f} s; load average at the end "
              f"{os.getloadavg()[0]:.1f}.", *notes, ""]
    if args.only is None and not args.quick:
        emit("whole", "\n".join(lines))  # the results file holds whole runs only
    else:
        sys.stdout.write("\n".join(lines))  # a partial run is printed, and leaves the results file as it was
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
