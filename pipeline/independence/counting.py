"""Contingency counting over integer-coded columns, partition by partition.

Columns are rows of a 2-D array shaped ``(variables, rows)`` holding codes ``0..k-1`` and ``-1`` for a
missing value. A table of x by y given a conditioning set z is counted with one ``np.bincount`` over
a mixed-radix cell index, one row partition at a time; partition tables add up, so peak memory is
bounded by the partition size. When the product of the levels is larger than the rows being counted,
only the cells that occur are kept (a sparse count), so no table larger than the rows it counts is
ever materialised. Rows may carry integer weights (distinct rows from `compress_rows` with their
number of occurrences); n is then the sum of the weights of the rows used.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from ..errors import LimitError
from ._kernels import count_dense, row_hash

__all__ = ["StratifiedTable", "compress_rows", "count_flat", "count_table", "stratum_codes"]

_INT64_SAFE = 1 << 62


@dataclass(frozen=True)
class StratifiedTable:
    """Counts shaped ``(observed strata, levels of x, levels of y)`` and the rows they came from."""

    counts: np.ndarray
    n: int
    possible_cells: int  # levels of x * levels of y * product of the levels of z


def _as_index(col: np.ndarray) -> np.ndarray:
    return col.astype(np.int64, copy=False)


def stratum_codes(
    data: np.ndarray, cards: Sequence[int], given: Sequence[int], start: int = 0, stop: int | None = None
) -> tuple[np.ndarray, int, np.ndarray | None]:
    """Mixed-radix stratum index of the rows ``start:stop`` for the variables `given`.

    Returns the index (int64), the number of possible strata and a boolean mask of rows where a
    variable of `given` is missing (None when none is).
    """
    stop = data.shape[1] if stop is None else stop
    n = stop - start
    if not given:
        return np.zeros(n, dtype=np.int64), 1, None
    missing = None
    s = None
    radix = 1
    for k in given:
        col = data[k, start:stop]
        m = col < 0
        if m.any():
            missing = m if missing is None else (missing | m)
        c = _as_index(col)
        if s is None:
            s = c.copy()
        else:
            if radix * cards[k] >= _INT64_SAFE:
                raise LimitError(
                    "The conditioning set has too many level combinations to index; lower "
                    "`search.max_order` or the number of levels per column."
                )
            s *= cards[k]
            s += c
        radix *= int(cards[k])
    assert s is not None
    if missing is not None:
        s[missing] = -1
    return s, radix, missing


def count_table(
    data: np.ndarray,
    cards: Sequence[int],
    x: int,
    y: int,
    given: Sequence[int] = (),
    *,
    partition_rows: int = 2_000_000,
    max_cells: int = 50_000_000,
    strata: tuple[np.ndarray, int, np.ndarray | None] | None = None,
    weights: np.ndarray | None = None,
) -> StratifiedTable:
    """Count x by y within each stratum of `given`, over all rows where all of them are present.

    Parameters
    ----------
    data : array shaped (variables, rows) of integer codes, -1 for missing.
    cards : number of levels of each variable.
    x, y : variable indices.
    given : indices of the conditioning set.
    partition_rows : rows counted at a time; the partial tables are summed.
    max_cells : refuse a dense table above this many cells (a sparse count is used before that).
    strata : a precomputed ``stratum_codes`` result for all rows (shared by tests with the same set).
    weights : optional count of each row (distinct rows from `compress_rows`); n is their sum.

    Examples
    --------
    >>> d = np.array([[0, 0, 1, 1], [0, 1, 1, 1]], dtype=np.int8)
    >>> count_table(d, [2, 2], 0, 1).counts[0].tolist()
    [[1, 1], [0, 2]]
    """
    n_rows = data.shape[1]
    kx, ky = int(cards[x]), int(cards[y])
    possible_strata = 1
    for k in given:
        possible_strata *= int(cards[k])
    possible = kx * ky * possible_strata
    dense = possible <= max(4 * min(n_rows, partition_rows), 1 << 16)
    if dense and possible > max_cells:
        dense = False
    if possible >= _INT64_SAFE:
        raise LimitError(
            f"A table of `{x}` by `{y}` given {len(given)} variables would have {possible:.3g} cells; "
            "lower `search.max_order` or the number of levels per column."
        )
    total: Any = np.zeros(possible, dtype=np.int64) if dense else None
    keys_parts: list[np.ndarray] = []
    counts_parts: list[np.ndarray] = []
    used = 0
    step = max(1, int(partition_rows))
    given_arr = np.asarray(given, dtype=np.int64)
    gcards = np.asarray([int(cards[k]) for k in given], dtype=np.int64)
    for start in range(0, n_rows, step):
        stop = min(n_rows, start + step)
        if dense and strata is None and weights is None:
            part = count_dense(data, x, y, given_arr, gcards, kx, ky, start, stop, possible)
            used += int(part.sum())
            total += part
            continue
        if strata is not None:
            s_full, _, _ = strata
            s = s_full[start:stop]
        else:
            s, _, _ = stratum_codes(data, cards, given, start, stop)
        xc = data[x, start:stop]
        yc = data[y, start:stop]
        idx = s * (kx * ky)
        idx += _as_index(xc) * ky
        idx += _as_index(yc)
        bad = (xc < 0) | (yc < 0) | (s < 0)
        wp = None if weights is None else weights[start:stop]
        if bad.any():
            idx = idx[~bad]
            wp = None if wp is None else wp[~bad]
        used += int(idx.size) if wp is None else int(wp.sum())
        if dense:
            if wp is None:
                total += np.bincount(idx, minlength=possible)
            else:
                total += np.bincount(idx, weights=wp, minlength=possible).astype(np.int64)
        else:
            if wp is None:
                part_keys, c = np.unique(idx, return_counts=True)
            else:
                part_keys, inv = np.unique(idx, return_inverse=True)
                c = np.bincount(inv, weights=wp).astype(np.int64)
            keys_parts.append(part_keys)
            counts_parts.append(c)
    if dense:
        assert total is not None
        cube = total.reshape(possible_strata, kx, ky)
        occupied = cube.reshape(possible_strata, -1).any(axis=1)
        counts = cube[occupied]
    else:
        if keys_parts:
            keys = np.concatenate(keys_parts)
            cnts = np.concatenate(counts_parts)
            if len(keys_parts) > 1:
                keys, inv = np.unique(keys, return_inverse=True)
                cnts = np.bincount(inv, weights=cnts).astype(np.int64)
        else:
            keys = np.zeros(0, dtype=np.int64)
            cnts = np.zeros(0, dtype=np.int64)
        stratum, cell = np.divmod(keys, kx * ky)
        ustrata, sidx = np.unique(stratum, return_inverse=True)
        if ustrata.size * kx * ky > max_cells:
            raise LimitError(
                f"A table would need {ustrata.size * kx * ky} cells (limit `limits.max_table_cells` = "
                f"{max_cells}); lower `search.max_order` or pool rare levels."
            )
        counts = np.zeros((ustrata.size, kx * ky), dtype=np.int64)
        counts[sidx, cell] = cnts
        counts = counts.reshape(ustrata.size, kx, ky)
    return StratifiedTable(counts=counts, n=used, possible_cells=possible)


def count_flat(
    data: np.ndarray,
    cards: Sequence[int],
    x: int,
    y: int,
    given: Sequence[int] = (),
    *,
    partition_rows: int = 2_000_000,
    max_cells: int = 50_000_000,
    weights: np.ndarray | None = None,
) -> tuple[np.ndarray, int]:
    """Counts of x by y per stratum as one flat array of whole ``levels_x * levels_y`` blocks, and n.

    The same numbers as `count_table`, without dropping empty strata (the statistics skip them);
    the engine's fast path.
    """
    n_rows = data.shape[1]
    kx, ky = int(cards[x]), int(cards[y])
    possible = kx * ky
    gcards_l = []
    for k in given:
        c = int(cards[k])
        gcards_l.append(c)
        possible *= c
    too_big = possible > max(4 * min(n_rows, partition_rows), 1 << 16) or possible > max_cells
    if too_big or weights is not None:
        table = count_table(
            data, cards, x, y, given, partition_rows=partition_rows, max_cells=max_cells,
            weights=weights,
        )
        return table.counts.reshape(-1), table.n
    given_arr = np.asarray(given, dtype=np.int64)
    gcards = np.asarray(gcards_l, dtype=np.int64)
    step = max(1, int(partition_rows))
    if n_rows <= step:
        total = count_dense(data, x, y, given_arr, gcards, kx, ky, 0, n_rows, possible)
    else:
        total = np.zeros(possible, dtype=np.int64)
        for start in range(0, n_rows, step):
            stop = min(n_rows, start + step)
            total += count_dense(data, x, y, given_arr, gcards, kx, ky, start, stop, possible)
    return total, int(total.sum())


_HASH_MULT = np.uint64(0x9E3779B97F4A7C15)
# numpy hashes about 100 million cells a second here; loading the compiled kernel costs 0.1-0.5 s
_COMPILED_HASH_CELLS = 20_000_000


def _row_hash(data: np.ndarray) -> np.ndarray:
    """A 64-bit hash of each column of `data` (each row of the table), mixing one variable at a time.

    Below `_COMPILED_HASH_CELLS` cells numpy's pass is cheaper than loading the compiled twin into a
    process that has no other use for it (the main process of a run whose tests run in workers).
    """
    fast = row_hash(data) if data.size >= _COMPILED_HASH_CELLS else None
    if fast is not None:
        return fast
    h = np.full(data.shape[1], 0x243F6A8885A308D3, dtype=np.uint64)
    with np.errstate(over="ignore"):
        for row in data:
            h ^= row.astype(np.int64).view(np.uint64) + np.uint64(0x7F4A7C15)
            h *= _HASH_MULT
            h ^= h >> np.uint64(29)
    return h


def _distinct(data: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """First occurrence, inverse and counts of the distinct table rows, or None on a hash collision."""
    first, inverse, counts = np.unique(_row_hash(data), return_index=True, return_inverse=True,
                                       return_counts=True)[1:]
    if not np.array_equal(data[:, first][:, inverse], data):
        return None
    return first, inverse, counts


def compress_rows(
    data: np.ndarray, *, max_ratio: float = 1.0, sample: int = 32_768
) -> tuple[np.ndarray, np.ndarray] | None:
    """The distinct rows of a coded table and how often each occurs.

    Counting over distinct rows with their counts as weights gives exactly the counts of the
    full table. Returns ``(distinct, weights)`` with `distinct` shaped (variables, D) in order of
    first occurrence and `weights` (int64, length D, summing to the rows), or None when the table
    would keep more than ``max_ratio`` of its rows. Above `sample` rows, an evenly spaced sample is
    looked at first: the share of distinct rows only falls as rows are added, so a sample above
    `max_ratio` settles the question cheaply.

    Examples
    --------
    >>> d = np.array([[0, 1, 0, 0], [1, 1, 1, 0]], dtype=np.int8)
    >>> u, w = compress_rows(d)
    >>> u.tolist(), w.tolist()
    ([[0, 1, 0], [1, 1, 0]], [2, 1, 1])
    """
    data = np.asarray(data)
    n = data.shape[1]
    if n == 0:
        return None
    if n > sample:
        pick = np.linspace(0, n - 1, sample).astype(np.int64)
        part = np.ascontiguousarray(data[:, pick])
        found = _distinct(part)
        d = found[0].size if found is not None else np.unique(
            np.ascontiguousarray(part.T).view(np.dtype((np.void, part.dtype.itemsize * part.shape[0])))
        ).size
        if d > max_ratio * sample:
            return None
    found = _distinct(data)
    if found is None:  # a hash collision (never seen): exact but slower
        rows = np.ascontiguousarray(data.T)
        view = rows.view(np.dtype((np.void, rows.dtype.itemsize * rows.shape[1]))).ravel()
        _, first, counts = np.unique(view, return_index=True, return_counts=True)
    else:
        first, _, counts = found
    if first.size > max_ratio * n:
        return None
    order = np.argsort(first, kind="stable")
    return np.ascontiguousarray(data[:, first[order]]), counts[order].astype(np.int64)
