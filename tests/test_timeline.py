"""The timeline stage: time column and series declared or detected, previous windows, persistence."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.errors import ConfigError, DataError
from pipeline.simulate import ar1
from pipeline.stages import clean, discretise, timeline
from pipeline.stages._data_common import empty_rejected
from pipeline.stages.ingest import Ingested


def _frame(nodes=3, windows=40, seed=0, phi=0.95):
    rng = np.random.default_rng(seed)
    parts = []
    for k in range(nodes):
        parts.append(pd.DataFrame({
            "ts": pd.date_range("2026-11-01", periods=windows, freq="5min", tz="UTC").astype(str),
            "node": f"n{k}", "zone": ["a", "b", "c"][k % 3],
            "load": ar1(rng, windows, phi).round(3), "wait": ar1(rng, windows, phi).round(3),
        }))
    return pd.concat(parts, ignore_index=True).sample(frac=1.0, random_state=1).reset_index(drop=True)


def _timed(frame, overrides=()):
    cfg = load_config(None, list(overrides))
    cleaned = clean.run(Ingested(frame.astype(str), empty_rejected(), len(frame), ["x.csv"], {}), cfg)
    disc = discretise.run(cleaned, cfg)
    cards = {k: max(1, len(v)) for k, v in disc.levels.items()}
    return timeline.run(cleaned.table, cleaned.times, cleaned.kinds, disc.codes, cards, cfg,
                         {c: v.get("method") for c, v in disc.summary["columns"].items()})


def test_time_column_and_series_are_detected_and_said():
    """The first timestamp column orders the rows; the one column that makes (time, column) unique is the
    series; both decisions are recorded, and the series column is not tested by default."""
    t = _timed(_frame().drop(columns=["zone"]))
    assert t.summary["time_column"] == "ts" and "detected" in t.summary["time_column_how"]
    assert t.summary["series"] == ["node"] and "detected" in t.summary["series_how"]
    assert "node" not in t.names and t.summary["window_seconds"] == 300
    assert t.summary["series_count"] == 3 and t.summary["rows_without_previous"] == 3


def test_series_columns_are_tested_only_when_asked():
    """`time.test_series: true` keeps the node among the tested signals."""
    t = _timed(_frame().drop(columns=["zone"]), ["time.test_series=true"])
    assert "node" in t.names


def test_rows_are_ordered_within_series_and_previous_windows_point_back():
    """After ordering, each row's previous window is the row of the same series one window earlier."""
    t = _timed(_frame(), ["time.series=[node]"])
    prev = t.timeline.prev
    ok = prev >= 0
    frame = t.frame
    assert (frame["series"].to_numpy()[ok] == frame["series"].to_numpy()[prev[ok]]).all()
    assert (frame["time"].to_numpy()[ok] - frame["time"].to_numpy()[prev[ok]] == 300 * 10**9).all()


def test_a_missing_window_is_a_gap_nothing_is_paired_across_it():
    """Dropping one window of one node leaves the next row of that node without a previous window."""
    f = _frame()
    f = f.drop(index=f.index[(f["node"] == "n1") & (f["ts"] == f["ts"].sort_values().unique()[10])])
    t = _timed(f, ["time.series=[node]"])
    assert t.summary["gaps"] == 1 and t.summary["rows_without_previous"] == 4


def test_ambiguous_series_stop_with_one_line_naming_the_candidates():
    """Two columns could each name the series (node and an id-like twin): one line names both."""
    f = _frame(nodes=3)
    f["host"] = f["node"].str.replace("n", "h")
    with pytest.raises(DataError, match="`node`.*`host`|`host`.*`node`"):
        _timed(f)


def test_repeated_timestamps_in_one_declared_series_are_refused():
    """Declaring no series while three nodes log the same windows: one line saying rows share a timestamp."""
    with pytest.raises(DataError, match="share a timestamp"):
        _timed(_frame(nodes=3), ["time.series=[]"])


def test_unknown_time_column_is_refused():
    """A `time.column` that is not a timestamp column: a configuration error naming the ones there are."""
    with pytest.raises(ConfigError, match="`time.column` = `load`.*`ts`"):
        _timed(_frame(), ["time.column=load"])


def test_persistent_signals_without_time_handling_are_warned_about():
    """With `time.serial: off` and strongly persistent signals (in file order), one warning names them."""
    f = _frame(nodes=1, windows=300).sort_values("ts").reset_index(drop=True)
    t = _timed(f, ["time.serial=off"])
    assert t.timeline is None
    assert len(t.summary["warnings"]) == 1 and "load" in t.summary["warnings"][0]
    assert t.summary["signals"]["load"]["persistence"] > 0.8


def test_default_settings_on_a_benchmark_set_run_the_g_test_unchanged(tmp_path):
    """ASIA (tests/data/benchmarks, integer-coded categories, no time column): the default `auto` method codes
    the columns level by level and runs the G-test, with the same skeleton as `test.method: g`."""
    from pipeline.api import run_pipeline

    data = __import__("_shared").benchmark_path("asia") / "data.txt"
    auto = run_pipeline(load_config(None, ["output.png=false"]), data, tmp_path / "auto")
    g = run_pipeline(load_config(None, ["output.png=false", "test.method=g"]), data, tmp_path / "g")
    assert set(auto.tests["method"]) == {"g"}
    assert auto.manifest["time"]["timed"] is False
    assert auto.evidence[["var_a", "var_b", "linked", "pvalue"]].equals(g.evidence[["var_a", "var_b", "linked", "pvalue"]])
