"""The configuration schema: defaults, validation and ``--set key=value`` overrides.

A configuration is YAML (loaded with a safe loader: nothing in it is executed; a key repeated in one
mapping is refused, and so is a file whose anchors and aliases expand to more than `MAX_CONFIG_VALUES`
values), validated by pydantic models that refuse unknown keys, wrong types, infinite numbers and
out-of-range values with a one-line message naming the key, the value (shortened) and what is allowed.
"""

from __future__ import annotations

import codecs
import copy
import reprlib
from pathlib import Path
from typing import Annotated, Any, Literal, Optional, Union

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from .errors import ConfigError

__all__ = ["Config", "load_config", "apply_overrides", "config_from_dict", "resolve_auto", "search_pair_count"]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", validate_assignment=True, allow_inf_nan=False)


class ColumnSpec(_Section):
    """Per-column overrides: type, discretisation, fixed bin edges, unit for labels."""

    type: Optional[Literal["numeric", "categorical", "boolean", "timestamp", "ignore"]] = None
    discretise: Optional[Literal["categorical", "quantile", "uniform", "fixed"]] = None
    bins: Optional[int] = Field(default=None, ge=2, le=64)
    edges: Optional[list[float]] = None
    unit: Optional[str] = None
    rename: Optional[str] = None


class InputSettings(_Section):
    """How the extract is read (ingest stage)."""

    format: Literal["auto", "csv", "parquet", "jsonl"] = "auto"
    delimiter: Optional[str] = None  # None: detected from the first lines
    quote_char: str = '"'
    encoding: str = "utf-8"
    header: bool = True
    columns: Optional[list[str]] = None  # None: every column
    rename: dict[str, str] = Field(default_factory=dict)
    null_values: list[str] = Field(
        default_factory=lambda: ["", "NA", "N/A", "NaN", "nan", "null", "NULL", "None", "-"]
    )
    # Lines whose bytes do not decode with `encoding`: "quarantine" sets them aside (with the reason)
    # while they are a small minority of the file, "refuse" stops at the first one.
    encoding_errors: Literal["quarantine", "refuse"] = "quarantine"

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, value: str) -> str:
        try:
            codecs.lookup(value)
        except LookupError:
            raise ValueError("not an encoding Python knows; use e.g. utf-8, latin-1 or cp1252") from None
        return value

    @field_validator("columns")
    @classmethod
    def _some_columns(cls, value: Optional[list[str]]) -> Optional[list[str]]:
        if value is not None and not value:
            raise ValueError("an empty list selects no column; name the columns to read, or leave the key out to read every column")
        return value


class CleanSettings(_Section):
    """Which columns and rows the tests may see (clean stage)."""

    drop_constant: bool = True
    id_unique_ratio: float = Field(default=0.95, gt=0.0, le=1.0)
    max_missing_fraction: float = Field(default=0.5, ge=0.0, le=1.0)
    rare_level_min_count: int = Field(default=0, ge=0)
    duplicates: Literal["keep", "drop"] = "keep"
    text_in_numeric: Literal["quarantine", "refuse", "categorical"] = "quarantine"
    min_rows: int = Field(default=20, ge=1)
    timestamp_features: bool = False
    # A text column whose non-missing values all parse as numbers except at most this fraction is a
    # numeric column holding stray text (handled per `text_in_numeric`); above it, it is categorical.
    numeric_text_max_fraction: float = Field(default=0.1, ge=0.0, lt=1.0)


class DiscretiseSettings(_Section):
    """How each kept column becomes small integer codes (discretise stage)."""

    default: Literal["auto", "categorical", "quantile", "uniform"] = "auto"
    bins: int = Field(default=4, ge=2, le=64)
    max_categorical_levels: int = Field(default=12, ge=2)
    # a run folder whose bin edges and levels are reused, or `latest` / `previous` of this
    # configuration's own runs (the first night then sets the categories for the nights after it)
    reuse_from: Optional[str] = None


