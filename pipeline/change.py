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
  strong persistence, so the tests above would report chance drift as change. The rows of both nights
  go into one `pipeline.independence.residual.ResidualTester` (normal scores of the pooled values,
  each night's own previous windows), so a signal is regressed exactly as the search regresses it:
  exact strata of categorical members, a spline basis of numeric members, and the previous windows
  of the signal and of the conditioning set when the time order is known. The residuals' association
  (pair) or mean and slope-against-neighbours (mechanism) is compared between the nights with a
  Newey-West variance (Newey & West 1987, `hac_covariance`) computed within each series of each
  night, never across two series, across a gap in time or across the two nights, and a Wald test
  (`wald`).

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
from .independence.residual import ResidualTester, Timeline, hac_covariance, normal_scores, wald

__all__ = [
    "NightData", "ChangeTest", "homogeneous_association_lr", "pair_change", "mechanism_change",
    "with_qvalues",
]

_IPF_TOL = 1e-10
_IPF_MAX_ITER = 500


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
        cells = [(i, j, k) for i in range(ni) for j in range(nj) for k in range(nl)
                 if xy[i, j] and xn[i, k] and yn[j, k]]
        if not cells:
            continue
        design = np.zeros((len(cells), ni * nj + ni * nl + nj * nl))
        for r, (i, j, k) in enumerate(cells):
            design[r, i * nj + j] = 1
            design[r, ni * nj + i * nl + k] = 1
            design[r, ni * nj + ni * nl + j * nl + k] = 1
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


# ----------------------------------------------------------------------------- residual route


class _Pooled:
    """Both nights' rows of a few signals in one `ResidualTester`: night b's rows after night a's.

    Numeric signals enter through normal scores of the pooled values (one value, one score on both
    nights); the previous window of a row is looked up within its own night and series, so nothing is
    paired across the two nights. Rows, regressions and Newey-West partners are the search's own
    (`pipeline.independence.residual`).
    """

    def __init__(self, a: NightData, b: NightData, names: Sequence[str]):
        self.names = list(names)
        self.night = np.r_[np.zeros(len(a.codes), dtype=np.int64), np.ones(len(b.codes), dtype=np.int64)]
        codes, scores = [], []
        for name in self.names:
            codes.append(np.r_[a.codes[name].to_numpy(), b.codes[name].to_numpy()].astype(np.int64))
            va, vb = _values(a, name), _values(b, name)
            scores.append(normal_scores(np.r_[va, vb]) if va is not None and vb is not None else None)
        self.codes = np.vstack(codes)
        self.levels = {n: int(c.max(initial=-1)) + 1 for n, c in zip(self.names, codes)}
        self.tester = ResidualTester(self.codes, scores, timeline=_pooled_timeline(a, b))

    def at(self, names: Sequence[str]) -> tuple[int, ...]:
        return tuple(self.names.index(n) for n in names)

    def target(self, name: str, rows: np.ndarray) -> np.ndarray:
        """Its score (one column), else indicators of its levels 0..L-2 (the same columns on both nights)."""
        i = self.names.index(name)
        s = self.tester.scores[i]
        if s is not None:
            return s[rows][:, None]
        return (self.codes[i][rows][:, None] == np.arange(max(self.levels[name] - 1, 0))[None, :]).astype(float)

    def residuals(self, name: str, given: Sequence[str], rows: np.ndarray) -> np.ndarray:
        """Standardised residuals of `name` on `given`, its own and their previous windows."""
        r = self.tester.residuals(self.names.index(name), self.at(given), rows, target=self.target(name, rows))
        sd = r.std(axis=0)
        return r / np.where(sd > 0, sd, 1.0)

    def mean_covariance(self, psi: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """Newey-West covariance of the column means of `psi` (its rows are `rows`), within series."""
        return hac_covariance(psi, self.tester.partners_for(rows)) / max(len(rows), 1)


def _values(night: NightData, name: str) -> Optional[np.ndarray]:
    """Raw numeric values of a signal (NaN missing), or None when the night has none for it."""
    if night.values is None or name not in night.values.columns:
        return None
    return night.values[name].to_numpy(dtype=float)


def _pooled_timeline(a: NightData, b: NightData) -> Optional[Timeline]:
    """Previous windows of the pooled rows (within a night and a series; consecutive ``order``), or None."""
    if a.order is None or b.order is None:
        return None
    ids = [pd.factorize(pd.Series(n.series if n.series is not None else np.zeros(len(n.codes))))[0] for n in (a, b)]
    series = np.r_[ids[0], ids[1] + (ids[0].max(initial=-1) + 1)]
    order = np.r_[a.order, b.order].astype(np.int64)
    idx = np.lexsort((order, series))
    ok = (series[idx][1:] == series[idx][:-1]) & (np.diff(order[idx]) == 1)
    prev = np.full(len(order), -1, dtype=np.int64)
    prev[idx[1:][ok]] = idx[:-1][ok]
    return Timeline(prev=prev, series_length=float(np.median(np.bincount(series))) if series.size else 0.0)


def _chi2(w: float, dof: int) -> float:
    return float(stats.chi2.sf(w, dof)) if dof > 0 else 1.0


def _pair_residual(a: NightData, b: NightData, x: str, y: str, given: tuple[str, ...]) -> ChangeTest:
    """Partial correlations of x and y given `given` (and the previous windows) compared between nights.

    Within each night, x and y are regressed on the conditioning set and the previous windows (the
    search's regression); the standardised residuals' correlations (a vector for categorical signals)
    are compared with a Wald test whose variance is the Newey-West variance of their influence
    functions ``rx ry - rho (rx^2 + ry^2) / 2``, computed within series.
    """
    p = _Pooled(a, b, (x, y) + given)
    ix, iy = p.at((x, y))
    every = p.tester.rows_for(ix, iy, p.at(given))
    rho, cov, counts = [], [], []
    for n in (0, 1):
        rows = every[p.night[every] == n]
        counts.append(int(rows.size))
        if rows.size < 3:
            return ChangeTest("pair", x, y, given, "residual_hac", 0.0, 0, 1.0, counts[0], int(rows.size))
        rx, ry = p.residuals(x, given, rows), p.residuals(y, given, rows)
        prod = (rx[:, :, None] * ry[:, None, :]).reshape(len(rx), -1)
        r = prod.mean(axis=0)
        sq = ((rx**2)[:, :, None] + (ry**2)[:, None, :]).reshape(len(rx), -1)
        rho.append(r)
        cov.append(p.mean_covariance(prod - r[None, :] * sq / 2.0, rows))
    w, dof = wald(rho[1] - rho[0], cov[0] + cov[1], 1)
    eff = [float(r[np.argmax(np.abs(r))]) if r.size else float("nan") for r in rho]
    return ChangeTest("pair", x, y, given, "residual_hac", w, dof, _chi2(w, dof), counts[0], counts[1],
                      "partial_r", eff[0], eff[1])


def _mechanism_residual(a: NightData, b: NightData, s: str, nbrs: tuple[str, ...]) -> ChangeTest:
    """Does the signal's regression on its neighbours (and the previous windows) differ between nights?

    One pooled regression (the same mechanism both nights under no change); its residuals, and
    their products with each neighbour's centred score or indicators, are averaged per night and the
    difference is Wald-tested with Newey-West variances computed within each night's series.
    """
    p = _Pooled(a, b, (s,) + nbrs)
    (i,) = p.at((s,))
    rows = p.tester.rows_for(i, i, p.at(nbrs))
    counts = [int(np.sum(p.night[rows] == n)) for n in (0, 1)]
    if min(counts) < 3:
        return ChangeTest("mechanism", s, "", nbrs, "residual_hac", 0.0, 0, 1.0, counts[0], counts[1])
    r = p.residuals(s, nbrs, rows)
    moments = [np.ones((len(rows), 1))] + [(z - z.mean(axis=0)) for z in (p.target(g, rows) for g in nbrs)]
    m = np.hstack(moments)
    psi = (r[:, :, None] * m[:, None, :]).reshape(len(r), -1)
    means, cov = [], []
    for n in (0, 1):
        sel = p.night[rows] == n
        means.append(psi[sel].mean(axis=0))
        cov.append(p.mean_covariance(psi[sel], rows[sel]))
    w, dof = wald(means[1] - means[0], cov[0] + cov[1], 1)
    return ChangeTest("mechanism", s, "", nbrs, "residual_hac", w, dof, _chi2(w, dof), counts[0], counts[1])


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
