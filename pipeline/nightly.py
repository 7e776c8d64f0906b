"""Unattended runs over an inbox of snapshots: one run folder per snapshot, retried, locked, pruned.

`run` looks in ``nightly.inbox`` (relative paths are relative to the current directory) for
snapshots, each a single file or a partition folder, and runs the pipeline on every snapshot that
has no successful run yet, **oldest first, where oldest means first by name**: for date-named
snapshots (``2026-11-01.csv``, ``2026-11-02/``) that is time order. Then it stops.

What counts as a snapshot
    Every entry of the inbox except hidden or in-progress names: names starting with ``.`` or
    ``_`` and names ending in ``.tmp``, ``.part``, ``.partial``, ``.crdownload`` or ``~``.
    An entry is *not ready yet* when it was modified less than ``nightly.settle_seconds`` ago (for
    a folder: its newest file), or, when ``nightly.ready_marker`` is set, when a partition folder
    does not hold that marker file (a folder with the marker is ready at once). Entries not ready
    are left for the next start. A modification time in the future is not trusted: that file's
    status-change time (this machine's clock) is used instead.
Roots
    The inbox and the output root must be separate: the same folder, or one inside the other, is
    refused (`ConfigError`) before anything is written.
Run folder names
    The snapshot's name without its data suffixes (``2026-11-01.csv.gz`` -> ``2026-11-01``);
    characters other than letters, digits, ``.``, ``_`` and ``-`` become ``_``. A name that could
    leave the output root (``..``, an absolute path, a separator) or a symlink that points outside
    the inbox is refused and counted as a failed attempt (exit code 3).
State
    ``nightly-state.json`` under the output root records, per snapshot, the status (``ok`` or
    ``failed``), attempts, last exit code and message. It is replaced atomically. A failed
    snapshot is retried on the next start until ``nightly.max_attempts`` attempts, then reported
    as given up and skipped, without holding up the ones after it; replacing the snapshot file
    (new size or modification time) starts its attempts afresh.
Pointers
    After each successful run, ``latest`` (a relative symlink, replaced atomically) and
    ``latest.json`` name the successful run that comes last by name; ``previous`` and the
    ``previous`` key of ``latest.json`` name the successful run just before it. A late snapshot
    that sorts before the latest one therefore never moves ``latest`` backwards. Only runs the state
    records as nightly's own successes count. A pointer naming a run that no longer exists is
    repaired at the start, with one ``note`` line.
Retention
    Beyond ``output.keep_runs`` successful runs, the oldest by name are deleted; the latest run is
    never deleted. The state keeps their ``ok`` status so they are not run again.
Lock
    ``<output root>/.lock`` (``filelock``): a second start on the same configuration waits up to
    ``nightly.lock_wait_seconds`` and then exits with code 4.
Log
    One line per snapshot (name, result, seconds) to the `log` callable and appended, time-stamped,
    to ``<output root>/nightly.log``.

Exit code of `nightly_main`: 0 when every due snapshot succeeded or none was due, 4 when the lock
is held (raised as `LockHeldError`), otherwise the exit code of the first failed snapshot
(2 configuration, 3 data, 5 limit, 1 anything else).
"""

from __future__ import annotations

import datetime as _dt
import json
import logging
import os
import re
import shutil
import sys
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Optional, Union

from .config import Config
from .errors import EXIT_FAILURE, EXIT_OK, ConfigError, DataError, EdgeproofError, LockHeldError

__all__ = [
    "NightlyResult",
    "SnapshotOutcome",
    "run",
    "nightly_main",
    "successful_runs",
    "read_pointer",
    "snapshot_run_name",
]

