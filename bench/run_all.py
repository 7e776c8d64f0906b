"""The `make bench` driver: run every bench/bench_*.py and collect their tables in bench/RESULTS.md.

Each bench script prints a Markdown table and writes it to bench/results/<name>.md (<name> is the
script's stem, with or without its ``bench_`` prefix); this driver runs them one after another (each
in its own process, so one failure does not stop the others), takes the results file each one wrote
during its run (or its printed output when it wrote none) and puts them under a header naming the
machine, the date and the command.

    .venv/bin/python bench/run_all.py            # every size (the 10,000,000-row run takes minutes)
    .venv/bin/python bench/run_all.py --quick    # smaller sizes, for a first look
    .venv/bin/python bench/run_all.py --only bench_scale

Every bench/bench_*.py is picked up by its name; `SCRIPT_ARGS` adds arguments to one script, e.g.
bench_demo.py (the demo flow over 20 seeds, the README's demo table) runs two seeds side by side.
"""

from __future__ import annotations

import argparse
import os
import platform
import shlex
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
RESULTS_DIR = HERE / "results"
# extra arguments of single scripts (by stem)
SCRIPT_ARGS: dict[str, list[str]] = {"bench_demo": ["--jobs", "2"]}


def _cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def _ram_gb() -> str:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                return f"{int(line.split()[1]) / 1024**2:.1f} GB"
    except OSError:
        pass
    return "unknown"


def _version(name: str) -> str:
    try:
        from importlib import metadata

        return metadata.version(name)
    except Exception:  # noqa: BLE001 - a missing package is just reported
        return "missing"


def machine_header(command: str) -> list[str]:
    """The lines naming the machine, the date and the command."""
    load = " / ".join(f"{v:.1f}" for v in os.getloadavg()) if hasattr(os, "getloadavg") else "n/a"
    return [
        "# edgeproof benchmarks",
        "",
        f"- Date: {time.strftime('%Y-%m-%d %H:%M:%S %z')}",
        f"- Command: `{command}`",
        f"- Machine: nproc {os.cpu_count()}, CPU {_cpu_model()}, RAM {_ram_gb()}, {platform.system()} "
        f"{platform.machine()}",
        f"- Python {platform.python_version()}, numpy {_version('numpy')}, pandas {_version('pandas')}, "
        f"pyarrow {_version('pyarrow')}, numba {_version('numba')}, joblib {_version('joblib')}, "
        f"dask {_version('distributed')}",
        f"- Load average (1/5/15 min) at start: {load} (the machine may be shared: compare ratios "
        "measured side by side, not absolute times across runs)",
        "",
    ]


def _run_script(script: Path, quick: bool) -> tuple[int, float, str, list[Path], str]:
    """Run one bench script; its exit code, seconds, stdout, results files it wrote, stderr tail."""
    cmd = [sys.executable, str(script), *SCRIPT_ARGS.get(script.stem, [])]
    if quick and "--quick" in script.read_text(encoding="utf-8"):
        cmd.append("--quick")
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in [str(REPO), os.environ.get("PYTHONPATH", "")] if p)
    started = time.time()
    t0 = time.perf_counter()
    print(f"[bench] {shlex.join(cmd[1:])} ...", file=sys.stderr, flush=True)
    proc = subprocess.run(cmd, cwd=REPO, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    seconds = time.perf_counter() - t0
    sys.stderr.write(proc.stderr[-4000:])
    # its own results file(s) only: other people may be writing other results at the same time
    own = {script.stem, script.stem.removeprefix("bench_")}
    written = sorted(p for p in RESULTS_DIR.glob("*.md") if p.stem in own and p.stat().st_mtime >= started)
    return proc.returncode, seconds, proc.stdout, written, proc.stderr[-1500:]


def main(argv: list[str] | None = None) -> int:
    """Run the bench scripts and write bench/RESULTS.md; non-zero exit if any script failed."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="pass --quick to every script that takes it")
    ap.add_argument("--only", nargs="+", default=None, help="script names to run, e.g. bench_scale")
    ap.add_argument("--out", type=Path, default=HERE / "RESULTS.md")
    args = ap.parse_args(argv)
    given = list(sys.argv[1:] if argv is None else argv)
    command = {(): "make bench", ("--quick",): "make bench-quick"}.get(
        tuple(given), shlex.join([".venv/bin/python", "bench/run_all.py", *given])
    )
    scripts = sorted(HERE.glob("bench_*.py"))
    if args.only:
        wanted = {Path(n).stem for n in args.only}
        scripts = [s for s in scripts if s.stem in wanted]
    RESULTS_DIR.mkdir(parents=True, exist_ok=True)
    sections: list[str] = []
    failed: list[str] = []
    t_all = time.perf_counter()
    for script in scripts:
        code, seconds, stdout, written, err_tail = _run_script(script, args.quick)
        sections += [f"## {script.name} ({seconds:.0f} s)", ""]
        if code != 0:
            failed.append(script.name)
            sections += [f"**Failed** with exit code {code}; last lines of its error output:", "", "```",
                         err_tail.strip(), "```", ""]
            continue
        if written:
            for path in written:
                sections += [f"_{path.relative_to(REPO)}_", "", path.read_text(encoding="utf-8").strip(), ""]
        else:
            sections += [stdout.strip() or "(no output)", ""]
    text = "\n".join([*machine_header(command), *sections,
                      f"Total: {time.perf_counter() - t_all:.0f} s for {len(scripts)} script(s)"
                      + (f"; failed: {', '.join(failed)}" if failed else "") + ".", ""])
    args.out.write_text(text, encoding="utf-8")
    print(f"[bench] wrote {args.out.relative_to(REPO) if args.out.is_relative_to(REPO) else args.out}",
          file=sys.stderr)
    return 1 if failed else 0


if __name__ == "__main__":
    raise SystemExit(main())
