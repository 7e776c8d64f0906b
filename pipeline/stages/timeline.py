"""Timeline: put the rows in time order within each series, find each row's previous window, and
measure how persistent each signal is.

What it assumes about time (the README says the same in plain words):

* the rows are windows of one or more series (a node, a node and a region ...) named by
  ``time.series`` or found from the data; the windows of one series are ``time.window_seconds`` apart
  (or the most common step); a missing window is a gap, and nothing is paired across a gap or across
  two series;
* a signal's dependence on its past is carried by its previous window once the previous windows of
  the conditioning set are known (an order-1 Markov reading); longer memory is partly covered by the
  long-run variance of the tests (see `pipeline.independence.residual`).

With ``time.lags: L`` every signal also enters as copies ``name@t-1 .. name@t-L`` (its value 1..L
windows earlier in its series), so a link from one window to a later one can be found; the search
knows a later copy cannot cause an earlier one.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Mapping

import numpy as np
import pandas as pd

from ..config import Config
from ..errors import ConfigError, DataError
from ._data_common import map_threads

if TYPE_CHECKING:  # the residual test's module (and scipy under it) loads when a stage runs, not on import
    from ..independence.residual import Timeline

__all__ = ["Timed", "run", "persistence", "lag_name", "lag_of", "time_tiers", "orient_lagged", "lag_pairs",
           "auto_inputs", "HIGH_PERSISTENCE"]

HIGH_PERSISTENCE = 0.3  # lag-1 persistence above this makes independent-row tests unreliable (see README)


def lag_name(signal: str, lag: int) -> str:
    """The name of a signal's copy `lag` windows earlier."""
    return f"{signal}@t-{lag}"


def lag_of(name: str) -> int:
    """The lag of a variable named by `lag_name` (0 for a signal of the present window)."""
    head, sep, tail = name.rpartition("@t-")
    return int(tail) if sep and head and tail.isdigit() else 0


def time_tiers(names: list[str], lags: list[int], tiers: list[list[str]]) -> list[list[str]]:
    """Background tiers with the time order first: copies from L windows back, ..., 1 window back, then
    the configured tiers of the present window (a later copy cannot cause an earlier one)."""
    most = max(lags, default=0)
    past = [[n for n, lag in zip(names, lags) if lag == k] for k in range(most, 0, -1)]
    return [t for t in past if t] + [list(t) for t in tiers]


def orient_lagged(evidence: pd.DataFrame) -> pd.DataFrame:
    """Linked pairs with a copy from an earlier window read ``earlier -> present``, whatever the search
    oriented (time order is background knowledge); a ``lag`` column gives the windows between them."""
    out = evidence.copy()
    la = out["var_a"].map(lag_of)
    lb = out["var_b"].map(lag_of)
    out["lag"] = (la - lb).abs().astype("int64")
    lagged = out["linked"].astype(bool) & (out["lag"] > 0)
    a_first = la > lb
    out.loc[lagged & a_first, "orientation"] = out["var_a"] + " -> " + out["var_b"]
    out.loc[lagged & ~a_first, "orientation"] = out["var_b"] + " -> " + out["var_a"]
    return out