STATE_FILE = "nightly-state.json"
LOG_FILE = "nightly.log"
LOCK_FILE = ".lock"
RESERVED_NAMES = frozenset({"latest", "previous"})
_IN_PROGRESS_SUFFIXES = (".tmp", ".part", ".partial", ".crdownload", "~")
_DATA_SUFFIXES = (".gz", ".bz2", ".xz", ".zst", ".csv", ".tsv", ".txt", ".parquet", ".jsonl", ".json")
_SAFE_CHARS = re.compile(r"[^A-Za-z0-9._-]")

LogFn = Any  # a progress.Reporter, a logging.Logger, a callable taking one line, or None


@dataclass(frozen=True)
class SnapshotOutcome:
    """What happened to one inbox entry on this start.

    ``status`` is ``ok``, ``failed``, ``gave_up`` (failed on its last allowed attempt),
    ``skipped`` (given up on an earlier start), ``waiting`` (not ready yet) or ``done``
    (succeeded on an earlier start).
    """

    name: str
    source: str
    status: str
    exit_code: int = EXIT_OK
    seconds: float = 0.0
    attempts: int = 0
    message: str = ""


@dataclass(frozen=True)
class NightlyResult:
    """Every inbox entry's outcome, in processing order, and the exit code for the whole start."""

    root: Path
    outcomes: tuple[SnapshotOutcome, ...]
    latest: Optional[str]
    previous: Optional[str]
    deleted: tuple[str, ...] = field(default_factory=tuple)

    @property
    def exit_code(self) -> int:
        """0 when nothing due failed, else the exit code of the first snapshot that failed now."""
        for o in self.outcomes:
            if o.status in ("failed", "gave_up"):
                return o.exit_code
        return EXIT_OK

    def ran(self) -> list[str]:
        """Names of the snapshots run on this start (whatever their result)."""
        return [o.name for o in self.outcomes if o.status in ("ok", "failed", "gave_up")]


# ----------------------------------------------------------------------------- public entry points


def run(cfg: Config, config_path: Optional[Path] = None, *, log: LogFn = None) -> NightlyResult:
    """Process every due snapshot of ``cfg.nightly.inbox`` under the lock, oldest (by name) first.

    Parameters
    ----------
    cfg : Config
        The configuration; sections ``nightly`` and ``output`` steer this function, the rest the runs.
    config_path : Path, optional
        The configuration file, used to find the default output root.
    log : callable or logging.Logger, optional
        Receives one line per snapshot; default: standard error.

    Returns
    -------
    NightlyResult

    Raises
    ------
    ConfigError
        ``nightly.inbox`` is not set or not a folder.
    LockHeldError
        Another start holds ``<root>/.lock`` beyond ``nightly.lock_wait_seconds``.

    Examples
    --------
    >>> from pipeline.config import config_from_dict
    >>> cfg = config_from_dict({"nightly": {"inbox": "no/such/folder"}})
    >>> run(cfg)
    Traceback (most recent call last):
    ...
    pipeline.errors.ConfigError: Inbox `no/such/folder` (nightly.inbox) is not a folder; create it or fix `nightly.inbox`.
    """
    inbox = _inbox(cfg)
    root = _output_root(cfg, config_path)
    _check_roots(inbox, root)
    root.mkdir(parents=True, exist_ok=True)
    emit = _logger(log, root)
    with _lock(root, cfg.nightly.lock_wait_seconds):
        return _process(cfg, inbox, root, emit, config_path)


def nightly_main(cfg: Config, config_path: Optional[Path] = None, *, log: LogFn = None) -> int:
    """Command-line body of ``edgeproof nightly``: run, print a summary line, return the exit code."""
    result = run(cfg, config_path, log=log)
    counts: dict[str, int] = {}
    for o in result.outcomes:
        counts[o.status] = counts.get(o.status, 0) + 1
    parts = [f"{counts.get(k, 0)} {label}" for k, label in (
        ("ok", "succeeded"), ("failed", "failed"), ("gave_up", "gave up"), ("skipped", "skipped"),
        ("waiting", "waiting"), ("done", "already done"))]
    print(
        f"nightly: {', '.join(parts)}; latest = {result.latest or '-'}; "
        f"previous = {result.previous or '-'}; exit code {result.exit_code}."
    )
    return result.exit_code


