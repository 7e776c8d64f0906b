"""Compare the graphs of two runs: added, removed and kept links, turned edges, evidence drift.

A pair is *added* when it is linked in run B and not in run A, *removed* the other way round, and
*kept* when linked in both. Pairs present in only one run's evidence (a column kept in one run only)
count as not linked in the other. For kept pairs the orientation marks are compared (``a -> b``,
``b -> a`` or undirected, where ``a -- b`` and ``ambiguous`` both mean undirected); when either
run has orientation off (empty ``orientation``), orientation is not compared.

The structural Hamming distance is ``added + removed + orientation changes among kept pairs``: the
number of pairs whose edge marks differ, the definition causal-learn's ``SHD`` computes.

A pair is *near alpha* when the p-value its verdict rests on (the ``pvalue`` column of
``evidence.parquet``: the removing test of a removed pair, the weakest test of a linked pair) lies
within a factor ``search.near_alpha_factor`` of that run's ``test.alpha`` on either side,
``alpha / f < p < alpha * f``, in either run.

Flips are not changes until tested: `run` tests every flipped pair and every pair near alpha for a
change of its conditional association between the two nights, and every signal for a change of its
distribution given its neighbours (`pipeline.change`), with Benjamini-Hochberg q-values over all of
them. ``added`` and ``removed`` keep only the flips whose change test has ``q <= compare.alpha``; the
other flips are ``unconfirmed``; ``mechanism_changes`` are the signals whose test passed. Without the
runs' coded data (``discretised.parquet``) nothing can be tested and every flip is unconfirmed.

Artifacts written to the comparison folder: ``diff.parquet``, ``diff.csv`` (one row per pair
linked in at least one run or near alpha in either; ``change`` is added, removed, unconfirmed, kept
or unlinked, ``flip`` the raw flip, with the change test's figures), ``mechanism.csv`` (one row per
signal's mechanism test), ``diff.dot``, ``diff.svg`` and ``diff.html``.
"""

from __future__ import annotations

import html
import io
import json
import math
import os
import re
import sys
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Optional, Union

import numpy as np
import pandas as pd

from .change import ChangeTest, NightData, mechanism_change, pair_change, with_qvalues
from .config import Config
from .errors import EXIT_CHANGED, EXIT_OK, ConfigError, DataError
from .pairs import pair_key
from .runs import RunFolder, atomic_write_bytes, atomic_write_text

__all__ = ["Comparison", "run", "confirm", "diff_evidence", "resolve_run", "compare_main", "DIFF_COLUMNS"]

Pair = tuple[str, str]
PathLike = Union[str, "os.PathLike[str]"]

DIFF_COLUMNS = [
    "var_a", "var_b", "change", "linked_a", "linked_b", "orientation_a", "orientation_b",
    "orientation_changed", "pvalue_a", "pvalue_b", "cmi_bits_a", "cmi_bits_b", "given_a", "given_b",
    "near_alpha_a", "near_alpha_b", "flip", "change_pvalue", "change_qvalue", "change_method",
    "change_given", "effect", "effect_a", "effect_b",
]
MECHANISM_COLUMNS = ["signal", "neighbours", "change_pvalue", "change_qvalue", "change_method",
                     "statistic", "dof", "supported"]
_UNDIRECTED = "--"
TIMELINE_SERIES, TIMELINE_ORDER = "series", "order"  # columns of a run's timeline.parquet