@dataclass(frozen=True)
class Timed:
    """The rows in series-then-time order and the variables the search tests.

    Attributes
    ----------
    order : row permutation of the coded table (identity when no time column is known).
    codes : integer codes shaped (variables, rows) in that order, lag copies after the signals.
    scores : per variable, normal scores of a numeric signal (NaN missing), else None.
    names, cards, source, lag : per variable: name, levels, the signal it copies, lag in windows.
    timeline : the previous window of each row, or None (rows independent).
    frame : the artifact ``timeline.parquet``: row, series, time, previous row, numeric values.
    summary : what was decided and measured, for the manifest and the report.
    """

    order: np.ndarray
    codes: np.ndarray
    scores: list[np.ndarray | None]
    names: list[str]
    cards: list[int]
    source: list[str]
    lag: list[int]
    timeline: Timeline | None
    frame: pd.DataFrame
    summary: dict[str, Any] = field(default_factory=dict)
    # the numeric columns of `frame` in file order (as cleaned), so `aligned_frame` need not reorder them
    file_values: dict[str, np.ndarray] = field(default_factory=dict, repr=False)

    def aligned_frame(self) -> pd.DataFrame:
        """``timeline.parquet``: one row per coded row in file order (as ``discretised.parquet``) with
        ``series`` and ``order`` (window number within the series; consecutive windows differ by 1) when
        a time column is known, and the raw values of the numeric signals."""
        kept = [c for c in self.frame.columns if c not in ("row", "series", "time", "previous")]
        if set(kept) != set(self.file_values):  # a frame built by hand: put every column back in file order
            return self._aligned_by_reordering()
        if self.timeline is None:  # rows in file order already: the numeric columns as they are
            return pd.DataFrame({c: self.file_values[c] for c in kept}, copy=False)
        back = np.empty_like(self.order)
        back[self.order] = np.arange(self.order.size)
        when = pd.DataFrame({"series": self.frame["series"].to_numpy()[back], "time": self.frame["time"].to_numpy()[back]})
        window_ns = max(float(self.summary.get("window_seconds") or 0.0), 1e-9) * 1e9
        first = when.groupby("series")["time"].transform("min")
        order = np.round((when["time"] - first) / window_ns).astype(np.int64)
        columns = {"order": order.to_numpy(), "series": when["series"].to_numpy(), "time": when["time"].to_numpy()}
        return pd.DataFrame({**columns, **{c: self.file_values[c] for c in kept}}, copy=False)

    def _aligned_by_reordering(self) -> pd.DataFrame:
        back = np.empty_like(self.order)
        back[self.order] = np.arange(self.order.size)
        out = self.frame.iloc[back].reset_index(drop=True)
        if self.timeline is None:
            return out.drop(columns=["row", "series", "time", "previous"])
        window_ns = max(float(self.summary.get("window_seconds") or 0.0), 1e-9) * 1e9
        first = out.groupby("series")["time"].transform("min")
        out.insert(1, "order", np.round((out["time"] - first) / window_ns).astype(np.int64))
        return out.drop(columns=["row", "previous"])

    @property
    def own_past(self) -> list[bool]:
        """Whether each variable's own previous window enters its tests (not for lag copies)."""
        return [lag == 0 for lag in self.lag]

    def doc(self) -> dict[str, Any]:
        """``timeline.json``: the summary and the search's variables (name, levels, the signal each copies,
        its lag, whether it is tested on its values), whether rows are time-ordered, the series length."""
        return {**self.summary, "names": self.names, "cards": self.cards, "source": self.source, "lag": self.lag,
                "numeric": [s is not None for s in self.scores], "timed": self.timeline is not None,
                "series_length": self.timeline.series_length if self.timeline is not None else 0.0}


def lag_pairs(doc: Mapping[str, Any]) -> list[tuple[str, str]]:
    """Pairs of `doc`'s variables (``timeline.json``) the search never tests: two earlier-window copies,
    or a signal and its own earlier copy."""
    names, source, lags = doc["names"], doc["source"], doc["lag"]
    out = []
    for i in range(len(names)):
        for j in range(i + 1, len(names)):
            if (lags[i] > 0 and lags[j] > 0) or source[i] == source[j]:
                out.append((names[i], names[j]))
    return out


def auto_inputs(doc: Mapping[str, Any], n_rows: int) -> tuple[int, list[int], int]:
    """What `config.resolve_auto` is given for a search over `doc`'s variables (``timeline.json``) on
    `n_rows` kept rows: the rows a test can use (on time-ordered rows the tests condition on the previous
    window, so a row counts once it has one), the level counts of the signals tested on their codes (the
    rules are about contingency tables) and the pairs the search tests (`lag_pairs` left out)."""
    n_info = n_rows - int(doc.get("rows_without_previous", 0)) if doc["timed"] else n_rows
    coded = [int(c) for c, numeric, lag in zip(doc["cards"], doc["numeric"], doc["lag"]) if not numeric and lag == 0]
    n = len(doc["names"])
    return n_info, coded, n * (n - 1) // 2 - len(lag_pairs(doc))