def successful_runs(root: Union[str, Path]) -> list[str]:
    """Names of the successful runs nightly made under `root`, by name.

    A run counts when its folder's ``manifest.json`` says ``status: ok`` and, once
    ``nightly-state.json`` exists, the state records it as a successful snapshot: folders written
    there by anything else (an ad-hoc ``run --out``) never become `latest` and are never pruned.
    """
    root = Path(root)
    if not root.is_dir():
        return []
    made = _nightly_names(root)
    names = []
    for entry in os.scandir(root):
        if entry.name.startswith(".") or entry.name in RESERVED_NAMES or entry.is_symlink():
            continue
        if made is not None and entry.name not in made:
            continue
        if entry.is_dir() and _manifest_ok(Path(entry.path)):
            names.append(entry.name)
    return sorted(names)


def _nightly_names(root: Path) -> Optional[set[str]]:
    """Snapshot names the state file records as successful, or None when there is no state file."""
    try:
        data = json.loads((root / STATE_FILE).read_text(encoding="utf-8"))
        snapshots = data["snapshots"]
        return {name for name, rec in snapshots.items() if isinstance(rec, dict) and rec.get("status") == "ok"}
    except FileNotFoundError:
        return None
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return set()


def read_pointer(root: Union[str, Path], which: str) -> Optional[str]:
    """The run name ``latest`` or ``previous`` points at (from ``latest.json``, else the symlink)."""
    if which not in RESERVED_NAMES:
        raise ConfigError(f"Pointer `{which}` is unknown; use `latest` or `previous`.")
    root = Path(root)
    try:
        data = json.loads((root / "latest.json").read_text(encoding="utf-8"))
        name = data.get("name" if which == "latest" else "previous")
        if name is None or isinstance(name, str):
            return _checked_pointer(root, name)
    except (OSError, ValueError, AttributeError):
        pass
    link = root / which
    if link.is_symlink():
        return _checked_pointer(root, os.readlink(link))
    return None


def snapshot_run_name(entry_name: str) -> str:
    """Run folder name for an inbox entry name; raises `DataError` for a name that could escape.

    Examples
    --------
    >>> snapshot_run_name("2026-11-01.csv.gz")
    '2026-11-01'
    >>> snapshot_run_name("week 45 (late).parquet")
    'week_45_late'
    """
    if (
        not entry_name
        or os.path.isabs(entry_name)
        or "/" in entry_name
        or "\\" in entry_name
        or entry_name in (".", "..")
        or "\x00" in entry_name
    ):
        raise DataError(
            f"Snapshot name `{entry_name}` could leave the output folder; rename it to a plain name "
            f"such as `2026-11-01.csv`."
        )
    stem = entry_name
    changed = True
    while changed:
        changed = False
        for suffix in _DATA_SUFFIXES:
            if stem.lower().endswith(suffix) and len(stem) > len(suffix):
                stem = stem[: -len(suffix)]
                changed = True
    from .runs import safe_name

    name = safe_name(stem)
    if name in RESERVED_NAMES or stem.startswith("."):
        raise DataError(
            f"Snapshot `{entry_name}` gives the run name `{name}`, which is reserved or hidden; "
            f"rename the snapshot."
        )
    return name


# ----------------------------------------------------------------------------- the work


@dataclass(frozen=True)
class _Entry:
    """One candidate inbox entry."""

    entry_name: str
    path: Path
    is_dir: bool


