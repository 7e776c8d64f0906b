"""Tests of the clean stage: type inference, drop rules with reasons, quarantine, limits."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.config import config_from_dict
from pipeline.errors import ConfigError, DataError, LimitError
from pipeline.stages import clean, ingest

BENCHMARKS = Path(__file__).resolve().parent / "data" / "benchmarks"
N = 40


def _cfg(**sections):
    return config_from_dict(sections)


def _ingest_csv(tmp_path: Path, text: str, cfg=None):
    path = tmp_path / "extract.csv"
    path.write_text(text, encoding="utf-8")
    cfg = cfg or _cfg()
    return ingest.run(path, cfg.input, cfg.limits)


def _frame_csv(tmp_path: Path, frame: pd.DataFrame, cfg=None):
    path = tmp_path / "extract.csv"
    frame.to_csv(path, index=False)
    cfg = cfg or _cfg()
    return ingest.run(path, cfg.input, cfg.limits)


def _base(n: int = N) -> dict:
    rng = np.random.default_rng(7)
    return {
        "zone": [["north", "south", "east"][i % 3] for i in range(n)],
        "latency": rng.normal(200, 30, n).round(2),
    }


def _record(cleaned, name):
    return next(r for r in cleaned.columns if r["column"] == name)


# ----------------------------------------------------------------------------- types


def test_types_are_inferred_and_numbers_stored_as_text_converted(tmp_path):
    """Numeric, categorical, boolean and numbers-written-as-text columns get the right kinds."""
    data = _base()
    data["ok"] = ["yes" if i % 2 else "no" for i in range(N)]
    data["depth_text"] = [f'"{i % 7}"' for i in range(N)]
    ing = _ingest_csv(tmp_path, pd.DataFrame(data).to_csv(index=False, quoting=3, quotechar="'"))
    got = clean.run(ing, _cfg())
    assert got.kinds == {
        "zone": "categorical",
        "latency": "numeric",
        "ok": "boolean",
        "depth_text": "numeric",
    }
    assert got.table["latency"].dtype == np.float64
    assert got.table["ok"].dtype == "boolean"
    assert got.table["zone"].dtype == object
    assert got.table["depth_text"].tolist()[:8] == [0, 1, 2, 3, 4, 5, 6, 0]


def test_type_overrides_from_columns_section(tmp_path):
    """`columns: {x: {type: ...}}` overrides inference, including `ignore`."""
    data = _base()
    data["code"] = [i % 4 for i in range(N)]
    data["note"] = ["a", "b"] * (N // 2)
    cfg = _cfg(columns={"code": {"type": "categorical"}, "note": {"type": "ignore"}})
    got = clean.run(_frame_csv(tmp_path, pd.DataFrame(data), cfg), cfg)
    assert got.kinds["code"] == "categorical"
    assert got.table["code"].tolist()[:5] == ["0", "1", "2", "3", "0"]
    assert "note" not in got.table
    assert "type: ignore" in got.summary["dropped"]["note"]


def test_infinities_and_nan_spellings_become_missing_and_are_counted(tmp_path):
    """inf, -inf, Infinity, +Inf, NaN, nan, #N/A, null and friends are missing, and counted."""
    spellings = [
        "inf",
        "-inf",
        "Infinity",
        "+Inf",
        "-Infinity",
        "NaN",
        "nan",
        "#N/A",
        "null",
        "NULL",
    ]
    values = [str(i + 0.25) for i in range(N - len(spellings))] + spellings
    data = _base()
    data["load"] = values
    got = clean.run(_frame_csv(tmp_path, pd.DataFrame(data)), _cfg())
    assert got.kinds["load"] == "numeric"
    assert got.table["load"].isna().sum() == len(spellings)
    rec = _record(got, "load")
    assert rec["missing"] == len(spellings)
    assert (
        rec["non_finite"] == 5
    )  # the five infinity spellings; the NaN/null ones were nulls already
    assert np.isfinite(got.table["load"].dropna()).all()


