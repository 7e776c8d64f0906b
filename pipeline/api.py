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
import glob
import json
import os
import platform
import shutil
import time
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import pandas as pd

from . import __version__
from .config import Config, resolve_auto
from .errors import ConfigError, DataError
from .independence.engine import EngineSettings
from .parallel import ParallelContext, parallel_context, share_array
from .progress import Reporter
from .runs import (
    StageCache,
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
    stable_hash,
    start_partial,
)
from .search.knowledge import Knowledge
from .stages import battery, clean, discretise, ingest, report, skeleton, stability
from .stages.skeleton import state_from_json, state_to_json

__all__ = ["RunResult", "run_pipeline", "load_run", "evidence_graph"]

_PACKAGES = ["numpy", "pandas", "scipy", "pyarrow", "networkx", "joblib", "pydantic", "graphviz"]


@dataclass(frozen=True)
class RunResult:
    """A finished run: its folder, evidence and tests as DataFrames, manifest, and graph."""

    out_dir: Path
    evidence: pd.DataFrame
    tests: pd.DataFrame
    manifest: dict[str, Any]
    graph: nx.Graph = field(repr=False)


def evidence_graph(evidence: pd.DataFrame) -> nx.Graph:
    """The linked pairs of an evidence table as a networkx graph with the evidence on its edges."""
    g = nx.Graph()
    g.add_nodes_from(sorted(set(evidence["var_a"]) | set(evidence["var_b"])))
    for row in evidence[evidence["linked"]].to_dict("records"):
        g.add_edge(row["var_a"], row["var_b"], **{k: v for k, v in row.items() if k not in ("var_a", "var_b")})
    return g


def load_run(run_dir: str | os.PathLike[str]) -> RunResult:
    """Load a finished run folder (or a `latest` link) back into a `RunResult`."""
    d = Path(run_dir)
    if not (d / "manifest.json").is_file():
        raise DataError(f"`{d}` is not a finished edgeproof run folder (no manifest.json).")
    manifest = json.loads((d / "manifest.json").read_text(encoding="utf-8"))
    evidence = pd.read_parquet(d / "evidence.parquet")
    tests = pd.read_parquet(d / "tests.parquet")
    return RunResult(out_dir=d.resolve(), evidence=evidence, tests=tests, manifest=manifest, graph=evidence_graph(evidence))


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
    out = {"python": platform.python_version(), "edgeproof": __version__}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "missing"
    return out


def _review_knowledge(cfg: Config, names: list[str]) -> tuple[list[tuple[str, str]], list[tuple[str, str]], list[dict[str, Any]], list[str]]:
    """Pairs confirmed and rejected in a reviewed evidence file, their comments, and what no longer fits."""
    path = cfg.knowledge.review_file
    if not path:
        return [], [], [], []
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"`knowledge.review_file` = `{p}` does not exist; fix the path or remove the key.")
    from .report._exports import read_review_file

    review = read_review_file(p)
    known = set(names)
    confirm, reject, comments, warnings = [], [], [], []
    for row in review.to_dict("records"):
        verdict = str(row.get("verdict") or "").strip().lower()
        a, b = str(row.get("var_a")), str(row.get("var_b"))
        if not verdict:
            continue
        missing = [n for n in (a, b) if n not in known]
        if missing:
            warnings.append(
                f"Review verdict `{verdict}` on `{a}` - `{b}` was not applied: "
                f"{', '.join(f'`{m}`' for m in missing)} is not among this run's signals."
            )
            continue
        if verdict == "confirm":
            confirm.append((a, b))
        elif verdict == "reject":
            reject.append((a, b))
        else:
            warnings.append(f"Review verdict `{verdict}` on `{a}` - `{b}` is not `confirm` or `reject`; ignored.")
            continue
        comments.append({"var_a": min(a, b), "var_b": max(a, b), "verdict": verdict, "comment": str(row.get("comment") or "")})
    return confirm, reject, comments, warnings


def _truth_edges(cfg: Config, input_path: Path) -> list[tuple[str, str]] | None:
    path = cfg.report.truth_file
    if not path:
        return None
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"`report.truth_file` = `{p}` does not exist; fix the path or remove the key.")
    from .stages._data_read import read_truth_edges

    return read_truth_edges(p, input_path)