def _process(
    cfg: Config, inbox: Path, root: Path, emit: Callable[..., None], config_path: Optional[Path]
) -> NightlyResult:
    """The body of `run`, called with the lock held."""

    state = _read_state(root)
    snapshots = state.setdefault("snapshots", {})
    outcomes: list[SnapshotOutcome] = []
    deleted: list[str] = []
    seen_names: dict[str, str] = {}
    now = time.time()
    _repair_pointers(root, emit)
    for entry in _entries(inbox):
        source = str(entry.path)
        try:
            name = snapshot_run_name(entry.entry_name)
        except DataError as err:
            name = _SAFE_CHARS.sub("_", entry.entry_name).strip(".") or "unnamed"
            outcomes.append(_record_failure(snapshots, name, source, err, 0.0, cfg, emit, None))
            _write_state(root, state)
            continue
        if name in seen_names:
            clash = DataError(
                f"Snapshots `{seen_names[name]}` and `{entry.entry_name}` both give the run name "
                f"`{name}`; rename one of them."
            )
            outcomes.append(_record_failure(snapshots, name, source, clash, 0.0, cfg, emit, None))
            _write_state(root, state)
            continue
        seen_names[name] = entry.entry_name
        record = snapshots.get(name, {})
        if _already_done(root, name, record):
            outcomes.append(SnapshotOutcome(name, source, "done", attempts=record.get("attempts", 0)))
            continue
        stamp = _stamp(entry)
        if record.get("status") == "failed" and record.get("stamp") != stamp:
            record = {}  # a new delivery of the snapshot: attempts start afresh
            snapshots.pop(name, None)
        if record.get("status") == "failed" and record.get("attempts", 0) >= cfg.nightly.max_attempts:
            o = SnapshotOutcome(
                name, source, "skipped", record.get("exit_code", EXIT_FAILURE), 0.0,
                record.get("attempts", 0),
                f"gave up after {record.get('attempts', 0)} attempts: {record.get('message', '')}",
            )
            emit(name, "skipped", 0.0, o.message, exit_code=o.exit_code)
            outcomes.append(o)
            continue
        waiting = _not_ready(entry, cfg, now)
        if waiting:
            emit(name, "waiting", 0.0, waiting)
            outcomes.append(SnapshotOutcome(name, source, "waiting", message=waiting))
            continue
        try:
            _check_inside(inbox, entry)
        except DataError as err:
            outcomes.append(_record_failure(snapshots, name, source, err, 0.0, cfg, emit, stamp))
            _write_state(root, state)
            continue
        outcome = _run_one(cfg, root, name, entry, snapshots, emit, stamp, config_path)
        outcomes.append(outcome)
        _write_state(root, state)
        if outcome.status == "ok":
            _changes_since_previous(cfg, root, name, emit)
            deleted.extend(_prune(root, cfg.output.keep_runs, snapshots))
            _write_state(root, state)
            _update_pointers(root)
    latest, previous = read_pointer(root, "latest"), read_pointer(root, "previous")
    return NightlyResult(root, tuple(outcomes), latest, previous, tuple(deleted))


def _run_one(
    cfg: Config,
    root: Path,
    name: str,
    entry: _Entry,
    snapshots: dict[str, Any],
    emit: Callable[..., None],
    stamp: list[int],
    config_path: Optional[Path],
) -> SnapshotOutcome:
    """Run the pipeline on one snapshot and record the result in `snapshots`."""
    from .api import run_pipeline

    out_dir = root / name
    if out_dir.resolve().parent != root.resolve():
        err = DataError(f"Run folder `{out_dir}` would leave the output root `{root}`; rename the snapshot.")
        return _record_failure(snapshots, name, str(entry.path), err, 0.0, cfg, emit, stamp)
    started = time.monotonic()
    try:
        run_pipeline(cfg, entry.path, out_dir, run_name=name, config_path=config_path)
    except EdgeproofError as err:
        return _record_failure(
            snapshots, name, str(entry.path), err, time.monotonic() - started, cfg, emit, stamp
        )
    except Exception as err:  # noqa: BLE001 - one bad snapshot must not stop the others
        wrapped = EdgeproofError(f"{type(err).__name__}: {_one_line(str(err))}")
        return _record_failure(
            snapshots, name, str(entry.path), wrapped, time.monotonic() - started, cfg, emit, stamp
        )
    seconds = time.monotonic() - started
    attempts = int(snapshots.get(name, {}).get("attempts", 0)) + 1
    snapshots[name] = {
        "status": "ok",
        "attempts": attempts,
        "exit_code": EXIT_OK,
        "message": "",
        "source": str(entry.path),
        "stamp": stamp,
        "seconds": round(seconds, 3),
        "finished": _now_iso(),
        "pruned": False,
    }
    emit(name, "ok", seconds, out=str(out_dir))
    return SnapshotOutcome(name, str(entry.path), "ok", EXIT_OK, seconds, attempts)