def test_timestamp_column_is_dropped_with_reason_and_features_derived(tmp_path):
    """A timestamp column is not tested (reason given); with features on, hour band and weekday appear."""
    data = _base()
    data["at"] = pd.date_range("2024-03-04 01:00", periods=N, freq="3h").strftime(
        "%Y-%m-%dT%H:%M:%S"
    )
    ing = _frame_csv(tmp_path, pd.DataFrame(data))
    plain = clean.run(ing, _cfg())
    assert "timestamp" in plain.summary["dropped"]["at"]
    assert "at_hour_band" not in plain.table
    cfg = _cfg(clean={"timestamp_features": True})
    got = clean.run(ing, cfg)
    assert got.table["at_hour_band"].tolist()[:4] == ["night", "night", "morning", "morning"]
    assert got.table["at_weekday"].iloc[0] == "Monday"  # 2024-03-04 was a Monday
    assert _record(got, "at_hour_band")["action"] == "derived"
    assert got.summary["level_order"]["at_hour_band"] == [
        "night",
        "morning",
        "afternoon",
        "evening",
    ]


# ----------------------------------------------------------------------------- drop rules


def test_entirely_missing_and_one_value_columns_are_dropped_with_reasons(tmp_path):
    """A column with no values and a column with one value are dropped, each with its reason."""
    data = _base()
    data["empty"] = [""] * N
    data["site"] = ["s1"] * N
    got = clean.run(_frame_csv(tmp_path, pd.DataFrame(data)), _cfg())
    assert got.summary["dropped"]["empty"] == "entirely missing"
    assert got.summary["dropped"]["site"].startswith("one value only (`s1`)")
    assert {r["column"] for r in got.columns} == {"zone", "latency", "empty", "site"}


def test_mostly_missing_column_is_dropped_above_the_threshold(tmp_path):
    """A column missing in 60% of rows is dropped when `clean.max_missing_fraction` is 0.5."""
    data = _base()
    data["sparse"] = [None if i % 5 < 3 else i % 2 for i in range(N)]
    got = clean.run(_frame_csv(tmp_path, pd.DataFrame(data)), _cfg())
    assert "60% of values missing" in got.summary["dropped"]["sparse"]


def test_id_like_columns_dropped_but_continuous_floats_kept(tmp_path):
    """Text and integer columns with all-distinct values are IDs; an all-distinct float is kept."""
    data = _base()
    data["node"] = [f"node-{i}" for i in range(N)]
    data["seq"] = list(range(N))
    got = clean.run(_frame_csv(tmp_path, pd.DataFrame(data)), _cfg())
    assert "identifier" in got.summary["dropped"]["node"]
    assert "identifier" in got.summary["dropped"]["seq"]
    assert pd.Series(data["latency"]).nunique() == N and got.kinds["latency"] == "numeric"


def test_rare_levels_pooled_only_when_asked(tmp_path):
    """With the default 0 levels never change; with a minimum count rare ones become `(other)`."""
    data = _base()
    data["plan"] = ["basic"] * 20 + ["pro"] * 17 + ["x", "y", "z"]
    ing = _frame_csv(tmp_path, pd.DataFrame(data))
    assert set(clean.run(ing, _cfg()).table["plan"]) == {"basic", "pro", "x", "y", "z"}
    got = clean.run(ing, _cfg(clean={"rare_level_min_count": 5}))
    assert set(got.table["plan"]) == {"basic", "pro", "(other)"}
    assert _record(got, "plan")["pooled_levels"] == 3


def test_duplicate_rows_dropped_into_quarantine_when_asked(tmp_path):
    """`clean.duplicates: drop` removes repeated rows and lists them in the quarantine with lines."""
    frame = pd.DataFrame(_base())
    frame = pd.concat([frame, frame.iloc[[0, 5]]], ignore_index=True)
    ing = _frame_csv(tmp_path, frame)
    assert len(clean.run(ing, _cfg()).table) == N + 2
    got = clean.run(ing, _cfg(clean={"duplicates": "drop"}))
    assert len(got.table) == N
    assert got.quarantined["line"].tolist() == [N + 2, N + 3]
    assert got.summary["rows"]["duplicates_dropped"] == 2


# ----------------------------------------------------------------------------- text in numeric columns


