"""Simulated operational logs with a known true graph: the instrument for size, power and false links.

Everything here is invented. Real logs differ from textbook samples in four ways, and every generator
below can switch each on:

* **persistence**: each node logs one row per five-minute window and most signals carry over from one
  window to the next (AR(1) noise with coefficient ``phi`` for numbers, "stay with probability s"
  Markov chains for categories, on/off flags that switch every few hours);
* **several series**: one series per node, each with its own level;
* **a daily cycle** in the traffic that drives the rest;
* **smooth mechanisms on raw values** (linear, tanh, exponential, logistic), not on any binning.

Public pieces:

* `markov_chain`, `ar1`: the null building blocks of the size checks;
* `triad`: ``z -> x, z -> y`` with a chosen mechanism (x and y independent given z);
* `nightly_logs`: a realistic nightly extract of an invented service with its true links, independent
  drifting signals among its signals, and optional planted changes (a new link or a changed mechanism).

Examples
--------
>>> night = nightly_logs(seed=1, nodes=2, windows=48)
>>> night.frame.shape[0], sorted(night.frame.columns)[:3]
(96, ['alert_level', 'batch_job', 'cache_hit_rate'])
>>> ('traffic_rps', 'queue_depth') in night.edges
True
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.special import ndtri
from scipy.stats import rankdata

__all__ = ["markov_chain", "ar1", "triad", "NightlyLogs", "nightly_logs", "MECHANISMS", "SIGNALS", "SmoothExtract",
           "smooth_extract"]

WINDOW = _dt.timedelta(minutes=5)
START = _dt.datetime(2026, 11, 1, tzinfo=_dt.timezone.utc)


def markov_chain(rng: np.random.Generator, n: int, levels: int, stay: float) -> np.ndarray:
    """A stationary Markov chain on ``0..levels-1``: stay with probability `stay`, else a uniform draw."""
    out = np.empty(n, dtype=np.int64)
    moves = rng.random(n) >= stay
    draws = rng.integers(0, levels, n)
    state = int(draws[0])
    for i in range(n):
        if moves[i]:
            state = int(draws[i])
        out[i] = state
    return out


def ar1(rng: np.random.Generator, n: int, phi: float, scale: float = 1.0) -> np.ndarray:
    """A stationary Gaussian AR(1) series with coefficient `phi` and marginal standard deviation `scale`."""
    e = rng.standard_normal(n) * np.sqrt(1.0 - phi**2)
    out = np.empty(n)
    out[0] = rng.standard_normal()
    for i in range(1, n):
        out[i] = phi * out[i - 1] + e[i]
    return out * scale


MECHANISMS = {
    "linear": lambda z: z,
    "tanh": lambda z: np.tanh(1.5 * z),
    "exp": lambda z: np.exp(0.8 * z),
    "cubic": lambda z: z**3 / 3.0,
    "square": lambda z: z**2,  # not monotone: outside a rank test's reach
}


def triad(rng: np.random.Generator, n: int, mechanism: str = "linear", *, kind_x: str = "numeric",
          kind_y: str = "numeric", strength: float = 1.0, link_xy: float = 0.0) -> pd.DataFrame:
    """``z -> x`` and ``z -> y`` through `mechanism` on z's raw values; rows independent.

    With ``link_xy = 0`` x and y are independent given z. A non-zero `link_xy` adds ``x -> y`` with that
    coefficient (on standardised x). Categorical children are 3-level logistic cuts of the same signal.
    """
    f = MECHANISMS[mechanism]
    z = rng.standard_normal(n)
    fz = f(z)
    fz = (fz - fz.mean()) / (fz.std() or 1.0)
    x = strength * fz + rng.standard_normal(n)
    y = strength * fz + link_xy * (x - x.mean()) / x.std() + rng.standard_normal(n)
    out = {"z": z, "x": x, "y": y}
    for name, kind in (("x", kind_x), ("y", kind_y)):
        if kind == "categorical":
            v = out[name]
            p = 1.0 / (1.0 + np.exp(-v))
            u = rng.random(n)
            out[name] = np.where(u < p * 0.5, "high", np.where(u < p, "mid", "low"))
    return pd.DataFrame(out)


# name -> (kind, persistence of its own noise or chain)
SIGNALS: dict[str, tuple[str, float]] = {
    "traffic_rps": ("numeric", 0.90),
    "deploy_window": ("flag", 0.97),
    "batch_job": ("flag", 0.99),
    "cache_hit_rate": ("numeric", 0.95),
    "queue_depth": ("numeric", 0.85),
    "cpu_util": ("numeric", 0.80),
    "conn_wait_ms": ("numeric", 0.85),
    "latency_ms": ("numeric", 0.80),
    "error_burst": ("categorical", 0.80),
    "alert_level": ("categorical", 0.80),
    "retry_rate": ("numeric", 0.85),
    "gc_pause_ms": ("numeric", 0.97),     # independent of everything, drifts
    "disk_used_pct": ("numeric", 0.995),  # independent of everything, drifts slowly
    "region_mix": ("categorical", 0.95),  # independent of everything, persistent
}

_EDGES = (
    ("traffic_rps", "queue_depth"),
    ("traffic_rps", "cpu_util"),
    ("batch_job", "cpu_util"),
    ("deploy_window", "cache_hit_rate"),
    ("queue_depth", "latency_ms"),
    ("cache_hit_rate", "latency_ms"),
    ("queue_depth", "conn_wait_ms"),
    ("latency_ms", "error_burst"),
    ("deploy_window", "error_burst"),
    ("error_burst", "alert_level"),
    ("error_burst", "retry_rate"),
)
_NEW_LINK = ("gc_pause_ms", "latency_ms")  # planted by ``change="link"``
_CHANGED_MECHANISM = "queue_depth"          # planted by ``change="mechanism"``


@dataclass(frozen=True)
class NightlyLogs:
    """One simulated night: the table (one row per node and window) and its true directed links."""

    frame: pd.DataFrame
    edges: tuple[tuple[str, str], ...]
    time_column: str = "window_start"
    series: tuple[str, ...] = ("node",)
    notes: dict[str, object] = field(default_factory=dict)


def _z(v: np.ndarray) -> np.ndarray:
    """Standardised over the whole sample (only for samples of independent rows, one population)."""
    s = v.std()
    return (v - v.mean()) / (s if s > 0 else 1.0)


def _flag(rng: np.random.Generator, n: int, stay: float, on_share: float) -> np.ndarray:
    """An on/off flag that switches rarely (mean run of 1/(1-stay) windows) and is on `on_share` of the time."""
    out = np.empty(n, dtype=np.int64)
    state = int(rng.random() < on_share)
    u = rng.random(n)
    for i in range(n):
        # switch off->on with prob (1-stay)*on_share/(1-on_share)... keeps the on share stationary
        if state == 1 and u[i] > stay:
            state = 0
        elif state == 0 and u[i] > 1.0 - (1.0 - stay) * on_share / (1.0 - on_share):
            state = 1
        out[i] = state
    return out


def _categorical(latent: np.ndarray, cuts: tuple[float, ...], labels: tuple[str, ...]) -> np.ndarray:
    """Ordered categories of a latent score cut at fixed points (the same on every node and night)."""
    return np.asarray(labels, dtype=object)[np.searchsorted(np.asarray(cuts), latent)]


def _one_node(rng: np.random.Generator, windows: int, node_level: float, *, persistence: bool,
              strength: float, change: str | None, day: int) -> dict[str, np.ndarray]:
    """The signals of one node over one night, following the true graph."""
    n = windows

    def noise(name: str) -> np.ndarray:
        phi = SIGNALS[name][1] if persistence else 0.0
        return ar1(rng, n, phi)

    hours = (np.arange(n) * 5.0 / 60.0) % 24.0
    cycle = np.sin(2 * np.pi * (hours - 9.0) / 24.0)  # busiest in the afternoon
    s = strength
    traffic = np.exp(5.0 + 0.25 * node_level + 0.5 * cycle + 0.25 * noise("traffic_rps"))
    lt = (np.log(traffic) - 5.0) / 0.5  # fixed scales: no mechanism depends on a node's own statistics
    st_deploy = SIGNALS["deploy_window"][1] if persistence else 0.15  # stay = on share: independent draws
    st_batch = SIGNALS["batch_job"][1] if persistence else 0.25
    deploy = _flag(rng, n, st_deploy, 0.15)
    batch = _flag(rng, n, st_batch, 0.25)
    cache = 1.0 / (1.0 + np.exp(-(2.2 - s * 1.2 * deploy + 0.35 * noise("cache_hit_rate"))))
    q_gain = 1.6 if change == "mechanism" else 0.8
    queue = np.exp(1.5 + s * q_gain * np.tanh(lt) + 0.45 * noise("queue_depth"))
    cpu = 100.0 / (1.0 + np.exp(-(s * 0.9 * lt + s * 1.0 * batch - 0.5 + 0.6 * noise("cpu_util"))))
    lq = (np.log(queue) - 1.5) / 0.65
    conn = np.exp(1.0 + s * 0.7 * lq + 0.6 * noise("conn_wait_ms"))
    gc = np.exp(2.0 + 0.5 * noise("gc_pause_ms"))
    disk = 60.0 + 12.0 * noise("disk_used_pct") + 0.02 * day
    lat_score = s * 0.8 * lq - s * 0.8 * (cache - 0.88) / 0.06 + 0.7 * noise("latency_ms")
    if change == "link":
        lat_score = lat_score + s * 0.8 * (np.log(gc) - 2.0) / 0.5
    latency = 40.0 * np.exp(0.35 * lat_score)
    err_score = s * 1.1 * lat_score / 1.3 + s * 1.0 * deploy
    error = _categorical(err_score + 0.8 * noise("error_burst"), (-0.4, 0.8), ("calm", "some", "many"))
    err_num = np.select([error == "calm", error == "some"], [0.0, 1.0], 2.0)
    alert = _categorical(s * 1.3 * (err_num - 1.0) / 0.8 + 0.8 * noise("alert_level"), (-0.6, 0.6), ("ok", "warn", "page"))
    retry = np.exp(-3.0 + s * 0.6 * err_num + 0.5 * noise("retry_rate"))
    stay = SIGNALS["region_mix"][1] if persistence else 0.0
    region = np.asarray(("north", "harbour", "uplands", "riverside"), dtype=object)[markov_chain(rng, n, 4, stay)]
    return {
        "traffic_rps": traffic.round(1), "deploy_window": deploy, "batch_job": batch,
        "cache_hit_rate": cache.round(4), "queue_depth": queue.round(2), "cpu_util": cpu.round(2),
        "conn_wait_ms": conn.round(2), "latency_ms": latency.round(2), "error_burst": error,
        "alert_level": alert, "retry_rate": retry.round(5), "gc_pause_ms": gc.round(2),
        "disk_used_pct": disk.round(3), "region_mix": region,
    }


def nightly_logs(seed: int = 0, *, nodes: int = 6, windows: int = 288, day: int = 0, persistence: bool = True,
                 strength: float = 1.0, change: str | None = None, shuffle_rows: bool = True) -> NightlyLogs:
    """One night of an invented service: `nodes` series of `windows` five-minute rows each.

    Parameters
    ----------
    seed, day : the night's random key is ``(seed, day)``; the structure is the same every night.
    persistence : serial dependence as in real logs (``False`` draws every window's noise afresh:
        rows independent given the daily cycle, the favourable textbook case).
    strength : multiplies every mechanism.
    change : ``None``, ``"link"`` (adds ``gc_pause_ms -> latency_ms``) or ``"mechanism"`` (doubles the
        response of ``queue_depth`` to traffic; the graph is unchanged).
    shuffle_rows : write the rows in an arbitrary order, as extracts often are (the time column and the
        node column carry the order).
    """
    levels = np.random.default_rng([int(seed), 20261101]).normal(0.0, 1.0, nodes)  # a node keeps its level
    rng = np.random.default_rng([int(seed), int(day), 20261101])
    parts = []
    for k in range(nodes):
        sig = _one_node(rng, windows, float(levels[k]), persistence=persistence, strength=strength,
                        change=change, day=day)
        frame = pd.DataFrame(sig)
        frame.insert(0, "node", f"node-{k + 1:02d}")
        frame.insert(0, "window_start", pd.date_range(START + day * _dt.timedelta(days=1), periods=windows,
                                                      freq=WINDOW))
        parts.append(frame)
    out = pd.concat(parts, ignore_index=True)
    if shuffle_rows:
        out = out.iloc[rng.permutation(len(out))].reset_index(drop=True)
    edges = _EDGES + ((_NEW_LINK,) if change == "link" else ())
    return NightlyLogs(frame=out, edges=edges, notes={"seed": seed, "day": day, "change": change,
                                                       "persistence": persistence, "strength": strength})


@dataclass(frozen=True)
class SmoothExtract:
    """An extract with independent rows, numeric common causes and smooth mechanisms, and its true links.

    ``kinds`` maps each column to ``numeric`` or ``categorical``; ``edges`` are (parent, child) pairs.
    """

    frame: pd.DataFrame
    edges: tuple[tuple[str, str], ...]
    kinds: dict[str, str]


def _smooth_structure(columns: int, seed: int, categorical_share: float):
    """The seeded graph of `smooth_extract`: per column its kind, levels, parents and mechanisms."""
    rng = np.random.default_rng([int(seed), int(columns), 30])
    roots = max(2, columns // 6)
    monotone = ("linear", "tanh", "exp", "cubic")
    nodes = []
    for i in range(columns):
        categorical = i >= roots and rng.random() < categorical_share
        kind = "categorical" if categorical else "numeric"
        name = f"{'c' if categorical else 'm'}{i + 1:02d}"
        parents: list[tuple[int, str, float]] = []
        if i >= roots:
            k = 1 if rng.random() < 0.45 else 2
            for p in sorted(rng.choice(i, size=min(k, i), replace=False).tolist()):
                sign = 1.0 if rng.random() < 0.5 else -1.0
                parents.append((int(p), str(rng.choice(monotone)), sign * float(rng.uniform(0.6, 1.0))))
        levels = int(rng.integers(2, 5)) if categorical else 0
        nodes.append({"name": name, "kind": kind, "levels": levels, "parents": parents})
    return nodes


def smooth_extract(rows: int, seed: int = 0, *, columns: int = 16, categorical_share: float = 0.3) -> SmoothExtract:
    """A table of `rows` independent rows and `columns` signals whose true graph is known.

    The first ``columns // 6`` signals are numeric roots (the common causes); every later signal has one
    or two earlier parents. A numeric signal is the sum over its parents of ``coef * f(parent)`` (f one of
    the smooth monotone `MECHANISMS` on the parent's standardised raw value; coef of size 0.6-1.0 with
    either sign; a categorical parent shifts it by a level effect) plus standard normal noise. A
    categorical signal (2-4 levels) cuts the same kind of score plus logistic noise at its quantiles. The
    graph depends on (`seed`, `columns`) only; the rows on `seed` and `rows` too.

    Examples
    --------
    >>> ex = smooth_extract(500, columns=12)
    >>> ex.frame.shape, len(ex.edges) > 10
    ((500, 12), True)
    """
    nodes = _smooth_structure(columns, seed, categorical_share)
    effects = np.random.default_rng([int(seed), int(columns), 32])
    level_effects = {(i, p): effects.permutation(np.linspace(-1.0, 1.0, nodes[p]["levels"]))
                     for i, node in enumerate(nodes) for p, _, _ in node["parents"] if nodes[p]["kind"] != "numeric"}
    rng = np.random.default_rng([int(seed), int(columns), int(rows), 31])
    # a numeric signal enters its children through the normal quantile of its rank (a monotone function of
    # its raw value), so the mechanisms act on a Gaussian input as in `triad` and tails do not compound
    # down the graph; a categorical one through its level codes
    std: list[np.ndarray] = []
    out: dict[str, np.ndarray] = {}
    edges = []
    for i, node in enumerate(nodes):
        score = np.zeros(rows)
        for p, mech, coef in node["parents"]:
            parent = nodes[p]
            edges.append((parent["name"], node["name"]))
            if parent["kind"] == "numeric":
                score += coef * _z(MECHANISMS[mech](std[p]))
            else:
                score += 1.5 * coef * level_effects[(i, p)][std[p].astype(np.int64)]
        if node["kind"] == "numeric":
            value = score + rng.standard_normal(rows)
            std.append(ndtri(rankdata(value) / (rows + 1.0)))
            out[node["name"]] = np.round(np.exp(0.5 * _z(value)) * 100.0, 3)  # skewed like a latency
        else:
            latent = 1.5 * score + rng.logistic(size=rows)
            cuts = np.quantile(latent, np.linspace(0, 1, node["levels"] + 1)[1:-1])
            codes = np.searchsorted(cuts, latent)
            std.append(codes.astype(np.float64))
            out[node["name"]] = np.asarray([f"level_{k}" for k in range(node["levels"])], dtype=object)[codes]
    kinds = {n["name"]: n["kind"] for n in nodes}
    return SmoothExtract(frame=pd.DataFrame(out), edges=tuple(edges), kinds=kinds)