def _changes_since_previous(cfg: Config, root: Path, name: str, emit: Callable[..., None]) -> None:
    """Compare the new run with the successful run before it and show the result in its report.

    Writes the comparison folder ``compare-<previous>-<name>`` under the root, the summary
    (`Comparison.summary` plus links to the comparison and history pages) as ``changes.json`` in
    the run folder, the history pages under the root, and re-renders the run's report.html with
    "what changed since the previous night". A failure here is logged and never fails the night's run.
    """
    from .compare import compare_main_quiet

    earlier = [n for n in successful_runs(root) if n < name]
    if not earlier:
        return
    previous = earlier[-1]
    try:
        changes = compare_main_quiet(root / previous, root / name, cfg, root / f"compare-{previous}-{name}")
        changes["diff_href"] = f"../compare-{previous}-{name}/diff.html"
        changes["history_href"] = "../history.html"
        report_changes(root / name, changes)
    except Exception as err:  # noqa: BLE001 - the night's run has succeeded already
        emit(name, "changes-not-computed", 0.0, f"{type(err).__name__}: {_one_line(str(err))}")


def report_changes(run_dir: Path, changes: dict[str, Any]) -> None:
    """Show "what changed since the previous night" in a run's report.

    Writes ``changes.json`` (keys ``previous_run``, ``added``, ``removed``, ``unconfirmed``,
    ``mechanism_changes``, ``diff_href``, ``history_href``) into the run folder, the history pages
    (``history.html``, ``history.csv``) into the nightly root above it (they read every night's
    ``changes.json``, this one's included), and re-renders the run's report.html with the changes
    near its top.
    """
    from .history import at_root, write_pages
    from .stages.report import render_report_html

    _write_text_atomic(run_dir / "changes.json", json.dumps(changes, indent=2, allow_nan=False) + "\n")
    write_pages(at_root(run_dir.parent), run_dir.parent)
    render_report_html(run_dir, changes)


def _record_failure(
    snapshots: dict[str, Any],
    name: str,
    source: str,
    err: EdgeproofError,
    seconds: float,
    cfg: Config,
    emit: Callable[..., None],
    stamp: Optional[list[int]],
) -> SnapshotOutcome:
    """Count a failed attempt; the last allowed attempt turns into `gave_up`."""
    record = snapshots.get(name, {})
    attempts = int(record.get("attempts", 0)) + 1
    code = int(getattr(err, "exit_code", EXIT_FAILURE))
    message = _one_line(str(err))
    snapshots[name] = {
        "status": "failed",
        "attempts": attempts,
        "exit_code": code,
        "message": message,
        "source": source,
        "stamp": stamp,
        "seconds": round(seconds, 3),
        "finished": _now_iso(),
    }
    limit = cfg.nightly.max_attempts
    status = "gave_up" if attempts >= limit else "failed"
    emit(name, "gave_up" if status == "gave_up" else "failed", seconds, message, exit_code=code,
         attempt=f"{attempts}/{limit}")
    return SnapshotOutcome(name, source, status, code, seconds, attempts, message)


def _already_done(root: Path, name: str, record: dict[str, Any]) -> bool:
    """A successful run exists, or did until retention deleted it."""
    if _manifest_ok(root / name):
        return True
    return record.get("status") == "ok" and bool(record.get("pruned"))


