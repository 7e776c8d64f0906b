"""The Python API the command line is a thin layer over: run a configuration, load a finished run.

Examples
--------
>>> from pipeline.api import run_pipeline, load_run          # doctest: +SKIP
>>> res = run_pipeline(load_config("configs/demo.yaml"), "outputs/demo/inbox/2026-11-01.csv")
>>> res.evidence.query("linked")[["var_a", "var_b", "pvalue"]]
>>> load_run(res.out_dir).graph.edges
"""

from __future__ import annotations

import contextlib
import gc
import glob
import json
import os
import platform
import shutil
import time
from dataclasses import dataclass
from functools import cached_property
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from . import __version__
from .config import Config, resolve_auto
from .errors import ConfigError, DataError
from .parallel import ParallelContext, parallel_context
from .plan import STAGES
from .progress import Reporter
from .runner import Runner
from .runs import (
    RunFolder,
    StageCache,
    atomic_write_arrow,
    atomic_write_bytes,
    atomic_write_json,
    atomic_write_parquet,
    atomic_write_text,
    cap_parallel_jobs,
    check_out_dir,
    clean_stale_partials,
    default_run_dir,
    fingerprint_paths,
    output_root,
    publish_run,
    run_lock,
    safe_name,
    start_partial,
)
from .search.knowledge import Knowledge
from .stages import report
from .stages.timeline import auto_inputs, lag_pairs, orient_lagged, time_tiers

if TYPE_CHECKING:  # networkx loads when a graph is asked for, not on every command
    import networkx as nx

__all__ = ["RunResult", "run_pipeline", "load_run", "evidence_graph"]

# rows x signals^2 from which local workers start while the timeline stage runs (see `_run_plan`): the
# 1,000,000 x 40 extract of bench/gen_extract.py (1.6e9) has them warm for its battery; ALARM
# forward-sampled to 100,000 rows (1.4e8) searches in about 0.3 s of counting, less than one worker's
# start-up (about a second of processor time), which on two cores only slowed the run's own process
_AHEAD_WORK = 500_000_000
_PACKAGES = ["numpy", "pandas", "scipy", "pyarrow", "networkx", "joblib", "pydantic", "graphviz"]


@dataclass(frozen=True)
class RunResult:
    """A finished run: its folder, evidence and tests as DataFrames, manifest, and graph.

    `tests` (every test run; millions of rows on a large search) and `graph` are read or built when
    first asked for, so a command that needs neither never holds them.
    """

    out_dir: Path
    evidence: pd.DataFrame
    manifest: dict[str, Any]

    @cached_property
    def tests(self) -> pd.DataFrame:
        """Every test run (tests.parquet), read when first asked for."""
        return RunFolder(self.out_dir).table("tests.parquet")

    @cached_property
    def graph(self) -> nx.Graph:
        """The linked pairs as a networkx graph with the evidence on its edges (built when first asked for)."""
        return evidence_graph(self.evidence)


def evidence_graph(evidence: pd.DataFrame) -> nx.Graph:
    """The linked pairs of an evidence table as a networkx graph with the evidence on its edges."""
    import networkx as nx

    g = nx.Graph()
    g.add_nodes_from(sorted(set(evidence["var_a"]) | set(evidence["var_b"])))
    for row in evidence[evidence["linked"]].to_dict("records"):
        g.add_edge(row["var_a"], row["var_b"], **{k: v for k, v in row.items() if k not in ("var_a", "var_b")})
    return g


def load_run(run_dir: str | os.PathLike[str]) -> RunResult:
    """Load a finished run folder (or a `latest` link) back into a `RunResult`."""
    run = RunFolder(run_dir)
    if not run.has("manifest.json"):
        raise DataError(f"`{run.path}` is not a finished edgeproof run folder (no manifest.json).")
    evidence = run.table("evidence.parquet")
    if not run.has("tests.parquet"):
        raise DataError(f"`{run.path}` lacks tests.parquet; re-run that snapshot.")
    return RunResult(out_dir=run.path.resolve(), evidence=evidence, manifest=run.json("manifest.json"))


