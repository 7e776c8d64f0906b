"""Tests of the discretise stage: level lists, bins, labels, reuse, missing policy, speed."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.config import config_from_dict
from pipeline.errors import ConfigError, LimitError
from pipeline.stages import clean, discretise, ingest
from pipeline.stages._data_common import empty_rejected
from pipeline.stages.clean import Cleaned

BENCHMARKS = Path(__file__).resolve().parent / "data" / "benchmarks"
ALARM = BENCHMARKS / "alarm" / "data.txt"


def _cfg(**sections):
    return config_from_dict(sections)


def _cleaned(table: dict, kinds: dict, summary: dict | None = None) -> Cleaned:
    return Cleaned(pd.DataFrame(table), kinds, [], empty_rejected(), summary or {})


def _alarm(cfg):
    ing = ingest.run(ALARM, cfg.input, cfg.limits)
    return discretise.run(clean.run(ing, cfg), cfg)


# ----------------------------------------------------------------------------- benchmark reference


@pytest.mark.parametrize("default", ["categorical", "auto"])
def test_alarm_codes_equal_the_ranks_numpy_gives(default):
    """ALARM codes equal numpy's `np.unique(..., return_inverse=True)` on the raw file, per column."""
    got = _alarm(_cfg(discretise={"default": default}))
    raw = np.loadtxt(
        ALARM, skiprows=1, dtype=np.int64
    )  # numpy reads the file: the outside reference
    assert got.codes.shape == (10_000, 37)
    for j, name in enumerate(got.codes.columns):
        uniques, inverse = np.unique(raw[:, j], return_inverse=True)
        np.testing.assert_array_equal(got.codes[name].to_numpy(), inverse)
        assert got.levels[name] == [str(u) for u in uniques]
        assert got.edges[name] is None
        assert got.codes[name].dtype == np.int8


# ----------------------------------------------------------------------------- categorical and boolean


def test_numeric_valued_categorical_levels_sort_numerically():
    """Text levels that are numbers sort as numbers ("9" before "10"); other text sorts as text."""
    got = discretise.run(
        _cleaned(
            {"a": ["10", "9", "2", None] * 10, "b": ["x", "b", "a", "b"] * 10},
            {"a": "categorical", "b": "categorical"},
        ),
        _cfg(),
    )
    assert got.levels["a"] == ["2", "9", "10"]
    assert got.codes["a"].tolist()[:4] == [2, 1, 0, -1]
    assert got.levels["b"] == ["a", "b", "x"]


def test_boolean_columns_code_false_then_true():
    """Booleans become levels ["false", "true"] with codes 0 / 1 and -1 for missing."""
    values = pd.array([True, False, None, True], dtype="boolean")
    got = discretise.run(
        _cleaned({"ok": values, "z": ["a", "b", "a", "b"]}, {"ok": "boolean", "z": "categorical"}),
        _cfg(),
    )
    assert got.levels["ok"] == ["false", "true"]
    assert got.codes["ok"].tolist() == [1, 0, -1, 1]


def test_missing_level_when_test_missing_is_level():
    """With `test.missing: level`, missing values get the last level `(missing)` instead of -1."""
    cfg = _cfg(test={"missing": "level"})
    got = discretise.run(
        _cleaned(
            {"z": ["a", None, "b", "a"], "y": [1.0, 2.0, 1.0, 2.0]},
            {"z": "categorical", "y": "numeric"},
        ),
        cfg,
    )
    assert got.levels["z"] == ["a", "b", "(missing)"]
    assert got.codes["z"].tolist() == [0, 2, 1, 0]
    assert got.levels["y"] == ["1", "2"]  # no missing values: no extra level


def test_level_order_hint_from_clean_is_kept():
    """Derived weekday levels keep the week's order given by the clean stage."""
    days = ["Tuesday", "Monday", "Sunday", "Monday"]
    summary = {
        "level_order": {
            "day": ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday"]
        }
    }
    got = discretise.run(
        _cleaned(
            {"day": days, "z": ["a", "b", "a", "b"]},
            {"day": "categorical", "z": "categorical"},
            summary,
        ),
        _cfg(),
    )
    assert got.levels["day"] == ["Monday", "Tuesday", "Sunday"]


def test_codes_use_the_smallest_signed_dtype():
    """127 levels fit int8; 200 levels need int16."""
    small = [f"v{i:03d}" for i in range(127)]
    big = [f"v{i:03d}" for i in range(200)]
    got = discretise.run(
        _cleaned({"s": small + small[:73], "b": big}, {"s": "categorical", "b": "categorical"}),
        _cfg(),
    )
    assert got.codes["s"].dtype == np.int8 and got.codes["b"].dtype == np.int16