# ----------------------------------------------------------------------------- inbox


def _inbox(cfg: Config) -> Path:
    """The inbox folder, relative to the current directory."""
    if not cfg.nightly.inbox:
        raise ConfigError(
            "`nightly.inbox` is not set; set it to the folder the snapshots arrive in "
            "(e.g. `--set nightly.inbox=data/inbox`)."
        )
    inbox = Path(cfg.nightly.inbox)
    if not inbox.is_dir():
        raise ConfigError(
            f"Inbox `{cfg.nightly.inbox}` (nightly.inbox) is not a folder; create it or fix "
            f"`nightly.inbox`."
        )
    return inbox


def _check_roots(inbox: Path, root: Path) -> None:
    """Refuse an inbox and an output root that overlap: each would take the other's files for its own."""
    a, b = inbox.resolve(), root.resolve()
    if a == b or b in a.parents or a in b.parents:
        how = "is" if a == b else ("lies inside" if b in a.parents else "holds")
        raise ConfigError(
            f"The inbox `{inbox}` (nightly.inbox) {how} the output root `{root}` (output.root); "
            "give them separate folders, e.g. `data/inbox` and `outputs/site`."
        )


def _entries(inbox: Path) -> list[_Entry]:
    """Candidate snapshots in name order, without hidden and in-progress names."""
    out = []
    for entry in sorted(os.scandir(inbox), key=lambda e: e.name):
        n = entry.name
        if n.startswith((".", "_")) or n.endswith(_IN_PROGRESS_SUFFIXES):
            continue
        try:
            is_dir = entry.is_dir()  # follows symlinks; checked against the inbox later
        except OSError:
            is_dir = False
        out.append(_Entry(n, Path(entry.path), is_dir))
    return out


def _check_inside(inbox: Path, entry: _Entry) -> None:
    """Refuse a symlink (or a folder holding one) whose target lies outside the inbox."""
    base = inbox.resolve()
    paths = [entry.path]
    if entry.is_dir:
        for dirpath, dirnames, filenames in os.walk(entry.path):
            paths.extend(Path(dirpath) / n for n in dirnames + filenames)
    for p in paths:
        if p.is_symlink() or p == entry.path:
            target = p.resolve()
            if target != base and base not in target.parents:
                raise DataError(
                    f"Snapshot `{entry.entry_name}` is or holds a link to `{target}` outside the "
                    f"inbox `{inbox}`; copy the data into the inbox instead."
                )


def _stamp(entry: _Entry) -> list[int]:
    """Size and newest modification time (ns) of a snapshot: a new delivery changes them."""
    if not entry.is_dir:
        try:
            st = entry.path.stat()
        except OSError:
            return [0, 0, 0]
        return [1, st.st_size, st.st_mtime_ns]
    count = size = newest = 0
    for dirpath, _dirs, files in os.walk(entry.path):
        for n in files:
            try:
                st = (Path(dirpath) / n).stat()
            except OSError:
                continue
            count, size, newest = count + 1, size + st.st_size, max(newest, st.st_mtime_ns)
    try:
        newest = max(newest, entry.path.stat().st_mtime_ns)
    except OSError:
        pass
    return [count, size, newest]


def _not_ready(entry: _Entry, cfg: Config, now: float) -> str:
    """Why the snapshot is still being written ('' when it is ready)."""
    marker = cfg.nightly.ready_marker
    if entry.is_dir and marker:
        if (entry.path / marker).exists():
            return ""
        return f"partition folder has no `{marker}` marker yet (nightly.ready_marker)"
    age = _settle_age(entry, now)
    if age < cfg.nightly.settle_seconds:
        return (
            f"modified {max(age, 0.0):.0f} s ago, less than nightly.settle_seconds = "
            f"{cfg.nightly.settle_seconds:g}"
        )
    return ""


