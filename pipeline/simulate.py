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

__all__ = ["markov_chain", "ar1", "triad", "NightlyLogs", "nightly_logs", "MECHANISMS", "SIGNALS"]

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