def _with_text(n_text: int = 2) -> pd.DataFrame:
    data = _base()
    depth = [str(i % 9) for i in range(N)]
    for k in range(n_text):
        depth[3 + 10 * k] = "overflow"
    data["queue_depth"] = depth
    return pd.DataFrame(data)


def test_text_in_numeric_column_quarantines_those_rows(tmp_path):
    """Default policy: rows with text in a numeric column are quarantined, naming column and value."""
    got = clean.run(_frame_csv(tmp_path, _with_text()), _cfg())
    assert got.kinds["queue_depth"] == "numeric"
    assert len(got.table) == N - 2
    assert got.quarantined["line"].tolist() == [5, 15]  # rows 3 and 13 sit on lines 5 and 15
    assert got.quarantined["reason"].iloc[0] == (
        "column `queue_depth` holds text `overflow` where numbers are expected"
    )
    assert got.quarantined["raw"].iloc[0].endswith(",overflow")
    assert got.summary["rows"]["quarantined"] == 2


def test_text_in_numeric_column_refused(tmp_path):
    """`clean.text_in_numeric: refuse` raises naming the column, the count and the first lines."""
    cfg = _cfg(clean={"text_in_numeric": "refuse"})
    with pytest.raises(
        DataError,
        match=r"Column `queue_depth` has 2 non-numeric values .*lines 5, 15 of `.*extract\.csv`",
    ):
        clean.run(_frame_csv(tmp_path, _with_text()), cfg)


def test_text_in_numeric_column_treated_as_categorical(tmp_path):
    """`clean.text_in_numeric: categorical` keeps every row and makes the column categorical."""
    cfg = _cfg(clean={"text_in_numeric": "categorical"})
    got = clean.run(_frame_csv(tmp_path, _with_text()), cfg)
    assert got.kinds["queue_depth"] == "categorical"
    assert len(got.table) == N and "overflow" in set(got.table["queue_depth"])


# ----------------------------------------------------------------------------- limits and refusals


def test_level_count_above_limit_is_a_limit_error(tmp_path):
    """A categorical column with more levels than `limits.max_levels` names column, count and fix."""
    data = _base()
    data["host"] = [f"h{i % 30}" for i in range(N)]
    cfg = _cfg(limits={"max_levels": 10}, clean={"id_unique_ratio": 1.0})
    with pytest.raises(
        LimitError,
        match=r"Column `host` has 30 levels, above `limits\.max_levels` = 10.*type: ignore",
    ):
        clean.run(_frame_csv(tmp_path, pd.DataFrame(data), cfg), cfg)


def test_fewer_rows_than_min_rows_is_refused_with_the_count(tmp_path):
    """Fewer usable rows than `clean.min_rows` is a DataError stating how many remain."""
    ing = _frame_csv(tmp_path, pd.DataFrame(_base(12)))
    with pytest.raises(
        DataError, match=r"Only 12 usable rows remain in `.*extract\.csv`.*`clean\.min_rows` = 20"
    ):
        clean.run(ing, _cfg())


def test_columns_section_naming_a_missing_column_lists_close_matches(tmp_path):
    """A `columns:` entry for a column the input lacks is a ConfigError with close matches."""
    cfg = _cfg(columns={"latncy": {"type": "numeric"}})
    with pytest.raises(ConfigError, match=r"column `latncy`.*close matches: `latency`"):
        clean.run(_frame_csv(tmp_path, pd.DataFrame(_base())), cfg)


def test_names_with_spaces_unicode_and_markup_survive_cleaning(tmp_path):
    """Odd column names are kept exactly (escaping them is the report's job)."""
    data = _base()
    frame = pd.DataFrame(
        {
            "queue depth": data["latency"],
            "région": data["zone"],
            "<script>x</script>": [i % 2 for i in range(N)],
        }
    )
    got = clean.run(_frame_csv(tmp_path, frame), _cfg())
    assert list(got.table.columns) == ["queue depth", "région", "<script>x</script>"]