def persistence(codes: np.ndarray, scores: np.ndarray | None, prev: np.ndarray) -> float:
    """Lag-1 persistence of one signal: the autocorrelation of its normal scores for a numeric signal,
    Cohen's kappa of a window against the previous one for a categorical signal."""
    ok = prev >= 0
    return _pair_persistence(codes, scores, np.flatnonzero(ok), prev[ok])


def _pair_persistence(codes: np.ndarray, scores: np.ndarray | None, here: Any, before: Any) -> float:
    """`persistence` over the row pairs (``here``, ``before``): index arrays, or two slices when each
    row's previous window is the row before it (no copy then)."""
    if scores is not None:
        a, b = scores[here], scores[before]
        good = np.isfinite(a) & np.isfinite(b)
        if not good.all():
            a, b = a[good], b[good]
        if a.size < 3 or a.std() == 0 or b.std() == 0:
            return float("nan")
        return float(np.corrcoef(a, b)[0, 1])
    a, b = codes[here], codes[before]
    good = (a >= 0) & (b >= 0)
    if not good.all():
        a, b = a[good], b[good]
    if a.size < 3:
        return float("nan")
    k = int(max(a.max(), b.max())) + 1
    pa, pb = np.bincount(a, minlength=k) / a.size, np.bincount(b, minlength=k) / b.size
    chance = float(np.sum(pa * pb))
    same = float(np.mean(a == b))
    return float((same - chance) / (1.0 - chance)) if chance < 1.0 else float("nan")


def _time_column(times: pd.DataFrame, cfg: Config) -> tuple[str | None, str]:
    wanted = cfg.time.column
    if wanted:
        if wanted not in times.columns:
            have = ", ".join(f"`{c}`" for c in times.columns) or "none"
            raise ConfigError(
                f"`time.column` = `{wanted}` is not a timestamp column of the extract (timestamp columns: {have}); "
                "fix the name or declare the column `type: timestamp` in `columns:`."
            )
        return wanted, "declared in `time.column`"
    if len(times.columns) == 0:
        return None, "no column parses as timestamps"
    return str(times.columns[0]), "detected: the first column that parses as timestamps"


def _series_columns(table: pd.DataFrame, kinds: dict[str, str], t: np.ndarray, cfg: Config) -> tuple[list[str], str]:
    declared = cfg.time.series
    if declared is not None:
        missing = [c for c in declared if c not in table.columns]
        if missing:
            raise ConfigError(
                f"`time.series` names {', '.join(f'`{m}`' for m in missing)}, not a kept column of the extract "
                f"(kept: {', '.join(table.columns[:12])}); fix the names."
            )
        return list(declared), "declared in `time.series`"
    if pd.Index(t).is_unique:
        return [], "timestamps do not repeat: one series"
    cands = []
    for c in table.columns:
        if kinds.get(c) not in ("categorical", "boolean"):
            continue
        key = pd.DataFrame({"t": t, "s": table[c].to_numpy()})
        if not key.duplicated().any():
            cands.append(c)
    if len(cands) == 1:
        return cands, f"detected: `{cands[0]}` makes (time, series) unique"
    if not cands:
        raise DataError(
            "Timestamps repeat and no single column tells the series apart (no column makes (time, column) "
            "unique); declare the columns that identify one series in `time.series`, or set `time.serial: off`."
        )
    raise DataError(
        f"Timestamps repeat and several columns could identify the series ({', '.join(f'`{c}`' for c in cands)}); "
        "choose them in `time.series`."
    )