class TestSettings(_Section):
    """The conditional-independence test used by every battery."""

    # auto: G-test on codes for categorical signals on independent rows; the residual-covariance
    # test (gcm) when a numeric signal is involved or the rows are time-ordered
    method: Literal["auto", "g", "chi2", "permutation", "gcm"] = "auto"
    # `auto`: 0.2 for small extracts (fewer than 100 * k**2 rows, k the median level count), else
    # 0.05 shared over the pairs the search tests: min(0.05, 2 / pairs), so that at most about two
    # pairs are expected to pass the first level by chance however many signals the extract has
    alpha: Union[Literal["auto"], Annotated[float, Field(gt=0.0, lt=1.0)]] = "auto"
    sparse_policy: Literal["flag", "independent", "dependent"] = "flag"
    min_rows_per_cell: float = Field(default=5.0, ge=0.0)
    missing: Literal["drop", "level"] = "drop"
    permutations: int = Field(default=999, ge=19, le=1_000_000)
    permutation_stop_hits: int = Field(default=20, ge=0)  # 0: no early stopping
    permutation_batch: int = Field(default=100, ge=1)
    permutation_score: Literal["g", "cmi"] = "g"
    seed: int = Field(default=0, ge=0)


class TimeSettings(_Section):
    """Which column orders the rows in time and which columns name one series (e.g. the node)."""

    # the timestamp column; None: the first column that parses as timestamps (the manifest says so)
    column: Optional[str] = None
    # columns that identify one series; None: found from the data when timestamps repeat
    series: Optional[list[str]] = None
    # auto: time-aware tests whenever a time column is known; off: rows are treated as independent
    serial: Literal["auto", "off"] = "auto"
    # whether series columns (e.g. the node) are also tested as signals
    test_series: bool = False
    # add each signal's values 1..lags windows earlier as variables (lagged links); 0: off
    lags: int = Field(default=0, ge=0, le=6)
    # window length in seconds; None: the most common step between consecutive rows of a series
    window_seconds: Optional[float] = Field(default=None, gt=0)

    @field_validator("serial", mode="before")
    @classmethod
    def _yaml_words(cls, value: Any) -> Any:
        # YAML reads a bare `off` as false and `on` as true
        return {False: "off", True: "auto"}.get(value, value) if isinstance(value, bool) else value


class SearchSettings(_Section):
    """The skeleton search (PC-stable) and optional orientation."""

    # an integer, `none` (no cap), or `auto`: 2 for small extracts (fewer than 5 * k**5 rows), else none
    max_order: Union[Literal["auto"], Annotated[int, Field(ge=0)], None] = "auto"
    orient: bool = False
    collider_rule: Literal["plain", "conservative", "majority"] = "conservative"
    resamples: int = Field(default=0, ge=0)
    resample_fraction: float = Field(default=0.5, gt=0.0, le=1.0)
    resample_method: Literal["subsample", "bootstrap"] = "subsample"
    stable_threshold: float = Field(default=0.6, gt=0.0, le=1.0)
    near_alpha_factor: float = Field(default=2.0, gt=1.0)

    @field_validator("max_order", mode="before")
    @classmethod
    def _none_words(cls, value: Any) -> Any:
        if isinstance(value, str) and value.strip().lower() in {"none", "null", "unlimited", ""}:
            return None
        if isinstance(value, str) and value.strip().lower() == "auto":
            return "auto"
        return value


class KnowledgeSettings(_Section):
    """Background knowledge from the experts."""

    required: list[tuple[str, str]] = Field(default_factory=list)
    forbidden: list[tuple[str, str]] = Field(default_factory=list)
    tiers: list[list[str]] = Field(default_factory=list)
    review_file: Optional[str] = None


class ParallelSettings(_Section):
    """Where and how wide the batteries run."""

    jobs: int = Field(default=1, ge=-1)
    backend: Literal["local", "dask"] = "local"
    scheduler: Optional[str] = None
    partition_rows: int = Field(default=2_000_000, ge=1_000)


class LimitSettings(_Section):
    """Sizes refused with a clear message instead of exhausting the machine."""

    max_columns: int = Field(default=500, ge=2)
    max_levels: int = Field(default=1_000, ge=2)
    max_table_cells: int = Field(default=50_000_000, ge=4)
    max_rows: int = Field(default=500_000_000, ge=1)


class OutputSettings(_Section):
    """Where runs are written."""

    root: Optional[str] = None
    keep_runs: int = Field(default=30, ge=1)
    cache_entries: int = Field(default=4, ge=1)  # cached results kept per stage (most recently used)
    png: bool = True


