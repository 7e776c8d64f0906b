"""Tests for change between two nights: did a pair's conditional association, or a signal's mechanism, change?

A difference of two graphs is not a test: a pair whose deciding p-value sits near alpha flips from
night to night by chance. This module tests the change itself on the pooled data of both nights, with
the night as an extra variable, and controls the false discovery rate over everything compared.

Two routes, chosen by what is known about the rows:

* **Categorical, rows independent** (no time order known). Pair change: the likelihood-ratio test of
  the three-way interaction x*y*night within the strata of the conditioning set, i.e. the homogeneous
  association model ``[XYZ][XZN][YZN]`` fitted by iterative proportional fitting against the saturated
  model (Bishop, Fienberg & Holland 1975, ch. 3), with degrees of freedom counted on the cells the
  model can fit (empty margins remove cells and parameters). Mechanism change: the G-test of
  ``signal`` against ``night`` within the strata of the signal's neighbours (the night indicator as a
  surrogate variable: Huang, Zhang, Zhang, Ramsey, Sanchez-Romero, Glymour & Scholkopf 2020, JMLR).
* **Residual route** (numeric values or a time order known). Rows of a night are time series with
  strong persistence, so the tests above would report chance drift as change. Each signal is
  regressed flexibly on the conditioning set (exact strata of categorical members, a spline basis of
  numeric members, and the signal's own previous window when the time order is known); the
  residuals' association (pair) or mean and slope-against-neighbours (mechanism) is compared between
  the nights with a Newey-West variance (Newey & West 1987) computed within each series of each
  night, never across two series or across a gap in time.

Benjamini & Hochberg (1995) over everything compared gives each test a q-value
(`scipy.stats.false_discovery_control`). Algorithms only: no file I/O (the reading is in
`pipeline.compare`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Optional, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from .independence import contingency_statistics

__all__ = [
    "NightData", "ChangeTest", "homogeneous_association_lr", "pair_change", "mechanism_change",
    "with_qvalues",
]

_IPF_TOL = 1e-10
_IPF_MAX_ITER = 500
_MAX_EXACT_STRATA = 64  # categorical members of a regression: exact strata up to this many, else additive


@dataclass(frozen=True)
class NightData:
    """One night's data as the change tests see it.

    Attributes
    ----------
    codes : pandas.DataFrame
        One column of integer codes per signal (-1 missing), as in ``discretised.parquet``.
    kinds : dict
        Signal -> ``"numeric"``, ``"categorical"`` or ``"boolean"``.
    values : pandas.DataFrame, optional
        Raw numeric values of numeric signals, rows aligned with `codes` (NaN missing).
    series : numpy.ndarray, optional
        Series id per row (e.g. the node); None: one series.
    order : numpy.ndarray, optional
        Time order per row within its series (consecutive integers are consecutive windows); None:
        no time order known, rows independent.
    """

    codes: pd.DataFrame
    kinds: dict[str, str]
    values: Optional[pd.DataFrame] = None
    series: Optional[np.ndarray] = None
    order: Optional[np.ndarray] = None

    @property
    def residual_route(self) -> bool:
        """Numeric values or a time order are known: use the residual route."""
        return self.order is not None or (self.values is not None and not self.values.empty)


@dataclass(frozen=True)
class ChangeTest:
    """One change test. ``var_b`` is empty for a mechanism test (``var_a`` is the signal).

    ``effect_a`` / ``effect_b`` are the night's own conditional association of the pair given
    ``given`` (``effect`` names the measure: ``cmi_bits`` or ``partial_r``); for a mechanism test they
    are NaN and ``effect_a`` holds nothing. ``qvalue`` is filled by `with_qvalues`.
    """

    kind: str  # "pair" or "mechanism"
    var_a: str
    var_b: str
    given: tuple[str, ...]
    method: str
    statistic: float
    dof: int
    pvalue: float
    n_a: int
    n_b: int
    effect: str = ""
    effect_a: float = float("nan")
    effect_b: float = float("nan")
    qvalue: float = float("nan")


# ----------------------------------------------------------------------------- log-linear interaction


def _ipf_homogeneous(t: np.ndarray) -> np.ndarray:
    """Fitted counts of the model with all two-way terms and no three-way term, per stratum.

    `t` has shape ``(K, I, J, L)``; the fit matches the margins XY, XN and YN of every stratum
    (iterative proportional fitting, Bishop, Fienberg & Holland 1975, section 3.5).
    """
    m = np.ones_like(t)
    xy, xn, yn = t.sum(axis=3), t.sum(axis=2), t.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(_IPF_MAX_ITER):
            m = m * np.nan_to_num(xy / m.sum(axis=3))[:, :, :, None]
            m = m * np.nan_to_num(xn / m.sum(axis=2))[:, :, None, :]
            m = m * np.nan_to_num(yn / m.sum(axis=1))[:, None, :, :]
            gap = max(np.abs(m.sum(axis=3) - xy).max(), np.abs(m.sum(axis=2) - xn).max())
            if gap < _IPF_TOL * max(1.0, float(t.sum())):
                break
    return m


def _homogeneous_dof(t: np.ndarray) -> int:
    """Residual degrees of freedom of the homogeneous model, counted on the cells it can fit.

    A cell whose XY, XN or YN margin is zero is fitted as zero and carries no information; the dof is
    the number of remaining cells minus the rank of the model's design restricted to them (the
    adjustment of Bishop, Fienberg & Holland 1975, section 3.8, done by rank).
    """
    total = 0
    _k, ni, nj, nl = t.shape
    for s in t:
        xy, xn, yn = s.sum(axis=2) > 0, s.sum(axis=1) > 0, s.sum(axis=0) > 0
        cells = [(i, j, l) for i in range(ni) for j in range(nj) for l in range(nl)
                 if xy[i, j] and xn[i, l] and yn[j, l]]
        if not cells:
            continue
        design = np.zeros((len(cells), ni * nj + ni * nl + nj * nl))
        for r, (i, j, l) in enumerate(cells):
            design[r, i * nj + j] = 1
            design[r, ni * nj + i * nl + l] = 1
            design[r, ni * nj + ni * nl + j * nl + l] = 1
        total += len(cells) - int(np.linalg.matrix_rank(design))
    return total


def homogeneous_association_lr(table: np.ndarray) -> tuple[float, int, float]:
    """Likelihood-ratio G^2, dof and p-value of no three-way interaction x*y*night within strata.

    Parameters
    ----------
    table : array of counts, shape ``(I, J, L)`` or ``(K, I, J, L)``
        x levels, y levels, nights (or any third factor), optionally within K strata of a
        conditioning set.

    Examples
    --------
    >>> t = np.array([[[10, 20], [20, 10]], [[20, 10], [10, 20]]])  # odds ratio 4 vs 1/4
    >>> g, dof, p = homogeneous_association_lr(np.transpose(t, (1, 2, 0)))
    >>> round(g, 3), dof, p < 0.001
    (13.592, 1, True)
    """
    t = np.asarray(table, dtype=np.float64)
    if t.ndim == 3:
        t = t[None]
    t = t[t.sum(axis=(1, 2, 3)) > 0]
    if t.size == 0:
        return 0.0, 0, 1.0
    m = _ipf_homogeneous(t)
    with np.errstate(divide="ignore", invalid="ignore"):
        g = float(2.0 * np.sum(np.where(t > 0, t * np.log(t / np.where(m > 0, m, 1.0)), 0.0)))
    g = max(g, 0.0)
    dof = _homogeneous_dof(t)
    p = float(stats.chi2.sf(g, dof)) if dof > 0 else 1.0
    return g, dof, p


# ----------------------------------------------------------------------------- categorical route


def _strata(codes: pd.DataFrame, given: Sequence[str]) -> tuple[np.ndarray, int]:
    """Stratum index per row of the joint levels of `given` (0 when empty), and the stratum count."""
    if not given:
        return np.zeros(len(codes), dtype=np.int64), 1
    idx = np.zeros(len(codes), dtype=np.int64)
    count = 1
    for g in given:
        c = codes[g].to_numpy(dtype=np.int64)
        k = int(c.max()) + 1 if c.size else 1
        idx = idx * k + c
        count *= k
    return idx, count


def _pooled(a: NightData, b: NightData, columns: Sequence[str]) -> tuple[pd.DataFrame, np.ndarray]:
    """Both nights' codes of `columns` with no missing value, and the night (0 = a, 1 = b) per row."""
    ca, cb = a.codes[list(columns)], b.codes[list(columns)]
    ca, cb = ca[(ca >= 0).all(axis=1)], cb[(cb >= 0).all(axis=1)]
    night = np.r_[np.zeros(len(ca), dtype=np.int64), np.ones(len(cb), dtype=np.int64)]
    return pd.concat([ca, cb], ignore_index=True).astype(np.int64), night