@dataclass(frozen=True)
class Comparison:
    """The difference between run A (before) and run B (after).

    Attributes
    ----------
    run_a, run_b : str
        Names of the two runs (folder names).
    added, removed, kept : tuple of (str, str)
        Linked pairs, each ``(var_a, var_b)`` in the evidence's order, sorted.
    orientation_changes : tuple of dict
        ``{"pair": [a, b], "before": str, "after": str}`` for kept pairs whose marks differ.
    table : pandas.DataFrame
        One row per pair linked in either run or near alpha in either (columns `DIFF_COLUMNS`).
    near_alpha : tuple of dict
        ``{"pair", "pvalue_a", "pvalue_b", "near_in", "linked_a", "linked_b"}``.
    warnings : tuple of str
        Category mismatches and other things the reader should know.
    """

    run_a: str
    run_b: str
    added: tuple[Pair, ...]
    removed: tuple[Pair, ...]
    kept: tuple[Pair, ...]
    orientation_changes: tuple[dict[str, Any], ...]
    table: pd.DataFrame
    near_alpha: tuple[dict[str, Any], ...]
    alpha: tuple[float, float] = (0.05, 0.05)
    near_alpha_factor: tuple[float, float] = (2.0, 2.0)
    warnings: tuple[str, ...] = field(default_factory=tuple)
    unconfirmed: tuple[Pair, ...] = ()
    mechanism: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=MECHANISM_COLUMNS))
    change_alpha: float = 0.05
    tested: bool = False

    @property
    def shd(self) -> int:
        """Structural Hamming distance: every flip (supported or not) plus orientation changes."""
        return len(self.added) + len(self.removed) + len(self.unconfirmed) + len(self.orientation_changes)

    @property
    def mechanism_changes(self) -> tuple[str, ...]:
        """Signals whose distribution given their neighbours changed (supported by the test)."""
        m = self.mechanism
        return tuple(str(s) for s in m.loc[m["supported"].astype(bool), "signal"]) if len(m) else ()

    @property
    def changed(self) -> int:
        """Supported changes: added + removed links + mechanism changes (what ``--fail-on-change`` counts)."""
        return len(self.added) + len(self.removed) + len(self.mechanism_changes)

    def pair_figures(self, pair: Pair) -> dict[str, Any]:
        """The change test's figures of one pair: p, q, effects before and after, and more."""
        t = self.table
        r = t[(t["var_a"] == pair[0]) & (t["var_b"] == pair[1])].iloc[0]
        return {
            "pair": [pair[0], pair[1]], "flip": str(r["flip"]),
            "change_pvalue": _num(r["change_pvalue"]), "change_qvalue": _num(r["change_qvalue"]),
            "change_method": str(r["change_method"]), "given": str(r["change_given"]),
            "effect": str(r["effect"]), "effect_before": _num(r["effect_a"]),
            "effect_after": _num(r["effect_b"]), "pvalue_before": _num(r["pvalue_a"]),
            "pvalue_after": _num(r["pvalue_b"]), "cmi_bits_before": _num(r["cmi_bits_a"]),
            "cmi_bits_after": _num(r["cmi_bits_b"]),
        }

    def summary(self) -> dict[str, Any]:
        """The change summary a nightly report shows: previous run, supported changes, unconfirmed flips."""
        return {
            "previous_run": self.run_a,
            "added": [self.pair_figures(p) for p in self.added],
            "removed": [self.pair_figures(p) for p in self.removed],
            "unconfirmed": [self.pair_figures(p) for p in self.unconfirmed],
            "mechanism_changes": [
                {"signal": str(r.signal), "neighbours": str(r.neighbours),
                 "change_pvalue": _num(r.change_pvalue), "change_qvalue": _num(r.change_qvalue),
                 "change_method": str(r.change_method)}
                for r in self.mechanism.itertuples(index=False) if bool(r.supported)
            ],
        }

    def to_json(self) -> dict[str, Any]:
        """Plain-data summary (what ``--json`` prints)."""
        kept_rows = self.table[self.table["change"] == "kept"]
        s = self.summary()
        return {
            "run_a": self.run_a,
            "run_b": self.run_b,
            "tested": self.tested,
            "change_alpha": self.change_alpha,
            "added": s["added"],
            "removed": s["removed"],
            "unconfirmed": s["unconfirmed"],
            "mechanism_changes": s["mechanism_changes"],
            "mechanism_tests": [
                {"signal": str(r.signal), "neighbours": str(r.neighbours),
                 "change_pvalue": _num(r.change_pvalue), "change_qvalue": _num(r.change_qvalue),
                 "supported": bool(r.supported)}
                for r in self.mechanism.itertuples(index=False)
            ],
            "kept": len(self.kept),
            "orientation_changes": list(self.orientation_changes),
            "shd": self.shd,
            "evidence_change": [
                {
                    "pair": [r.var_a, r.var_b],
                    "pvalue_a": _num(r.pvalue_a),
                    "pvalue_b": _num(r.pvalue_b),
                    "cmi_bits_a": _num(r.cmi_bits_a),
                    "cmi_bits_b": _num(r.cmi_bits_b),
                }
                for r in kept_rows.itertuples(index=False)
            ],
            "near_alpha": list(self.near_alpha),
            "alpha": list(self.alpha),
            "near_alpha_factor": list(self.near_alpha_factor),
            "warnings": list(self.warnings),
        }


# ----------------------------------------------------------------------------- public entry points


def run(
    run_a: PathLike,
    run_b: PathLike,
    *,
    category_mismatch: str = "warn",
    near_alpha_factor: Optional[float] = None,
    change_alpha: float = 0.05,
) -> Comparison:
    """Compare two run folders (A before, B after).

    Parameters
    ----------
    run_a, run_b : path
        Run folders holding ``evidence.parquet``, ``levels.json`` and ``manifest.json``.
    category_mismatch : {"warn", "refuse"}
        What to do when the two runs' ``levels.json`` differ: a warning, or `DataError`.
    near_alpha_factor : float, optional
        Overrides the factor each run's manifest records (``search.near_alpha_factor``).
    change_alpha : float
        False discovery rate of the change tests (``compare.alpha``): a flip or a mechanism change
        is supported when its Benjamini-Hochberg q-value is at most this.

    Returns
    -------
    Comparison

    Examples
    --------
    >>> run("no/such/run", "no/such/run")
    Traceback (most recent call last):
    ...
    pipeline.errors.DataError: Run folder `no/such/run` has no `evidence.parquet`; give a finished run folder (or `latest` / `previous` with --config).
    """
    if category_mismatch not in ("warn", "refuse"):
        raise ConfigError(
            f"`compare.category_mismatch` = {category_mismatch!r} is not allowed; use warn or refuse."
        )
    a, b = _load(Path(run_a)), _load(Path(run_b))
    warnings = list(_category_warnings(a, b))
    if warnings and category_mismatch == "refuse":
        raise DataError(warnings[0] + " (compare.category_mismatch = refuse; set it to warn to compare anyway)")
    alpha = (a["alpha"], b["alpha"])
    factor = (
        (near_alpha_factor, near_alpha_factor) if near_alpha_factor else (a["factor"], b["factor"])
    )
    cmp = diff_evidence(
        a["evidence"], b["evidence"], alpha=alpha, near_alpha_factor=factor,
        names=(a["name"], b["name"]),
    )
    night_a, night_b = _load_night(Path(run_a), a["levels"]), _load_night(Path(run_b), b["levels"])
    if night_a is None or night_b is None:
        warnings.append(
            "A run folder lacks `discretised.parquet`, so no change could be tested; every flip is "
            "listed as unconfirmed"
        )
    cmp = confirm(cmp, night_a, night_b, alpha=change_alpha)
    if warnings:
        cmp = replace(cmp, warnings=tuple(warnings))
    return cmp