def test_summary_accounts_for_every_input_column_and_row(tmp_path):
    """cleaning.json names every input column with an action, and rows reconcile."""
    data = _with_text()
    data["site"] = "s1"
    ing = _frame_csv(tmp_path, data)
    got = clean.run(ing, _cfg())
    assert [r["column"] for r in got.columns] == list(ing.table.columns)
    assert all(r["action"] in {"kept", "dropped", "derived"} and r["reason"] for r in got.columns)
    rows = got.summary["rows"]
    assert rows["kept"] + rows["quarantined"] == rows["ingested"] == len(ing.table)


def test_alarm_benchmark_columns_all_kept_as_numeric():
    """All 37 ALARM columns survive cleaning as numeric with their integer values unchanged."""
    cfg = _cfg()
    ing = ingest.run(BENCHMARKS / "alarm" / "data.txt", cfg.input, cfg.limits)
    got = clean.run(ing, cfg)
    assert got.table.shape == (10_000, 37) and set(got.kinds.values()) == {"numeric"}
    raw = np.loadtxt(BENCHMARKS / "alarm" / "data.txt", skiprows=1)
    np.testing.assert_array_equal(got.table.to_numpy(), raw)


def test_summaries_are_plain_json(tmp_path):
    """The ingest and clean summaries (cleaning.json) serialise with the standard json module."""
    import json

    data = _with_text()
    data["at"] = pd.date_range("2024-01-01", periods=N, freq="h").strftime("%Y-%m-%d %H:%M")
    ing = _frame_csv(tmp_path, data)
    got = clean.run(ing, _cfg(clean={"timestamp_features": True}))
    assert json.loads(json.dumps(got.summary))["rows"]["quarantined"] == 2
    assert json.loads(json.dumps(ing.summary))["rows_read"] == N


def test_quarantined_rows_keep_their_file_lines_when_the_ingest_entry_is_reused(tmp_path):
    """A second run that reuses the cached ingest stage but re-cleans reports the same file lines."""
    from pipeline.api import run_pipeline

    path = tmp_path / "extract.csv"
    _with_text().to_csv(path, index=False)
    first = run_pipeline(_cfg(), path, tmp_path / "runs" / "a")
    second = run_pipeline(_cfg(clean={"duplicates": "drop"}), path, tmp_path / "runs" / "b")
    assert second.manifest["stages"]["ingest"]["reused"] and not second.manifest["stages"]["clean"]["reused"]
    for run in (first, second):
        lines = pd.read_parquet(run.out_dir / "rejected.parquet")["line"].tolist()
        assert lines == [5, 15]  # rows 3 and 13 sit on lines 5 and 15 of the file (line 1 is the header)


def test_stored_table_keeps_text_columns_as_categoricals_of_the_same_values(tmp_path):
    """The table the stage stores (``clean.arrow``) holds each categorical column read from text as a
    categorical whose values equal the cleaned table's, cell by cell (pandas' own comparison of the
    two columns as Python objects): padded spellings of one level share a code, missing spellings are
    missing, quarantined rows are left out and renames apply (property test on invented rows)."""
    rows = ["zone,load,site"]
    zones = ["a", " a", "b", "n/a", "", "c ", "b"]
    for i in range(70):
        load = "oops" if i == 5 else str(i % 9)
        rows.append(f"{zones[i % len(zones)]},{load},s{i % 3}")
    cfg = _cfg(columns={"site": {"rename": "place"}})
    got = clean.run(_ingest_csv(tmp_path, "\n".join(rows) + "\n", cfg), cfg)
    stored = got.stored()
    assert list(stored.columns) == list(got.table.columns)
    assert set(got.categories) == {"zone", "place"}
    for name in got.categories:
        assert isinstance(stored[name].dtype, pd.CategoricalDtype)
        assert got.table[name].dtype == object
        as_objects = stored[name].astype(object).where(stored[name].notna(), None)
        assert as_objects.tolist() == got.table[name].tolist()
    assert sorted(stored["zone"].cat.categories) == ["a", "b", "c"]
    pd.testing.assert_series_equal(stored["load"], got.table["load"])


