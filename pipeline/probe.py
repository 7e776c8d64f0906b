"""One test on demand, through the same ingest, clean, discretise and timeline stages as a run (so the
same test runs: `test.method: auto` picks the numeric test when a numeric signal is involved)."""

from __future__ import annotations

import difflib
import os
from pathlib import Path
from typing import Any, Sequence

from .config import Config, resolve_auto, search_pair_count
from .errors import ConfigError
from .independence.engine import EngineSettings
from .independence.mixed import MixedEngine
from .stages import clean, discretise, ingest, timeline

__all__ = ["plain_words", "probe"]


def probe(cfg: Config, input_path: str | os.PathLike[str], x: str, y: str, given: Sequence[str] = ()) -> dict[str, Any]:
    """Test `x` independent of `y` given `given` on an extract; returns the result as plain data."""
    from .api import _input_files  # the same input resolution as a run

    _input_files(Path(input_path))
    ing = ingest.run(Path(input_path), cfg.input, cfg.limits)
    cl = clean.run(ing, cfg)
    disc = discretise.run(cl, cfg, None)
    # the same timeline as a run: rows in time order within series, previous windows, numeric scores
    all_cards = {str(c): max(1, len(disc.levels[c])) for c in disc.codes.columns}
    probe_time = cfg.time.model_copy(update={"test_series": True, "lags": 0})
    timed = timeline.run(cl.table, cl.times, disc.kinds, disc.codes, all_cards, cfg.model_copy(update={"time": probe_time}),
                         {c: v.get("method") for c, v in (disc.summary.get("columns") or {}).items()})
    names = list(timed.names)
    for n in (x, y, *given):
        if n not in names:
            close = difflib.get_close_matches(n, names, n=3)
            hint = f" (did you mean {', '.join(f'`{c}`' for c in close)}?)" if close else ""
            raise ConfigError(f"`{n}` is not a usable signal of this extract{hint}; see cleaning.json of a run for dropped columns.")
    if len({x, y, *given}) != 2 + len(given):
        raise ConfigError("x, y and the --given signals must all be different.")
    n_info = len(disc.codes) - int(timed.summary.get("rows_without_previous", 0)) if timed.timeline is not None else len(disc.codes)
    # alpha as a run on this extract would resolve it: the pairs of its signals (series columns set aside
    # unless `time.test_series`) and of their earlier-window copies
    series = set(timed.summary.get("series") or []) if not cfg.time.test_series else set()
    n_pairs = search_pair_count(sum(1 for n in names if n not in series), cfg.time.lags if timed.timeline is not None else 0)
    cfg, _ = resolve_auto(cfg, n_info, [c for c, s in zip(timed.cards, timed.scores) if s is None], n_pairs)
    settings = EngineSettings.from_config(cfg)
    engine = MixedEngine(timed.codes, timed.names, timed.cards, settings, scores=timed.scores,
                         timeline=timed.timeline, own_past=timed.own_past)
    r = engine.test(x, y, list(given))
    out = r.to_dict()
    out["effect_r"] = r.effect_r
    out["time"] = {k: timed.summary.get(k) for k in ("time_column", "series", "window_seconds")}
    out["flags"] = list(r.flags)
    out["alpha"] = float(settings.alpha)
    return out


def plain_words(result: dict[str, Any]) -> str:
    """The probe's result as a sentence, with the alpha it used."""
    from .report._common import fmt_num, p_is

    given = "{" + ", ".join(result["given"]) + "}" if result["given"] else "no conditioning set"
    alpha = float(result["alpha"])
    if result["independent"]:
        outcome = f"no evidence of dependence given {given} ({p_is(result['pvalue'])} > alpha = {alpha:g})"
    else:
        outcome = f"dependent given {given} ({p_is(result['pvalue'])} \u2264 alpha = {alpha:g})"
    if result.get("policy_applied"):
        outcome += f"; decided by the sparse-table policy `{result.get('policy')}`, not by the p-value"
    lines = [f"{result['x']} and {result['y']}: {outcome}."]
    if result["method"] == "gcm":
        past = result.get("correction", "none") != "none"
        sources = ([given] if result["given"] else []) + (["its own previous window"] if past else [])
        predicted = " and ".join(sources) if sources else "nothing (no conditioning set)"
        lines += [
            f"Test: residual correlation (generalised covariance measure). Each of the two was predicted from "
            f"{predicted} (numbers by their ranks, along flexible curves; a separate level for every combination "
            f"of the categories held fixed), and what is left of {result['x']} was compared with what is left of "
            f"{result['y']}. \"Dependent\" means the two leftovers still move together: the predictions do not "
            "explain the association.",
            f"Statistic {fmt_num(result['statistic'])} on {result['dof']} degrees of freedom (chi-square), "
            f"{result['n']} rows; residual correlation r = {fmt_num(result.get('effect_r', float('nan')))}.",
        ]
    else:
        lines += [
            f"Test: {result['method']}, statistic {fmt_num(result['statistic'])} on {result['dof']} degrees of freedom, "
            f"{result['n']} rows.",
            f"Effect given the set: {fmt_num(result['cmi_bits'])} bits (conditional mutual information); "
            f"association ignoring other signals: Cram\u00e9r's V {fmt_num(result['cramers_v'])}.",
        ]
    if result.get("flags"):
        lines.append("Read with care: " + ", ".join(str(f) for f in result["flags"]) + ".")
    return "\n".join(lines)