class NightlySettings(_Section):
    """Unattended runs over an inbox of snapshots."""

    inbox: Optional[str] = None
    settle_seconds: float = Field(default=60.0, ge=0.0)
    ready_marker: Optional[str] = None  # e.g. "_SUCCESS": only folders holding it are picked up
    max_attempts: int = Field(default=3, ge=1)
    lock_wait_seconds: float = Field(default=0.0, ge=0.0)


class ReportSettings(_Section):
    """What the report shows besides the evidence."""

    title: Optional[str] = None
    truth_file: Optional[str] = None  # a known true graph (JSON {"edges": [[a, b], ...]}), e.g. the demo's


class CompareSettings(_Section):
    """How two runs are compared."""

    category_mismatch: Literal["warn", "refuse"] = "warn"
    alpha: float = Field(default=0.05, gt=0.0, lt=1.0)  # false discovery rate of the change tests


class Config(_Section):
    """The whole configuration; every key has a default that serves a typical extract."""

    input: InputSettings = Field(default_factory=InputSettings)
    columns: dict[str, ColumnSpec] = Field(default_factory=dict)
    clean: CleanSettings = Field(default_factory=CleanSettings)
    discretise: DiscretiseSettings = Field(default_factory=DiscretiseSettings)
    test: TestSettings = Field(default_factory=TestSettings)
    search: SearchSettings = Field(default_factory=SearchSettings)
    time: TimeSettings = Field(default_factory=TimeSettings)
    knowledge: KnowledgeSettings = Field(default_factory=KnowledgeSettings)
    parallel: ParallelSettings = Field(default_factory=ParallelSettings)
    limits: LimitSettings = Field(default_factory=LimitSettings)
    output: OutputSettings = Field(default_factory=OutputSettings)
    nightly: NightlySettings = Field(default_factory=NightlySettings)
    compare: CompareSettings = Field(default_factory=CompareSettings)
    report: ReportSettings = Field(default_factory=ReportSettings)
    name: Optional[str] = None  # names the configuration's output folder; default: the file's stem

    def section(self, name: str) -> dict[str, Any]:
        """The plain-data slice of one section, for cache keys and the manifest."""
        return getattr(self, name).model_dump(mode="json") if name != "columns" else {
            k: v.model_dump(mode="json") for k, v in self.columns.items()
        }


# ----------------------------------------------------------------------------- reading YAML safely

MAX_CONFIG_VALUES = 100_000  # values a configuration may expand to (anchors and aliases counted out)
_SHOWN_CHARS = 80  # longest value or key echoed in a message


class _RepeatedKey(yaml.YAMLError):
    """A mapping holds the same key twice (YAML would silently keep the last one)."""

    def __init__(self, key: Any, first: int, again: int) -> None:
        super().__init__(f"repeated key {key!r}")
        self.key, self.first, self.again = key, first, again


class _StrictLoader(yaml.SafeLoader):
    """`yaml.SafeLoader` that refuses a key repeated in one mapping."""

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
        seen: dict[Any, int] = {}
        for key_node, _value in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                continue  # `<<: *defaults` may be overridden key by key
            key = self.construct_object(key_node, deep=True)
            try:
                first = seen.setdefault(key, key_node.start_mark.line + 1)
            except TypeError:
                continue  # an unhashable key: the base loader reports it
            if first != key_node.start_mark.line + 1:
                raise _RepeatedKey(key, first, key_node.start_mark.line + 1)
        return super().construct_mapping(node, deep=deep)


def _yaml(text: str) -> Any:
    return yaml.load(text, Loader=_StrictLoader)  # noqa: S506 - a SafeLoader subclass


def _short(value: Any) -> str:
    """`repr` of a value cut to a few dozen characters, without building the whole text first."""
    r = reprlib.Repr()
    r.maxlevel, r.maxlist, r.maxdict, r.maxtuple, r.maxstring, r.maxother = 3, 6, 6, 6, _SHOWN_CHARS, _SHOWN_CHARS
    text = r.repr(value)
    return text if len(text) <= _SHOWN_CHARS else text[: _SHOWN_CHARS - 3] + "..."