def _pair_categorical(a: NightData, b: NightData, x: str, y: str, given: tuple[str, ...]) -> ChangeTest:
    """Log-linear interaction test of x*y*night within the strata of `given`."""
    pooled, night = _pooled(a, b, (x, y) + given)
    stratum, k = _strata(pooled, given)
    _, stratum = np.unique(stratum, return_inverse=True)
    ix, iy = pooled[x].to_numpy(), pooled[y].to_numpy()
    shape = (int(stratum.max()) + 1 if stratum.size else 1, int(ix.max(initial=0)) + 1,
             int(iy.max(initial=0)) + 1, 2)
    t = np.zeros(shape)
    np.add.at(t, (stratum, ix, iy, night), 1.0)
    g, dof, p = homogeneous_association_lr(t)
    eff = [contingency_statistics(t[..., n]).cmi_bits for n in (0, 1)]
    return ChangeTest("pair", x, y, given, "loglinear_interaction", g, dof, p,
                      int((night == 0).sum()), int((night == 1).sum()), "cmi_bits", eff[0], eff[1])


def _mechanism_categorical(a: NightData, b: NightData, s: str, nbrs: tuple[str, ...]) -> ChangeTest:
    """G-test of signal vs night within the strata of the neighbours (night as a surrogate variable)."""
    pooled, night = _pooled(a, b, (s,) + nbrs)
    stratum, _ = _strata(pooled, nbrs)
    _, stratum = np.unique(stratum, return_inverse=True)
    iv = pooled[s].to_numpy()
    t = np.zeros((int(stratum.max(initial=0)) + 1, int(iv.max(initial=0)) + 1, 2))
    np.add.at(t, (stratum, iv, night), 1.0)
    st = contingency_statistics(t)
    return ChangeTest("mechanism", s, "", nbrs, "g_night_surrogate", st.g, st.dof, st.pvalue("g"),
                      int((night == 0).sum()), int((night == 1).sum()), "cmi_bits", float("nan"),
                      st.cmi_bits)