def _input_files(path: Path) -> list[Path]:
    text = str(path)
    if any(ch in text for ch in "*?["):
        files = [Path(p) for p in sorted(glob.glob(text, recursive=True)) if Path(p).is_file()]
    elif path.is_dir():
        files = sorted(
            p for p in path.rglob("*") if p.is_file() and not any(part.startswith((".", "_")) for part in p.relative_to(path).parts)
        )
    elif path.is_file():
        files = [path]
    else:
        raise DataError(f"Input `{path}` does not exist; check the path given to --input.")
    if not files:
        raise DataError(f"Input `{path}` holds no data files; point --input at a file, a glob or a folder of partitions.")
    return files


def _link_or_copy(src: Path, dst: Path) -> None:
    dst.parent.mkdir(parents=True, exist_ok=True)
    tmp = dst.with_name(f".{dst.name}.tmp")
    if tmp.exists():
        tmp.unlink()
    try:
        os.link(src, tmp)
    except OSError:
        shutil.copyfile(src, tmp)
    os.replace(tmp, dst)


def _versions() -> dict[str, str]:
    """The versions of the packages a run uses: a loaded module's own ``__version__`` (reading every
    package's installed metadata takes tens of milliseconds), else the installed metadata."""
    import sys

    out = {"python": platform.python_version(), "edgeproof": __version__}
    for name in _PACKAGES:
        loaded = getattr(sys.modules.get(name), "__version__", None)
        if isinstance(loaded, str):
            out[name] = loaded
            continue
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "missing"
    return out


def _review_knowledge(cfg: Config, names: list[str]) -> tuple[list, list, list[dict[str, Any]], list[str]]:
    """Pairs confirmed and rejected in `knowledge.review_file`, their comments, and warning lines."""
    path = cfg.knowledge.review_file
    if path and not Path(path).is_file():
        raise ConfigError(f"`knowledge.review_file` = `{path}` does not exist; fix the path or remove the key.")
    from .report import review_knowledge

    return review_knowledge(path, names)


def _night_name(source: Path, run_name: str | None) -> str:
    """The night a run stands for: the nightly run name, else the snapshot's name without suffixes."""
    from .nightly import snapshot_run_name

    if run_name:
        return run_name
    try:
        return snapshot_run_name(source.name)
    except DataError:  # a reserved or odd name: still a fine title
        return source.stem


def _truth_edges(cfg: Config, input_path: Path) -> list[tuple[str, str]] | None:
    path = cfg.report.truth_file
    if not path:
        return None
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"`report.truth_file` = `{p}` does not exist; fix the path or remove the key.")
    from .stages._data_read import read_truth_edges

    return read_truth_edges(p, input_path)




def _input_root(source: Path) -> Path:
    """The folder input file names are taken relative to (partition folder names count)."""
    if source.is_dir():
        return source
    if glob.has_magic(str(source)):
        parts = []
        for part in source.parts:
            if glob.has_magic(part):
                break
            parts.append(part)
        return Path(*parts) if parts else Path(".")
    return source.parent


def _stable_graph(evidence: pd.DataFrame, levels: dict[str, Any], cfg: Config, out: Path) -> dict[str, Path]:
    """The stable graph (pairs linked in at least `search.stable_threshold` of the resamples), drawn
    beside the single-run graph."""
    from .report import _graph

    stable = evidence.assign(linked=evidence["stable"].astype(bool))
    names = sorted(set(evidence["var_a"]) | set(evidence["var_b"]))
    g = _graph.build_graph(stable, names, levels, float(cfg.test.alpha), cfg.search.orient)
    return {
        "stable_graph.dot": atomic_write_text(out / "stable_graph.dot", g.source),
        "stable_graph.svg": atomic_write_bytes(out / "stable_graph.svg", _graph.render(g, "svg", "stable_graph.svg")),
    }


def _with_stability(evidence: pd.DataFrame, shares: pd.DataFrame, info: dict[str, Any]) -> pd.DataFrame:
    """The evidence table with the resampling figures filled in and unstable links flagged."""
    ev = evidence.drop(columns=["stability"]).merge(shares, on=["var_a", "var_b"], how="left")
    cols = [c for c in evidence.columns if c != "stability"]
    at = cols.index("orientation") + 1
    ev = ev[cols[:at] + ["stability", "stability_a_to_b", "stability_b_to_a", "stable"] + cols[at:]]
    weak = ev["linked"] & (ev["stability"] < 0.5)
    ev.loc[weak, "flags"] = ev.loc[weak, "flags"].map(lambda f: ";".join([w for w in f.split(";") if w] + ["unstable"]))
    share = (ev["stability"] * 100).round().astype(int).astype(str)
    ev["explanation"] = ev["explanation"] + " Linked in " + share + f"% of {info['resamples']} resamples."
    return ev