def diff_evidence(
    evidence_a: pd.DataFrame,
    evidence_b: pd.DataFrame,
    *,
    alpha: Union[float, tuple[float, float]] = 0.05,
    near_alpha_factor: Union[float, tuple[float, float]] = 2.0,
    names: tuple[str, str] = ("a", "b"),
) -> Comparison:
    """Compare two evidence tables (columns var_a, var_b, linked, pvalue, cmi_bits, orientation).

    Examples
    --------
    >>> a = pd.DataFrame({"var_a": ["x", "x"], "var_b": ["y", "z"], "linked": [True, False],
    ...                   "pvalue": [1e-9, 0.5], "orientation": ["x -- y", ""]})
    >>> b = a.assign(linked=[False, True], pvalue=[0.4, 1e-6], orientation=["", "x -> z"])
    >>> c = diff_evidence(a, b)
    >>> c.added, c.removed, c.shd
    ((('x', 'z'),), (('x', 'y'),), 2)
    """
    alpha_ab = alpha if isinstance(alpha, tuple) else (alpha, alpha)
    factor_ab = (
        near_alpha_factor if isinstance(near_alpha_factor, tuple)
        else (near_alpha_factor, near_alpha_factor)
    )
    ea, eb = _indexed(evidence_a), _indexed(evidence_b)
    pairs = sorted(set(ea) | set(eb))
    rows = []
    for pair in pairs:
        ra, rb = ea.get(pair, {}), eb.get(pair, {})
        la, lb = bool(ra.get("linked", False)), bool(rb.get("linked", False))
        pa, pb = _float(ra.get("pvalue")), _float(rb.get("pvalue"))
        oa, ob = str(ra.get("orientation", "") or ""), str(rb.get("orientation", "") or "")
        near_a = _near(pa, alpha_ab[0], factor_ab[0])
        near_b = _near(pb, alpha_ab[1], factor_ab[1])
        change = "added" if lb and not la else "removed" if la and not lb else "kept" if la else ""
        turned = change == "kept" and _marks_differ(pair, oa, ob)
        if not change and not (near_a or near_b):
            continue
        rows.append({
            "var_a": pair[0], "var_b": pair[1], "change": change or "unlinked",
            "linked_a": la, "linked_b": lb, "orientation_a": oa, "orientation_b": ob,
            "orientation_changed": turned, "pvalue_a": pa, "pvalue_b": pb,
            "cmi_bits_a": _float(ra.get("cmi_bits")), "cmi_bits_b": _float(rb.get("cmi_bits")),
            "given_a": str(ra.get("given", "") or ""), "given_b": str(rb.get("given", "") or ""),
            "near_alpha_a": near_a, "near_alpha_b": near_b,
            "flip": change if change in ("added", "removed") else "",
            "change_pvalue": math.nan, "change_qvalue": math.nan, "change_method": "",
            "change_given": "", "effect": "", "effect_a": math.nan, "effect_b": math.nan,
        })
    table = pd.DataFrame(rows, columns=DIFF_COLUMNS)
    table = table.astype({
        "var_a": "string", "var_b": "string", "change": "string", "linked_a": bool,
        "linked_b": bool, "orientation_a": "string", "orientation_b": "string",
        "orientation_changed": bool, "pvalue_a": float, "pvalue_b": float, "cmi_bits_a": float,
        "cmi_bits_b": float, "given_a": "string", "given_b": "string", "near_alpha_a": bool,
        "near_alpha_b": bool, "flip": "string", "change_pvalue": float, "change_qvalue": float,
        "change_method": "string", "change_given": "string", "effect": "string", "effect_a": float,
        "effect_b": float,
    })
    pick = lambda kind: tuple(  # noqa: E731
        (str(r.var_a), str(r.var_b)) for r in table.itertuples(index=False) if r.change == kind
    )
    turned_rows = table[table["orientation_changed"]]
    near_rows = table[table["near_alpha_a"] | table["near_alpha_b"]]
    return Comparison(
        run_a=names[0],
        run_b=names[1],
        added=pick("added"),
        removed=pick("removed"),
        kept=pick("kept"),
        orientation_changes=tuple(
            {"pair": [str(r.var_a), str(r.var_b)], "before": str(r.orientation_a),
             "after": str(r.orientation_b)}
            for r in turned_rows.itertuples(index=False)
        ),
        table=table,
        near_alpha=tuple(
            {"pair": [str(r.var_a), str(r.var_b)], "pvalue_a": _num(r.pvalue_a),
             "pvalue_b": _num(r.pvalue_b),
             "near_in": [k for k, f in (("a", r.near_alpha_a), ("b", r.near_alpha_b)) if f],
             "linked_a": bool(r.linked_a), "linked_b": bool(r.linked_b)}
            for r in near_rows.itertuples(index=False)
        ),
        alpha=(float(alpha_ab[0]), float(alpha_ab[1])),
        near_alpha_factor=(float(factor_ab[0]), float(factor_ab[1])),
    )


