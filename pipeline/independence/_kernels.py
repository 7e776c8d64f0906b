"""Compiled inner loops of the engine (numba), each with a plain-numpy twin giving the same numbers.

The numba versions are used when numba imports and ``EDGEPROOF_NO_NUMBA`` is not set; the numpy
twins are the reference the tests compare them with (counts exactly, statistics to rtol 1e-12).
"""

from __future__ import annotations

import os

import numpy as np

__all__ = [
    "HAVE_NUMBA", "count_dense", "count_dense_numpy", "flat_statistics", "flat_statistics_numpy", "run_groups",
]

_LANES_MAX_CELLS = 1 << 13  # below this many cells, count into 4 interleaved tables (less stalling)

try:  # pragma: no cover - depends on the install
    if os.environ.get("EDGEPROOF_NO_NUMBA"):
        raise ImportError("disabled by EDGEPROOF_NO_NUMBA")
    from numba import njit

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover - depends on the install
    HAVE_NUMBA = False


def count_dense_numpy(
    data: np.ndarray, x: int, y: int, given: np.ndarray, gcards: np.ndarray, kx: int, ky: int,
    start: int, stop: int, possible: int,
) -> np.ndarray:
    """Dense counts (length `possible`) of rows ``start:stop`` where x, y and `given` are present."""
    xc = data[x, start:stop].astype(np.int64)
    yc = data[y, start:stop].astype(np.int64)
    bad = (xc < 0) | (yc < 0)
    s = np.zeros(stop - start, dtype=np.int64)
    for k, c in zip(given, gcards):
        col = data[int(k), start:stop]
        bad |= col < 0
        s *= int(c)
        s += col
    idx = s * (kx * ky) + xc * ky + yc
    if bad.any():
        idx = idx[~bad]
    return np.bincount(idx, minlength=possible).astype(np.int64)


