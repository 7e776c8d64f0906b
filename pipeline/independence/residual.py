"""Residual-covariance tests of "x independent of y given z" whose size holds on time series.

The test is the generalised covariance measure (Shah & Peters 2020, "The hardness of conditional
independence testing and the generalised covariance measure", Annals of Statistics 48(3)):

1. regress x on the conditioning set z and y on z, with flexible regressions;
2. multiply the two residuals row by row;
3. under independence given z the mean product is zero; its standardised square is chi-square.

How each part is done here:

* **Signals.** A numeric signal enters through its normal scores (the ranks mapped through the normal
  quantile function, the rank idea of Harris & Drton 2013, "PC algorithm for nonparanormal graphical
  models", JMLR 14), so monotone mechanisms and heavy tails need no binning. A categorical signal
  with k levels enters as k-1 indicator columns; several residual columns are tested together by a
  Wald statistic with ``(a * b)`` degrees of freedom (a, b the columns of x and y).
* **Regressions.** Categorical members of z stratify exactly (every regression has a separate mean
  per stratum); numeric members enter through a piecewise-linear spline with knots at quantiles,
  their number growing like ``n ** (1/3)`` (at most 24), plus products of pairs of numeric members;
  on more than 200,000 rows the coefficients are fitted on a fixed, seeded subset of 200,000 rows and
  the residuals computed on every row. With only
  categorical members the residual is the deviation from the stratum mean, and the test is the
  generalised Cochran-Mantel-Haenszel statistic of average association.
* **Cost on independent rows.** The spline is written in hat functions (linear B-splines, de Boor 1978,
  "A Practical Guide to Splines", ch. IX: the same fitted values), so a row of the design has two entries
  per numeric member: the normal equations and the fitted values are compiled passes over the rows, and
  no (rows x basis) array is written. Each signal's breakpoints are found once; the regression on a
  conditioning set (strata, whitened normal equations) is kept for the next signal regressed on it, and
  residuals for the next test that needs them. On more than `test_rows` (200,000) rows, each test uses a
  fixed, seeded random subset of 200,000 of them, the same for every test: a test on a random subset keeps
  its size, and at this many rows its power to find links of the strength that matters is kept (measured
  in bench/bench_numeric.py); the fit-on-a-subset rule above then never applies on independent rows.
* **Time.** When the rows are windows of one or more series (`Timeline`), each signal is also
  regressed on its own value in the previous window of its series (conditioning on the tested signals'
  own past: Anderson & Goodman 1957 for Markov chains; the momentary conditional independence of
  Runge, Nowack, Kretschmer, Flaxman & Sejdinovic 2019, Science Advances 5). Rows without a previous
  window (the start of a series, a gap) are left out, so nothing is paired across series or gaps. The
  variance of the mean product is the Newey & West (1987) long-run variance with Bartlett weights
  over lags within the series (bandwidth ``floor(4 (m / 100) ** (2 / 9))`` for series of m rows,
  Newey & West 1994, widened by the AR(1) plug-in rule of Andrews 1991 when the products themselves
  persist), so what persistence is left after the regressions does not shrink the p-values.

Every result records ``correction`` (what was done for serial dependence) and ``n_effective`` (the rows
divided by the variance inflation the long-run variance found), and an effect size comparable with the
G-test's: ``cmi_bits`` = information in bits under a Gaussian reading (``W0 / (2 n ln 2)`` with W0 the
statistic under an independent-rows variance), and ``effect_r``, the matching partial correlation
``sqrt(1 - exp(-W0 / n))``.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
from scipy.special import chdtrc as _chdtrc
from scipy.special import ndtri as _ndtri

from ._kernels import HAVE_NUMBA

if HAVE_NUMBA:
    from numba import njit

__all__ = ["Timeline", "normal_scores", "ResidualTester", "hac_covariance", "wald"]

_LN2 = math.log(2.0)


@dataclass(frozen=True)
class Timeline:
    """Where each row's previous window is: rows are sorted by series, then time.

    ``prev[i]`` is the row of the same series one window before row ``i``, or -1 at the start of a series
    and after a gap (a missing window). ``series_length`` is the median number of rows per series.
    """

    prev: np.ndarray
    series_length: float

    def lag_partner(self, k: int) -> np.ndarray:
        """The row k windows earlier in the same series without a gap, or -1."""
        out = self.prev.copy()
        for _ in range(k - 1):
            ok = out >= 0
            nxt = np.full_like(out, -1)
            nxt[ok] = self.prev[out[ok]]
            out = nxt
        return out

    def bandwidth(self) -> int:
        """Bartlett bandwidth (Newey & West 1994 rule of thumb) for series of this length."""
        return max(1, int(4.0 * (max(self.series_length, 1.0) / 100.0) ** (2.0 / 9.0)))


def normal_scores(values: np.ndarray) -> np.ndarray:
    """Normal scores ``ndtri(rank / (n + 1))`` of the present values (ties share their mean rank); NaN stays."""
    from scipy.stats import rankdata  # scipy.stats costs about a second to import: only when scores are needed

    v = np.asarray(values, dtype=np.float64)
    out = np.full(v.shape, np.nan)
    ok = np.isfinite(v)
    n = int(ok.sum())
    if n:
        out[ok] = _ndtri(rankdata(v[ok]) / (n + 1.0))
    return out


def hac_covariance(r: np.ndarray, partners: Sequence[np.ndarray] = ()) -> np.ndarray:
    """Long-run covariance of the rows of `r` (n x d, centred here) with Bartlett weights.

    ``partners[k-1][i]`` is the row k steps before row i within its series (or -1); with no partners
    this is the ordinary covariance (rows independent).
    """
    n = r.shape[0]
    rc = r - r.mean(axis=0)
    cov = rc.T @ rc / n
    bw = len(partners)
    for k, p in enumerate(partners, start=1):
        ok = p >= 0
        if not ok.any():
            continue
        g = rc[ok].T @ rc[p[ok]] / n
        cov += (1.0 - k / (bw + 1.0)) * (g + g.T)
    return cov


def wald(mean: np.ndarray, cov: np.ndarray, n: int) -> tuple[float, int]:
    """``n * m' cov^+ m`` over the directions where `cov` is not degenerate, and their number (the dof)."""
    vals, vecs = np.linalg.eigh((cov + cov.T) / 2.0)
    top = float(vals.max(initial=0.0))
    keep = vals > max(top * 1e-9, 1e-300)
    if not keep.any():
        return 0.0, 0
    proj = vecs[:, keep].T @ mean
    return float(n * np.sum(proj**2 / vals[keep])), int(keep.sum())