def confirm(
    cmp: Comparison,
    night_a: Optional[NightData],
    night_b: Optional[NightData],
    *,
    alpha: float = 0.05,
) -> Comparison:
    """Test every flip, every pair near alpha and every signal's mechanism; keep supported flips.

    Each pair is tested given each distinct deciding conditioning set of the two nights (the
    ``given`` of its evidence rows); its p-value is the smallest, times the number of sets
    (Bonferroni). Benjamini-Hochberg runs over all pair and mechanism tests together. A signal's
    neighbours are the union of its linked pairs in either night. Without data (either night None)
    nothing is tested and every flip is unconfirmed.
    """
    t = cmp.table.copy()
    tests: list[ChangeTest] = []
    rows_tested: list[int] = []
    mech_rows: list[dict[str, Any]] = []
    if night_a is not None and night_b is not None:
        common = set(night_a.codes.columns) & set(night_b.codes.columns)
        for i, r in enumerate(t.itertuples(index=False)):
            x, y = str(r.var_a), str(r.var_b)
            if not (r.flip or r.near_alpha_a or r.near_alpha_b) or not {x, y} <= common:
                continue
            sets = []
            for text in (str(r.given_a), str(r.given_b)):
                g = tuple(sorted(v for v in text.split(";") if v and v in common))
                if g not in sets:
                    sets.append(g)
            found = [_safe_test(pair_change, night_a, night_b, x, y, g) for g in sets]
            best = min(found, key=lambda c: c.pvalue)
            tests.append(replace(best, pvalue=min(1.0, best.pvalue * len(found))))
            rows_tested.append(i)
        linked = t[t["linked_a"] | t["linked_b"]]
        for sig in sorted(common):
            nbrs = sorted(
                {str(v) for v in linked.loc[linked["var_a"] == sig, "var_b"]}
                | {str(v) for v in linked.loc[linked["var_b"] == sig, "var_a"]}
            )
            tests.append(_safe_test(mechanism_change, night_a, night_b, sig, [n for n in nbrs if n in common]))
    tests = with_qvalues(tests)
    for i, c in zip(rows_tested, tests):
        t.loc[t.index[i], ["change_pvalue", "change_qvalue", "effect_a", "effect_b"]] = [
            c.pvalue, c.qvalue, c.effect_a, c.effect_b]
        t.loc[t.index[i], ["change_method", "change_given", "effect"]] = [c.method, ";".join(c.given), c.effect]
    for c in tests[len(rows_tested):]:
        mech_rows.append({
            "signal": c.var_a, "neighbours": ";".join(c.given), "change_pvalue": c.pvalue,
            "change_qvalue": c.qvalue, "change_method": c.method, "statistic": c.statistic,
            "dof": c.dof, "supported": bool(c.qvalue <= alpha),
        })
    supported = t["change_qvalue"].fillna(1.0) <= alpha
    t.loc[(t["flip"] != "") & ~supported, "change"] = "unconfirmed"
    pick = lambda kind: tuple(  # noqa: E731
        (str(r.var_a), str(r.var_b)) for r in t.itertuples(index=False) if r.change == kind
    )
    near = []
    for n in cmp.near_alpha:
        hit = t[(t["var_a"] == n["pair"][0]) & (t["var_b"] == n["pair"][1])].iloc[0]
        near.append({**n, "change_pvalue": _num(hit["change_pvalue"]),
                     "change_qvalue": _num(hit["change_qvalue"]),
                     "association_changed": bool(_float(hit["change_qvalue"]) <= alpha)})
    mech = pd.DataFrame(mech_rows, columns=MECHANISM_COLUMNS).astype(
        {"signal": "string", "neighbours": "string", "change_pvalue": float, "change_qvalue": float,
         "change_method": "string", "statistic": float, "dof": "int64", "supported": bool})
    return replace(
        cmp, table=t, added=pick("added"), removed=pick("removed"), unconfirmed=pick("unconfirmed"),
        near_alpha=tuple(near), mechanism=mech, change_alpha=float(alpha),
        tested=night_a is not None and night_b is not None,
    )


def _safe_test(fn: Any, a: NightData, b: NightData, *args: Any) -> ChangeTest:
    """Run one change test; a numerically impossible one (no usable rows) is a p-value of 1."""
    try:
        return fn(a, b, *args)
    except (np.linalg.LinAlgError, ValueError) as err:
        x = str(args[0])
        y = str(args[1]) if fn is pair_change else ""
        given = tuple(args[-1])
        return ChangeTest("pair" if fn is pair_change else "mechanism", x, y, given,
                          f"not testable ({type(err).__name__})", math.nan, 0, 1.0, 0, 0)


def resolve_run(
    spec: PathLike, cfg: Optional[Config] = None, config_path: Optional[Path] = None
) -> Path:
    """A run folder from a path, or from ``latest`` / ``previous`` / a run name under the output root.

    An existing folder wins; otherwise, with a configuration, ``latest`` and ``previous`` follow the
    nightly pointers and any other plain name is looked up under the output root.
    """
    text = os.fspath(spec)
    path = Path(text)
    if path.is_dir() and text not in ("latest", "previous"):
        return path
    if cfg is None:
        if text in ("latest", "previous"):
            raise ConfigError(
                f"`{text}` needs the configuration whose runs it points into; add --config FILE."
            )
        return path  # `run` reports the missing folder
    from .nightly import read_pointer
    from .runs import output_root

    root = Path(output_root(cfg, config_path))
    if text in ("latest", "previous"):
        name = read_pointer(root, text)
        if name is None:
            raise DataError(
                f"No `{text}` run under `{root}` yet; run `edgeproof nightly` (twice for `previous`)."
            )
        return root / name
    if path.is_dir():
        return path
    if "/" not in text and "\\" not in text and text not in (".", "..") and (root / text).is_dir():
        return root / text
    return path