def flat_statistics_numpy(counts: np.ndarray, kx: int, ky: int) -> tuple[float, float, int, int, int, int]:
    """G, X^2, dof, n, observed strata and min(rows, columns present) - 1 of flat stratified counts."""
    t = counts.reshape(-1, kx, ky).astype(np.float64)
    rows = t.sum(axis=2)
    cols = t.sum(axis=1)
    tot = rows.sum(axis=1)
    keep = tot > 0
    t, rows, cols, tot = t[keep], rows[keep], cols[keep], tot[keep]
    n = int(round(tot.sum()))
    if n == 0:
        return 0.0, 0.0, 0, 0, 0, 0
    expected = rows[:, :, None] * cols[:, None, :] / tot[:, None, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        safe_e = np.where(expected > 0, expected, 1.0)
        chi2 = float(np.sum((t - expected) ** 2 / safe_e))
        ratio = np.where(t > 0, t / safe_e, 1.0)
        g = float(2.0 * np.sum(t * np.log(ratio)))
    r_present = (rows > 0).sum(axis=1)
    c_present = (cols > 0).sum(axis=1)
    dof = int(max(0, np.sum((r_present - 1) * (c_present - 1))))
    m = int(min(r_present[0], c_present[0]) - 1) if t.shape[0] == 1 else 0
    return max(g, 0.0), chi2, dof, n, int(t.shape[0]), m


if HAVE_NUMBA:

    @njit(cache=True, nogil=True)
    def _count0(xc, yc, kxy, ky, checked, out):  # pragma: no cover
        """Counts with 0 conditioning column(s) into ``out`` shaped (lanes, cells)."""
        o = out.ravel()
        cells = np.uint64(out.shape[1])
        lane = np.uint64(out.shape[0] - 1)
        uky = np.uint64(ky)
        if checked:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                if (xs | ys) >= 0:
                    o[(np.uint64(r) & lane) * cells + np.uint64(xs) * uky + np.uint64(ys)] += 1
        else:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                o[(np.uint64(r) & lane) * cells + np.uint64(xs) * uky + np.uint64(ys)] += 1

    @njit(cache=True, nogil=True)
    def _count1(xc, yc, z0, kxy, ky, checked, out):  # pragma: no cover
        """Counts with 1 conditioning column(s) into ``out`` shaped (lanes, cells)."""
        o = out.ravel()
        cells = np.uint64(out.shape[1])
        lane = np.uint64(out.shape[0] - 1)
        ukxy = np.uint64(kxy)
        uky = np.uint64(ky)
        if checked:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                a0 = np.int64(z0[r])
                if (xs | ys | a0) >= 0:
                    o[(np.uint64(r) & lane) * cells + np.uint64(a0) * ukxy + np.uint64(xs) * uky + np.uint64(ys)] += 1
        else:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                a0 = np.int64(z0[r])
                o[(np.uint64(r) & lane) * cells + np.uint64(a0) * ukxy + np.uint64(xs) * uky + np.uint64(ys)] += 1

    @njit(cache=True, nogil=True)
    def _count2(xc, yc, z0, z1, c1, kxy, ky, checked, out):  # pragma: no cover
        """Counts with 2 conditioning column(s) into ``out`` shaped (lanes, cells)."""
        o = out.ravel()
        cells = np.uint64(out.shape[1])
        lane = np.uint64(out.shape[0] - 1)
        ukxy = np.uint64(kxy)
        uky = np.uint64(ky)
        u1 = np.uint64(c1)
        if checked:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                a0 = np.int64(z0[r])
                a1 = np.int64(z1[r])
                if (xs | ys | a0 | a1) >= 0:
                    o[(np.uint64(r) & lane) * cells + (np.uint64(a0) * u1 + np.uint64(a1)) * ukxy + np.uint64(xs) * uky + np.uint64(ys)] += 1
        else:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                a0 = np.int64(z0[r])
                a1 = np.int64(z1[r])
                o[(np.uint64(r) & lane) * cells + (np.uint64(a0) * u1 + np.uint64(a1)) * ukxy + np.uint64(xs) * uky + np.uint64(ys)] += 1

    @njit(cache=True, nogil=True)
    def _count3(xc, yc, z0, z1, z2, c1, c2, kxy, ky, checked, out):  # pragma: no cover
        """Counts with 3 conditioning column(s) into ``out`` shaped (lanes, cells)."""
        o = out.ravel()
        cells = np.uint64(out.shape[1])
        lane = np.uint64(out.shape[0] - 1)
        ukxy = np.uint64(kxy)
        uky = np.uint64(ky)
        u1 = np.uint64(c1)
        u2 = np.uint64(c2)
        if checked:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                a0 = np.int64(z0[r])
                a1 = np.int64(z1[r])
                a2 = np.int64(z2[r])
                if (xs | ys | a0 | a1 | a2) >= 0:
                    o[(np.uint64(r) & lane) * cells + ((np.uint64(a0) * u1 + np.uint64(a1)) * u2 + np.uint64(a2)) * ukxy + np.uint64(xs) * uky + np.uint64(ys)] += 1
        else:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                a0 = np.int64(z0[r])
                a1 = np.int64(z1[r])
                a2 = np.int64(z2[r])
                o[(np.uint64(r) & lane) * cells + ((np.uint64(a0) * u1 + np.uint64(a1)) * u2 + np.uint64(a2)) * ukxy + np.uint64(xs) * uky + np.uint64(ys)] += 1

    @njit(cache=True, nogil=True)
    def _count4(xc, yc, z0, z1, z2, z3, c1, c2, c3, kxy, ky, checked, out):  # pragma: no cover
        """Counts with 4 conditioning column(s) into ``out`` shaped (lanes, cells)."""
        o = out.ravel()
        cells = np.uint64(out.shape[1])
        lane = np.uint64(out.shape[0] - 1)
        ukxy = np.uint64(kxy)
        uky = np.uint64(ky)
        u1 = np.uint64(c1)
        u2 = np.uint64(c2)
        u3 = np.uint64(c3)
        if checked:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                a0 = np.int64(z0[r])
                a1 = np.int64(z1[r])
                a2 = np.int64(z2[r])
                a3 = np.int64(z3[r])
                if (xs | ys | a0 | a1 | a2 | a3) >= 0:
                    o[(np.uint64(r) & lane) * cells + (((np.uint64(a0) * u1 + np.uint64(a1)) * u2 + np.uint64(a2)) * u3 + np.uint64(a3)) * ukxy + np.uint64(xs) * uky + np.uint64(ys)] += 1
        else:
            for r in range(xc.shape[0]):
                xs = np.int64(xc[r])
                ys = np.int64(yc[r])
                a0 = np.int64(z0[r])
                a1 = np.int64(z1[r])
                a2 = np.int64(z2[r])
                a3 = np.int64(z3[r])
                o[(np.uint64(r) & lane) * cells + (((np.uint64(a0) * u1 + np.uint64(a1)) * u2 + np.uint64(a2)) * u3 + np.uint64(a3)) * ukxy + np.uint64(xs) * uky + np.uint64(ys)] += 1

    @njit(cache=True, nogil=True)
    def _closing(g_half, dof, observed, m):  # pragma: no cover
        """G from its half sum (never below 0), dof (never below 0), and m kept for one stratum only."""
        g = max(2.0 * g_half, 0.0)
        return g, max(dof, 0), (m if observed == 1 else 0)

    @njit(cache=True, nogil=True)
    def _flat_statistics_nb(counts, kx, ky):  # pragma: no cover
        """`flat_statistics_numpy` compiled: margins summed as integers (an empty stratum is seen from
        one integer sum of its cells), expected counts only where both levels are present. The
        statistics add the same terms in the same order as a cell-by-cell pass, so the same bits."""
        kxy = kx * ky
        n_strata = counts.shape[0] // kxy
        rows = np.zeros(kx, dtype=np.int64)
        cols = np.zeros(ky, dtype=np.int64)
        g = 0.0
        chi2 = 0.0
        dof = 0
        n = 0
        observed = 0
        m = 0
        for s in range(n_strata):
            base = s * kxy
            tot_i = np.int64(0)
            for c in range(base, base + kxy):
                tot_i += counts[c]
            if tot_i == 0:
                continue
            cols[:] = 0
            for i in range(kx):
                row = np.int64(0)
                at = base + i * ky
                for j in range(ky):
                    c = counts[at + j]
                    row += c
                    cols[j] += c
                rows[i] = row
            tot = np.float64(tot_i)
            observed += 1
            n += tot_i
            rp = 0
            cp = 0
            for i in range(kx):
                if rows[i] > 0:
                    rp += 1
            for j in range(ky):
                if cols[j] > 0:
                    cp += 1
            dof += (rp - 1) * (cp - 1)
            m = min(rp, cp) - 1
            for i in range(kx):
                if rows[i] == 0:
                    continue
                ri = np.float64(rows[i])
                at = base + i * ky
                for j in range(ky):
                    if cols[j] == 0:
                        continue
                    e = ri * np.float64(cols[j]) / tot
                    o = np.float64(counts[at + j])
                    d = o - e
                    chi2 += d * d / e
                    if o > 0.0:
                        g += o * np.log(o / e)
        g, dof, m = _closing(g, dof, observed, m)
        return g, chi2, dof, n, observed, m


def count_dense(
    data: np.ndarray, x: int, y: int, given: np.ndarray, gcards: np.ndarray, kx: int, ky: int,
    start: int, stop: int, possible: int, checked: bool = True,
) -> np.ndarray:
    """Dense counts of rows ``start:stop`` (compiled when numba is available).

    ``checked = False`` promises that no code in these columns is negative (no missing values),
    which skips the per-row test.
    """
    if not HAVE_NUMBA:
        return count_dense_numpy(data, x, y, given, gcards, kx, ky, start, stop, possible)
    lanes = 4 if possible <= _LANES_MAX_CELLS else 1
    dtype = np.int32 if stop - start < (1 << 31) else np.int64
    out = np.zeros((lanes, possible), dtype=dtype)
    xc = data[x, start:stop]
    yc = data[y, start:stop]
    ng = len(given)
    kxy = kx * ky
    if ng == 0:
        _count0(xc, yc, kxy, ky, checked, out)
    elif ng == 1:
        _count1(xc, yc, data[given[0], start:stop], kxy, ky, checked, out)
    elif ng == 2:
        _count2(xc, yc, data[given[0], start:stop], data[given[1], start:stop], int(gcards[1]),
                kxy, ky, checked, out)
    else:
        if ng == 3:
            z = [data[given[j], start:stop] for j in range(3)]
            c = [int(gcards[1]), int(gcards[2])]
            _count3(xc, yc, z[0], z[1], z[2], c[0], c[1], kxy, ky, checked, out)
        else:
            head = _prefix_codes(data, given[: ng - 3], gcards[: ng - 3], start, stop)
            z = [data[given[j], start:stop] for j in range(ng - 3, ng)]
            c = [int(gcards[j]) for j in range(ng - 3, ng)]
            _count4(xc, yc, head, z[0], z[1], z[2], c[0], c[1], c[2], kxy, ky, True, out)
    total = out.sum(axis=0, dtype=np.int64) if lanes > 1 else out[0].astype(np.int64)
    return total


def _prefix_codes(data: np.ndarray, given: np.ndarray, gcards: np.ndarray, start: int, stop: int) -> np.ndarray:
    """Mixed-radix code of the first conditioning columns, -1 where one of them is missing."""
    s = data[int(given[0]), start:stop].astype(np.int64)
    bad = s < 0
    for k, c in zip(given[1:], gcards[1:]):
        col = data[int(k), start:stop]
        bad |= col < 0
        s *= int(c)
        s += col
    s[bad] = -1
    return s


def flat_statistics(counts: np.ndarray, kx: int, ky: int) -> tuple[float, float, int, int, int, int]:
    """G, X^2, dof, n, observed strata and the Cramer's V divisor of flat counts (compiled if possible)."""
    if not HAVE_NUMBA:
        return flat_statistics_numpy(counts, kx, ky)
    g, chi2, dof, n, observed, m = _flat_statistics_nb(counts, kx, ky)
    return float(g), float(chi2), int(dof), int(n), int(observed), int(m)


# --------------------------------------------------------------------------------------------------
# Batched tests: one compiled call runs a whole list of tests (or PC's candidate lists, stopping at
# the first independence of each pair) over weighted rows. Rows are taken in blocks of
# ``_BLOCK`` rows: a cell-code pass per column (vectorises), then one counting pass into
# interleaved tables, so nothing larger than a block is ever allocated besides the table.
# --------------------------------------------------------------------------------------------------

_BLOCK = 4096

# Status of a group (a pair's candidate list) after a batched run.
GROUP_DONE = 0  # ran to its end, or stopped at a test the kernel is sure is independent
GROUP_UNSURE = 1  # stopped at a test whose decision lies within the margin of the critical value
GROUP_TOO_BIG = 2  # stopped at a test counted one at a time (cells past 2**62, or past `max_cells`)
_INDEX_LIMIT = 1 << 62  # largest cell code the kernels index (as `counting._INT64_SAFE`)


if HAVE_NUMBA:

    @njit(cache=True, nogil=True)
    def _stratum_block(data, cards, g, ng, lo, hi, code):  # pragma: no cover
        """The stratum code ``(z0 * c1 + z1) * c2 + ...`` of rows ``lo:hi`` into ``code[:hi - lo]``, in the
        integer type of `code` (0 without a conditioning set)."""
        m = hi - lo
        if ng == 0:
            for r in range(m):
                code[r] = 0
            return
        zc = data[g[0], lo:hi]
        for r in range(m):
            code[r] = zc[r]
        for j in range(1, ng):
            zc = data[g[j], lo:hi]
            c = code.dtype.type(cards[g[j]])
            for r in range(m):
                code[r] = code[r] * c + code.dtype.type(zc[r])

    @njit(cache=True, nogil=True)
    def _count_block_tests(data, w, cards, colmiss, x, y, g, ng, possible, lanes, table, code, bad):  # pragma: no cover
        """Dense counts of one test into ``table[:lanes * possible]`` (zeroed here), summed to int64."""
        n_rows = data.shape[1]
        ky = cards[y]
        kxy = cards[x] * ky
        checked = colmiss[x] or colmiss[y]
        for j in range(ng):
            if colmiss[g[j]]:
                checked = True
        t = table[: lanes * possible]
        t[:] = 0
        lane_mask = lanes - 1
        for start in range(0, n_rows, _BLOCK):
            stop = min(n_rows, start + _BLOCK)
            m = stop - start
            # cell code: ((z0 * c1 + z1) * c2 + ...) * kxy + x * ky + y
            if ng > 0:
                _stratum_block(data, cards, g, ng, start, stop, code)
                xc = data[x, start:stop]
                yc = data[y, start:stop]
                ukxy = np.int32(kxy)
                uky = np.int32(ky)
                for r in range(m):
                    code[r] = code[r] * ukxy + np.int32(xc[r]) * uky + np.int32(yc[r])
            else:
                xc = data[x, start:stop]
                yc = data[y, start:stop]
                uky = np.int32(ky)
                for r in range(m):
                    code[r] = np.int32(xc[r]) * uky + np.int32(yc[r])
            if checked:
                xc = data[x, start:stop]
                yc = data[y, start:stop]
                for r in range(m):
                    bad[r] = xc[r] | yc[r]
                for j in range(ng):
                    zc = data[g[j], start:stop]
                    for r in range(m):
                        bad[r] |= zc[r]
                if w is None:
                    for r in range(m):
                        if bad[r] >= 0:
                            t[(r & lane_mask) * possible + code[r]] += 1
                else:
                    for r in range(m):
                        if bad[r] >= 0:
                            t[(r & lane_mask) * possible + code[r]] += w[start + r]
            elif lanes == 4:
                t0 = t[:possible]
                t1 = t[possible: 2 * possible]
                t2 = t[2 * possible: 3 * possible]
                t3 = t[3 * possible:]
                m4 = m - (m & 3)
                if w is None:
                    for r in range(0, m4, 4):
                        t0[code[r]] += 1
                        t1[code[r + 1]] += 1
                        t2[code[r + 2]] += 1
                        t3[code[r + 3]] += 1
                    for r in range(m4, m):
                        t0[code[r]] += 1
                else:
                    ws = w[start:stop]
                    for r in range(0, m4, 4):
                        t0[code[r]] += ws[r]
                        t1[code[r + 1]] += ws[r + 1]
                        t2[code[r + 2]] += ws[r + 2]
                        t3[code[r + 3]] += ws[r + 3]
                    for r in range(m4, m):
                        t0[code[r]] += ws[r]
            else:
                if w is None:
                    for r in range(m):
                        t[code[r]] += 1
                else:
                    for r in range(m):
                        t[code[r]] += w[start + r]
        counts = np.empty(possible, dtype=np.int64)
        for c in range(possible):
            counts[c] = t[c]
        for lane in range(1, lanes):
            off = lane * possible
            for c in range(possible):
                counts[c] += t[off + c]
        return counts

    from numba import types as _nbt
    from numba.extending import intrinsic as _intrinsic

    @_intrinsic
    def _popcount(typingctx, v):  # pragma: no cover
        """Number of set bits of a uint64 (the CPU's popcount instruction)."""
        sig = _nbt.uint64(_nbt.uint64)

        def codegen(context, builder, signature, args):
            return builder.ctpop(args[0])

        return sig, codegen

    @njit(cache=True, nogil=True)
    def _count_bits(planes, off, cards, x, y, g, ng, possible, st_idx, st_mask, nz, lev):  # pragma: no cover
        """Dense counts of one test from bit planes: strata by ANDing planes (empty words dropped),
        cells by popcounts of stratum & x-level & y-level."""
        counts = np.zeros(possible, dtype=np.int64)
        kx = cards[x]
        ky = cards[y]
        kxy = kx * ky
        ox = off[x]
        oy = off[y]
        nwords = planes.shape[1]
        for i in range(nwords):
            st_idx[0, i] = i
            st_mask[0, i] = ~np.uint64(0)
        nz[0] = nwords
        d = 0
        lev[0] = 0
        while True:
            if ng > 0:
                if lev[d] >= cards[g[d]]:
                    if d == 0:
                        break
                    d -= 1
                    lev[d] += 1
                    continue
                plane = planes[off[g[d]] + lev[d]]
                cnt = 0
                for i in range(nz[d]):
                    w = st_idx[d, i]
                    mm = st_mask[d, i] & plane[w]
                    if mm != 0:
                        st_idx[d + 1, cnt] = w
                        st_mask[d + 1, cnt] = mm
                        cnt += 1
                nz[d + 1] = cnt
                if cnt == 0:
                    lev[d] += 1
                    continue
                if d + 1 < ng:
                    d += 1
                    lev[d] = 0
                    continue
                stratum = 0
                for j in range(ng):
                    stratum = stratum * cards[g[j]] + lev[j]
                leaf = ng
            else:
                stratum = 0
                leaf = 0
            base = stratum * kxy
            m_count = nz[leaf]
            idx = st_idx[leaf]
            msk = st_mask[leaf]
            for a in range(kx):
                px = planes[ox + a]
                for b in range(ky):
                    py = planes[oy + b]
                    acc = np.uint64(0)
                    if leaf == 0:
                        for w in range(nwords):
                            acc += _popcount(px[w] & py[w])
                    else:
                        for i in range(m_count):
                            w = idx[i]
                            acc += _popcount(msk[i] & px[w] & py[w])
                    counts[base + a * ky + b] = np.int64(acc)
            if ng == 0:
                break
            lev[d] += 1
        return counts

    @njit(cache=True, nogil=True)
    def _sparse_scratch(rows, kmax):  # pragma: no cover
        """Scratch arrays of `_sparse_stats` for tables of `rows` rows (a hash table twice as large)."""
        size = 2
        while size < 2 * rows:
            size *= 2
        if rows == 0:
            size = 0
        return (np.zeros(size, dtype=np.int64), np.zeros(size, dtype=np.int64), np.zeros(size, dtype=np.int64),
                np.zeros(1, dtype=np.int64), np.empty(rows, dtype=np.int64), np.empty(rows, dtype=np.int64),
                np.empty(rows + 1, dtype=np.int64), np.empty(rows, dtype=np.int64), np.empty(rows, dtype=np.int64),
                np.empty(rows, dtype=np.int64), np.empty(_BLOCK, dtype=np.int64), np.empty(_BLOCK, dtype=np.int64))

    @njit(cache=True, nogil=True)
    def _sparse_stats(data, w, cards, colmiss, x, y, g, ng, sp, tab, rowc, colc):  # pragma: no cover
        """G, X^2, dof, n, observed strata, m and the strata met of one test, visiting only the
        cells that occur (for tables of many more cells than rows).

        Rows are grouped by stratum (the stratum code indexes a table directly when the strata are few
        enough, else through a hash, then a counting sort); each stratum is counted into a table of x
        by y that is cleared cell by cell after use. X^2 adds the cells that occur and, for the cells
        of present levels that do not, their expected counts, which sum to the stratum's rows less the
        expected counts of the cells that occur. The sums are added in another order than
        `_flat_statistics_nb`'s, so the statistics agree with it to rounding (relative 1e-12); dof, n,
        the strata and m are the same integers. `sp` holds the scratch arrays (`_sparse_scratch`);
        `tab`, `rowc` and `colc` are zero on entry and on return.
        """
        hkey, hid, hstamp, stamp_box, rid, rs, start, px, py, pw, code, bad = sp
        n_rows = data.shape[1]
        ky = cards[y]
        checked = colmiss[x] or colmiss[y]
        strata_possible = 1
        for j in range(ng):
            if colmiss[g[j]]:
                checked = True
            strata_possible *= cards[g[j]]
        size = hkey.shape[0]
        direct = strata_possible <= size  # the stratum code is its own slot: no probing, no key to compare
        mask = size - 1
        bits = 0
        while (1 << bits) < size:
            bits += 1
        shift = np.uint64(64 - bits)
        mult = np.uint64(0x9E3779B97F4A7C15)
        stamp_box[0] += 1
        cur = stamp_box[0]
        xs = data[x]
        ys = data[y]
        n_strata = 0
        nv = 0
        for lo in range(0, n_rows, _BLOCK):
            hi = min(n_rows, lo + _BLOCK)
            m = hi - lo
            _stratum_block(data, cards, g, ng, lo, hi, code)
            if checked:
                for r in range(m):
                    bad[r] = np.int64(xs[lo + r] | ys[lo + r])
                for j in range(ng):
                    zc = data[g[j], lo:hi]
                    for r in range(m):
                        bad[r] |= np.int64(zc[r])
            for r in range(m):
                if checked and bad[r] < 0:
                    continue
                sc = code[r]
                if direct:
                    h = sc
                else:
                    h = np.int64((np.uint64(sc) * mult) >> shift)
                    while hstamp[h] == cur and hkey[h] != sc:
                        h = (h + 1) & mask
                if hstamp[h] != cur:
                    hstamp[h] = cur
                    hkey[h] = sc
                    hid[h] = n_strata
                    n_strata += 1
                rid[nv] = lo + r
                rs[nv] = hid[h]
                nv += 1
        if n_strata == 0:
            return 0.0, 0.0, 0, 0, 0, 0, 0
        for k in range(n_strata + 1):
            start[k] = 0
        for i in range(nv):
            start[rs[i] + 1] += 1
        for k in range(n_strata):
            start[k + 1] += start[k]
        for i in range(nv):
            k = rs[i]
            at = start[k]
            r = rid[i]
            px[at] = xs[r]
            py[at] = ys[r]
            pw[at] = 1 if w is None else np.int64(w[r])
            start[k] = at + 1
        # start[k] now ends stratum k; px, py, pw hold the rows stratum by stratum
        g_sum = 0.0
        chi2 = 0.0
        dof = 0
        n = 0
        m = 0
        observed = 0
        a = 0
        for k in range(n_strata):
            b = start[k]
            tot = 0.0
            rp = 0
            cp = 0
            for i in range(a, b):
                c = np.float64(pw[i])
                xi = px[i]
                yi = py[i]
                if c > 0.0:
                    if rowc[xi] == 0.0:
                        rp += 1
                    if colc[yi] == 0.0:
                        cp += 1
                tab[xi * ky + yi] += c
                rowc[xi] += c
                colc[yi] += c
                tot += c
            if tot > 0.0:
                observed += 1
                n += np.int64(tot)
                dof += (rp - 1) * (cp - 1)
                m = min(rp, cp) - 1
                e_seen = 0.0
                for i in range(a, b):
                    cell = px[i] * ky + py[i]
                    o = tab[cell]
                    if o > 0.0:
                        e = rowc[px[i]] * colc[py[i]] / tot
                        d = o - e
                        chi2 += d * d / e
                        g_sum += o * np.log(o / e)
                        e_seen += e
                        tab[cell] = 0.0
                chi2 += max(tot - e_seen, 0.0)  # the cells of present levels that do not occur: (0 - e)^2 / e
            for i in range(a, b):
                tab[px[i] * ky + py[i]] = 0.0
                rowc[px[i]] = 0.0
                colc[py[i]] = 0.0
            a = b
        g_sum, dof, m = _closing(g_sum, dof, observed, m)
        return g_sum, chi2, dof, n, observed, m, n_strata

    @njit(cache=True, nogil=True)
    def _run_groups_nb(data, w, cards, colmiss, xs, ys, gs, gn, group_start, group_stop, stop_first,
                       use_chi2, crit, margin, alpha, min_rows, policy, cap, table,
                       planes, off, bit_cost, sparse_from, max_cells,
                       out_g, out_chi2, out_dof, out_n, out_obs, out_m, out_possible,
                       group_ran, group_status):  # pragma: no cover
        """Run groups of tests; with `stop_first`, a group stops at its first independent test."""
        code = np.empty(_BLOCK, dtype=np.int32)
        bad = np.empty(_BLOCK, dtype=np.int8)
        scratch = table.shape[0]
        use_bits = bit_cost > 0.0
        nwords = planes.shape[1]
        depth = gs.shape[1] + 1
        st_idx = np.empty((depth, nwords if use_bits else 1), dtype=np.int64)
        st_mask = np.empty((depth, nwords if use_bits else 1), dtype=np.uint64)
        nz = np.zeros(depth, dtype=np.int64)
        lev = np.zeros(depth, dtype=np.int64)
        rows = data.shape[1]
        sp = _sparse_scratch(0, 0)
        kmax = 1
        for v in range(cards.shape[0]):
            kmax = max(kmax, cards[v])
        tab = np.zeros(0)
        rowc = np.zeros(0)
        colc = np.zeros(0)
        for k in range(group_start.shape[0]):
            status = 0
            ran = 0
            for t in range(group_start[k], group_stop[k]):
                x = xs[t]
                y = ys[t]
                ng = gn[t]
                g = gs[t]
                possible = cards[x] * cards[y]
                overflow = False
                for j in range(ng):
                    c = cards[g[j]]
                    if possible > (_INDEX_LIMIT - 1) // c:
                        overflow = True
                        break
                    possible *= c
                if overflow:
                    status = 2
                    break
                lanes = 4 if possible <= 8192 else 1
                if possible > sparse_from or possible > cap or lanes * possible > scratch:
                    if sp[0].shape[0] == 0:
                        sp = _sparse_scratch(rows, kmax)
                        tab = np.zeros(kmax * kmax)
                        rowc = np.zeros(kmax)
                        colc = np.zeros(kmax)
                    gv, cv, dof, n, obs, m, strata = _sparse_stats(data, w, cards, colmiss, x, y, g, ng, sp,
                                                                   tab, rowc, colc)
                    if strata * cards[x] * cards[y] > max_cells:
                        status = 2  # counted one at a time, which refuses it (`limits.max_table_cells`)
                        break
                else:
                    if use_bits and nwords * possible * bit_cost * (1 << ng) < rows * (1.0 + 0.1 * ng):
                        counts = _count_bits(planes, off, cards, x, y, g, ng, possible, st_idx, st_mask, nz, lev)
                    else:
                        counts = _count_block_tests(data, w, cards, colmiss, x, y, g, ng, possible, lanes,
                                                    table, code, bad)
                    gv, cv, dof, n, obs, m = _flat_statistics_nb(counts, cards[x], cards[y])
                out_g[t] = gv
                out_chi2[t] = cv
                out_dof[t] = dof
                out_n[t] = n
                out_obs[t] = obs
                out_m[t] = m
                out_possible[t] = possible
                ran += 1
                if not stop_first:
                    continue
                sparse = n < min_rows * possible
                if sparse and policy != 0:
                    if policy == 1:
                        break  # decided independent by the sparse policy
                    continue
                if dof == 0:
                    if 1.0 > alpha:
                        break
                    continue
                stat = cv if use_chi2 else gv
                if dof >= crit.shape[0]:
                    status = 1
                    break
                c = crit[dof]
                if stat < c * (1.0 - margin):
                    break
                if stat <= c * (1.0 + margin):
                    status = 1
                    break
            group_ran[k] = ran
            group_status[k] = status


def run_groups(data, w, cards, colmiss, xs, ys, gs, gn, group_start, group_stop, stop_first,
               use_chi2, crit, margin, alpha, min_rows, policy, cap, table, planes, off, bit_cost,
               sparse_from, max_cells, out_g, out_chi2, out_dof, out_n, out_obs, out_m, out_possible):
    """Compiled batch runner (see `_run_groups_nb`); fills the per-test arrays at the tests it runs
    and returns, per group, the number of tests run and a GROUP_* status."""
    group_ran = np.zeros(group_start.shape[0], dtype=np.int64)
    group_status = np.zeros(group_start.shape[0], dtype=np.int64)
    _run_groups_nb(data, w, cards, colmiss, xs, ys, gs, gn, group_start, group_stop, stop_first,
                   use_chi2, crit, margin, alpha, min_rows, policy, cap, table, planes, off, bit_cost,
                   sparse_from, max_cells, out_g, out_chi2, out_dof, out_n, out_obs, out_m, out_possible,
                   group_ran, group_status)
    return group_ran, group_status


def bit_planes(data: np.ndarray, cards) -> tuple[np.ndarray, np.ndarray]:
    """One bit plane per level of each variable (bit r of plane (v, l) set when row r has level l).

    Returns the planes shaped (sum of levels, words) as uint64 and each variable's first plane.
    Missing codes (-1) set no bit; bits past the last row are zero.
    """
    n = data.shape[1]
    words = max(1, (n + 63) // 64)
    off = np.zeros(len(cards), dtype=np.int64)
    off[1:] = np.cumsum(np.asarray(cards, dtype=np.int64))[:-1]
    planes = np.zeros((int(sum(cards)), words), dtype=np.uint64)
    for v, k in enumerate(cards):
        col = data[v]
        for level in range(int(k)):
            packed = np.packbits(col == level, bitorder="little")
            buf = np.zeros(words * 8, dtype=np.uint8)
            buf[: packed.size] = packed
            planes[off[v] + level] = buf.view(np.uint64)
    return planes, off


if HAVE_NUMBA:

    @njit(cache=True, nogil=True)
    def _row_hash_nb(data):  # pragma: no cover
        n = data.shape[1]
        h = np.full(n, np.uint64(0x243F6A8885A308D3))
        mult = np.uint64(0x9E3779B97F4A7C15)
        add = np.uint64(0x7F4A7C15)
        s29 = np.uint64(29)
        for v in range(data.shape[0]):
            col = data[v]
            for r in range(n):
                x = h[r] ^ (np.uint64(np.int64(col[r])) + add)
                x = x * mult
                h[r] = x ^ (x >> s29)
        return h


def row_hash(data: np.ndarray) -> np.ndarray | None:
    """The compiled twin of `counting._row_hash` (same values), or None without numba."""
    if not HAVE_NUMBA:
        return None
    return _row_hash_nb(data)