def _check_size(data: Any) -> None:
    """Refuse data whose anchors and aliases expand to more than `MAX_CONFIG_VALUES` values."""
    sizes: dict[int, int] = {}
    busy: set[int] = set()

    def size(obj: Any) -> int:
        if not isinstance(obj, (dict, list, tuple)):
            return 1
        key = id(obj)
        if key in sizes:
            return sizes[key]
        if key in busy:
            raise ConfigError("The configuration contains a value that contains itself (a YAML alias to its own anchor); remove it.")
        busy.add(key)
        items = list(obj.keys()) + list(obj.values()) if isinstance(obj, dict) else obj
        total = 1
        for item in items:
            total += size(item)
            if total > MAX_CONFIG_VALUES:
                break
        busy.discard(key)
        sizes[key] = total
        return total

    if size(data) > MAX_CONFIG_VALUES:
        raise ConfigError(
            f"The configuration expands to more than {MAX_CONFIG_VALUES:,} values (YAML anchors and aliases "
            "repeat what they name); write the values out, or use fewer aliases."
        )


def _key_path(loc: tuple[Any, ...], data: Any) -> tuple[list[str], Any]:
    """The part of an error location that names configuration keys, and the value found there."""
    parts: list[str] = []
    value: Any = data
    for part in loc:
        if isinstance(value, dict) and part in value:
            parts.append(str(part))
            value = value[part]
        elif isinstance(value, (list, tuple)) and isinstance(part, int) and part < len(value):
            parts.append(str(part))
            value = value[part]
        else:
            if not parts or isinstance(value, dict):
                parts.append(str(part))  # a key that is not there (unknown or missing)
                value = "?"
            break
    return parts, value


def _describe(err: ValidationError, data: dict[str, Any]) -> str:
    errors = err.errors()
    first = errors[0]
    parts, value = _key_path(first["loc"], data)
    key = ".".join(parts)
    if first["type"] == "extra_forbidden":
        model: Any = Config
        for part in parts[:-1]:
            field = model.model_fields.get(part) if hasattr(model, "model_fields") else None
            model = field.annotation if field is not None else None
        allowed = sorted(model.model_fields) if hasattr(model, "model_fields") else []
        hint = f"; allowed keys here: {', '.join(allowed)}" if allowed else ""
        return f"Unknown configuration key `{key[:_SHOWN_CHARS]}`{hint}."
    # a key whose type is a union (`auto` or a number, say) reports one error per branch
    msgs = []
    for e in errors:
        msg = e["msg"].removeprefix("Value error, ")
        if ".".join(_key_path(e["loc"], data)[0]) == key and msg not in msgs:
            msgs.append(msg)
    return f"Configuration key `{key[:_SHOWN_CHARS]}` = {_short(value)} is not allowed: {'; or '.join(msgs)}."


PAIRS_BY_CHANCE = 2.0  # `auto` alpha: pairs expected to pass the first level by chance, at most


def search_pair_count(n_signals: int, lags: int = 0) -> int:
    """The pairs a search tests: the signals with each other, and each earlier-window copy (lags 1..`lags`)
    with every other signal of the present window (copies are never tested with each other or their own signal)."""
    p = max(0, int(n_signals))
    return p * (p - 1) // 2 + p * max(0, int(lags)) * max(0, p - 1)


def resolve_auto(cfg: Config, n_rows: int, cards: list[int], n_pairs: int = 1) -> tuple[Config, dict[str, Any]]:
    """Replace `auto` settings by their values for an extract of `n_rows` rows and these level counts.

    The small-extract rule comes from the study in ``bench/bench_small_samples.py`` (adjacency F1 on
    subsamples of the four shared benchmark networks): with k the median number of levels (at least 2),
    ``test.alpha`` is 0.2 below ``100 * k**2`` rows (a typical two-variable table has fewer than 100
    rows per cell). Above, alpha is 0.05 shared over the `n_pairs` pairs the search tests:
    ``min(0.05, 2 / n_pairs)``. A search tests every pair at the first level, so m pairs with no link
    pass it by chance m * alpha times on average (Bonferroni's bound on the expected number of false
    rejections); the rule keeps that at most two however many signals there are, which is what keeps
    false links rare in the simulations (``bench/bench_timeseries.py``, ``bench/bench_numeric.py``).
    ``search.max_order`` is 2 below ``5 * k**5`` rows (a typical table of order 3 would have fewer
    than 5 rows per cell, common practice) and uncapped above.
    Returns the resolved configuration and a record of what was decided and why. The caller passes the
    rows a test can use (on time-ordered rows: the rows with a previous window), the level counts of the
    signals tested on their codes (signals tested on their values have no table cells to fill) and the
    number of pairs the search tests (`search_pair_count`).
    """
    import statistics

    k = max(2.0, float(statistics.median(cards))) if cards else 2.0
    decided: dict[str, Any] = {}
    test, search = cfg.test, cfg.search
    if test.alpha == "auto":
        small = n_rows < 100 * k**2
        pairs = max(1, int(n_pairs))
        shared = min(0.05, PAIRS_BY_CHANCE / pairs)
        test = test.model_copy(update={"alpha": 0.2 if small else float(f"{shared:.3g}")})
        rows_why = f"{n_rows} rows {'<' if small else '>='} 100 * k^2 = {100 * k**2:g} (k = {k:g} levels, median)"
        pairs_why = "" if small else (
            f"; {pairs} pairs tested: min(0.05, {PAIRS_BY_CHANCE:g} / {pairs}) keeps the pairs expected to pass "
            f"the first level by chance at {pairs * test.alpha:.2g} or fewer")
        decided["test.alpha"] = {"value": test.alpha, "why": rows_why + pairs_why}
    if search.max_order == "auto":
        small = n_rows < 5 * k**5
        search = search.model_copy(update={"max_order": 2 if small else None})
        decided["search.max_order"] = {
            "value": search.max_order,
            "why": f"{n_rows} rows {'<' if small else '>='} 5 * k^5 = {5 * k**5:g} (k = {k:g} levels, median)",
        }
    if not decided:
        return cfg, decided
    return cfg.model_copy(update={"test": test, "search": search}), decided