# ----------------------------------------------------------------------------- residual route (private helpers)


def _normal_scores(v: np.ndarray) -> np.ndarray:
    """Pooled ranks mapped to standard normal quantiles (NaN stays NaN)."""
    out = np.full(v.shape, np.nan)
    ok = np.isfinite(v)
    if ok.any():
        r = stats.rankdata(v[ok])
        out[ok] = stats.norm.ppf((r - 0.5) / ok.sum())
    return out


def _columns(night: NightData, name: str) -> tuple[np.ndarray, bool]:
    """(raw representation, is_numeric): numeric values when known, else the codes."""
    if night.values is not None and name in night.values.columns:
        return night.values[name].to_numpy(dtype=float), True
    c = night.codes[name].to_numpy(dtype=float)
    c[c < 0] = np.nan
    return c, False


def _lagged(night: NightData, v: np.ndarray) -> np.ndarray:
    """The previous window's value in the same series (NaN at a series start or after a gap)."""
    out = np.full(v.shape, np.nan)
    if night.order is None:
        return out
    series = night.series if night.series is not None else np.zeros(len(v))
    order = np.asarray(night.order, dtype=np.int64)
    idx = np.lexsort((order, series))
    prev_ok = np.r_[False, (series[idx][1:] == series[idx][:-1]) & (np.diff(order[idx]) == 1)]
    lag_sorted = np.r_[np.nan, v[idx][:-1]]
    out[idx] = np.where(prev_ok, lag_sorted, np.nan)
    return out