def _previous(series_id: np.ndarray, t: np.ndarray, window: float | None) -> tuple[np.ndarray, float, int]:
    """Previous-window rows (rows already sorted by series, then time), the window and the gap count."""
    n = t.size
    prev = np.full(n, -1, dtype=np.int64)
    if n < 2:
        return prev, float(window or 0.0), 0
    same = series_id[1:] == series_id[:-1]
    step = (t[1:] - t[:-1]).astype(np.float64) / 1e9
    if np.any(same & (step == 0)):
        raise DataError(
            "Two rows of one series share a timestamp; declare the columns that identify one series in "
            "`time.series` (or `clean.duplicates: drop` if they are copies)."
        )
    if window is None:
        pos = step[same & (step > 0)]
        if pos.size == 0:
            return prev, 0.0, 0
        vals, counts = np.unique(np.round(pos, 3), return_counts=True)
        window = float(vals[np.argmax(counts)])
    ok = same & (np.abs(step - window) <= 1e-6 * max(window, 1.0))
    prev[1:][ok] = np.nonzero(ok)[0]
    gaps = int(np.sum(same & ~ok))
    return prev, float(window), gaps


def run(table: pd.DataFrame, times: pd.DataFrame, kinds: dict[str, str], codes: pd.DataFrame,
        cards: dict[str, int], cfg: Config, methods: dict[str, str] | None = None) -> Timed:
    """Order the rows, find previous windows, measure persistence and add lag copies.

    Parameters
    ----------
    table : the cleaned table (kept rows, in file order), for series columns and numeric values.
    times : the cleaned timestamp columns as int64 nanoseconds (the same rows), maybe no columns.
    kinds : kept column -> numeric / categorical / boolean.
    codes : the discretised codes (the same rows and kept columns).
    cards : kept column -> number of levels.
    methods : kept column -> how the discretise stage coded it (``categorical`` = level by level).
    """
    n = len(codes)
    time_col, how = _time_column(times, cfg)
    summary: dict[str, Any] = {"time_column": time_col, "time_column_how": how, "series": [], "series_how": "",
                               "serial": cfg.time.serial, "lags": cfg.time.lags, "warnings": []}
    timed_on = time_col is not None and cfg.time.serial != "off"
    if timed_on:
        t = times[time_col].to_numpy(dtype=np.int64)
        if (t == np.iinfo(np.int64).min).any():
            raise DataError(
                f"The time column `{time_col}` has missing timestamps; fix the extract or set `time.serial: off`."
            )
        series, summary["series_how"] = _series_columns(table, kinds, t, cfg)
        keys = [table[c].astype(str).to_numpy() for c in series]
        if keys:
            series_id = pd.MultiIndex.from_arrays(keys).factorize()[0] if len(keys) > 1 else pd.factorize(keys[0])[0]
        else:
            series_id = np.zeros(n, dtype=np.int64)
        order = np.lexsort((t, series_id))
        series_id, t = series_id[order], t[order]
        prev, window, gaps = _previous(series_id, t, cfg.time.window_seconds)
        counts = np.bincount(series_id) if n else np.zeros(0, dtype=np.int64)
        from ..independence.residual import Timeline

        timeline = Timeline(prev=prev, series_length=float(np.median(counts)) if counts.size else 0.0)
        summary.update(series=series, window_seconds=window, gaps=gaps, series_count=int(counts.size),
                       rows_without_previous=int(np.sum(prev < 0)))
    else:
        series = []
        order = np.arange(n)
        series_id = np.zeros(n, dtype=np.int64)
        t = np.zeros(n, dtype=np.int64)
        # file order stands in for time when measuring persistence (a warning sign only)
        prev = np.arange(n, dtype=np.int64) - 1
        timeline = None

    def in_order(values: np.ndarray) -> np.ndarray:
        return values[order] if timed_on else values  # untimed rows stay in file order: no copy

    # the pairs (row, its previous window) that persistence compares: two views when untimed
    if timed_on:
        here: Any = np.flatnonzero(prev >= 0)
        before: Any = prev[here]
    else:
        here, before = slice(1, None), slice(0, max(n - 1, 0))
    signals = [c for c in codes.columns if cfg.time.test_series or c not in series]
    base_codes = [in_order(codes[c].to_numpy()) for c in signals]
    # a numeric signal is tested on its values, unless the configuration asks for bins or the data
    # hold a few whole numbers coded level by level (codes of a category, as in the benchmark sets)
    binned = {c for c, spec in cfg.columns.items() if spec.discretise is not None}
    as_numbers = cfg.discretise.default == "auto"
    methods = methods or {}
    in_file_order = {c: table[c].to_numpy(dtype=np.float64) for c in signals if kinds.get(c) == "numeric"}
    values = {c: in_order(v) for c, v in in_file_order.items()}  # each numeric column put in order once
    scored = [c for c in signals if kinds.get(c) == "numeric" and as_numbers and c not in binned
              and methods.get(c, "quantile") != "categorical"]
    scores: dict[str, np.ndarray] = {}
    if scored:  # the scores' module loads the compiled kernels: not for an extract of categories only
        import scipy.stats  # noqa: F401  (imported once here, not by the threads side by side)

        from ..independence.residual import normal_scores

        # the rank sorts behind the normal scores release the interpreter lock: a wide extract's
        # columns are scored side by side
        scores = dict(zip(scored, map_threads(normal_scores, [values[c] for c in scored], cfg.parallel.jobs)))
    base_scores = [scores.get(c) for c in signals]
    per_signal = {}
    for name, c, s in zip(signals, base_codes, base_scores):
        rho = _pair_persistence(c, s, here, before)
        per_signal[name] = {"persistence": None if np.isnan(rho) else round(rho, 4),
                            "n_effective": None if np.isnan(rho) else round(n * (1 - max(rho, 0)) / (1 + max(rho, 0)), 1)}
    summary["signals"] = per_signal
    high = [k for k, v in per_signal.items() if (v["persistence"] or 0.0) > HIGH_PERSISTENCE]
    summary["persistent_signals"] = high
    if high and not timed_on:
        summary["warnings"].append(
            f"{len(high)} signals persist from one row to the next (lag-1 persistence above {HIGH_PERSISTENCE:g}: "
            f"{', '.join(high[:8])}{' ...' if len(high) > 8 else ''}) but no time handling is on, so the tests treat "
            "rows as independent and may link unrelated signals; declare `time.column` (and `time.series`)."
        )
    names, all_codes, all_scores, source, lags = list(signals), list(base_codes), list(base_scores), list(signals), [0] * len(signals)
    if timed_on and cfg.time.lags > 0:
        for k in range(1, cfg.time.lags + 1):
            partner = timeline.lag_partner(k)  # type: ignore[union-attr]
            ok = partner >= 0
            for name, c, s in zip(signals, base_codes, base_scores):
                lc = np.full(n, -1, dtype=c.dtype)
                lc[ok] = c[partner[ok]]
                ls = None
                if s is not None:
                    ls = np.full(n, np.nan)
                    ls[ok] = s[partner[ok]]
                names.append(lag_name(name, k))
                all_codes.append(lc)
                all_scores.append(ls)
                source.append(name)
                lags.append(k)
    columns = {"row": order.astype(np.int64), "series": series_id.astype(np.int64), "time": t,
               "previous": (prev if timed_on else np.full(n, -1)).astype(np.int64)}
    columns.update(values)
    frame = pd.DataFrame(columns, copy=False)
    stacked = np.vstack(all_codes) if all_codes else np.zeros((0, n), dtype=np.int8)
    return Timed(order=order, codes=stacked, scores=all_scores, names=names,
                 cards=[int(cards[s]) for s in source], source=source, lag=lags, timeline=timeline,
                 frame=frame, summary=summary, file_values=in_file_order)