def config_from_dict(data: dict[str, Any] | None) -> Config:
    """Validate a plain dictionary into a `Config`, raising `ConfigError` with one clear line."""
    data = data or {}
    if not isinstance(data, dict):
        raise ConfigError(f"The configuration must be a mapping of sections, got {type(data).__name__}.")
    _check_size(data)
    try:
        return Config.model_validate(data)
    except ValidationError as err:
        raise ConfigError(_describe(err, data)) from err


def _parse_value(text: str) -> Any:
    try:
        return _yaml(text)
    except yaml.YAMLError:
        return text


def apply_overrides(data: dict[str, Any], overrides: list[str]) -> dict[str, Any]:
    """Return a copy of `data` with ``key.sub=value`` overrides applied (values parsed as YAML)."""
    out = copy.deepcopy(data or {})
    for item in overrides:
        if "=" not in item:
            raise ConfigError(f"`--set {item}` has no `=`; write it as `--set section.key=value`.")
        key, raw = item.split("=", 1)
        parts = [p for p in key.strip().split(".") if p]
        if not parts:
            raise ConfigError(f"`--set {item}` names no key; write it as `--set section.key=value`.")
        node = out
        for part in parts[:-1]:
            child = node.get(part)
            if child is None:
                child = node[part] = {}
            if not isinstance(child, dict):
                raise ConfigError(f"`--set {item}`: `{part}` is a value, not a section.")
            node = child
        node[parts[-1]] = _parse_value(raw)
    return out


def load_config(path: Union[str, Path, None] = None, overrides: Optional[list[str]] = None) -> Config:
    """Read a YAML configuration (or the defaults when `path` is None) and apply overrides.

    Examples
    --------
    >>> cfg = load_config(None, ["test.alpha=0.01", "search.max_order=none"])
    >>> cfg.test.alpha, cfg.search.max_order
    (0.01, None)
    """
    data: dict[str, Any] = {}
    if path is not None:
        p = Path(path)
        if not p.is_file():
            raise ConfigError(f"Configuration file `{p}` does not exist; check the path given to --config.")
        try:
            data = _yaml(p.read_text(encoding="utf-8")) or {}
        except _RepeatedKey as err:
            raise ConfigError(
                f"Configuration file `{p}` gives the key `{str(err.key)[:_SHOWN_CHARS]}` twice in one "
                f"mapping (lines {err.first} and {err.again}); keep one of them (merge repeated sections)."
            ) from err
        except (yaml.YAMLError, UnicodeDecodeError) as err:
            line = getattr(getattr(err, "problem_mark", None), "line", None)
            where = f" at line {line + 1}" if line is not None else ""
            raise ConfigError(f"Configuration file `{p}` is not valid YAML{where}; fix its syntax.") from err
        if not isinstance(data, dict):
            raise ConfigError(f"Configuration file `{p}` must hold a mapping of sections.")
        if "name" not in data:
            data["name"] = p.stem
    data = apply_overrides(data, overrides or [])
    return config_from_dict(data)
