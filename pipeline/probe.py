"""One test on demand, through the same ingest, clean and discretise stages as a run."""

from __future__ import annotations

import difflib
import os
from pathlib import Path
from typing import Any, Sequence

from .config import Config, resolve_auto
from .errors import ConfigError
from .independence.engine import CIEngine, EngineSettings
from .stages import clean, discretise, ingest

__all__ = ["plain_words", "probe"]


def probe(cfg: Config, input_path: str | os.PathLike[str], x: str, y: str, given: Sequence[str] = ()) -> dict[str, Any]:
    """Test `x` independent of `y` given `given` on an extract; returns the result as plain data."""
    from .api import _coded_matrix, _input_files  # the same input resolution as a run

    _input_files(Path(input_path))
    ing = ingest.run(Path(input_path), cfg.input, cfg.limits)
    cl = clean.run(ing, cfg)
    disc = discretise.run(cl, cfg, None)
    names = [str(c) for c in disc.codes.columns]
    for n in (x, y, *given):
        if n not in names:
            close = difflib.get_close_matches(n, names, n=3)
            hint = f" (did you mean {', '.join(f'`{c}`' for c in close)}?)" if close else ""
            raise ConfigError(f"`{n}` is not a usable signal of this extract{hint}; see cleaning.json of a run for dropped columns.")
    if len({x, y, *given}) != 2 + len(given):
        raise ConfigError("x, y and the --given signals must all be different.")
    cards = [max(1, len(disc.levels[n])) for n in names]
    cfg, _ = resolve_auto(cfg, len(disc.codes), cards)
    settings = EngineSettings.from_config(cfg)
    engine = CIEngine(_coded_matrix(disc.codes), names, cards, settings)
    r = engine.test(x, y, list(given))
    out = r.to_dict()
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
    lines = [
        f"{result['x']} and {result['y']}: {outcome}.",
        f"Test: {result['method']}, statistic {fmt_num(result['statistic'])} on {result['dof']} degrees of freedom, "
        f"{result['n']} rows.",
        f"Effect given the set: {fmt_num(result['cmi_bits'])} bits (conditional mutual information); "
        f"association ignoring other signals: Cram\u00e9r's V {fmt_num(result['cramers_v'])}.",
    ]
    if result.get("flags"):
        lines.append("Read with care: " + ", ".join(str(f) for f in result["flags"]) + ".")
    return "\n".join(lines)