def _settle_age(entry: _Entry, now: float) -> float:
    """Seconds since the snapshot last changed, by this machine's clock.

    A modification time in the future (set by another machine's clock, or by hand) says nothing
    about when the file was written here, so that file's status-change time is used instead: the
    local clock's moment of the last write or copy. Were that in the future too, the file counts
    as settled (age infinite) rather than waiting for ever.
    """
    paths = [entry.path]
    if entry.is_dir:
        paths += [Path(d) / n for d, _dirs, files in os.walk(entry.path) for n in files]
    newest = float("-inf")
    for p in paths:
        try:
            st = p.stat()
        except OSError:
            continue
        changed = st.st_mtime if st.st_mtime <= now + 1.0 else st.st_ctime
        if changed > now + 1.0:
            return float("inf")
        newest = max(newest, changed)
    return now - newest


# ----------------------------------------------------------------------------- output root


def _output_root(cfg: Config, config_path: Optional[Path]) -> Path:
    """`output.root`, or ``outputs/<config name>``, through the lead's `runs.output_root`."""
    from .runs import output_root

    return Path(output_root(cfg, config_path))


def _manifest_ok(folder: Path) -> bool:
    """The folder is a finished run (manifest with ``status: ok``)."""
    try:
        data = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and data.get("status") == "ok"


def _checked_pointer(root: Path, name: Optional[str]) -> Optional[str]:
    """A pointer target that names a plain folder directly under `root`, else None."""
    if not name or "/" in name or "\\" in name or name in (".", "..") or os.path.isabs(name):
        return None
    return name if (root / name).is_dir() else None


def _repair_pointers(root: Path, emit: Callable[..., None]) -> None:
    """Point ``latest``/``previous`` again at runs that exist when one of them names a missing run."""
    dangling = []
    for which in sorted(RESERVED_NAMES):
        named = _raw_pointer(root, which)
        if named and read_pointer(root, which) != named:
            dangling.append(f"`{which}` named `{named}`, which no longer exists")
        elif named and which == "latest" and named not in successful_runs(root):
            dangling.append(f"`{which}` named `{named}`, which is not a successful nightly run")
    if not dangling:
        return
    _update_pointers(root)
    now = read_pointer(root, "latest")
    emit("pointers", "repaired", 0.0, f"{'; '.join(dangling)}; `latest` is now `{now or '-'}`", kind="note")


def _raw_pointer(root: Path, which: str) -> Optional[str]:
    """The name a pointer holds (``latest.json`` first, then the symlink), whether or not it exists."""
    try:
        data = json.loads((root / "latest.json").read_text(encoding="utf-8"))
        name = data.get("name" if which == "latest" else "previous")
        if isinstance(name, str) and name:
            return name
    except (OSError, ValueError, AttributeError):
        pass
    link = root / which
    return os.readlink(link) if link.is_symlink() else None


def _update_pointers(root: Path) -> None:
    """Point ``latest``/``previous`` (symlinks and ``latest.json``) at the last two successful runs."""
    runs = successful_runs(root)
    if not runs:  # nothing to point at: no pointer at all rather than one at a missing run
        for stale in (root / "latest", root / "previous", root / "latest.json"):
            if stale.is_symlink() or stale.is_file():
                stale.unlink()
        return
    latest = runs[-1]
    previous = runs[-2] if len(runs) > 1 else None
    _write_text_atomic(
        root / "latest.json",
        json.dumps({"name": latest, "previous": previous, "updated": _now_iso()}, indent=2) + "\n",
    )
    for link, target in (("latest", latest), ("previous", previous)):
        path = root / link
        if target is None:
            if path.is_symlink():
                path.unlink()
            continue
        tmp = root / f".{link}.{os.getpid()}.tmp"
        if tmp.is_symlink() or tmp.exists():
            tmp.unlink()
        os.symlink(target, tmp, target_is_directory=True)
        os.replace(tmp, path)