def _coded_matrix(codes: pd.DataFrame) -> np.ndarray:
    dtype = np.result_type(*[codes[c].dtype for c in codes.columns]) if len(codes.columns) else np.int8
    out = np.empty((codes.shape[1], codes.shape[0]), dtype=dtype)
    for i, c in enumerate(codes.columns):
        out[i] = codes[c].to_numpy()
    return out


def _order(cfg: Config) -> int | None:
    """The resolved order cap (`auto` is resolved before the search starts)."""
    value = cfg.search.max_order
    assert value != "auto", "resolve_auto must run before the search"
    return value  # type: ignore[return-value]


def _stability_frame(evidence: pd.DataFrame, res: Any) -> pd.DataFrame:
    """One row per pair: share of resamples linked, per direction, and whether the pair is stable."""
    rows = []
    for a, b in evidence[["var_a", "var_b"]].itertuples(index=False):
        rows.append({
            "var_a": a, "var_b": b,
            "stability": float(res.linked.get((a, b), 0.0)),
            "stability_a_to_b": float(res.directed.get((a, b), np.nan)) if res.directed else np.nan,
            "stability_b_to_a": float(res.directed.get((b, a), np.nan)) if res.directed else np.nan,
            "stable": (a, b) in res.stable_edges,
        })
    return pd.DataFrame(rows)


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
    runs (``.cache``), keyed by their inputs, their slice of the configuration and the version; a
    second run on the same input and configuration recomputes nothing.
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
    cache = StageCache(final.parent / ".cache")
    with run_lock(final.parent / ".locks" / final.name, 0.0):
        clean_stale_partials(final.parent, keep=final.name)
        start_partial(partial)
        par = cfg.parallel
        # the workers start in the background while the data stages run
        with parallel_context(par.jobs, par.backend, par.scheduler) as workers:
            result = _run_stages(cfg, source, files, partial, cache, rep, workers)
        manifest = result["manifest"]
        manifest.update(started=started, finished=time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                        seconds=round(time.perf_counter() - t_start, 3), out_dir=str(final.resolve()))
        manifest["warnings"] += [jobs_note] if jobs_note else []
        atomic_write_json(partial / "manifest.json", manifest)
        publish_run(partial, final)
        cache.prune(cfg.output.cache_entries, protect={f"{k}-{v}" for k, v in manifest["cache_keys"].items()} | {f"shared-{manifest['cache_keys']['discretise']}"})
    rep.event("done", out=str(final), seconds=manifest["seconds"])
    return load_run(final)


def _stage(name: str, timings: dict[str, Any], rep: Reporter):
    class _Timer:
        def __enter__(self) -> "_Timer":
            self.t = time.perf_counter()
            self.reused = False
            rep.event("stage", name=name, status="start")
            return self

        def __exit__(self, *exc: Any) -> None:
            sec = round(time.perf_counter() - self.t, 3)
            timings[name] = {"seconds": sec, "reused": self.reused}
            if exc[0] is None:
                rep.event("stage", name=name, status="reused" if self.reused else "done", seconds=sec)

    return _Timer()