def _knot_points(z: np.ndarray, knots: int) -> np.ndarray:
    """Interior quantiles of a score column (distinct), the knots of its spline."""
    if knots <= 0:
        return np.empty(0)
    return np.unique(np.quantile(z, np.linspace(0.0, 1.0, knots + 2)[1:-1]))


def _design(num_cols: list[np.ndarray], knots: int, points: list[np.ndarray] | None = None) -> np.ndarray:
    """Piecewise-linear spline basis of each numeric column (z and (z - q)_+ at interior quantiles, or at
    the given `points`) and the products of pairs of columns, written into one preallocated array."""
    if points is None:
        points = [_knot_points(z, knots) for z in num_cols]
    pairs = len(num_cols) * (len(num_cols) - 1) // 2
    width = sum(1 + q.size for q in points) + pairs
    out = np.empty((num_cols[0].size, width), order="F")  # column-major: each column is contiguous
    at = 0
    for z, q in zip(num_cols, points):
        out[:, at] = z
        for k, point in enumerate(q, start=at + 1):
            col = out[:, k]
            np.subtract(z, point, out=col)
            np.maximum(col, 0.0, out=col)
        at += 1 + q.size
    for a in range(len(num_cols)):
        for b in range(a + 1, len(num_cols)):
            np.multiply(num_cols[a], num_cols[b], out=out[:, at])
            at += 1
    return out