@pytest.mark.parametrize("distinct", [1, 3, 900, 20_000, 150_000, 400_000])
def test_distinct_floats_equals_numpy_unique(distinct):
    """Property test (invented values with -0.0, 0.0 and infinities mixed in): the distinct count of a
    numeric column equals numpy's `np.unique` count with -0.0 taken as 0.0, whichever way it is counted
    (hashed or from a sorted copy, chosen by a sample)."""
    from pipeline.stages._data_clean import distinct_floats

    rng = np.random.default_rng(distinct)
    values = rng.normal(size=distinct) * 1e3
    values[: min(3, distinct)] = [0.0, -0.0, np.inf][: min(3, distinct)]
    arr = values[rng.integers(0, distinct, 500_000)]
    arr[rng.random(arr.size) < 0.01] = -np.inf
    expected = np.unique(arr + 0.0).size  # + 0.0 turns -0.0 into 0.0
    assert distinct_floats(arr) == expected
    assert distinct_floats(arr[:1000]) == np.unique(arr[:1000] + 0.0).size


def test_columns_on_threads_give_what_they_give_in_turn(tmp_path, monkeypatch):
    """A table past `_THREADED_FROM` cells is typed and counted on `parallel.jobs` threads: the same cleaned table,
    kinds, summary and quarantine as in turn, over every kind of column (numbers, text, booleans,
    a timestamp with derived features, an identifier, a constant, rare levels pooled, text in a
    numeric column quarantined); and of two columns that fail, the first in the table's order raises,
    as in turn (invented data)."""
    n = 3_000
    rng = np.random.default_rng(11)
    data = {
        "zone": rng.choice(["north", "south", "east", "rare"], n, p=[0.4, 0.4, 0.1995, 0.0005]),
        "latency": rng.normal(200, 30, n).round(2).astype(object),
        "flag": rng.choice(["true", "false"], n),
        "at": pd.date_range("2026-11-01", periods=n, freq="5min").astype(str),
        "ticket": np.arange(n),
        "site": ["s1"] * n,
        "load": rng.integers(0, 5, n),
    }
    data["latency"][[5, 17]] = "n/a?"
    cfg = _cfg(clean={"rare_level_min_count": 5, "timestamp_features": True, "text_in_numeric": "quarantine"},
               parallel={"jobs": 2})
    ingested = _frame_csv(tmp_path, pd.DataFrame(data), cfg)
    import threading

    from pipeline.stages import _data_clean

    threads_seen: list[set[str]] = []
    real_decide = _data_clean.decide

    def decide(*args, **kwargs):  # which threads decide the columns (the pool's name, without its number)
        threads_seen[-1].add(threading.current_thread().name.rsplit("_", 1)[0])
        return real_decide(*args, **kwargs)

    monkeypatch.setattr(_data_clean, "decide", decide)
    got = {}
    for threaded_from in (0, 10**12):
        monkeypatch.setattr(clean, "_THREADED_FROM", threaded_from)
        threads_seen.append(set())
        got[threaded_from] = clean.run(ingested, cfg)
    assert threads_seen[1] == {"MainThread"}
    one, threads = got[10**12], got[0]
    assert threads_seen[0] == {"edgeproof-columns"}  # the second really ran on the pool's threads
    pd.testing.assert_frame_equal(one.table, threads.table)
    pd.testing.assert_frame_equal(one.quarantined, threads.quarantined)
    assert one.kinds == threads.kinds and one.columns == threads.columns and one.summary == threads.summary
    assert len(one.quarantined) == 2 and "ticket" not in one.kinds and "site" not in one.kinds
    assert _record(one, "zone")["pooled_levels"] == 1
    bad = pd.DataFrame({"a": ["x", "y"] * 20, "b": ["1", "3"] * 20, "c": ["1", "2"] * 20})
    cfg = _cfg(columns={"b": {"type": "boolean"}, "c": {"type": "boolean"}}, parallel={"jobs": 2})
    ingested = _frame_csv(tmp_path, bad, cfg)
    errors = []
    for threaded_from in (10**12, 0):
        monkeypatch.setattr(clean, "_THREADED_FROM", threaded_from)
        with pytest.raises((ConfigError, DataError)) as err:
            clean.run(ingested, cfg)
        errors.append((type(err.value), str(err.value)))
    assert errors[0] == errors[1] and "Column `b`" in errors[0][1]