def run_pipeline(
    cfg: Config,
    input_path: str | os.PathLike[str],
    out_dir: str | os.PathLike[str] | None = None,
    *,
    run_name: str | None = None,
    config_path: str | os.PathLike[str] | None = None,
    reporter: Reporter | None = None,
) -> RunResult:
    """Run every stage on one extract and publish the run folder.

    The run is assembled in ``.<name>.partial`` beside `out_dir` and renamed into place at the end,
    so a failed or killed run never replaces a finished one. Stage results are cached beside the
    runs (``.edgeproof-cache``), keyed by their inputs, their slice of the configuration and the
    version (see `pipeline.plan`); a second run on the same input and configuration recomputes nothing.
    """
    rep = reporter or Reporter("quiet")
    started = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    t_start = time.perf_counter()
    source = Path(input_path)
    files = _input_files(source)
    if out_dir is None:
        out_dir = output_root(cfg, config_path) / safe_name(run_name) if run_name else default_run_dir(cfg, config_path, source)
    final = Path(out_dir)
    check_out_dir(final, source, files)
    cfg, jobs_note = cap_parallel_jobs(cfg)
    final.parent.mkdir(parents=True, exist_ok=True)
    partial = final.parent / f".{final.name}.partial"
    cache = StageCache.beside(final.parent).open()
    with run_lock(final.parent / ".locks" / final.name, 0.0):
        clean_stale_partials(final.parent, keep=final.name)
        start_partial(partial)
        par = cfg.parallel
        # the workers start in the background while the data stages run
        from .search.warm import warm_worker

        with parallel_context(par.jobs, par.backend, par.scheduler, warm_up=warm_worker) as workers, \
                _frozen_heap(rep.event) as on_event:
            runner = Runner(list(STAGES), cache, cfg, __version__, env={"workers": workers, "reporter": rep}, on_event=on_event)
            manifest = _run_plan(runner, source, files, partial, rep, run_name)
        manifest.update(started=started, finished=time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                        seconds=round(time.perf_counter() - t_start, 3), out_dir=str(final.resolve()))
        manifest["warnings"] += [jobs_note] if jobs_note else []
        atomic_write_json(partial / "manifest.json", manifest)
        publish_run(partial, final)
        cache.prune(cfg.output.cache_entries, protect=runner.entries())
    rep.event("done", out=str(final), seconds=manifest["seconds"])
    return load_run(final)


@contextlib.contextmanager
def _frozen_heap(on_event: Any) -> Any:
    """The runner's event callback, freezing the collector's view of the heap at each stage's start
    and end (`gc.freeze`) for the length of a run.

    A run makes few reference cycles but carries a large long-lived heap (the modules of pandas,
    numba and scipy that its stages import), and the collector's full passes rescan all of it: about
    0.35 s of a 5 s run on a 70-signal network (measured with `gc.callbacks`). Frozen objects are
    never rescanned; they are still freed as usual when nothing refers to them, and cycles among
    them are collected once the run ends (`gc.unfreeze`), so a long-lived process (the nightly loop,
    the tests) collects as before.
    """
    gc.freeze()

    def event(kind: str, **fields: Any) -> None:
        if kind == "stage":
            gc.freeze()
        on_event(kind, **fields)

    try:
        yield event
    finally:
        gc.unfreeze()


def _reuse_levels(cfg: Config, out: Path) -> Any:
    """The levels of the run named by `discretise.reuse_from`, or None."""
    if not cfg.discretise.reuse_from:
        return None
    ref: Path | None = Path(cfg.discretise.reuse_from) / "levels.json"
    if cfg.discretise.reuse_from in ("latest", "previous"):
        # the configuration's own run history: the first night sets the categories, later
        # nights keep them, so nights stay comparable
        ref = out.parent / cfg.discretise.reuse_from / "levels.json"
        if not ref.is_file():
            return None
    assert ref is not None
    if not ref.is_file():
        raise ConfigError(
            f"`discretise.reuse_from` = `{cfg.discretise.reuse_from}` holds no levels.json; name a finished run folder."
        )
    return json.loads(ref.read_text(encoding="utf-8"))


