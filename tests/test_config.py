"""The configuration: defaults, overrides, and one-line refusals naming key, value and what is allowed."""

from __future__ import annotations

import pytest

from pipeline.config import apply_overrides, config_from_dict, load_config, resolve_auto, search_pair_count
from pipeline.errors import ConfigError


def test_defaults_validate():
    """The empty configuration is valid and has the documented defaults."""
    cfg = load_config(None)
    assert cfg.test.method == "auto"
    assert cfg.test.alpha == "auto" and cfg.search.max_order == "auto"
    assert cfg.parallel.jobs == 1
    assert cfg.discretise.default == "auto"


def test_overrides_parse_values_as_yaml():
    """`--set` values are typed: numbers, booleans, and `none` for no order cap."""
    cfg = load_config(None, ["test.alpha=0.01", "search.max_order=none", "search.orient=true", "parallel.jobs=2"])
    assert cfg.test.alpha == 0.01 and cfg.search.max_order is None
    assert cfg.search.orient is True and cfg.parallel.jobs == 2
    assert load_config(None, ["search.max_order=3"]).search.max_order == 3


def test_unknown_key_is_refused_with_the_allowed_keys():
    """A misspelt key names itself and lists what the section allows."""
    with pytest.raises(ConfigError, match=r"Unknown configuration key `test.alpah`.*alpha"):
        load_config(None, ["test.alpah=0.1"])


def test_out_of_range_value_names_key_and_value():
    """An alpha outside (0, 1) is refused with the key and the value."""
    with pytest.raises(ConfigError, match=r"`test.alpha` = 1.5"):
        load_config(None, ["test.alpha=1.5"])


def test_wrong_choice_names_allowed_values():
    """A method that does not exist is refused, naming the allowed ones."""
    with pytest.raises(ConfigError, match=r"`test.method` = 'fisher'.*'auto', 'g', 'chi2', 'permutation' or 'gcm'"):
        load_config(None, ["test.method=fisher"])


def test_override_without_equals_is_refused():
    """`--set` without `=` explains the form."""
    with pytest.raises(ConfigError, match="section.key=value"):
        apply_overrides({}, ["test.alpha"])


def test_yaml_file_is_loaded_safely(tmp_path):
    """A YAML tag that would build a Python object is refused, not executed."""
    p = tmp_path / "evil.yaml"
    p.write_text("test: !!python/object/apply:os.system ['echo pwned']\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(p)


def test_missing_config_file(tmp_path):
    """A configuration path that does not exist is a configuration error naming it."""
    with pytest.raises(ConfigError, match="does not exist"):
        load_config(tmp_path / "nope.yaml")


def test_config_name_defaults_to_file_stem(tmp_path):
    """The configuration's name (its output folder) defaults to the file's stem."""
    p = tmp_path / "nightly-api.yaml"
    p.write_text("test: {alpha: 0.01}\n")
    assert load_config(p).name == "nightly-api"


def test_top_level_must_be_mapping():
    """A list at the top level is refused."""
    with pytest.raises(ConfigError, match="mapping"):
        config_from_dict([1, 2])  # type: ignore[arg-type]


def test_auto_settings_follow_the_small_extract_rule():
    """`auto` alpha and order cap follow the documented rule (bench/bench_small_samples.py): with k the
    median level count, alpha 0.2 below 100 k^2 rows, order cap 2 below 5 k^5 rows."""
    cfg = load_config(None)
    small, why = resolve_auto(cfg, 300, [3, 3, 3, 2])
    assert small.test.alpha == 0.2 and small.search.max_order == 2
    assert "100 * k^2" in why["test.alpha"]["why"]
    big, _ = resolve_auto(cfg, 10_000, [3, 3, 3, 2])
    assert big.test.alpha == 0.05 and big.search.max_order is None
    middle, _ = resolve_auto(cfg, 1_000, [3, 3, 3])  # 900 <= 1000 < 1215
    assert middle.test.alpha == 0.05 and middle.search.max_order == 2
    fixed, why = resolve_auto(load_config(None, ["test.alpha=0.01", "search.max_order=none"]), 300, [3, 3])
    assert (fixed.test.alpha, fixed.search.max_order, why) == (0.01, None, {})


def test_auto_alpha_shares_005_over_the_pairs_tested():
    """Above the small-extract rows, `auto` alpha is min(0.05, 2 / pairs) (3 significant digits): m pairs
    with no link pass the first level by chance m * alpha times on average (Bonferroni's bound), so the
    rule keeps that at about two. Few signals keep 0.05; the small-extract 0.2 is unchanged."""
    cfg = load_config(None)
    cases = {1: 0.05, 40: 0.05, 91: 0.022, 120: 0.0167, 780: 0.00256}
    for pairs, alpha in cases.items():
        got, why = resolve_auto(cfg, 10_000, [3, 3], pairs)
        assert got.test.alpha == alpha, pairs
        assert got.test.alpha * pairs <= 2.01 or alpha == 0.05
        assert f"{pairs} pairs tested" in why["test.alpha"]["why"]
    small, _ = resolve_auto(cfg, 300, [3, 3], 780)
    assert small.test.alpha == 0.2


def test_tested_pairs_counts_what_the_search_tests():
    """`search_pair_count` equals the pairs a run leaves in the search: all pairs of its variables minus the pairs
    the time order rules out (two earlier copies, or a signal with its own copy; `timeline.lag_pairs`)."""
    from pipeline.stages.timeline import lag_pairs

    for p in (2, 5, 14):
        for lags in (0, 1, 3):
            names, source, lag = [], [], []
            for k in range(lags + 1):
                for i in range(p):
                    names.append(f"s{i}@{k}"), source.append(f"s{i}"), lag.append(k)
            n = len(names)
            doc = {"names": names, "source": source, "lag": lag}
            assert search_pair_count(p, lags) == n * (n - 1) // 2 - len(lag_pairs(doc)), (p, lags)


def test_auto_inputs_from_a_timeline_doc():
    """What a run gives `resolve_auto`: rows with a previous window (time-ordered rows), the levels of the
    signals tested on their codes (no numeric signal, no earlier-window copy), the pairs the search tests."""
    from pipeline.stages.timeline import auto_inputs

    doc = {"names": ["a", "b", "c", "a@t-1", "b@t-1", "c@t-1"], "source": ["a", "b", "c", "a", "b", "c"],
           "lag": [0, 0, 0, 1, 1, 1], "cards": [3, 4, 1, 3, 4, 1], "numeric": [False, False, True, False, False, True],
           "timed": True, "rows_without_previous": 12}
    assert auto_inputs(doc, 1000) == (988, [3, 4], search_pair_count(3, 1))
    assert auto_inputs({**doc, "timed": False}, 1000)[0] == 1000