def compare_main(
    run_a: PathLike,
    run_b: PathLike,
    *,
    cfg: Optional[Config] = None,
    config_path: Optional[Path] = None,
    json_out: bool = False,
    fail_on_change: Optional[int] = None,
    out_dir: Optional[PathLike] = None,
) -> int:
    """Command-line body of ``edgeproof compare``: compare, write artifacts, print, return exit code."""
    if fail_on_change is not None and fail_on_change < 0:
        raise ConfigError(f"`--fail-on-change {fail_on_change}` must be 0 or more.")
    folder_a = resolve_run(run_a, cfg, config_path)
    folder_b = resolve_run(run_b, cfg, config_path)
    mismatch = cfg.compare.category_mismatch if cfg is not None else "warn"
    factor = cfg.search.near_alpha_factor if cfg is not None else None
    change_alpha = cfg.compare.alpha if cfg is not None else 0.05
    cmp = run(folder_a, folder_b, category_mismatch=mismatch, near_alpha_factor=factor,
              change_alpha=change_alpha)
    if out_dir is None:
        base = Path.cwd()
        if cfg is not None:
            from .runs import output_root

            base = Path(output_root(cfg, config_path))
        out = base / f"compare-{_safe(cmp.run_a)}-{_safe(cmp.run_b)}"
    else:
        out = Path(out_dir)
    written = _write(cmp, out)
    for w in cmp.warnings:
        print(f"edgeproof compare: warning: {w}", file=sys.stderr)
    if json_out:
        print(json.dumps({**cmp.to_json(), "out_dir": str(out)}, indent=2, allow_nan=False))
    else:
        print(_text_summary(cmp))
        print(f"Written: {', '.join(str(p) for p in written)}")
    if fail_on_change is not None and cmp.changed > fail_on_change:
        print(
            f"edgeproof compare: {cmp.changed} supported changes, more than --fail-on-change "
            f"{fail_on_change}.",
            file=sys.stderr,
        )
        return EXIT_CHANGED
    return EXIT_OK


def compare_main_quiet(run_a: Path, run_b: Path, cfg: Config, out: Path) -> dict[str, Any]:
    """Compare two runs with the configuration's settings, write the artifacts into `out`, return the summary."""
    cmp = run(run_a, run_b, category_mismatch="warn", near_alpha_factor=cfg.search.near_alpha_factor,
              change_alpha=cfg.compare.alpha)
    _write(cmp, out)
    return {**cmp.summary(), "warnings": list(cmp.warnings)}


# ----------------------------------------------------------------------------- loading


def _load(folder: Path) -> dict[str, Any]:
    """Evidence, levels and the alpha settings of one run folder."""
    run = RunFolder(folder)
    ev_path = folder / "evidence.parquet"
    if not run.has("evidence.parquet"):
        raise DataError(
            f"Run folder `{folder}` has no `evidence.parquet`; give a finished run folder "
            f"(or `latest` / `previous` with --config)."
        )
    evidence = run.table("evidence.parquet")
    missing = {"var_a", "var_b", "linked", "pvalue"} - set(evidence.columns)
    if missing:
        raise DataError(f"`{ev_path}` lacks columns {sorted(missing)}; re-run that snapshot.")
    levels = run.json("levels.json")
    manifest = run.json("manifest.json")
    conf = manifest.get("config", {}) if isinstance(manifest, dict) else {}
    alpha = _float((conf.get("test") or {}).get("alpha"))
    factor = _float((conf.get("search") or {}).get("near_alpha_factor"))
    return {
        "name": run.name,
        "evidence": evidence,
        "levels": levels if isinstance(levels, dict) else {},
        "alpha": alpha if math.isfinite(alpha) else 0.05,
        "factor": factor if math.isfinite(factor) else 2.0,
    }


def _load_night(folder: Path, levels: dict[str, Any]) -> Optional[NightData]:
    """The coded data of a run (``discretised.parquet``) and, when the run has it, its time table.

    ``timeline.parquet`` (rows aligned with the codes) may hold ``series`` (series id), ``order``
    (time order within the series) and the raw values of numeric signals under their own names.
    Without it the night is categorical with independent rows. None when the codes are missing.
    """
    run = RunFolder(folder)
    path, timeline = folder / "discretised.parquet", folder / "timeline.parquet"
    if not run.has("discretised.parquet"):
        return None
    codes = run.table("discretised.parquet")
    kinds = {str(k): str(v) for k, v in (levels.get("kinds") or {}).items()}
    if not run.has("timeline.parquet"):
        return NightData(codes, kinds)
    tl = run.table("timeline.parquet")
    if len(tl) != len(codes):
        raise DataError(
            f"`{timeline}` has {len(tl)} rows but `{path}` has {len(codes)}; re-run that snapshot."
        )
    numeric = [c for c in codes.columns if kinds.get(c) == "numeric" and c in tl.columns]
    series = tl[TIMELINE_SERIES].to_numpy() if TIMELINE_SERIES in tl.columns else None
    order = tl[TIMELINE_ORDER].to_numpy(dtype=np.int64) if TIMELINE_ORDER in tl.columns else None
    values = tl[numeric].astype(float) if numeric else None
    return NightData(codes, kinds, values, series, order)