def _one_hot(codes: np.ndarray, levels: int) -> np.ndarray:
    """Indicator columns of levels 0..levels-2 (the last level is the reference)."""
    c = np.nan_to_num(codes, nan=-1).astype(np.int64)
    return (c[:, None] == np.arange(max(levels - 1, 0))[None, :]).astype(float)


def _spline(v: np.ndarray) -> np.ndarray:
    """A cubic B-spline basis of a numeric score (knots at quantiles), plus the score itself."""
    from sklearn.preprocessing import SplineTransformer

    ok = np.isfinite(v)
    out = np.zeros((len(v), 6))
    if ok.sum() < 20 or np.unique(v[ok]).size < 5:
        out[ok, 0] = v[ok]
        return out[:, :1]
    basis = SplineTransformer(n_knots=4, degree=3, knots="quantile", extrapolation="linear",
                              include_bias=False).fit_transform(v[ok, None])
    out = np.zeros((len(v), basis.shape[1] + 1))
    out[ok, :-1] = basis
    out[ok, -1] = v[ok]
    return out


def _demean(m: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Subtract the group mean from every column of `m`."""
    if m.shape[1] == 0:
        return m
    counts = np.bincount(groups).astype(float)
    means = np.stack([np.bincount(groups, weights=m[:, j]) for j in range(m.shape[1])], axis=1)
    return m - means[groups] / counts[groups, None]


def _residuals(target: np.ndarray, design: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Residuals of `target` (n x a) on group fixed effects plus `design` (Frisch-Waugh)."""
    yt, xt = _demean(target, groups), _demean(design, groups)
    if xt.shape[1]:
        gram = xt.T @ xt
        vals, vecs = np.linalg.eigh(gram)
        keep = vals > max(vals.max(initial=0.0), 0.0) * 1e-10
        inv = (vecs[:, keep] / vals[keep]) @ vecs[:, keep].T  # pseudo-inverse: least squares
        yt = yt - xt @ (inv @ (xt.T @ yt))
    return yt


def _nw_lags(n: int) -> int:
    """Newey & West (1994) plug-in truncation lag, floor(4 (n/100)^(2/9))."""
    return int(math.floor(4.0 * (max(n, 1) / 100.0) ** (2.0 / 9.0)))


def _hac_mean_cov(psi: np.ndarray, series: np.ndarray, order: Optional[np.ndarray]) -> np.ndarray:
    """Newey-West covariance of the column means of `psi` (n x d), within each series only.

    Rows of different series are independent; within a series, products of rows up to L windows
    apart (by `order`, never across a gap) enter with Bartlett weights 1 - l/(L+1). Without a time
    order the rows are independent (L = 0).
    """
    n, d = psi.shape
    c = psi - psi.mean(axis=0)
    omega = c.T @ c
    if order is not None:
        order = np.asarray(order, dtype=np.int64)
        lags = _nw_lags(n // max(len(np.unique(series)), 1))
        idx = np.lexsort((order, series))
        cs, ss, os_ = c[idx], series[idx], order[idx]
        for lag in range(1, lags + 1):
            same = (ss[lag:] == ss[:-lag]) & (os_[lag:] - os_[:-lag] == lag)
            if not same.any():
                continue
            gamma = cs[lag:][same].T @ cs[:-lag][same]
            omega += (1.0 - lag / (lags + 1.0)) * (gamma + gamma.T)
    return omega / (n * n)


def _wald(diff: np.ndarray, cov: np.ndarray) -> tuple[float, int, float]:
    """Wald chi-square of ``diff = 0`` with covariance `cov` (pseudo-inverse, dof = rank)."""
    if diff.size == 0:
        return 0.0, 0, 1.0
    vals, vecs = np.linalg.eigh((cov + cov.T) / 2.0)
    keep = vals > max(vals.max(initial=0.0), 0.0) * 1e-10
    if not keep.any():
        return 0.0, 0, 1.0
    proj = vecs[:, keep].T @ diff
    w = float(np.sum(proj**2 / vals[keep]))
    dof = int(keep.sum())
    return w, dof, float(stats.chi2.sf(w, dof))


class _Frame:
    """The pooled rows of both nights for a set of signals, in the residual route's representation."""

    def __init__(self, a: NightData, b: NightData, names: Sequence[str], lag_of: Sequence[str]):
        raw, numeric, lags = {}, {}, {}
        for name in names:
            va, na = _columns(a, name)
            vb, nb = _columns(b, name)
            raw[name], numeric[name] = np.r_[va, vb], na and nb
            if name in lag_of:
                lags[name] = np.r_[_lagged(a, va), _lagged(b, vb)]
        ok = np.all([np.isfinite(v) for v in raw.values()], axis=0)
        for v in lags.values():
            ok &= np.isfinite(v) | (a.order is None and b.order is None)
        self.night = np.r_[np.zeros(len(a.codes), dtype=np.int64), np.ones(len(b.codes), dtype=np.int64)][ok]
        ser_a = a.series if a.series is not None else np.zeros(len(a.codes))
        ser_b = b.series if b.series is not None else np.zeros(len(b.codes))
        _, ser = np.unique(np.r_[pd.factorize(pd.Series(ser_a))[0], 10**9 + pd.factorize(pd.Series(ser_b))[0]],
                           return_inverse=True)
        self.series = ser[ok]
        self.order = None if a.order is None or b.order is None else np.r_[a.order, b.order].astype(np.int64)[ok]
        self.numeric = numeric
        self.raw = {k: v[ok] for k, v in raw.items()}
        self.lags = {k: v[ok] for k, v in lags.items()}
        self.levels = {k: int(np.nanmax(np.r_[v, 0])) + 1 for k, v in self.raw.items()}

    def target(self, name: str) -> np.ndarray:
        """Normal scores of a numeric signal (one column), else indicators of its levels."""
        if self.numeric[name]:
            return _normal_scores(self.raw[name])[:, None]
        return _one_hot(self.raw[name], self.levels[name])

    def regressors(self, given: Sequence[str], lag_of: Optional[str], rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(group id, design) for the rows `rows`: exact strata of categorical members when few,
        additive indicators otherwise; splines of numeric members; the own previous window."""
        cats = [g for g in given if not self.numeric[g]]
        nums = [g for g in given if self.numeric[g]]
        parts = []
        strata = int(np.prod([self.levels[g] for g in cats])) if cats else 1
        groups = np.zeros(int(rows.sum()), dtype=np.int64)
        if strata <= _MAX_EXACT_STRATA:
            for g in cats:
                groups = groups * self.levels[g] + self.raw[g][rows].astype(np.int64)
            groups = np.unique(groups, return_inverse=True)[1]
        else:
            parts += [_one_hot(self.raw[g][rows], self.levels[g]) for g in cats]
        parts += [_spline(_normal_scores(self.raw[g])[rows]) for g in nums]
        if lag_of is not None and lag_of in self.lags and np.isfinite(self.lags[lag_of]).all():
            lag = self.lags[lag_of][rows]
            parts.append(_normal_scores(lag)[:, None] if self.numeric[lag_of]
                         else _one_hot(lag, self.levels[lag_of]))
        design = np.hstack(parts) if parts else np.zeros((int(rows.sum()), 0))
        return groups, design


def _standardise(r: np.ndarray) -> np.ndarray:
    sd = r.std(axis=0)
    return r / np.where(sd > 0, sd, 1.0)


def _pair_residual(a: NightData, b: NightData, x: str, y: str, given: tuple[str, ...]) -> ChangeTest:
    """Partial correlations of x and y given `given` (and their own past) compared between nights.

    Within each night, x and y are regressed on the conditioning set and their own previous window;
    the standardised residuals' correlations (a vector for categorical signals) are compared with a
    Wald test whose variance is the Newey-West variance of their influence functions
    ``rx ry - rho (rx^2 + ry^2) / 2``, computed within series.
    """
    f = _Frame(a, b, (x, y) + given, (x, y))
    tx, ty = f.target(x), f.target(y)
    rho, cov, counts = [], [], []
    for n in (0, 1):
        rows = f.night == n
        counts.append(int(rows.sum()))
        rx = _standardise(_residuals(tx[rows], *_swap(f.regressors(given, x, rows))))
        ry = _standardise(_residuals(ty[rows], *_swap(f.regressors(given, y, rows))))
        prod = (rx[:, :, None] * ry[:, None, :]).reshape(len(rx), -1)
        r = prod.mean(axis=0)
        sq = ((rx**2)[:, :, None] + (ry**2)[:, None, :]).reshape(len(rx), -1)
        psi = prod - r[None, :] * sq / 2.0
        order = None if f.order is None else f.order[rows]
        rho.append(r)
        cov.append(_hac_mean_cov(psi, f.series[rows], order))
    w, dof, p = _wald(rho[1] - rho[0], cov[0] + cov[1])
    eff = [float(r[np.argmax(np.abs(r))]) if r.size else float("nan") for r in rho]
    return ChangeTest("pair", x, y, given, "residual_hac", w, dof, p, counts[0], counts[1],
                      "partial_r", eff[0], eff[1])


def _swap(gd: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """(groups, design) -> (design, groups), the argument order of `_residuals`."""
    return gd[1], gd[0]


def _mechanism_residual(a: NightData, b: NightData, s: str, nbrs: tuple[str, ...]) -> ChangeTest:
    """Does the signal's regression on its neighbours (and its own past) differ between nights?

    One pooled regression (the same mechanism both nights under no change); its residuals, and
    their products with each neighbour's centred score, are averaged per night and the difference
    is Wald-tested with Newey-West variances computed within each night's series.
    """
    f = _Frame(a, b, (s,) + nbrs, (s,))
    rows = np.ones(len(f.night), dtype=bool)
    groups, design = f.regressors(nbrs, s, rows)
    r = _standardise(_residuals(f.target(s), design, groups))
    moments = [np.ones((len(r), 1))]
    for g in nbrs:
        z = _normal_scores(f.raw[g])[:, None] if f.numeric[g] else _one_hot(f.raw[g], f.levels[g])
        moments.append(z - z.mean(axis=0))
    m = np.hstack(moments)
    psi = (r[:, :, None] * m[:, None, :]).reshape(len(r), -1)
    means, cov, counts = [], [], []
    for n in (0, 1):
        rows = f.night == n
        counts.append(int(rows.sum()))
        means.append(psi[rows].mean(axis=0))
        cov.append(_hac_mean_cov(psi[rows], f.series[rows], None if f.order is None else f.order[rows]))
    w, dof, p = _wald(means[1] - means[0], cov[0] + cov[1])
    return ChangeTest("mechanism", s, "", nbrs, "residual_hac", w, dof, p, counts[0], counts[1])


# ----------------------------------------------------------------------------- public tests


def pair_change(a: NightData, b: NightData, x: str, y: str, given: Sequence[str] = ()) -> ChangeTest:
    """Test whether the association of x and y given `given` differs between night a and night b.

    The categorical route when neither night has numeric values or a time order; the residual
    route otherwise (see the module's docstring).
    """
    given = tuple(g for g in given if g not in (x, y))
    if a.residual_route or b.residual_route:
        return _pair_residual(a, b, x, y, given)
    return _pair_categorical(a, b, x, y, given)


def mechanism_change(a: NightData, b: NightData, signal: str, neighbours: Sequence[str]) -> ChangeTest:
    """Test whether the distribution of `signal` given `neighbours` differs between the nights."""
    nbrs = tuple(sorted(set(neighbours) - {signal}))
    if a.residual_route or b.residual_route:
        return _mechanism_residual(a, b, signal, nbrs)
    return _mechanism_categorical(a, b, signal, nbrs)


def with_qvalues(tests: Sequence[ChangeTest]) -> list[ChangeTest]:
    """The same tests with Benjamini-Hochberg q-values over all of them (Benjamini & Hochberg 1995)."""
    if not tests:
        return []
    p = np.array([t.pvalue if math.isfinite(t.pvalue) else 1.0 for t in tests])
    q = stats.false_discovery_control(p, method="bh")
    return [replace(t, qvalue=float(v)) for t, v in zip(tests, q)]