def _prune(root: Path, keep: int, snapshots: dict[str, Any]) -> list[str]:
    """Delete the oldest successful runs beyond `keep`; never the newest one or the current latest."""
    runs = successful_runs(root)
    protected = {runs[-1]} if runs else set()
    current = read_pointer(root, "latest")
    if current:
        protected.add(current)
    excess = len(runs) - keep
    deleted = []
    for name in runs:
        if excess <= 0:
            break
        if name in protected:
            continue
        folder = root / name
        trash = root / f".{name}.deleting-{os.getpid()}"
        os.replace(folder, trash)  # the run vanishes at once; the slow delete follows
        shutil.rmtree(trash, ignore_errors=True)
        record = snapshots.setdefault(name, {"status": "ok", "attempts": 1})
        record["pruned"] = True
        deleted.append(name)
        excess -= 1
    return deleted


# ----------------------------------------------------------------------------- state, lock, log


def _read_state(root: Path) -> dict[str, Any]:
    """The state file, or an empty state (a damaged file is set aside, not trusted)."""
    path = root / STATE_FILE
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return {"version": 1, "snapshots": {}}
    except (OSError, ValueError):
        os.replace(path, path.with_name(f"{STATE_FILE}.damaged-{int(time.time())}"))
        return {"version": 1, "snapshots": {}}
    if not isinstance(data, dict) or not isinstance(data.get("snapshots"), dict):
        return {"version": 1, "snapshots": {}}
    return data


def _write_state(root: Path, state: dict[str, Any]) -> None:
    """Replace the state file atomically."""
    _write_text_atomic(root / STATE_FILE, json.dumps(state, indent=2, sort_keys=True) + "\n")


def _write_text_atomic(path: Path, text: str) -> None:
    """Write `text` through a temporary sibling and an atomic rename (`runs.atomic_write_text`)."""
    from .runs import atomic_write_text

    atomic_write_text(path, text)


@contextmanager
def _lock(root: Path, wait_seconds: float) -> Iterator[None]:
    """Hold ``<root>/.lock`` for the whole start, or raise `LockHeldError` after `wait_seconds`."""
    from .runs import run_lock

    try:
        with run_lock(root, wait_seconds):
            yield
    except LockHeldError as err:
        raise LockHeldError(
            f"Another nightly start holds the lock `{root / LOCK_FILE}`; let it finish, or raise "
            f"nightly.lock_wait_seconds (now {wait_seconds:g}) to wait for it."
        ) from err


def _logger(log: LogFn, root: Path) -> Callable[..., None]:
    """One line per snapshot: to `log` and appended, time-stamped, to ``nightly.log``.

    `log` may be a `progress.Reporter` (gets a ``snapshot`` event with the fields), a
    `logging.Logger` (gets an info line), any callable taking a line, or None (standard error).
    """

    def emit(name: str, result: str, seconds: float = 0.0, message: str = "", *, kind: str = "snapshot",
             **extra: Any) -> None:
        fields = {"name": name, "result": result, "seconds": round(seconds, 1), **extra}
        if message:
            fields["message"] = message
        line = " ".join(
            f"{k}={v}" if k != "message" else f"message={json.dumps(v)}" for k, v in fields.items()
        )
        if log is None:
            print(f"edgeproof: {kind} {line}", file=sys.stderr, flush=True)
        elif hasattr(log, "event"):
            log.event(kind, **fields)
        elif isinstance(log, logging.Logger):
            log.info("%s %s", kind, line)
        else:
            log(f"{kind} {line}")
        with open(root / LOG_FILE, "a", encoding="utf-8") as fh:
            fh.write(f"{_now_iso()} {kind} {line}\n")

    return emit


def _now_iso() -> str:
    """Current time, UTC, ISO 8601 to the second."""
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()


def _one_line(text: str) -> str:
    """First line of a message, trimmed."""
    return (text.strip().splitlines() or [""])[0][:500]