def _category_warnings(a: dict[str, Any], b: dict[str, Any]) -> list[str]:
    """One sentence per kind of difference between the two runs' ``levels.json``."""
    la, lb = a["levels"].get("levels", {}) or {}, b["levels"].get("levels", {}) or {}
    if not la and not lb:
        return []
    only_a, only_b = sorted(set(la) - set(lb)), sorted(set(lb) - set(la))
    differ = sorted(c for c in set(la) & set(lb) if list(la[c]) != list(lb[c]))
    out = []
    if differ:
        c = differ[0]
        more = f" and {len(differ) - 1} more" if len(differ) > 1 else ""
        out.append(
            f"Runs `{a['name']}` and `{b['name']}` use different categories for `{c}`{more} "
            f"({_short(la[c])} vs {_short(lb[c])}); links may change because the bins moved. "
            f"Set discretise.reuse_from to the earlier run to compare like with like"
        )
    if only_a or only_b:
        out.append(
            f"Runs `{a['name']}` and `{b['name']}` test different columns (only in A: "
            f"{', '.join(only_a) or '-'}; only in B: {', '.join(only_b) or '-'}); pairs of a missing "
            f"column count as not linked"
        )
    return out


def _indexed(evidence: pd.DataFrame) -> dict[Pair, dict[str, Any]]:
    """Evidence rows keyed by the unordered pair (sorted by name, so both runs agree)."""
    out: dict[Pair, dict[str, Any]] = {}
    for rec in evidence.to_dict("records"):
        a, b = str(rec["var_a"]), str(rec["var_b"])
        out[pair_key(a, b)] = rec
    return out


def _marks(pair: Pair, orientation: str) -> Optional[str]:
    """``a->b``, ``b->a`` or undirected for a linked pair; None when orientation is off."""
    a, b = pair
    text = orientation.strip()
    if not text:
        return None
    if text == f"{a} -> {b}":
        return "a->b"
    if text == f"{b} -> {a}":
        return "b->a"
    return _UNDIRECTED


def _marks_differ(pair: Pair, before: str, after: str) -> bool:
    """The edge marks changed (only when both runs oriented)."""
    ma, mb = _marks(pair, before), _marks(pair, after)
    return ma is not None and mb is not None and ma != mb


def _near(p: float, alpha: float, factor: float) -> bool:
    """``alpha / factor < p < alpha * factor``."""
    return bool(math.isfinite(p) and alpha / factor < p < alpha * factor)


def _float(value: Any) -> float:
    """A float, NaN for missing."""
    try:
        out = float(value)
    except (TypeError, ValueError):
        return float("nan")
    return out


def _num(value: Any) -> Optional[float]:
    """A JSON-able number: None for NaN."""
    v = _float(value)
    return v if math.isfinite(v) else None


def _short(labels: Any) -> str:
    """A list of labels, cut to the first three."""
    items = [str(x) for x in list(labels)]
    return "[" + ", ".join(items[:3]) + (", ..." if len(items) > 3 else "") + "]"


def _safe(name: str) -> str:
    """A run name usable inside a folder name."""
    return re.sub(r"[^A-Za-z0-9._-]", "_", name).strip(".") or "run"


# ----------------------------------------------------------------------------- writing


def _write(cmp: Comparison, out: Path) -> list[Path]:
    """Write diff.parquet, diff.csv, diff.dot, diff.svg and diff.html into `out`."""
    out.mkdir(parents=True, exist_ok=True)
    written = []
    parquet = out / "diff.parquet"
    buf = io.BytesIO()
    cmp.table.to_parquet(buf, index=False)
    atomic_write_bytes(parquet, buf.getvalue())
    csv = out / "diff.csv"
    atomic_write_text(csv, cmp.table.to_csv(index=False))
    mech = out / "mechanism.csv"
    atomic_write_text(mech, cmp.mechanism.to_csv(index=False))
    written.append(mech)
    dot_source = _dot(cmp)
    dot = out / "diff.dot"
    atomic_write_text(dot, dot_source)
    written += [parquet, csv, dot]
    svg_text = _render_svg(dot_source)
    if svg_text is not None:
        svg = out / "diff.svg"
        atomic_write_text(svg, svg_text)
        written.append(svg)
    page = out / "diff.html"
    atomic_write_text(page, _html(cmp, svg_text))
    written.append(page)
    return written