def _run_stages(cfg: Config, source: Path, files: list[Path], out: Path, cache: StageCache, rep: Reporter,
                workers: ParallelContext) -> dict[str, Any]:
    timings: dict[str, Any] = {}
    fp = fingerprint_paths(files)
    version = __version__
    k_ingest = stable_hash(["ingest", version, fp, cfg.section("input"), cfg.section("limits")])
    k_clean = stable_hash(["clean", k_ingest, cfg.section("clean"), cfg.section("columns")])
    reuse_levels = None
    if cfg.discretise.reuse_from:
        ref = Path(cfg.discretise.reuse_from) / "levels.json"
        if cfg.discretise.reuse_from in ("latest", "previous"):
            # the configuration's own run history: the first night sets the categories, later
            # nights keep them, so nights stay comparable
            ref = out.parent / cfg.discretise.reuse_from / "levels.json"
            if not ref.is_file():
                ref = None  # type: ignore[assignment]
        if ref is None:
            pass
        elif not ref.is_file():
            raise ConfigError(
                f"`discretise.reuse_from` = `{cfg.discretise.reuse_from}` holds no levels.json; name a finished run folder."
            )
        else:
            reuse_levels = json.loads(ref.read_text(encoding="utf-8"))
    k_disc = stable_hash(["discretise", k_clean, cfg.section("discretise"), cfg.test.missing, reuse_levels])

    # ingest + clean + discretise (each cached; a later hit skips the earlier stages entirely)
    disc_dir = cache.hit("discretise", k_disc)
    clean_dir = cache.hit("clean", k_clean)
    ingest_dir = cache.hit("ingest", k_ingest)
    for stage_name, key, hit_dir in (("discretise", k_disc, disc_dir), ("clean", k_clean, clean_dir), ("ingest", k_ingest, ingest_dir)):
        if hit_dir is not None:
            cache.touch(stage_name, key)
    with _stage("ingest", timings, rep) as st:
        if disc_dir or clean_dir or ingest_dir:
            st.reused = True
            ingested = None
        else:
            ingested = ingest.run(source, cfg.input, cfg.limits)
            d = cache.begin("ingest", k_ingest)
            atomic_write_parquet(d / "ingest.parquet", ingested.table)
            atomic_write_parquet(d / "rejected.parquet", ingested.rejected)
            atomic_write_json(d / "ingest.json", {"rows_read": ingested.rows_read, "sources": ingested.sources, "summary": ingested.summary})
            cache.finish("ingest", k_ingest)
            ingest_dir = d
    with _stage("clean", timings, rep) as st:
        if disc_dir or clean_dir:
            st.reused = True
            cleaned = None
        else:
            if ingested is None:
                assert ingest_dir is not None
                meta = json.loads((ingest_dir / "ingest.json").read_text(encoding="utf-8"))
                ingested = ingest.Ingested(
                    table=pd.read_parquet(ingest_dir / "ingest.parquet"),
                    rejected=pd.read_parquet(ingest_dir / "rejected.parquet"),
                    rows_read=meta["rows_read"], sources=meta["sources"], summary=meta["summary"],
                )
            cleaned = clean.run(ingested, cfg)
            d = cache.begin("clean", k_clean)
            atomic_write_parquet(d / "clean.parquet", cleaned.table)
            atomic_write_parquet(d / "quarantined.parquet", cleaned.quarantined)
            atomic_write_parquet(d / "rejected.parquet", pd.concat([ingested.rejected, cleaned.quarantined], ignore_index=True))
            atomic_write_json(d / "cleaning.json", cleaned.summary)
            atomic_write_json(d / "clean-meta.json", {"kinds": cleaned.kinds, "columns": cleaned.columns, "rows_read": ingested.rows_read, "rejected": len(ingested.rejected), "quarantined": len(cleaned.quarantined), "sources": ingested.sources})
            cache.finish("clean", k_clean)
            clean_dir = d
            ingested = None  # the raw table is no longer needed: free it before discretising
    with _stage("discretise", timings, rep) as st:
        if disc_dir:
            st.reused = True
        else:
            if cleaned is None:
                assert clean_dir is not None
                meta = json.loads((clean_dir / "clean-meta.json").read_text(encoding="utf-8"))
                cleaned = clean.Cleaned(
                    table=pd.read_parquet(clean_dir / "clean.parquet"), kinds=meta["kinds"], columns=meta["columns"],
                    quarantined=pd.read_parquet(clean_dir / "quarantined.parquet"),
                    summary=json.loads((clean_dir / "cleaning.json").read_text(encoding="utf-8")),
                )
            disc = discretise.run(cleaned, cfg, reuse_levels)
            d = cache.begin("discretise", k_disc)
            atomic_write_parquet(d / "discretised.parquet", disc.codes)
            atomic_write_json(d / "levels.json", {"levels": disc.levels, "edges": disc.edges, "kinds": disc.kinds})
            atomic_write_json(d / "discretise.json", disc.summary)
            assert clean_dir is not None
            for name in ("rejected.parquet", "cleaning.json", "clean-meta.json"):
                _link_or_copy(clean_dir / name, d / name)
            cache.finish("discretise", k_disc)
            disc_dir = d
            cleaned = disc = None  # type: ignore[assignment]  # the codes are read back below
    assert disc_dir is not None
    for name in ("rejected.parquet", "cleaning.json", "discretised.parquet", "levels.json"):
        _link_or_copy(disc_dir / name, out / name)
    clean_meta = json.loads((disc_dir / "clean-meta.json").read_text(encoding="utf-8"))
    levels_doc = json.loads((disc_dir / "levels.json").read_text(encoding="utf-8"))
    codes = pd.read_parquet(disc_dir / "discretised.parquet")
    names = [str(c) for c in codes.columns]
    if len(names) < 2:
        raise DataError(
            f"Only {len(names)} usable column(s) left after cleaning ({', '.join(names) or 'none'}); "
            "see cleaning.json for why the others were dropped."
        )
    cards = [max(1, len(levels_doc["levels"][n])) for n in names]
    cfg, auto_settings = resolve_auto(cfg, len(codes), cards)

    # knowledge: configuration + reviewed evidence file
    confirm, reject, comments, review_warnings = _review_knowledge(cfg, names)
    knowledge = Knowledge.build(
        names,
        required=[*cfg.knowledge.required, *confirm],
        forbidden=[*cfg.knowledge.forbidden, *reject],
        tiers=cfg.knowledge.tiers,
    )
    settings = EngineSettings.from_config(cfg)
    k_battery = stable_hash(["battery", k_disc, cfg.section("test"), sorted(knowledge.required), sorted(knowledge.forbidden)])
    k_search = stable_hash(["search", k_battery, cfg.search.max_order, cfg.search.orient, cfg.search.collider_rule, [list(t) for t in knowledge.tiers]])
    data = _coded_matrix(codes)
    n_kept = len(codes)
    del codes  # the matrix holds the same codes, one signal per row
    with contextlib.nullcontext(workers) as ctx:
        if ctx.backend == "local":
            shared_dir = cache.hit("shared", k_disc)
            if shared_dir is None:
                shared_dir = cache.begin("shared", k_disc)
                share_array(data, shared_dir)
                cache.finish("shared", k_disc)
            data = share_array(data, shared_dir)
        with _stage("battery", timings, rep) as st:
            hit = cache.hit("battery", k_battery)
            if hit:
                st.reused = True
                state = state_from_json((hit / "state.json").read_text(encoding="utf-8"))
                marginal_tests = pd.read_parquet(hit / "marginal.parquet")
            else:
                marginal = battery.run(data, names, cards, settings, knowledge, ctx)
                d = cache.begin("battery", k_battery)
                atomic_write_parquet(d / "marginal.parquet", marginal.tests)
                atomic_write_text(d / "state.json", state_to_json(marginal.state))
                cache.finish("battery", k_battery)
                state, marginal_tests = marginal.state, marginal.tests
        atomic_write_parquet(out / "marginal.parquet", marginal_tests)
        with _stage("skeleton", timings, rep) as st:
            hit = cache.hit("skeleton", k_search)
            if hit:
                st.reused = True
                evidence = pd.read_parquet(hit / "evidence.parquet")
                tests = pd.read_parquet(hit / "tests.parquet")
            else:
                d = cache.begin("skeleton", k_search) if not (cache.folder("skeleton", k_search) / "checkpoint.json").is_file() else cache.folder("skeleton", k_search)
                outcome = skeleton.run(
                    data, names, cards, settings, knowledge, state,
                    max_order=_order(cfg), orient_graph=cfg.search.orient,
                    collider_rule=cfg.search.collider_rule, context=ctx,
                    checkpoint=d / "checkpoint.json", progress=rep.level,
                )
                rep.close()
                evidence, tests = outcome.evidence, outcome.tests
                atomic_write_parquet(d / "evidence.parquet", evidence)
                atomic_write_parquet(d / "tests.parquet", tests)
                cache.finish("skeleton", k_search)
        stability_info = None
        if cfg.search.resamples > 0:
            with _stage("stability", timings, rep) as st:
                k_stab = stable_hash(["stability", k_search, cfg.search.resamples, cfg.search.resample_fraction,
                                      cfg.search.resample_method, cfg.search.stable_threshold, cfg.test.seed])
                hit = cache.hit("stability", k_stab)
                if hit:
                    st.reused = True
                    shares = pd.read_parquet(hit / "stability.parquet")
                    stability_info = json.loads((hit / "stability.json").read_text(encoding="utf-8"))
                else:
                    res_stab = stability.run(
                        data, names, cards, settings, knowledge, resamples=cfg.search.resamples,
                        fraction=cfg.search.resample_fraction, method=cfg.search.resample_method,
                        max_order=_order(cfg), orient_graph=cfg.search.orient,
                        collider_rule=cfg.search.collider_rule, seed=cfg.test.seed, context=ctx,
                        threshold=cfg.search.stable_threshold,
                    )
                    shares = _stability_frame(evidence, res_stab)
                    stability_info = {"resamples": res_stab.resamples, "method": res_stab.method,
                                      "fraction": res_stab.fraction, "threshold": res_stab.threshold,
                                      "rows_per_resample": res_stab.rows_per_resample, "caveat": res_stab.caveat}
                    d = cache.begin("stability", k_stab)
                    atomic_write_parquet(d / "stability.parquet", shares)
                    atomic_write_json(d / "stability.json", stability_info)
                    cache.finish("stability", k_stab)
            evidence = _with_stability(evidence, shares, stability_info)
            atomic_write_parquet(out / "stability.parquet", shares)
    atomic_write_parquet(out / "evidence.parquet", evidence)
    atomic_write_parquet(out / "tests.parquet", tests)

    dropped = {c["column"]: c.get("reason", "") for c in clean_meta["columns"] if c.get("action") == "dropped"}
    rows = {
        "read": int(clean_meta["rows_read"]),
        "rejected": int(clean_meta["rejected"]),
        "quarantined": int(clean_meta["quarantined"]),
        "kept": int(n_kept),
    }
    warnings = list(review_warnings)
    if rows["read"] != rows["kept"] + rows["rejected"] + rows["quarantined"]:
        warnings.append(
            f"Row counts do not reconcile: read {rows['read']} != kept {rows['kept']} + rejected "
            f"{rows['rejected']} + quarantined {rows['quarantined']}."
        )
    manifest: dict[str, Any] = {
        "edgeproof_version": version,
        "config": cfg.model_dump(mode="json"),
        "input": {"path": str(source), "files": [str(f) for f in files], "fingerprint": fp},
        "rows": rows,
        "columns": {"kept": names, "dropped": dropped},
        "stages": timings,
        "packages": _versions(),
        "platform": {"machine": platform.machine(), "cpus": os.cpu_count()},
        "cache_keys": {"ingest": k_ingest, "clean": k_clean, "discretise": k_disc, "battery": k_battery, "skeleton": k_search},
        "edges": int(evidence["linked"].sum()),
        "tests": int(len(tests)),
        "auto_settings": auto_settings,
        "review": comments,
        "warnings": warnings,
        "status": "ok",
    }
    if stability_info is not None:
        manifest["stability"] = stability_info
        if stability_info.get("caveat"):
            warnings.append(str(stability_info["caveat"]))
    with _stage("report", timings, rep):
        ctx_report = report.ReportContext(
            title=cfg.report.title or f"edgeproof run on {source.name}",
            summary={
                "input": str(source), "rows": rows, "columns_kept": names, "columns_dropped": dropped,
                "settings": {"test": cfg.section("test"), "search": cfg.section("search"), "discretise": cfg.section("discretise")},
                "timings": timings,
            },
            levels=levels_doc["levels"],
            alpha=float(cfg.test.alpha),
            orient=cfg.search.orient,
            truth_edges=_truth_edges(cfg, source),
            review={(c["var_a"], c["var_b"]): c for c in comments} or None,
            warnings=warnings,
            png=cfg.output.png,
        )
        written = report.run(evidence, tests, ctx_report, out)
        if stability_info is not None:
            written.update(_stable_graph(evidence, levels_doc["levels"], cfg, out))
    manifest["artifacts"] = sorted(p.name for p in out.iterdir() if p.is_file() and not p.name.startswith("."))
    manifest["artifacts"] = sorted(set(manifest["artifacts"]) | {"manifest.json"} | {Path(p).name for p in written.values()})
    for w in warnings:
        rep.event("warning", message=w)
    return {"manifest": manifest}

