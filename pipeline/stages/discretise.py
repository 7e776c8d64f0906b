"""Discretise: every kept column becomes small integer codes with readable level labels.

Categorical and boolean columns keep their levels; numeric columns are kept level by level when they
hold a few whole numbers, or binned (quantile, uniform or fixed cut points). ``-1`` is missing unless
``test.missing: level`` gives missing values a level of their own, ``(missing)``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import pandas as pd

from ..config import ColumnSpec, Config
from ..errors import ConfigError
from . import _data_bins as _bins
from ._data_common import smallest_int_dtype
from .clean import Cleaned

__all__ = ["Discretised", "run"]


@dataclass(frozen=True)
class Discretised:
    """Integer codes for the tests, and what each code means.

    Attributes
    ----------
    codes : pandas.DataFrame
        One column per kept signal, in the smallest signed integer dtype that fits; -1 = missing.
    levels : dict
        Column -> labels, the label of code ``i`` at position ``i`` (e.g. ``"[120, 250) ms"``).
    edges : dict
        Column -> cut points for binned columns (bin 0 is ``x < edges[0]``, the last bin
        ``x >= edges[-1]``), None for columns coded level by level.
    kinds : dict
        Column -> ``"numeric"``, ``"categorical"`` or ``"boolean"`` (as cleaned).
    summary : dict
        Per column: method, number of levels, missing and unknown counts, whether levels were reused.
    """

    codes: pd.DataFrame
    levels: dict[str, list[str]]
    edges: dict[str, list[float] | None]
    kinds: dict[str, str]
    summary: dict[str, Any]


def run(cleaned: Cleaned, cfg: Config, reuse: dict | None = None) -> Discretised:
    """Code every kept column of `cleaned`.

    Parameters
    ----------
    cleaned : Cleaned
        The output of `pipeline.stages.clean.run`.
    cfg : Config
        Uses ``discretise``, ``columns`` (per-column method, bins, edges, unit), ``test.missing``
        and ``limits.max_levels``.
    reuse : dict, optional
        ``{"levels": ..., "edges": ...}`` of an earlier run (its ``levels.json``): those columns get
        the same cut points and level lists; values at unknown levels are coded -1 and counted.

    Returns
    -------
    Discretised

    Examples
    --------
    >>> import pandas as pd
    >>> from pipeline.config import config_from_dict
    >>> from pipeline.stages.clean import Cleaned
    >>> from pipeline.stages._data_common import empty_rejected
    >>> t = pd.DataFrame({"latency": [90.0, 130.0, 300.0, None], "zone": ["b", "a", None, "a"]})
    >>> c = Cleaned(t, {"latency": "numeric", "zone": "categorical"}, [], empty_rejected(), {})
    >>> cfg = config_from_dict({"columns": {"latency": {"edges": [120, 250], "unit": "ms"}}})
    >>> d = run(c, cfg)
    >>> d.codes["latency"].tolist(), d.levels["latency"], d.codes["zone"].tolist()
    ([0, 1, 2, -1], ['< 120 ms', '[120, 250) ms', '>= 250 ms'], [1, 0, -1, 0])
    """
    known = _check_reuse(reuse)
    hints = (cleaned.summary or {}).get("level_order", {})
    codes, levels, edges, info = {}, {}, {}, {}
    for name in cleaned.table.columns:
        values, kind = cleaned.table[name], cleaned.kinds[name]
        if name in known["levels"]:
            coded = _bins.reapply(
                name, values, kind, list(known["levels"][name]), known["edges"].get(name)
            )
        else:
            coded = _bins.fresh(
                name,
                values,
                kind,
                _spec_for(cleaned, cfg, name),
                cfg.discretise,
                cfg.limits.max_levels,
                hints.get(name),
            )
        if kind in ("categorical", "boolean") and name not in known["levels"]:
            present = coded.codes >= 0  # fresh levels code exactly the missing values -1
        else:
            present = values.notna().to_numpy()
        coded = _bins.attach_missing(coded, present, cfg.test.missing)
        _bins.check_levels(name, len(coded.levels), cfg.limits.max_levels)
        codes[name] = coded.codes.astype(smallest_int_dtype(len(coded.levels)), copy=False)
        levels[name], edges[name] = coded.levels, coded.edges
        info[name] = dict(
            kind=kind,
            method=coded.method,
            levels=len(coded.levels),
            missing=int((coded.codes == -1).sum()),
            reused=name in known["levels"],
            **coded.facts,
        )
    summary = {
        "columns": info,
        "missing_policy": cfg.test.missing,
        "reused": bool(known["levels"]),
        "unknown_levels": {n: i["unknown"] for n, i in info.items() if i.get("unknown")},
        "not_in_data": sorted(set(known["levels"]) - set(cleaned.table.columns)),
    }
    table = pd.DataFrame(codes, index=cleaned.table.index, copy=False)  # one block per column: no stacking copy
    return Discretised(table, levels, edges, dict(cleaned.kinds), summary)


def _check_reuse(reuse: dict | None) -> dict[str, dict]:
    """The ``levels`` and ``edges`` maps of a reused ``levels.json`` (empty when not reusing)."""
    if reuse is None:
        return {"levels": {}, "edges": {}}
    if not isinstance(reuse, dict) or not isinstance(reuse.get("levels"), dict):
        raise ConfigError(
            "The reused levels must be the content of a `levels.json` "
            '(`{"levels": {...}, "edges": {...}}`); check `discretise.reuse_from`.'
        )
    return {"levels": reuse["levels"], "edges": dict(reuse.get("edges") or {})}


def _spec_for(cleaned: Cleaned, cfg: Config, name: str) -> ColumnSpec | None:
    """The `columns:` entry of a kept column, looked up under its name before any rename."""
    original = (cleaned.summary or {}).get("renamed", {}).get(name, name)
    return cfg.columns.get(original) or cfg.columns.get(name)