def _dot(cmp: Comparison) -> str:
    """DOT source: kept solid, added bold with "+ added", removed dashed with "- removed"."""
    import graphviz

    g = graphviz.Digraph("diff", graph_attr={
        "label": f"Links: {cmp.run_a} (before) -> {cmp.run_b} (after)", "labelloc": "t",
        "fontname": "Helvetica", "fontsize": "14", "nodesep": "0.3", "ranksep": "0.45", "pad": "0.2",
    }, node_attr={"shape": "box", "style": "rounded", "fontname": "Helvetica", "fontsize": "14"},
        edge_attr={"fontname": "Helvetica", "fontsize": "12"})
    nodes = sorted(set(cmp.table["var_a"].astype(str)) | set(cmp.table["var_b"].astype(str)))
    ids = {n: f"n{i}" for i, n in enumerate(nodes)}  # plain ids; names only ever appear as labels
    for n in nodes:
        g.node(ids[n], label=graphviz.escape(n))
    for r in cmp.table.itertuples(index=False):
        a, b = ids[str(r.var_a)], ids[str(r.var_b)]
        names = {ids[str(r.var_a)]: str(r.var_a), ids[str(r.var_b)]: str(r.var_b)}
        if r.change == "added":
            head, tail, direction = _direction((a, b), str(r.orientation_b), names)
            g.edge(tail, head, label="+ added", style="bold", penwidth="3", color="#1f4e9c",
                   dir=direction)
        elif r.change == "removed":
            head, tail, direction = _direction((a, b), str(r.orientation_a), names)
            g.edge(tail, head, label="- removed", style="dashed", penwidth="1.5", color="#9c1f1f",
                   dir=direction)
        elif r.change == "unconfirmed":
            g.edge(b, a, label=f"? {r.flip}, not supported", style="dotted", penwidth="1",
                   color="#777777", dir="none")
        elif r.change == "kept":
            head, tail, direction = _direction((a, b), str(r.orientation_b), names)
            label = graphviz.escape(f"kept, turned (was {r.orientation_a})") if r.orientation_changed else ""
            g.edge(tail, head, label=label, style="solid", penwidth="1", color="#333333",
                   dir=direction)
    return g.source  # the key, drawn with line samples, is on diff.html (`_KEY`)


def _direction(
    pair: Pair, orientation: str, names: Optional[dict[str, str]] = None
) -> tuple[str, str, str]:
    """(head, tail, dot dir) for the edge between node ids `pair`, from its orientation text."""
    a, b = pair
    names = names or {a: a, b: b}
    marks = _marks((names[a], names[b]), orientation)
    if marks == "a->b":
        return b, a, "forward"
    if marks == "b->a":
        return a, b, "forward"
    return b, a, "none"


def _render_svg(source: str) -> Optional[str]:
    """SVG text from DOT source, or None (with a warning) when Graphviz `dot` is missing."""
    import graphviz

    try:
        return graphviz.Source(source).pipe(format="svg").decode("utf-8")
    except graphviz.ExecutableNotFound:
        print(
            "edgeproof compare: warning: Graphviz `dot` is not installed; diff.svg not drawn "
            "(install the graphviz system package).",
            file=sys.stderr,
        )
        return None


def _g(v: Optional[float]) -> str:
    """A number in 3 significant digits, '-' for none."""
    return "-" if v is None else f"{v:.3g}"


def _text_summary(cmp: Comparison) -> str:
    """The human summary printed without --json."""
    lines = [
        f"Compare {cmp.run_a} (before) with {cmp.run_b} (after): {len(cmp.added)} added, "
        f"{len(cmp.removed)} removed, {len(cmp.mechanism_changes)} mechanism changes (supported by "
        f"the change test, q <= {cmp.change_alpha:g}); {len(cmp.unconfirmed)} unconfirmed flips; "
        f"{len(cmp.kept)} kept, {len(cmp.orientation_changes)} turned; structural Hamming distance {cmp.shd}."
    ]
    for sign, pairs in (("+", cmp.added), ("-", cmp.removed), ("?", cmp.unconfirmed)):
        for p in pairs:
            f = cmp.pair_figures(p)
            lines.append(f"  {sign} {p[0]} -- {p[1]}  change p = {_g(f['change_pvalue'])}, "
                         f"q = {_g(f['change_qvalue'])}" + (f" ({f['flip']})" if sign == "?" else ""))
    for sig in cmp.mechanism_changes:
        lines.append(f"  ~ {sig}: distribution given its neighbours changed")
    for o in cmp.orientation_changes:
        lines.append(f"  ~ {o['before']}  now  {o['after']}")
    if cmp.near_alpha:
        lines.append(f"  {len(cmp.near_alpha)} pairs rest on a test near alpha: " + ", ".join(
            f"{n['pair'][0]}--{n['pair'][1]}" for n in cmp.near_alpha[:8]
        ) + (" ..." if len(cmp.near_alpha) > 8 else ""))
    return "\n".join(lines)


_TERMS = (
    ("added", "linked after, not linked before."),
    ("removed", "linked before, separated after."),
    ("kept", "linked on both nights."),
    ("turned", "a kept link whose arrow changed (reversed, or became directed or undirected)."),
    ("structural Hamming distance", "added + removed + turned: how many pairs' lines differ between the two "
                                    "graphs."),
    ("p-value", "the p-value each night's outcome rests on (the test that separated the pair, or a linked "
                "pair's weakest test)."),
    ("effect (CMI bits)", "conditional mutual information given the conditioning set: how strongly the pair "
                          "is linked."),
    ("conditioning set", "the signals held fixed in the deciding test."),
    ("near alpha", "the deciding p-value lies within a factor of alpha on either side: the outcome could "
                   "flip by chance on another night."),
)


