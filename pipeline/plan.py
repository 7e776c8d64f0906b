"""The plan of a run: every cached stage, what it reads and writes, and the configuration it depends on.

This is the one place to read the stage order, the cache keys and the artifacts. The runner
(`pipeline.runner`) computes each stage's key as hash(version, stage name, the settings listed here,
keys of what it reads). Values the plan provides itself (not made by a stage):

``input``         the input path (key: content fingerprint with partition folder names)
``reuse_levels``  the levels of an earlier run named by ``discretise.reuse_from``, or None
``signals``       ``{"names", "cards"}`` of the variables tested, in the order of ``search-codes.npy``
``knowledge``     the `Knowledge` (required / forbidden pairs, tiers) after the review file

Each stage function takes a `StageCall` and returns ``{artifact: value}``; the work itself is in
``pipeline/stages/<name>.py``.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .runner import Stage, StageCall

# Each stage function imports its own module, so a run that finds every stage in the cache does not
# load the test engine, numba or scipy at all.
if TYPE_CHECKING:
    from .independence.engine import EngineSettings
    from .search.skeleton import SignalExtras

__all__ = ["STAGES", "coded_matrix"]


def coded_matrix(codes: pd.DataFrame) -> np.ndarray:
    """The coded table as one row per signal (the layout every search kernel reads)."""
    dtype = np.result_type(*[codes[c].dtype for c in codes.columns]) if len(codes.columns) else np.int8
    out = np.empty((codes.shape[1], codes.shape[0]), dtype=dtype)
    for i, c in enumerate(codes.columns):
        out[i] = codes[c].to_numpy()
    return out


def _ingest(call: StageCall) -> dict[str, Any]:
    from .stages import ingest

    res = ingest.run(call["input"], call.cfg.input, call.cfg.limits)
    return {
        "ingest.arrow": res.table,
        # the table's index (each row's line in its file) beside it: the table file keeps no index
        "ingest-lines.npy": res.table.index.to_numpy(dtype=np.int64),
        "ingest-rejected.parquet": res.rejected,
        "ingest.json": {"rows_read": res.rows_read, "sources": res.sources, "summary": res.summary},
    }


def _clean(call: StageCall) -> dict[str, Any]:
    from .stages import clean, ingest

    meta = call["ingest.json"]
    table = call["ingest.arrow"]
    table.index = pd.Index(np.array(call["ingest-lines.npy"], dtype=np.int64), name="line")
    ingested = ingest.Ingested(
        table=table, rejected=call["ingest-rejected.parquet"],
        rows_read=meta["rows_read"], sources=meta["sources"], summary=meta["summary"],
    )
    call.inputs.clear()  # the stage holds the only reference: the raw table goes with `ingested`
    cleaned = clean.run(ingested, call.cfg)
    return {
        "clean.arrow": cleaned.stored(),  # categorical columns as codes: Arrow never reads a string per row
        "clean-times.parquet": cleaned.times,
        "quarantined.parquet": cleaned.quarantined,
        "rejected.parquet": pd.concat([ingested.rejected, cleaned.quarantined], ignore_index=True),
        "cleaning.json": cleaned.summary,
        "clean-meta.json": {
            "kinds": cleaned.kinds, "columns": cleaned.columns, "rows_read": ingested.rows_read,
            "rejected": len(ingested.rejected), "quarantined": len(cleaned.quarantined), "sources": ingested.sources,
        },
    }


def _discretise(call: StageCall) -> dict[str, Any]:
    from .stages import clean, discretise

    meta = call["clean-meta.json"]
    cleaned = clean.Cleaned(
        table=call["clean.arrow"], kinds=meta["kinds"], columns=meta["columns"],
        quarantined=call["quarantined.parquet"], summary=call["cleaning.json"],
    )
    reuse_levels = call["reuse_levels"]
    call.inputs.clear()
    disc = discretise.run(cleaned, call.cfg, reuse_levels)
    return {
        "discretised.parquet": disc.codes,
        "levels.json": {"levels": disc.levels, "edges": disc.edges, "kinds": disc.kinds},
        "discretise.json": disc.summary,
    }


def _timeline(call: StageCall) -> dict[str, Any]:
    levels = call["levels.json"]
    codes = call["discretised.parquet"]
    cards = {c: max(1, len(levels["levels"][c])) for c in codes.columns}
    from .stages import timeline  # loads scipy.stats (rank scores): only when the stage runs, not on a cache hit

    methods = {c: v.get("method") for c, v in (call["discretise.json"].get("columns") or {}).items()}
    timed = timeline.run(call["clean.arrow"], call["clean-times.parquet"], levels["kinds"], codes, cards, call.cfg,
                         methods)
    n = timed.codes.shape[1]
    # one row per variable (NaN rows for those tested on codes); no columns at all when none is numeric,
    # since the search then never reads a row
    numeric = [s is not None for s in timed.scores]
    scores = np.full(timed.codes.shape if any(numeric) else (len(numeric), 0), np.nan)
    for i, s in enumerate(timed.scores):
        if s is not None:
            scores[i] = s
    prev = timed.timeline.prev if timed.timeline is not None else np.full(n, -1, dtype=np.int64)
    return {
        "timeline.parquet": timed.aligned_frame(),
        "search-codes.npy": timed.codes,
        "search-scores.npy": scores,
        "search-prev.npy": prev,
        "timeline.json": timed.doc(),
    }


def search_extras(call: StageCall) -> SignalExtras | None:
    """Numeric scores and previous windows for the search, or None when codes on independent rows suffice."""
    from .search.skeleton import SignalExtras

    doc = call["timeline.json"]
    numeric = tuple(bool(v) for v in doc["numeric"])
    if not doc["timed"] and not any(numeric):
        return None
    return SignalExtras(scores=call["search-scores.npy"], numeric=numeric,
                        prev=call["search-prev.npy"] if doc["timed"] else None,
                        series_length=float(doc["series_length"]), own_past=tuple(lag == 0 for lag in doc["lag"]))


def _settings(call: StageCall) -> EngineSettings:
    from .independence.engine import EngineSettings

    return EngineSettings.from_config(call.cfg)


def _battery(call: StageCall) -> dict[str, Any]:
    from .stages import battery
    from .stages.skeleton import state_doc

    sig = call["signals"]
    marginal = battery.run(call["search-codes.npy"], sig["names"], sig["cards"], _settings(call), call["knowledge"],
                           call.env["workers"], extras=search_extras(call))
    return {"marginal.parquet": marginal.tests, "state.json": state_doc(marginal.state),
            # the order-0 tests as columns (variables as indices): the skeleton stage goes on from them
            "marginal-columns.parquet": marginal.state.tests.columns().to_arrow()}


def _skeleton(call: StageCall) -> dict[str, Any]:
    from .independence.columns import TestColumns
    from .stages import skeleton
    from .stages.skeleton import state_from

    sig, cfg, rep = call["signals"], call.cfg, call.env["reporter"]
    state = state_from(call["state.json"], TestColumns.from_arrow(call["marginal-columns.parquet"]))
    call.inputs.pop("marginal-columns.parquet")
    outcome = skeleton.run(
        call["search-codes.npy"], sig["names"], sig["cards"], _settings(call), call["knowledge"], state,
        extras=search_extras(call),
        max_order=cfg.search.max_order, orient_graph=cfg.search.orient, collider_rule=cfg.search.collider_rule,
        context=call.env["workers"], checkpoint=call.work, progress=rep.level,
        tests_to=call.work / "tests.parquet",  # written there row group by row group, never held whole
        checkpoint_every=skeleton.CHECKPOINT_EVERY,
    )
    rep.close()
    return {"evidence.parquet": outcome.evidence, "tests.parquet": outcome.tests}


def _stability(call: StageCall) -> dict[str, Any]:
    from .stages import stability

    sig, cfg, evidence = call["signals"], call.cfg, call["evidence.parquet"]
    res = stability.run(
        call["search-codes.npy"], sig["names"], sig["cards"], _settings(call), call["knowledge"],
        resamples=cfg.search.resamples, fraction=cfg.search.resample_fraction, method=cfg.search.resample_method,
        max_order=cfg.search.max_order, orient_graph=cfg.search.orient, collider_rule=cfg.search.collider_rule,
        seed=cfg.test.seed, context=call.env["workers"], threshold=cfg.search.stable_threshold,
        extras=search_extras(call),
    )
    rows = []
    for a, b in evidence[["var_a", "var_b"]].itertuples(index=False):
        rows.append({
            "var_a": a, "var_b": b,
            "stability": float(res.linked.get((a, b), 0.0)),
            "stability_a_to_b": float(res.directed.get((a, b), np.nan)) if res.directed else np.nan,
            "stability_b_to_a": float(res.directed.get((b, a), np.nan)) if res.directed else np.nan,
            "stable": (a, b) in res.stable_edges,
        })
    info = {"resamples": res.resamples, "method": res.method, "fraction": res.fraction, "threshold": res.threshold,
            "rows_per_resample": res.rows_per_resample, "caveat": res.caveat}
    return {"stability.parquet": pd.DataFrame(rows), "stability.json": info}


_SEARCH = ("test", "search.max_order", "search.orient", "search.collider_rule")
# what every search stage reads: the variables in time order (with lag copies), their scores and previous windows
_SEARCH_DATA = ("search-codes.npy", "search-scores.npy", "search-prev.npy", "timeline.json", "signals", "knowledge")

# The stages in order. A new stage is one entry here plus its function above (see DEVELOPERS.md).
STAGES: tuple[Stage, ...] = (
    Stage("ingest", _ingest, reads=("input",), settings=("input", "limits"),
          writes=("ingest.arrow", "ingest-lines.npy", "ingest-rejected.parquet", "ingest.json")),
    Stage("clean", _clean, reads=("ingest.arrow", "ingest-lines.npy", "ingest-rejected.parquet", "ingest.json"),
          settings=("clean", "columns"),
          writes=("clean.arrow", "clean-times.parquet", "quarantined.parquet", "rejected.parquet", "cleaning.json", "clean-meta.json")),
    Stage("discretise", _discretise,
          reads=("clean.arrow", "quarantined.parquet", "clean-meta.json", "cleaning.json", "reuse_levels"),
          settings=("discretise", "test.missing"),
          writes=("discretised.parquet", "levels.json", "discretise.json"),
          carries=("rejected.parquet", "cleaning.json", "clean-meta.json")),
    Stage("timeline", _timeline,
          reads=("clean.arrow", "clean-times.parquet", "discretised.parquet", "levels.json", "discretise.json"),
          settings=("time", "discretise.default", "columns"),
          writes=("timeline.parquet", "search-codes.npy", "search-scores.npy", "search-prev.npy", "timeline.json")),
    Stage("battery", _battery, reads=_SEARCH_DATA, settings=("test",),
          writes=("marginal.parquet", "marginal-columns.parquet", "state.json"), workers=True),
    Stage("skeleton", _skeleton, reads=(*_SEARCH_DATA, "marginal-columns.parquet", "state.json"),
          settings=_SEARCH, writes=("evidence.parquet", "tests.parquet"), resumable=True, workers=True),
    Stage("stability", _stability, reads=(*_SEARCH_DATA, "evidence.parquet"),
          settings=(*_SEARCH, "search.resamples", "search.resample_fraction", "search.resample_method",
                    "search.stable_threshold", "test.seed"),
          writes=("stability.parquet", "stability.json"), workers=True),
)