def _least_squares(basis: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Least-squares coefficients of `t` on `basis` through the normal equations, solved on the
    eigenvectors whose eigenvalues are not negligible (a minimum-norm solution when columns are collinear);
    the same fitted values as ``np.linalg.lstsq`` at a fraction of its cost for tall, narrow designs."""
    gram = basis.T @ basis
    vals, vecs = np.linalg.eigh(gram)
    keep = vals > max(float(vals.max(initial=0.0)) * 1e-11, 1e-300)
    v = vecs[:, keep]
    return v @ ((v.T @ (basis.T @ t)) / vals[keep][:, None])


def _group_demean(t: np.ndarray, strata: np.ndarray) -> np.ndarray:
    """Columns of `t` minus their mean within each stratum (strata coded 0..S-1)."""
    return t - _group_means(t, strata)[strata]


def _dense_codes(cols: list[np.ndarray]) -> np.ndarray | None:
    """One stratum code 0..S-1 per row for the joint levels of integer columns (None when no columns)."""
    if not cols:
        return None
    lows = [int(c.min()) for c in cols]
    spans = [int(c.max()) - lo + 1 for c, lo in zip(cols, lows)]
    if math.prod(spans) <= 1 << 22:  # the joint level as one number (first column most significant: the
        joint = np.zeros(cols[0].size, dtype=np.int64)  # order of np.unique(axis=0)), renumbered by its counts
        for c, lo, span in zip(cols, lows, spans):
            joint *= span
            joint += c
            joint -= lo
        used = np.bincount(joint, minlength=math.prod(spans)) > 0
        return (np.cumsum(used) - 1)[joint]
    if len(cols) == 1:
        return np.unique(cols[0], return_inverse=True)[1].ravel()
    stacked = np.column_stack(cols)
    return np.unique(stacked, axis=0, return_inverse=True)[1].ravel()


@dataclass
class _Projector:
    """Regression on one conditioning set over one set of rows: exact strata of its categorical members
    and a spline basis of its numeric members, with a curve of its own in every stratum that has the rows
    for it (at least `_ROWS_PER_COLUMN` per basis column; smaller strata share the pooled curve), and the
    normal equations of each fit kept, so that each further variable costs one pass over the rows.
    Coefficients come from at most `fit_rows` rows per fit (a fixed, seeded subset)."""

    strata: np.ndarray | None
    num_cols: list[np.ndarray]
    points: list[np.ndarray]
    means: np.ndarray | None  # per-stratum (or overall) means of the basis columns
    whiten: np.ndarray | None  # w with w @ w.T the pseudo-inverse of the pooled basis Gram matrix
    pick: np.ndarray | None  # the rows the pooled coefficients are fitted on (None: all)
    own: list[tuple[np.ndarray, np.ndarray | None, np.ndarray]]  # (rows of a stratum, fit positions, whitening)

    @classmethod
    def build(cls, strata: np.ndarray | None, num_cols: list[np.ndarray], knots: int, fit_rows: int) -> "_Projector":
        if not num_cols:
            return cls(strata, [], [], None, None, None, [])
        n = num_cols[0].size
        points = [_knot_points(z, knots) for z in num_cols]
        basis = _design(num_cols, 0, points)
        means = _group_means(basis, strata)
        basis -= means[strata] if strata is not None else means
        pick = None
        if n > fit_rows:
            pick = np.sort(np.random.default_rng(n).choice(n, fit_rows, replace=False))
        whiten = _whitening(basis if pick is None else basis[pick])
        own: list[tuple[np.ndarray, np.ndarray | None, np.ndarray]] = []
        if strata is not None:
            order = np.argsort(strata, kind="stable")
            bounds = np.searchsorted(strata[order], np.arange(int(strata.max(initial=-1)) + 2))
            need = _ROWS_PER_COLUMN * basis.shape[1]
            for s in range(bounds.size - 1):
                rows = order[bounds[s]: bounds[s + 1]]
                if rows.size >= need:
                    at = None if rows.size <= fit_rows else np.sort(
                        np.random.default_rng(s).choice(rows.size, fit_rows, replace=False))
                    own.append((rows, at, _whitening(basis[rows] if at is None else basis[rows[at]])))
        return cls(strata, num_cols, points, means, whiten, pick, own)

    def apply(self, t: np.ndarray, tester: "ResidualTester", basis: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray | None]:
        """Residuals of the columns of `t`, and the demeaned basis (for a further regression)."""
        t = _group_demean(t, self.strata) if self.strata is not None else t - t.mean(axis=0)
        if self.whiten is None:
            return t, None
        if basis is None:
            basis = _design(self.num_cols, 0, self.points)
            basis -= self.means[self.strata] if self.strata is not None else self.means  # type: ignore[index]
        fit_b, fit_t = (basis, t) if self.pick is None else (basis[self.pick], t[self.pick])
        out = t - basis @ (self.whiten @ (self.whiten.T @ (fit_b.T @ fit_t)))
        for rows, at, w in self.own:
            b, y = basis[rows], t[rows]
            fb, fy = (b, y) if at is None else (b[at], y[at])
            out[rows] = y - b @ (w @ (w.T @ (fb.T @ fy)))
        return out, basis


_ROWS_PER_COLUMN = 10  # rows per basis column a stratum needs for a curve of its own (common practice)


def _whitening(basis: np.ndarray) -> np.ndarray:
    """w with ``w @ w.T`` the pseudo-inverse of ``basis.T @ basis`` (negligible directions dropped)."""
    vals, vecs = np.linalg.eigh(basis.T @ basis)
    keep = vals > max(float(vals.max(initial=0.0)) * 1e-11, 1e-300)
    return vecs[:, keep] / np.sqrt(vals[keep])


def _group_means(t: np.ndarray, strata: np.ndarray | None) -> np.ndarray:
    """Per-stratum means of the columns of `t` (shape strata x columns), or the overall means (1 x columns)."""
    if strata is None:
        return t.mean(axis=0, keepdims=True)
    counts = np.bincount(strata).astype(np.float64)
    counts[counts == 0] = 1.0
    out = np.empty((counts.size, t.shape[1]))
    for j in range(t.shape[1]):
        out[:, j] = np.bincount(strata, weights=t[:, j], minlength=counts.size) / counts
    return out



# -- the regression on independent rows through hat functions ------------------------------------------
#
# The piecewise-linear spline of a numeric member (z and (z - q)_+ at interior knots q, with an intercept)
# spans exactly the functions that are linear between consecutive breakpoints min(z) <= q_1 < ... <= max(z);
# the hat functions (linear B-splines, de Boor 1978, "A Practical Guide to Splines", ch. IX) span the same
# space with two non-zero entries per row. So each row of the design has 2 entries per numeric member, one
# per product of members and one stratum indicator: the normal equations of a fit are a sparse product, and
# the fitted values on every row a short compiled loop, instead of a dense (rows x basis) array per fit.


def _breakpoints(z: np.ndarray, knots: int) -> np.ndarray:
    """min, the interior quantile knots and max of a score column (distinct, increasing)."""
    return np.unique(np.concatenate([[z.min()], _knot_points(z, knots), [z.max()]]))


def _hat_add_numpy(pred: np.ndarray, z: np.ndarray, rows: np.ndarray | None, k: np.ndarray, g: np.ndarray,
                   coef: np.ndarray, blk: np.ndarray) -> None:
    """pred[i] += coef[blk[i], k[i]] (1 - w) + coef[blk[i], k[i] + 1] w, w the weight of z[rows[i]] in interval k[i]."""
    k = k.astype(np.intp)
    lo = g[k]
    w = ((z if rows is None else z[rows]) - lo) / (g[k + 1] - lo)
    pred += coef[blk, k] * (1.0 - w)[:, None] + coef[blk, k + 1] * w[:, None]


def _prod_add_numpy(pred: np.ndarray, za: np.ndarray, zb: np.ndarray, rows: np.ndarray | None, coef: np.ndarray,
                    blk: np.ndarray) -> None:
    """pred[i] += coef[blk[i]] za[rows[i]] zb[rows[i]]."""
    p = za * zb if rows is None else za[rows] * zb[rows]
    pred += coef[blk] * p[:, None]


if HAVE_NUMBA:

    @njit(cache=True, nogil=True)
    def _hat_add_compiled(pred, z, rows, use_rows, k, g, coef, blk):  # pragma: no cover
        for i in range(pred.shape[0]):
            v = z[rows[i]] if use_rows else z[i]
            lo = np.int64(k[i])
            w = (v - g[lo]) / (g[lo + 1] - g[lo])
            b = blk[i]
            for c in range(pred.shape[1]):
                pred[i, c] += coef[b, lo, c] * (1.0 - w) + coef[b, lo + 1, c] * w

    @njit(cache=True, nogil=True)
    def _prod_add_compiled(pred, za, zb, rows, use_rows, coef, blk):  # pragma: no cover
        for i in range(pred.shape[0]):
            p = za[rows[i]] * zb[rows[i]] if use_rows else za[i] * zb[i]
            b = blk[i]
            for c in range(pred.shape[1]):
                pred[i, c] += coef[b, c] * p

_NO_ROWS = np.zeros(1, dtype=np.int64)


def _hat_add(pred: np.ndarray, z: np.ndarray, rows: np.ndarray | None, k: np.ndarray, g: np.ndarray,
             coef: np.ndarray, blk: np.ndarray) -> None:
    if HAVE_NUMBA:
        _hat_add_compiled(pred, z, _NO_ROWS if rows is None else rows, rows is not None, k, g, coef, blk)
    else:
        _hat_add_numpy(pred, z, rows, k, g, coef, blk)


def _prod_add(pred: np.ndarray, za: np.ndarray, zb: np.ndarray, rows: np.ndarray | None, coef: np.ndarray,
              blk: np.ndarray) -> None:
    if HAVE_NUMBA:
        _prod_add_compiled(pred, za, zb, _NO_ROWS if rows is None else rows, rows is not None, coef, blk)
    else:
        _prod_add_numpy(pred, za, zb, rows, coef, blk)


@dataclass
class _HatProjector:
    """Regression on one conditioning set over one set of independent rows: exact strata of its categorical
    members, the hat-function spline of each numeric member and the products of pairs of members, with a
    curve of its own in every stratum that has the rows for it (at least `_ROWS_PER_COLUMN` per spline
    column, as in `_Projector`; smaller strata share the pooled curve, fitted on every row with one level
    per stratum). Coefficients come from at most `fit_rows` rows (a fixed, seeded subset); fitted values
    are computed on every row. Kept: the breakpoints, the strata and the whitening of each fit's normal
    equations; the design itself is never written out (its rows are rebuilt where they are needed)."""

    members: list[np.ndarray]  # the full score column of each numeric member
    intervals: list[np.ndarray]  # per member and row, the interval of its value between breakpoints
    rows: np.ndarray | None  # positions of the rows in those columns (None: every row, in order)
    strata: np.ndarray | None  # per row, 0..S-1 (int32)
    breaks: list[np.ndarray]
    blk_of: np.ndarray  # per stratum: 0 for the pooled curve, b >= 1 for the b-th curve of its own
    fit: np.ndarray | None  # positions (within rows) of the fit rows (None: all)
    whitening: list[np.ndarray]  # per curve
    layout: tuple  # (gpad, gsize, offsets, pair_a, pair_b, pstart, istart, width)
    nbytes: int = 0

    @classmethod
    def build(cls, strata: np.ndarray | None, signals: list[tuple[np.ndarray, np.ndarray, np.ndarray]],
              rows: np.ndarray | None, n: int, fit: np.ndarray | None) -> "_HatProjector":
        """`signals`: per numeric member, its full score column, its breakpoints and the interval of every row;
        `fit`: the positions of the fit rows within `rows` (None: all)."""
        members = [m for m, _, _ in signals]
        breaks = [g for _, g, _ in signals]
        intervals = [k for _, _, k in signals]
        strata = None if strata is None else strata.astype(np.int16 if strata.max(initial=0) < 32767 else np.int32)
        n_strata = int(strata.max(initial=-1)) + 1 if strata is not None else 1
        if not members:
            return cls(members, intervals, rows, strata, breaks, np.zeros(n_strata, dtype=np.int64), fit, [], (),
                       0 if strata is None else int(strata.nbytes))
        m = len(members)
        gsize = np.array([g.size for g in breaks], dtype=np.int64)
        gpad = np.zeros((m, int(gsize.max()) + 1))
        offsets = np.zeros(m, dtype=np.int64)
        at = 0
        for j, g in enumerate(breaks):
            gpad[j, : g.size] = g
            offsets[j] = at
            at += g.size - 1  # hat 0 is left out: the strata's levels span it
        pair_a = np.array([a for a in range(m) for b in range(a + 1, m)], dtype=np.int64)
        pair_b = np.array([b for a in range(m) for b in range(a + 1, m)], dtype=np.int64)
        layout = (gpad, gsize, offsets, pair_a, pair_b, at, at + pair_a.size, at + pair_a.size + n_strata)
        blk_of = np.zeros(n_strata, dtype=np.int64)
        if strata is not None:
            # the same rule as the dense projector: a stratum with at least 10 rows per spline column
            need = _ROWS_PER_COLUMN * (sum(1 + max(g.size - 2, 0) for g in breaks) + pair_a.size)
            counts = np.bincount(strata, minlength=n_strata)
            fit_counts = counts if fit is None else np.bincount(strata[fit], minlength=n_strata)
            own = np.nonzero((counts >= need) & (fit_counts >= need))[0]
            blk_of[own] = np.arange(1, own.size + 1)
        proj = cls(members, intervals, rows, strata, breaks, blk_of, fit, [], layout)
        gram, _ = proj._normal_sums(None)
        proj.whitening = [_whitening_of(gm) for gm in gram]
        proj.nbytes = int((0 if strata is None else strata.nbytes) + sum(w.nbytes for w in proj.whitening))
        return proj

    def _normal_sums(self, t: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
        """X'X (when `t` is None) or X't of every curve's fit rows, the design X rebuilt row by row."""
        gpad, gsize, offsets, pair_a, pair_b, pstart, istart, width = self.layout
        at = self.rows if self.fit is None else (self.fit if self.rows is None else self.rows[self.fit])
        zf = np.vstack([z if at is None else z[at] for z in self.members])
        kf = np.vstack([k if self.fit is None else k[self.fit] for k in self.intervals]).astype(np.int64)
        nf = zf.shape[1]
        sf = np.zeros(nf, dtype=np.int64) if self.strata is None else (
            self.strata if self.fit is None else self.strata[self.fit]).astype(np.int64)
        nb = int(self.blk_of.max(initial=0)) + 1
        want_gram = t is None
        tf = np.zeros((nf, 0)) if t is None else np.ascontiguousarray(t if self.fit is None else t[self.fit])
        gram = np.zeros((nb, width, width) if want_gram else (0, 0, 0))
        cross = np.zeros((nb, width, tf.shape[1]))
        (_normal_sums_compiled if HAVE_NUMBA else _normal_sums_numpy)(
            zf, kf, gpad, gsize, offsets, pair_a, pair_b, pstart, istart, sf, self.blk_of, tf, gram, cross, want_gram)
        return gram, cross

    def apply(self, t: np.ndarray) -> np.ndarray:
        """Residuals of the columns of `t` (rows x columns)."""
        r = np.array(t, dtype=np.float64, order="C")
        if self.members:
            _, cross = self._normal_sums(r)
            coef = np.stack([w @ (w.T @ x) for w, x in zip(self.whitening, cross)])  # (curves, width, columns)
            gpad, gsize, offsets, pair_a, pair_b, pstart, istart, width = self.layout
            blk = self.blk_of[self.strata] if self.strata is not None and len(self.whitening) > 1 else \
                np.zeros(r.shape[0], dtype=np.int64)
            neg = -coef
            for j, (z, k) in enumerate(zip(self.members, self.intervals)):
                size = int(gsize[j])
                if size < 2:
                    continue
                hat = np.zeros((coef.shape[0], size, r.shape[1]))
                hat[:, 1:] = neg[:, offsets[j]: offsets[j] + size - 1]
                _hat_add(r, z, self.rows, k, self.breaks[j], hat, blk)
            for q, (a, b) in enumerate(zip(pair_a, pair_b)):
                _prod_add(r, self.members[a], self.members[b], self.rows, np.ascontiguousarray(neg[:, pstart + q]), blk)
        # the levels' coefficients are left to this last step: the residuals have mean 0 in every stratum
        return _demean(r, self.strata)


def _whitening_of(gram: np.ndarray) -> np.ndarray:
    """w with ``w @ w.T`` the pseudo-inverse of a Gram matrix (negligible directions dropped)."""
    vals, vecs = np.linalg.eigh(gram)
    keep = vals > max(float(vals.max(initial=0.0)) * 1e-11, 1e-300)
    return vecs[:, keep] / np.sqrt(vals[keep])


def _normal_sums_numpy(zf, kf, gpad, gsize, offsets, pair_a, pair_b, pstart, istart, sf, blk_of, tf, gram, cross,
                       want_gram):
    """The numpy twin of the compiled normal sums: the fit rows' design written out."""
    nf = zf.shape[1]
    design = np.zeros((nf, gram.shape[1] if want_gram else cross.shape[1]))
    idx = np.arange(nf)
    for j in range(zf.shape[0]):
        if gsize[j] < 2:
            continue
        k = kf[j]
        lo, hi = gpad[j, k], gpad[j, k + 1]
        w = (zf[j] - lo) / (hi - lo)
        low = k > 0
        design[idx[low], offsets[j] + k[low] - 1] += 1.0 - w[low]
        design[idx, offsets[j] + k] += w
    for q in range(pair_a.size):
        design[:, pstart + q] = zf[pair_a[q]] * zf[pair_b[q]]
    design[idx, istart + sf] = 1.0
    blk = blk_of[sf]
    for b in range(cross.shape[0]):
        sel = slice(None) if b == 0 else blk == b
        d = design[sel]
        if want_gram:
            gram[b] += d.T @ d
        cross[b] += d.T @ tf[sel]


if HAVE_NUMBA:

    @njit(cache=True, nogil=True)
    def _normal_sums_compiled(zf, kf, gpad, gsize, offsets, pair_a, pair_b, pstart, istart, sf, blk_of, tf, gram,
                              cross, want_gram):  # pragma: no cover
        m = zf.shape[0]
        size = 2 * m + pair_a.shape[0] + 1
        col = np.empty(size, dtype=np.int64)
        val = np.empty(size)
        for i in range(zf.shape[1]):
            e = 0
            for j in range(m):
                if gsize[j] < 2:
                    continue
                k = kf[j, i]
                lo = gpad[j, k]
                w = (zf[j, i] - lo) / (gpad[j, k + 1] - lo)
                if k > 0:
                    col[e] = offsets[j] + k - 1
                    val[e] = 1.0 - w
                    e += 1
                col[e] = offsets[j] + k
                val[e] = w
                e += 1
            for q in range(pair_a.shape[0]):
                col[e] = pstart + q
                val[e] = zf[pair_a[q], i] * zf[pair_b[q], i]
                e += 1
            s = sf[i]
            col[e] = istart + s
            val[e] = 1.0
            e += 1
            own = blk_of[s]
            for rep in range(2):
                b = 0 if rep == 0 else own
                if rep == 1 and own == 0:
                    break
                for u in range(e):
                    cu = col[u]
                    vu = val[u]
                    if want_gram:  # one triangle (the columns of a row increase), mirrored at the end
                        for v in range(u, e):
                            gram[b, cu, col[v]] += vu * val[v]
                    for c in range(tf.shape[1]):
                        cross[b, cu, c] += vu * tf[i, c]
        if want_gram:
            for b in range(gram.shape[0]):
                for u in range(gram.shape[1]):
                    for v in range(u):
                        gram[b, u, v] = gram[b, v, u]



def _demean_numpy(r: np.ndarray, strata: np.ndarray, n_strata: int) -> None:
    r -= _group_means(r, strata)[strata]


def _product_sums_numpy(rx: np.ndarray, ry: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sums of the row-wise products p = rx_a * ry_b (a x b columns) and of their outer products p p'."""
    prod = (rx[:, :, None] * ry[:, None, :]).reshape(rx.shape[0], -1)
    return prod.sum(axis=0), prod.T @ prod


if HAVE_NUMBA:

    @njit(cache=True, nogil=True)
    def _demean_compiled(r, strata, n_strata):  # pragma: no cover
        sums = np.zeros((n_strata, r.shape[1]))
        counts = np.zeros(n_strata)
        for i in range(r.shape[0]):
            s = strata[i]
            counts[s] += 1.0
            for c in range(r.shape[1]):
                sums[s, c] += r[i, c]
        for s in range(n_strata):
            if counts[s] > 0:
                for c in range(r.shape[1]):
                    sums[s, c] /= counts[s]
        for i in range(r.shape[0]):
            s = strata[i]
            for c in range(r.shape[1]):
                r[i, c] -= sums[s, c]

    @njit(cache=True, nogil=True)
    def _product_sums_compiled(rx, ry):  # pragma: no cover
        a, b = rx.shape[1], ry.shape[1]
        d = a * b
        s = np.zeros(d)
        ss = np.zeros((d, d))
        if d == 1:
            s1 = 0.0
            s2 = 0.0
            for i in range(rx.shape[0]):
                p1 = rx[i, 0] * ry[i, 0]
                s1 += p1
                s2 += p1 * p1
            s[0] = s1
            ss[0, 0] = s2
            return s, ss
        p = np.empty(d)
        for i in range(rx.shape[0]):
            for u in range(a):
                for v in range(b):
                    p[u * b + v] = rx[i, u] * ry[i, v]
            for u in range(d):
                s[u] += p[u]
                for v in range(u, d):
                    ss[u, v] += p[u] * p[v]
        for u in range(d):
            for v in range(u):
                ss[u, v] = ss[v, u]
        return s, ss


def _demean(r: np.ndarray, strata: np.ndarray | None) -> np.ndarray:
    """The columns of `r` (C order, float) minus their mean within each stratum (or overall), in place."""
    if strata is None:
        r -= r.mean(axis=0)
        return r
    n_strata = int(strata.max(initial=-1)) + 1
    (_demean_compiled if HAVE_NUMBA else _demean_numpy)(r, strata, n_strata)
    return r


def _product_sums(rx: np.ndarray, ry: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    if HAVE_NUMBA:
        return _product_sums_compiled(np.ascontiguousarray(rx), np.ascontiguousarray(ry))
    return _product_sums_numpy(rx, ry)


class ResidualTester:
    """Residual-covariance tests over one table of signals.

    Parameters
    ----------
    codes : integer codes shaped (variables, rows), -1 for missing (every signal has codes).
    scores : per variable, its normal scores (float array, NaN for missing) when it is numeric, else None.
    timeline : where each row's previous window is, or None when rows are independent draws.
    own_past : per variable, whether its own previous window enters its regression (lag copies of
        signals, added for lagged links, are themselves past values: they get False).

    Examples
    --------
    >>> from pipeline.simulate import triad
    >>> df = triad(np.random.default_rng(0), 3000, "tanh")
    >>> sc = [normal_scores(df[c].to_numpy()) for c in "xyz"]
    >>> t = ResidualTester(np.zeros((3, 3000), dtype=np.int8), sc)
    >>> t.test(0, 1, ())[2] < 1e-6, t.test(0, 1, (2,))[2] > 0.01
    (True, True)
    """

    def __init__(self, codes: np.ndarray, scores: Sequence[np.ndarray | None], *,
                 timeline: Timeline | None = None, own_past: Sequence[bool] | None = None,
                 cache_bytes: int = 96 * 1024 * 1024, fit_rows: int = 200_000,
                 test_rows: int = 200_000) -> None:
        self.codes = codes
        self.scores = list(scores)
        self.timeline = timeline
        self.fit_rows = int(fit_rows)
        self.test_rows = int(test_rows)
        self._test_pick: dict[int, np.ndarray] = {}
        nv = codes.shape[0]
        self.own_past = list(own_past) if own_past is not None else [True] * nv
        n = codes.shape[1]
        base = np.ones(n, dtype=bool)
        self._partners: list[np.ndarray] = []
        if timeline is not None:
            base &= timeline.prev >= 0
            self._partners = [timeline.lag_partner(k) for k in range(1, timeline.bandwidth() + 1)]
        self._rule = len(self._partners)  # the Newey-West bandwidth for this series length
        self._base = base
        self._present = [self._present_of(i) for i in range(nv)]
        self._complete = [bool(base.all() and p.all()) and (timeline is None) for p in self._present]
        self._all_rows = np.arange(n)
        self._cache: OrderedDict[tuple, np.ndarray] = OrderedDict()
        self._projectors: OrderedDict[tuple, _Projector] = OrderedDict()
        self._hats: OrderedDict[tuple, _HatProjector] = OrderedDict()
        self._hats_bytes = 0
        self._fit_pick: dict[int, np.ndarray] = {}
        self._signal_cache: OrderedDict[tuple, tuple[np.ndarray, np.ndarray, np.ndarray]] = OrderedDict()
        self._cache_bytes = 0
        self._cache_max = cache_bytes

    # -- data of one variable -------------------------------------------------------------------
    def is_numeric(self, i: int) -> bool:
        return self.scores[i] is not None

    def _present_of(self, i: int) -> np.ndarray:
        s = self.scores[i]
        return np.isfinite(s) if s is not None else self.codes[i] >= 0

    def _past_ok(self, i: int) -> np.ndarray | None:
        if self.timeline is None or not self.own_past[i]:
            return None
        prev = self.timeline.prev
        ok = prev >= 0
        out = np.zeros_like(ok)
        out[ok] = self._present[i][prev[ok]]
        return out

    def _target(self, i: int, rows: np.ndarray) -> np.ndarray:
        s = self.scores[i]
        if s is not None:
            return s[rows][:, None]
        c = self.codes[i][rows].astype(np.intp)
        used = np.bincount(c - c.min(initial=0)) > 0 if c.size else np.zeros(0, dtype=bool)
        levels = np.nonzero(used)[0]
        inv = (np.cumsum(used) - 1)[c - c.min(initial=0)] if c.size else c  # np.unique's codes, without a sort
        if levels.size <= 1:
            return np.zeros((rows.size, 0))
        onehot = np.zeros((rows.size, levels.size - 1))
        keep = inv < levels.size - 1
        onehot[np.nonzero(keep)[0], inv[keep]] = 1.0
        return onehot

    def _knots(self, n: int) -> int:
        return int(min(24, max(3, round(0.5 * n ** (1.0 / 3.0)))))

    # -- the regression of one variable on a conditioning set -------------------------------------
    def rows_for(self, x: int, y: int, given: Sequence[int]) -> np.ndarray:
        """Rows a test of x, y given `given` uses: all present, and a previous window for x and y."""
        ok = self._base & self._present[x] & self._present[y]
        for g in given:
            ok = ok & self._present[g]
        for v in (x, y, *given):
            p = self._past_ok(v)
            if p is not None:
                ok = ok & p
        return np.nonzero(ok)[0]

    def residuals(self, v: int, given: Sequence[int], rows: np.ndarray, target: np.ndarray | None = None, *,
                  token: str | None = None) -> np.ndarray:
        """Residuals of variable `v` (its score or its indicators) regressed on `given` (with the previous
        window of each member when rows are time-ordered) and on its own previous window.

        `target` (rows x columns) replaces v's own score or indicators, e.g. indicators of levels fixed
        across two tables (the change test of `pipeline.change`); the regressors are v's as usual.
        """
        if target is None and token is not None and self.timeline is None and self.scores[v] is not None:
            t = self._intervals(v, rows, False, token)[0][:, None]
        else:
            t = self._target(v, rows) if target is None else np.asarray(target, dtype=np.float64)
        if t.shape[1] == 0:
            return t
        if self.timeline is None:
            return self._hat_projector(tuple(given), rows, token).apply(t)
        timed = self.timeline is not None and self.own_past[v]
        cat_past = timed and self.scores[v] is None
        proj = self._projector(tuple(given), rows, v if cat_past else None)
        t, basis = proj.apply(t, self)
        if timed and not cat_past:
            # the signal's own numeric past, after the conditioning set (Frisch-Waugh: the same fit as
            # one regression on both)
            past = self.scores[v][self.timeline.prev[rows]]  # type: ignore[index, union-attr]
            extra, _ = proj.apply(_design([past], self._knots(rows.size)), self, basis)
            t = t - extra @ _least_squares(extra, t)
        return t

    def _projector(self, given: tuple[int, ...], rows: np.ndarray, cat_past_of: int | None) -> "_Projector":
        """The regression on a conditioning set (its strata, spline knots and normal equations), kept for
        the next variable regressed on the same set over the same rows."""
        key = (given, cat_past_of, rows.size, hash(rows.tobytes()))
        hit = self._projectors.get(key)
        if hit is not None:
            self._projectors.move_to_end(key)
            return hit
        cat_cols: list[np.ndarray] = []
        num_cols: list[np.ndarray] = []
        for g in given:
            if self.scores[g] is None:
                cat_cols.append(self.codes[g][rows].astype(np.int64))
            else:
                num_cols.append(self.scores[g][rows])  # type: ignore[index]
        if self.timeline is not None:
            past = self.timeline.prev[rows]
            for w in given:  # the conditioning set's previous window
                if not self.own_past[w]:
                    continue
                if self.scores[w] is None:
                    cat_cols.append(self.codes[w][past].astype(np.int64))
                else:
                    num_cols.append(self.scores[w][past])  # type: ignore[index]
            if cat_past_of is not None:  # a categorical signal's own previous level stratifies exactly
                cat_cols.append(self.codes[cat_past_of][past].astype(np.int64))
        proj = _Projector.build(_dense_codes(cat_cols), num_cols, self._knots(rows.size), self.fit_rows)
        self._projectors[key] = proj
        while len(self._projectors) > 64:
            self._projectors.popitem(last=False)
        return proj

    def _hat_projector(self, given: tuple[int, ...], rows: np.ndarray, token: str | None = None) -> "_HatProjector":
        """The regression on a conditioning set over independent rows, kept for the next variable regressed
        on the same set over the same rows (bounded by the bytes it holds). `token` names a row set fixed
        for the tester's life (then its bytes need not be hashed)."""
        n_all = self.codes.shape[1]
        full = rows.size == n_all
        rows_key = token if token is not None else (None if full else hash(rows.tobytes()))
        key = ("hat", given, rows.size, rows_key)
        hit = self._hats.get(key)
        if hit is not None:
            self._hats.move_to_end(key)
            return hit
        cat_cols = [self.codes[g] if full else self.codes[g][rows] for g in given if self.scores[g] is None]
        signals = [self._intervals(g, rows, full, rows_key) for g in given if self.scores[g] is not None]
        fit = None
        if rows.size > self.fit_rows:  # the same seeded subset for every conditioning set over these rows
            fit = self._fit_pick.get(rows.size)
            if fit is None:
                fit = np.sort(np.random.default_rng(rows.size).choice(rows.size, self.fit_rows, replace=False))
                self._fit_pick = {rows.size: fit}
        local = full or token is not None  # the signals' columns are over exactly these rows
        proj = _HatProjector.build(_dense_codes(cat_cols), signals, None if local else rows, rows.size, fit)
        self._hats[key] = proj
        self._hats_bytes += proj.nbytes
        while (self._hats_bytes > self._cache_max // 3 or len(self._hats) > 1024) and len(self._hats) > 1:
            _, old = self._hats.popitem(last=False)
            self._hats_bytes -= old.nbytes
        return proj

    def _intervals(self, v: int, rows: np.ndarray, full: bool, rows_key: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """A numeric signal's score column, breakpoints over `rows` and the interval of each row, computed once
        per signal and set of rows (the same for every conditioning set it belongs to)."""
        key = (v, rows.size, rows_key)
        hit = self._signal_cache.get(key)
        if hit is None:
            z = self.scores[v]
            assert z is not None
            local = z if full else z[rows]
            g = _breakpoints(local, self._knots(rows.size))
            k = np.clip(np.searchsorted(g, local, side="right") - 1, 0, max(g.size - 2, 0))
            # over a row set fixed for the tester's life (a token), the values of those rows are kept too, so
            # that every later pass reads them in order instead of gathering them from the whole column
            hit = (local if isinstance(rows_key, str) else z, g, k.astype(np.uint8 if g.size <= 256 else np.int32))
            self._signal_cache[key] = hit
            while len(self._signal_cache) > 4 * len(self.scores) + 8:
                self._signal_cache.popitem(last=False)
        else:
            self._signal_cache.move_to_end(key)
        return hit  # type: ignore[return-value]

    def _cached_residuals(self, v: int, given: tuple[int, ...], rows: np.ndarray, full: bool,
                          token: str | None = None) -> np.ndarray:
        if not full:
            return self.residuals(v, given, rows)
        key = (v, given)
        hit = self._cache.get(key)
        if hit is not None:
            self._cache.move_to_end(key)
            return hit
        r = self.residuals(v, given, rows, token=token)
        self._cache[key] = r
        self._cache_bytes += r.nbytes
        while self._cache_bytes > self._cache_max and len(self._cache) > 1:
            _, old = self._cache.popitem(last=False)
            self._cache_bytes -= old.nbytes
        return r

    # -- the test ----------------------------------------------------------------------------------
    def products(self, x: int, y: int, given: Sequence[int]) -> tuple[np.ndarray, np.ndarray]:
        """Row-wise products of the residuals of x and y (n x a*b) and the rows they come from."""
        given = tuple(sorted(given))
        rows = self.rows_for(x, y, given)
        full = rows.size == self._full_rows(x, y)
        rx = self._cached_residuals(x, given, rows, full)
        ry = self._cached_residuals(y, given, rows, full)
        prod = (rx[:, :, None] * ry[:, None, :]).reshape(rows.size, -1)
        return prod, rows

    def partners_for(self, rows: np.ndarray, bandwidth: int | None = None) -> list[np.ndarray]:
        """Positions within `rows` of each row's partners 1..bandwidth windows back in its series (or -1);
        the bandwidth defaults to the Newey-West rule for the series length."""
        if self.timeline is None:
            return []
        want = self._rule if bandwidth is None else int(bandwidth)
        while len(self._partners) < want:
            self._partners.append(self.timeline.lag_partner(len(self._partners) + 1))
        pos = np.full(self.codes.shape[1], -1, dtype=np.int64)
        pos[rows] = np.arange(rows.size)
        out = []
        for p in self._partners[:want]:
            q = p[rows]
            out.append(np.where(q >= 0, pos[np.maximum(q, 0)], -1))
        return out

    def bandwidth_for(self, prod: np.ndarray, partners: list[np.ndarray]) -> int:
        """Bartlett bandwidth: the Newey & West (1994) rule for the series length, or more when the products
        themselves persist (the AR(1) plug-in rule of Andrews 1991, Econometrica 59(3), with the lag-1
        autocorrelation of each product column within the series), capped at half a series."""
        rule = len(partners)
        if not partners:
            return 0
        p1 = partners[0]
        ok = p1 >= 0
        if ok.sum() < 10:
            return rule
        a, b = prod[ok], prod[p1[ok]]
        a = a - a.mean(axis=0)
        b = b - b.mean(axis=0)
        var = np.maximum((a * a).mean(axis=0), 1e-300)
        rho = np.clip((a * b).mean(axis=0) / var, -0.97, 0.97)
        weight = (var / var.max()) ** 2  # scaled, so that tiny variances do not underflow
        num = np.sum(4.0 * rho**2 * weight / ((1.0 - rho) ** 6 * (1.0 + rho) ** 2))
        den = np.sum(weight / (1.0 - rho) ** 4)
        if not (np.isfinite(num) and np.isfinite(den) and den > 0):
            return rule
        plug_in = 1.1447 * (float(num / den) * prod.shape[0]) ** (1.0 / 3.0)
        cap = max(1, int(self.timeline.series_length // 2)) if self.timeline is not None else rule
        return int(min(cap, max(rule, math.ceil(plug_in))))

    def _full_rows(self, x: int, y: int) -> int:
        # residuals are cached only for the common row set: every row with a previous window
        # (or every row), with nothing missing anywhere
        if not hasattr(self, "_common"):
            ok = self._base.copy()
            for i in range(len(self.scores)):
                ok &= self._present[i]
                p = self._past_ok(i)
                if p is not None:
                    ok &= p
            self._common = int(ok.sum())
        return self._common

    def test(self, x: int, y: int, given: Sequence[int]) -> tuple[float, int, float, int, float, float, float, str]:
        """(statistic, dof, pvalue, n, n_effective, cmi_bits, effect_r, correction) of x vs y given `given`."""
        if self.timeline is None:
            return self._test_independent_rows(x, y, given)
        prod, rows = self.products(x, y, given)
        n = int(rows.size)
        correction = "own-past+hac" if self.timeline is not None else "none"
        if n < 3 or prod.shape[1] == 0:
            return 0.0, 0, 1.0, n, float(n), 0.0, 0.0, correction
        mean = prod.mean(axis=0)
        partners = self.partners_for(rows)
        if partners:
            wide = self.bandwidth_for(prod, partners)
            if wide > len(partners):
                partners = self.partners_for(rows, wide)
        cov0 = hac_covariance(prod)
        w0, dof0 = wald(mean, cov0, n)
        if partners:
            cov = hac_covariance(prod, partners)
            w, dof = wald(mean, cov, n)
            inflation = max(1.0, float(np.trace(cov)) / max(float(np.trace(cov0)), 1e-300))
        else:
            w, dof, inflation = w0, dof0, 1.0
        p = float(_chdtrc(dof, w)) if dof > 0 else 1.0
        bits = w0 / (2.0 * n * _LN2)
        r = math.sqrt(max(0.0, 1.0 - math.exp(-w0 / n))) if n else 0.0
        return w, dof, p, n, n / inflation, bits, r, correction

    def _test_independent_rows(self, x: int, y: int, given: Sequence[int]) -> tuple[float, int, float, int, float, float, float, str]:
        """`test` on independent rows: the mean and covariance of the residual products in one pass, without
        writing the products out (the same numbers as `hac_covariance` without partners)."""
        given = tuple(sorted(given))
        complete = self._complete[x] and self._complete[y] and all(self._complete[g] for g in given)
        rows = self._all_rows if complete else self.rows_for(x, y, given)
        full = rows.size == self._full_rows(x, y)
        token = "all" if complete else None
        if rows.size > self.test_rows:  # a fixed, seeded subset of the rows (the same for every test)
            pick = self._test_pick.get(rows.size)
            if pick is None:
                pick = np.sort(np.random.default_rng([rows.size, 1]).choice(rows.size, self.test_rows, replace=False))
                self._test_pick = {rows.size: pick}
            rows = rows[pick] if token is None else self._test_pick.setdefault(-1, rows[pick])
            token = None if token is None else "all-subset"
        n = int(rows.size)
        rx = self._cached_residuals(x, given, rows, full, token)
        ry = self._cached_residuals(y, given, rows, full, token)
        if n < 3 or rx.shape[1] * ry.shape[1] == 0:
            return 0.0, 0, 1.0, n, float(n), 0.0, 0.0, "none"
        s, ss = _product_sums(rx, ry)
        mean = s / n
        cov = ss / n - np.outer(mean, mean)
        w, dof = wald(mean, cov, n)
        p = float(_chdtrc(dof, w)) if dof > 0 else 1.0
        bits = w / (2.0 * n * _LN2)
        r = math.sqrt(max(0.0, 1.0 - math.exp(-w / n))) if n else 0.0
        return w, dof, p, n, float(n), bits, r, "none"