def _publish_tests(source: Path, target: Path) -> int:
    """Put tests.parquet from the stage cache into the run folder: linked as it is (the skeleton stage
    writes it as the run folder stores it), or, from an entry written before it did, copied batch by
    batch into that form (`published`): a search of millions of tests is never one table in memory.
    Returns the tests."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from .stages._evidence import ROW_GROUP, published

    src = pq.ParquetFile(source, pre_buffer=False)  # read batch by batch, not the whole file first
    schema = published(src.schema_arrow.empty_table()).schema
    if src.schema_arrow.equals(schema):
        _link_or_copy(source, target)
    else:
        atomic_write_arrow(target, (b for batch in src.iter_batches(batch_size=ROW_GROUP)
                                    for b in published(pa.Table.from_batches([batch])).to_batches()), schema)
    return int(src.metadata.num_rows)


def _release_freed_memory() -> None:
    """Hand the C heap's free pages back to the system. After a search of millions of tests glibc keeps
    the pages of its freed arrays for later C allocations (0.53 GB after the 9.7 million tests of
    bench_whole's dense set at 80 signals), but what follows (reading tests.parquet for the report)
    allocates through Arrow's own pool, which cannot use them. A no-op where the C library has no
    ``malloc_trim``."""
    import ctypes
    import ctypes.util

    try:
        trim = ctypes.CDLL(ctypes.util.find_library("c")).malloc_trim
    except (OSError, AttributeError, TypeError):
        return
    trim(0)


def _run_plan(runner: Runner, source: Path, files: list[Path], out: Path, rep: Reporter,
              run_name: str | None = None) -> dict[str, Any]:
    """Pull the plan's artifacts through the runner and assemble the run folder and its manifest."""
    cfg = runner.cfg
    fp = fingerprint_paths(files, _input_root(source))
    reuse_levels = _reuse_levels(cfg, out)
    runner.provide("input", source, key=fp)
    runner.provide("reuse_levels", reuse_levels, key=reuse_levels)
    clean_meta = runner.get("clean-meta.json")
    levels_doc = runner.get("levels.json")
    codes = runner.get("discretised.parquet")
    names = [str(c) for c in codes.columns]
    n_kept = len(codes)
    del codes
    workers = runner.env.get("workers")
    if isinstance(workers, ParallelContext):
        # local workers start ahead of the search (while the timeline stage runs) only for a table large
        # enough that its search repays their start-up; otherwise the first level large enough opens them
        workers.ahead = n_kept * len(names) ** 2 >= _AHEAD_WORK
    if len(names) < 2:
        raise DataError(
            f"Only {len(names)} usable column(s) left after cleaning ({', '.join(names) or 'none'}); "
            "see cleaning.json for why the others were dropped."
        )
    # the variables the search tests: the signals in time order (series columns left out unless
    # `time.test_series`), and their copies from earlier windows when `time.lags` asks for them
    kept = names
    time_doc = runner.get("timeline.json")
    names, cards = list(time_doc["names"]), [int(c) for c in time_doc["cards"]]
    if len(names) < 2:
        raise DataError(
            f"Only {len(names)} signal(s) left to test ({', '.join(names) or 'none'}) once the series columns "
            f"({', '.join(time_doc.get('series') or []) or 'none'}) are set aside; see cleaning.json, or set `time.test_series: true`."
        )
    cfg, auto_settings = resolve_auto(cfg, *auto_inputs(time_doc, n_kept))
    runner.cfg = cfg  # the stages from here on see the resolved settings (and are keyed by them)

    # knowledge: configuration + reviewed evidence file + the order of time (a copy from an earlier window
    # is tested only against signals of the present window, never against its own signal)
    confirm, reject, comments, review_warnings = _review_knowledge(cfg, [n for n, lag in zip(names, time_doc["lag"]) if lag == 0])
    knowledge = Knowledge.build(
        names,
        required=[*cfg.knowledge.required, *confirm],
        forbidden=[*cfg.knowledge.forbidden, *lag_pairs(time_doc)],
        rejected=reject,  # tested as usual, removed at the end (the report says when data disagree)
        tiers=time_tiers(names, time_doc["lag"], cfg.knowledge.tiers),
    )
    runner.provide("signals", {"names": names, "cards": cards}, key=[names, cards])
    runner.provide("knowledge", knowledge, key=[sorted(knowledge.required), sorted(knowledge.forbidden),
                                                 [list(t) for t in knowledge.tiers], sorted(knowledge.rejected)])
    _link_or_copy(runner.path("marginal.parquet"), out / "marginal.parquet")  # as the cache holds it
    evidence = runner.get("evidence.parquet")
    # the data stages' files are published once the search has run: their entries' writers (hundreds of
    # megabytes on a large extract) finish meanwhile instead of holding up the search
    for name in ("rejected.parquet", "cleaning.json", "discretised.parquet", "levels.json", "timeline.parquet"):
        _link_or_copy(runner.path(name), out / name)
    _release_freed_memory()  # the search's tests are written and gone
    stability_info = None
    if cfg.search.resamples > 0:
        shares = runner.get("stability.parquet")
        stability_info = runner.get("stability.json")
        evidence = _with_stability(evidence, shares, stability_info)
        atomic_write_parquet(out / "stability.parquet", shares)
    from .independence.result import with_effect_r

    evidence = with_effect_r(orient_lagged(evidence))
    atomic_write_parquet(out / "evidence.parquet", evidence)
    n_tests = _publish_tests(runner.path("tests.parquet"), out / "tests.parquet")

    dropped = {c["column"]: c.get("reason", "") for c in clean_meta["columns"] if c.get("action") == "dropped"}
    rows = {
        "read": int(clean_meta["rows_read"]),
        "rejected": int(clean_meta["rejected"]),
        "quarantined": int(clean_meta["quarantined"]),
        "kept": int(n_kept),
    }
    warnings = [*runner.warnings, *review_warnings, *time_doc.get("warnings", [])]
    if rows["read"] != rows["kept"] + rows["rejected"] + rows["quarantined"]:
        warnings.append(
            f"Row counts do not reconcile: read {rows['read']} != kept {rows['kept']} + rejected "
            f"{rows['rejected']} + quarantined {rows['quarantined']}."
        )
    manifest: dict[str, Any] = {
        "edgeproof_version": runner.version,
        "config": cfg.model_dump(mode="json"),
        "input": {"path": str(source), "files": [str(f) for f in files], "fingerprint": fp},
        "rows": rows,
        "columns": {"kept": kept, "dropped": dropped, "tested": names},
        "stages": runner.stage_record(),
        "packages": _versions(),
        "platform": {"machine": platform.machine(), "cpus": os.cpu_count()},
        "cache_keys": runner.cache_keys(),
        "edges": int(evidence["linked"].sum()),
        "tests": n_tests,
        "auto_settings": auto_settings,
        "time": {k: v for k, v in time_doc.items() if k not in ("names", "cards", "source", "lag", "numeric")},
        "review": comments,
        "night": _night_name(source, run_name),
        "warnings": warnings,
        "status": "ok",
    }
    if stability_info is not None:
        manifest["stability"] = stability_info
        if stability_info.get("caveat"):
            warnings.append(str(stability_info["caveat"]))
    with runner.timed("report"):
        ctx_report = report.ReportContext(
            title=cfg.report.title or cfg.name or "edgeproof run",
            night=manifest["night"],
            show_changes=bool(run_name),
            near_alpha_factor=float(cfg.search.near_alpha_factor),
            summary=report.summary_of(manifest),  # as a page rendered again from the run folder reads it
            levels={k: v for k, v in levels_doc["levels"].items() if k in names},  # the signals tested
            alpha=float(cfg.test.alpha),
            orient=cfg.search.orient,
            truth_edges=_truth_edges(cfg, source),
            review={(c["var_a"], c["var_b"]): c for c in comments} or None,
            warnings=warnings,
            png=cfg.output.png,
        )
        written = report.run(evidence, out / "tests.parquet", ctx_report, out)  # read for the page's picks only
        if stability_info is not None:
            written.update(_stable_graph(evidence, levels_doc["levels"], cfg, out))
    manifest["stages"] = runner.stage_record()
    manifest["artifacts"] = sorted(p.name for p in out.iterdir() if p.is_file() and not p.name.startswith("."))
    manifest["artifacts"] = sorted(set(manifest["artifacts"]) | {"manifest.json"} | {Path(p).name for p in written.values()})
    for w in warnings[len(runner.warnings):]:  # the runner's own warnings were shown as they happened
        rep.event("warning", message=w)
    return manifest