def test_level_limit_applies_to_numeric_columns_coded_level_by_level():
    """`discretise.default: categorical` on a column with many values is a LimitError naming it."""
    cfg = _cfg(discretise={"default": "categorical"}, limits={"max_levels": 50})
    x = np.arange(100, dtype=float) + 0.5
    with pytest.raises(
        LimitError, match=r"Column `x` has 100 levels, above `limits\.max_levels` = 50"
    ):
        discretise.run(_cleaned({"x": x, "y": x}, {"x": "numeric", "y": "numeric"}), cfg)


# ----------------------------------------------------------------------------- bins


def test_quantile_bins_match_numpy_quantiles():
    """Quantile cut points are numpy's quantiles; codes are numpy's digitize on them."""
    rng = np.random.default_rng(11)
    x = rng.lognormal(3, 1, 5_000)
    got = discretise.run(_cleaned({"x": x, "y": x}, {"x": "numeric", "y": "numeric"}), _cfg())
    cuts = np.quantile(x, [0.25, 0.5, 0.75])  # numpy as the reference
    np.testing.assert_allclose(got.edges["x"], cuts, rtol=1e-12)
    np.testing.assert_array_equal(got.codes["x"].to_numpy(), np.digitize(x, cuts, right=False))
    assert np.bincount(got.codes["x"].to_numpy()).tolist() == [1250] * 4
    assert got.summary["columns"]["x"]["method"] == "quantile"


def test_uniform_bins_count_like_numpy_histogram():
    """Equal-width bins give the same counts as `numpy.histogram` with the same number of bins."""
    rng = np.random.default_rng(5)
    x = rng.normal(0, 1, 3_000)
    cfg = _cfg(discretise={"default": "uniform", "bins": 5})
    got = discretise.run(_cleaned({"x": x, "y": x}, {"x": "numeric", "y": "numeric"}), cfg)
    counts, _ = np.histogram(x, bins=5)
    np.testing.assert_array_equal(np.bincount(got.codes["x"].to_numpy(), minlength=5), counts)


def test_fixed_edges_with_unit_give_readable_labels():
    """`columns: {latency: {discretise: fixed, edges: [120, 250], unit: ms}}` labels the bins."""
    cfg = _cfg(columns={"latency": {"discretise": "fixed", "edges": [120, 250], "unit": "ms"}})
    lat = [90.0, 120.0, 249.9, 250.0, 999.0, np.nan]
    got = discretise.run(
        _cleaned({"latency": lat, "z": list("abcabc")}, {"latency": "numeric", "z": "categorical"}),
        cfg,
    )
    assert got.levels["latency"] == ["< 120 ms", "[120, 250) ms", ">= 250 ms"]
    assert got.codes["latency"].tolist() == [0, 1, 1, 2, 2, -1]
    assert got.edges["latency"] == [120.0, 250.0]


def test_fixed_without_edges_is_a_config_error():
    """`discretise: fixed` without `edges` names the column and the missing key."""
    cfg = _cfg(columns={"x": {"discretise": "fixed"}})
    with pytest.raises(ConfigError, match=r"`columns\.x\.discretise` is 'fixed' but no `edges`"):
        discretise.run(
            _cleaned({"x": [1.5, 2.5], "y": [1.0, 2.0]}, {"x": "numeric", "y": "numeric"}), cfg
        )


def test_duplicate_quantile_edges_merge_and_isolate_the_mass_at_the_minimum():
    """A mostly-zero column gets the bins "< 1" (the zeros) and ">= 1", not an empty first bin."""
    x = np.r_[np.zeros(900), np.arange(1, 101, dtype=float)]
    got = discretise.run(
        _cleaned({"x": x, "y": x}, {"x": "numeric", "y": "numeric"}),
        _cfg(discretise={"default": "quantile"}),
    )
    assert got.edges["x"] == [1.0]
    assert got.levels["x"] == ["< 1", ">= 1"]
    assert np.bincount(got.codes["x"].to_numpy()).tolist() == [900, 100]


def test_auto_keeps_few_integers_as_levels_and_bins_the_rest():
    """Auto: <= max_categorical_levels distinct whole numbers are levels; continuous values binned."""
    rng = np.random.default_rng(3)
    got = discretise.run(
        _cleaned(
            {"k": rng.integers(0, 5, 400).astype(float), "c": rng.random(400)},
            {"k": "numeric", "c": "numeric"},
        ),
        _cfg(),
    )
    assert got.levels["k"] == ["0", "1", "2", "3", "4"] and got.edges["k"] is None
    assert len(got.levels["c"]) == 4 and len(got.edges["c"]) == 3


