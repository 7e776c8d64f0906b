"""Compiled inner loops of the engine (numba), each with a plain-numpy twin giving the same numbers.

The numba versions are used when numba imports and ``EDGEPROOF_NO_NUMBA`` is not set; the numpy
twins are the reference the tests compare them with (counts exactly, statistics to rtol 1e-12).
"""

from __future__ import annotations

import os

import numpy as np

__all__ = ["HAVE_NUMBA", "count_dense", "count_dense_numpy", "flat_statistics", "flat_statistics_numpy"]

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
        ukxy = np.uint64(kxy)
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
    def _flat_statistics_nb(counts, kx, ky):  # pragma: no cover
        n_strata = counts.shape[0] // (kx * ky)
        rows = np.zeros(kx)
        cols = np.zeros(ky)
        g = 0.0
        chi2 = 0.0
        dof = 0
        n = 0
        observed = 0
        m = 0
        for s in range(n_strata):
            base = s * kx * ky
            tot = 0.0
            rows[:] = 0.0
            cols[:] = 0.0
            for i in range(kx):
                for j in range(ky):
                    c = counts[base + i * ky + j]
                    rows[i] += c
                    cols[j] += c
                    tot += c
            if tot == 0.0:
                continue
            observed += 1
            n += np.int64(tot)
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
                for j in range(ky):
                    e = rows[i] * cols[j] / tot
                    if e > 0.0:
                        o = np.float64(counts[base + i * ky + j])
                        d = o - e
                        chi2 += d * d / e
                        if o > 0.0:
                            g += o * np.log(o / e)
        g = 2.0 * g
        if g < 0.0:
            g = 0.0
        if dof < 0:
            dof = 0
        if observed != 1:
            m = 0
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