def _html(cmp: Comparison, svg: Optional[str]) -> str:
    """A self-contained page: summary, picture, and the tables; every string escaped."""
    from .report._page import LineSample, line_key, page_css, terms_list

    e = html.escape
    fmt = lambda v: "" if not math.isfinite(_float(v)) else f"{_float(v):.3g}"  # noqa: E731
    key = line_key([
        LineSample("kept", color="#333333", width=1.5),
        LineSample("+ added: new in after", color="#1f4e9c", width=4),
        LineSample("\u2212 removed: gone in after", color="#9c1f1f", width=2, dash="7 4"),
    ])

    def table(headers: list[str], rows: list[list[str]]) -> str:
        if not rows:
            return "<p>None.</p>"
        head = "".join(f"<th>{e(h)}</th>" for h in headers)
        body = "".join("<tr>" + "".join(c for c in r) + "</tr>" for r in rows)
        return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"

    td = lambda s: f"<td>{e(str(s))}</td>"  # noqa: E731
    tn = lambda v: f'<td class="num">{e(fmt(v))}</td>'  # noqa: E731
    t = cmp.table
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{e(f'Compare {cmp.run_a} with {cmp.run_b}')}</title><style>{page_css()}</style></head><body>",
        f"<header class='page'><h1>{e(cmp.run_a)} (before) &rarr; {e(cmp.run_b)} (after)</h1>",
        f"<p class='sub'>{len(cmp.added)} added, {len(cmp.removed)} removed, {len(cmp.mechanism_changes)} "
        f"mechanism changes (supported); {len(cmp.unconfirmed)} unconfirmed flips; {len(cmp.kept)} "
        f"kept, {len(cmp.orientation_changes)} turned; structural Hamming distance {cmp.shd}.</p></header><main>",
    ]
    for w in cmp.warnings:
        parts.append(f"<p class='warn'>Warning: {e(w)}.</p>")
    if svg is not None:
        start = svg.find("<svg")
        parts.append(f"<figure class='figure'>{svg[start:] if start >= 0 else ''}{key}</figure>")
    parts.append("<h2>Words on this page</h2>" + terms_list(_TERMS))
    heads = ["", "pair", "change p", "change q", "effect before", "effect after", "measure",
             "tested given", "p-value before", "p-value after"]

    def flip_rows(kinds: list[str]) -> list[list[str]]:
        rows = t[t["change"].isin(kinds)]
        return [[td("+" if r.flip == "added" else "\u2212"), td(f"{r.var_a} -- {r.var_b}"),
                 tn(r.change_pvalue), tn(r.change_qvalue), tn(r.effect_a), tn(r.effect_b),
                 td(r.effect), td(r.change_given), tn(r.pvalue_a), tn(r.pvalue_b)]
                for r in rows.itertuples(index=False)]

    parts.append(
        f"<p>A flip is a <em>supported change</em> when the test that the pair's conditional "
        f"association differs between the two nights has a Benjamini-Hochberg q-value of at most "
        f"{e(f'{cmp.change_alpha:g}')}" + ("" if cmp.tested else " (no coded data: nothing was tested)")
        + ".</p>")
    parts.append("<h2>Links added (+) and removed (&minus;): supported changes</h2>")
    parts.append(table(heads, flip_rows(["added", "removed"])))
    parts.append("<h2>Signals whose mechanism changed</h2><p>The distribution of the signal given its "
                 "neighbours (in either night) differs between the nights.</p>")
    m = cmp.mechanism
    parts.append(table(
        ["signal", "neighbours", "change p", "change q", "test"],
        [[td(r.signal), td(r.neighbours), tn(r.change_pvalue), tn(r.change_qvalue), td(r.change_method)]
         for r in m[m["supported"].astype(bool)].itertuples(index=False)] if len(m) else [],
    ))
    parts.append("<h2>Unconfirmed flips</h2><p>Linked on one night only, but the change test does not "
                 "support a change: most likely chance near alpha.</p>")
    parts.append(table(heads, flip_rows(["unconfirmed"])))
    parts.append("<h2>Links turned (arrow changed)</h2>")
    parts.append(table(["before", "after"], [[td(o["before"]), td(o["after"])]
                                             for o in cmp.orientation_changes]))
    kept = t[t["change"] == "kept"]
    parts.append("<h2>Evidence for kept links</h2>")
    parts.append(table(
        ["pair", "p-value before", "p-value after", "effect before (bits)", "effect after (bits)"],
        [[td(f"{r.var_a} -- {r.var_b}"), tn(r.pvalue_a), tn(r.pvalue_b), tn(r.cmi_bits_a),
          tn(r.cmi_bits_b)] for r in kept.itertuples(index=False)],
    ))
    f_a, f_b = cmp.near_alpha_factor
    parts.append(
        f"<h2>Outcomes resting on a test near alpha</h2><p>p within a factor {e(f'{f_a:g}')} of "
        f"alpha = {e(f'{cmp.alpha[0]:g}')} (before) / {e(f'{f_b:g}')} of "
        f"{e(f'{cmp.alpha[1]:g}')} (after), on either side.</p>"
    )
    parts.append(table(
        ["pair", "outcome before", "outcome after", "p-value before", "p-value after", "near in",
         "change p", "change q"],
        [[td(f"{n['pair'][0]} -- {n['pair'][1]}"), td("linked" if n["linked_a"] else "separated"),
          td("linked" if n["linked_b"] else "separated"), tn(n["pvalue_a"]), tn(n["pvalue_b"]),
          td(", ".join("before" if k == "a" else "after" for k in n["near_in"])),
          tn(n.get("change_pvalue")), tn(n.get("change_qvalue"))]
         for n in cmp.near_alpha],
    ))
    parts.append("</main></body></html>\n")
    return "".join(parts)