# ----------------------------------------------------------------------------- reuse


def test_reuse_gives_the_same_edges_and_levels_and_counts_unknown_levels():
    """Reusing levels.json keeps cut points and level lists; unseen levels become -1, counted."""
    rng = np.random.default_rng(9)
    first = discretise.run(
        _cleaned(
            {"x": rng.normal(0, 1, 500), "z": ["a", "b"] * 250},
            {"x": "numeric", "z": "categorical"},
        ),
        _cfg(),
    )
    stored = json.loads(
        json.dumps({"levels": first.levels, "edges": first.edges, "kinds": first.kinds})
    )
    later = discretise.run(
        _cleaned(
            {"x": rng.normal(3, 1, 300), "z": ["a", "c", "b"] * 100},
            {"x": "numeric", "z": "categorical"},
        ),
        _cfg(),
        reuse=stored,
    )
    assert later.edges["x"] == first.edges["x"] and later.levels == first.levels
    assert later.codes["z"].tolist()[:3] == [0, -1, 1]
    assert later.summary["unknown_levels"] == {"z": 100}


# ----------------------------------------------------------------------------- speed


@pytest.mark.slow
def test_a_million_rows_by_forty_columns_go_through_the_data_stages(tmp_path):
    """1,000,000 rows x 40 columns (numbers, small integers, text, a flag) go through ingest + clean +
    discretise whole: every column coded, every row kept, codes within their levels. How fast is a
    benchmark's claim (`bench/bench_scale.py`), not a test's: the machine is shared."""
    rng = np.random.default_rng(0)
    n = 1_000_000
    cols = {f"f{i}": rng.normal(100, 20, n).round(3) for i in range(20)}
    cols |= {f"i{i}": rng.integers(0, 6, n) for i in range(10)}
    cols |= {f"c{i}": rng.choice(np.array(["east", "west", "north", "south"]), n) for i in range(9)}
    cols["b0"] = rng.random(n) < 0.3
    path = tmp_path / "big.csv"
    pd.DataFrame(cols).to_csv(path, index=False)
    cfg = _cfg()
    ing = ingest.run(path, cfg.input, cfg.limits)
    got = discretise.run(clean.run(ing, cfg), cfg)
    assert got.codes.shape == (n, 40)
    for c in got.codes.columns:
        codes = got.codes[c].to_numpy()
        assert codes.min() >= 0 and codes.max() < len(got.levels[c]), c
    assert len(got.levels["c0"]) == 4 and len(got.levels["i0"]) == 6


def test_reuse_of_whole_number_levels_maps_new_values_to_minus_one():
    """Reused numeric levels ["1", "2", "3"] code 1, 2, 3 as before; an unseen 7 becomes -1."""
    kinds = {"k": "numeric", "j": "numeric"}
    first = discretise.run(
        _cleaned({"k": [1.0, 2.0, 3.0] * 5, "j": [1.0, 2.0] * 7 + [1.0]}, kinds), _cfg()
    )
    stored = {"levels": first.levels, "edges": first.edges}
    later = discretise.run(
        _cleaned({"k": [3.0, 7.0, 1.0, np.nan], "j": [2.0, 1.0, 2.0, 1.0]}, kinds),
        _cfg(),
        reuse=stored,
    )
    assert later.codes["k"].tolist() == [2, -1, 0, -1]
    assert later.summary["unknown_levels"] == {"k": 1}


def test_categorical_columns_code_as_their_object_values():
    """A text column handed over as a pandas categorical (as the clean stage stores it) gets the same
    codes and levels as the same values as Python objects, with a category no row holds left out
    (property test on invented values; pandas' factorize of the objects is the reference)."""
    values = ["b", None, "a", "c", "a", None, "b"] * 5
    as_objects = pd.Series(values, dtype=object)
    as_categorical = pd.Series(pd.Categorical(values, categories=["c", "unused", "b", "a"]))
    cfg = _cfg()
    kinds = {"s": "categorical", "t": "categorical"}
    for mode in ("drop", "level"):
        cfg = _cfg(test={"missing": mode})
        plain = discretise.run(_cleaned({"s": as_objects, "t": as_objects}, kinds), cfg)
        coded = discretise.run(_cleaned({"s": as_categorical, "t": as_objects}, kinds), cfg)
        assert coded.levels == plain.levels
        pd.testing.assert_frame_equal(coded.codes, plain.codes)
        assert coded.summary == plain.summary
    codes, uniques = pd.factorize(as_objects)
    assert plain.levels["s"][: len(uniques)] == sorted(uniques)
