"""Run folders: atomic writes, the stage cache, fingerprints, locks and name safety.

Every artifact is written to a temporary name in the same folder and renamed into place, so a crash
never leaves a half-written file under its final name. A run is assembled in a hidden sibling folder
``.<name>.partial`` and renamed into place only when every stage has finished.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
import os
import re
import shutil
import tempfile
import time
from pathlib import Path
from typing import Any, Iterator

import pandas as pd

from .errors import ConfigError, LockHeldError

__all__ = [
    "atomic_write_bytes",
    "atomic_write_text",
    "atomic_write_json",
    "atomic_write_parquet",
    "fingerprint_paths",
    "stable_hash",
    "output_root",
    "run_lock",
    "safe_name",
    "StageCache",
    "publish_run",
    "is_run_folder",
    "default_run_dir",
    "check_out_dir",
    "check_outside_nightly_root",
    "start_partial",
    "clean_stale_partials",
    "cap_parallel_jobs",
]

REPO_OUTPUTS = Path("outputs")
_UMASK = os.umask(0)
os.umask(_UMASK)


def _fsync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes) -> Path:
    """Write `data` to `path` through a temporary file and an atomic rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, 0o666 & ~_UMASK)  # the permissions an ordinary open() would give
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    _fsync_dir(path.parent)
    return path


def atomic_write_text(path: str | os.PathLike[str], text: str) -> Path:
    """Write UTF-8 text atomically."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_json(path: str | os.PathLike[str], data: Any) -> Path:
    """Write JSON (sorted keys, indented, no NaN) atomically."""
    return atomic_write_text(path, json.dumps(data, indent=2, sort_keys=True, default=str, allow_nan=False) + "\n")


def atomic_write_parquet(path: str | os.PathLike[str], frame: pd.DataFrame) -> Path:
    """Write a DataFrame as Parquet atomically (no index, no pandas metadata timestamps)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(frame, preserve_index=False)
    buf = io.BytesIO()
    pq.write_table(table, buf, compression="zstd")
    return atomic_write_bytes(path, buf.getvalue())


def stable_hash(obj: Any) -> str:
    """A short hash of plain data, independent of dict order."""
    text = json.dumps(obj, sort_keys=True, default=str, separators=(",", ":"))
    return hashlib.blake2b(text.encode("utf-8"), digest_size=12).hexdigest()


def fingerprint_paths(paths: list[Path]) -> str:
    """Content hash of input files (names relative to their common folder, then bytes)."""
    h = hashlib.blake2b(digest_size=16)
    for p in sorted(paths):
        h.update(p.name.encode("utf-8") + b"\0")
        with open(p, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 22), b""):
                h.update(block)
    return h.hexdigest()


_SAFE = re.compile(r"[^A-Za-z0-9._=+-]+")


def safe_name(raw: str) -> str:
    """A run or snapshot name that cannot escape its folder (no separators, no dot-dot, no leading dot)."""
    name = _SAFE.sub("_", os.path.basename(str(raw).replace("\\", "/").rstrip("/")))
    name = name.strip("._") or "run"
    if name in {".", ".."}:
        name = "run"
    return name[:120]


def output_root(cfg: Any, config_path: str | os.PathLike[str] | None = None) -> Path:
    """The folder that holds a configuration's runs: `output.root`, or ``outputs/<name>``."""
    if cfg.output.root:
        return Path(cfg.output.root)
    name = cfg.name or (Path(config_path).stem if config_path else "default")
    return REPO_OUTPUTS / safe_name(name)


@contextlib.contextmanager
def run_lock(folder: str | os.PathLike[str], wait_seconds: float = 0.0) -> Iterator[None]:
    """Hold the lock of an output folder, or raise `LockHeldError` after `wait_seconds`."""
    from filelock import FileLock, Timeout

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    lock = FileLock(str(folder / ".lock"))
    try:
        lock.acquire(timeout=wait_seconds if wait_seconds > 0 else 0)
    except Timeout as err:
        raise LockHeldError(
            f"Another edgeproof run holds the lock on `{folder}`; wait for it to finish "
            "(or raise `nightly.lock_wait_seconds`)."
        ) from err
    try:
        yield
    finally:
        lock.release()


class StageCache:
    """Artifacts of a stage keyed by its inputs, its slice of the configuration and the version.

    A cached stage is a folder ``<root>/<stage>-<key>/`` holding its files and a ``done`` marker
    written last; a folder without the marker is an interrupted attempt and is ignored.
    """

    def __init__(self, root: str | os.PathLike[str]) -> None:
        self.root = Path(root)

    def folder(self, stage: str, key: str) -> Path:
        """Where a stage's artifacts for this key live."""
        return self.root / f"{stage}-{key}"

    def hit(self, stage: str, key: str) -> Path | None:
        """The folder of a finished cached stage, or None."""
        f = self.folder(stage, key)
        return f if (f / "done").is_file() else None

    def begin(self, stage: str, key: str) -> Path:
        """A fresh folder to write a stage's artifacts into (an interrupted attempt is cleared)."""
        f = self.folder(stage, key)
        if f.exists() and not (f / "done").is_file():
            shutil.rmtree(f, ignore_errors=True)
        f.mkdir(parents=True, exist_ok=True)
        return f

    def finish(self, stage: str, key: str) -> None:
        """Mark a stage's artifacts complete."""
        atomic_write_text(self.folder(stage, key) / "done", key + "\n")

    def touch(self, stage: str, key: str) -> None:
        """Record that a cached stage was used (pruning keeps the most recently used)."""
        with contextlib.suppress(OSError):
            os.utime(self.folder(stage, key) / "done")

    def prune(self, keep: int, protect: set[str] | frozenset[str] = frozenset()) -> int:
        """Delete all but the `keep` most recently used entries of each stage; returns how many went.

        Entries named in `protect` (``<stage>-<key>``) and unfinished entries younger than a day
        (another run may be writing them) are kept.
        """
        if not self.root.is_dir():
            return 0
        by_stage: dict[str, list[tuple[float, Path]]] = {}
        for f in self.root.iterdir():
            if not f.is_dir() or "-" not in f.name or f.name in protect:
                continue
            done = f / "done"
            try:
                stamp = done.stat().st_mtime if done.is_file() else f.stat().st_mtime
            except OSError:
                continue
            if not done.is_file() and stamp > time.time() - 86400:
                continue
            by_stage.setdefault(f.name.rsplit("-", 1)[0], []).append((stamp, f))
        removed = 0
        for entries in by_stage.values():
            entries.sort(reverse=True)
            for _, f in entries[keep:]:
                shutil.rmtree(f, ignore_errors=True)
                removed += 1
        return removed


def publish_run(partial: Path, final: Path) -> None:
    """Move a finished run folder into place; an older folder of that name is replaced only then."""
    if final.is_symlink():
        raise ConfigError(f"`{final}` is a symbolic link; give a real folder as the run's --out.")
    (partial / PARTIAL_MARKER).unlink(missing_ok=True)  # the manifest marks it edgeproof's from here on
    if final.exists():
        old = final.with_name(f".{final.name}.old")
        shutil.rmtree(old, ignore_errors=True)
        os.replace(final, old)
        os.replace(partial, final)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(partial, final)
    _fsync_dir(final.parent)


# ----------------------------------------------------------------------------- output path safety
#
# What `run --out` may replace, where ad-hoc runs go, stale `.NAME.partial` folders, worker counts.

ADHOC_FOLDER = "adhoc"  # ad-hoc runs under an output root: never part of the nightly history
PARTIAL_MARKER = ".edgeproof-partial"  # written into every `.NAME.partial` folder edgeproof starts
NIGHTLY_MARKERS = ("nightly-state.json", "nightly.log")  # files only `edgeproof nightly` writes


def is_run_folder(folder: str | os.PathLike[str]) -> bool:
    """The folder holds a ``manifest.json`` written by edgeproof (it has an ``edgeproof_version``)."""
    try:
        data = json.loads((Path(folder) / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and "edgeproof_version" in data


def _inside(path: Path, folder: Path) -> bool:
    """`path` is `folder` or lies under it (both resolved)."""
    return path == folder or folder in path.parents


def default_run_dir(cfg: Any, config_path: str | os.PathLike[str] | None, source: Path) -> Path:
    """Where a run without ``--out`` goes: ``<output root>/adhoc/<input name>-<time>``.

    Ad-hoc runs live in their own subfolder, so the nightly history (its `latest` pointer and its
    retention) never sees them.
    """
    stem = safe_name(source.stem if source.is_file() else source.name)
    return output_root(cfg, config_path) / ADHOC_FOLDER / f"{stem}-{time.strftime('%Y%m%dT%H%M%S')}"


def check_out_dir(final: Path, source: Path, files: list[Path]) -> None:
    """Refuse a run folder that would replace or swallow something edgeproof did not make.

    Refused (`ConfigError`, exit code 2): the current folder or one holding it (``--out .``), a
    symbolic link, an existing file, an existing folder that is not an edgeproof run folder, the
    input itself, a folder inside the input folder (the next run would read this run's files as
    input), and a folder that holds the input. An earlier run folder may be replaced: the old one
    stays until the new one is complete (`publish_run`).
    """
    shown = str(final)
    if final.name in ("", ".", ".."):
        raise ConfigError(f"--out `{shown}` names no folder of its own; give a new folder name such as `runs/tonight`.")
    target = final.resolve()
    if _inside(Path.cwd().resolve(), target):
        raise ConfigError(f"--out `{shown}` is the current folder or holds it; give a new folder name such as `runs/tonight`.")
    if final.is_symlink():
        raise ConfigError(f"--out `{shown}` is a symbolic link; give a real folder as the run's --out.")
    if final.exists() and not final.is_dir():
        raise ConfigError(f"--out `{shown}` is an existing file; give a new folder name (nothing was changed).")
    inputs = [source.resolve()] if source.exists() else []
    inputs += [f.resolve() for f in files]
    for item in inputs:
        if _inside(item, target):
            raise ConfigError(f"--out `{shown}` is or holds the input `{item}`; write the run somewhere else.")
        if item.is_dir() and _inside(target, item):
            raise ConfigError(
                f"--out `{shown}` lies inside the input folder `{item}`; the next run would read this run's "
                "files as input: write the run outside the input folder."
            )
    if final.is_dir() and not is_run_folder(final):
        raise ConfigError(
            f"--out `{shown}` exists and is not an edgeproof run folder (no manifest.json written by edgeproof); "
            "give a new folder name, or move it away yourself (nothing was changed)."
        )


def check_outside_nightly_root(final: Path, cfg: Any, config_path: str | os.PathLike[str] | None) -> None:
    """Refuse an ad-hoc ``--out`` at or inside a nightly output root (outside its ``adhoc/`` folder).

    A nightly root is a folder holding ``nightly-state.json`` or ``nightly.log``, or the output root
    of a configuration with ``nightly.inbox`` set. Its runs, pointers and retention belong to
    `edgeproof nightly`, which holds its lock while it changes them.
    """
    target = final.resolve()
    roots = [p for p in [target, *target.parents] if any((p / m).exists() for m in NIGHTLY_MARKERS)]
    if getattr(cfg.nightly, "inbox", None):
        configured = output_root(cfg, config_path).resolve()
        if _inside(target, configured):
            roots.append(configured)
    for root in roots:
        if not _inside(target, root / ADHOC_FOLDER) or target == root / ADHOC_FOLDER:
            raise ConfigError(
                f"--out `{final}` is inside the nightly output root `{root}`, whose runs belong to "
                f"`edgeproof nightly`; leave out --out (ad-hoc runs go to `{root / ADHOC_FOLDER}`) or write elsewhere."
            )


def _own_partial(folder: Path) -> bool:
    """A `.NAME.partial` folder edgeproof started: it holds the marker, is still empty (killed right
    after creating it), is complete up to its manifest (killed while being published), or has the
    run's lock file ``.locks/NAME`` beside it (left by a version that wrote no marker)."""
    if folder.is_symlink() or not folder.is_dir():
        return False
    name = folder.name[1:-len(".partial")] if folder.name.endswith(".partial") else ""
    return (
        (folder / PARTIAL_MARKER).is_file()
        or not any(folder.iterdir())
        or is_run_folder(folder)
        or (bool(name) and (folder.parent / ".locks" / name / ".lock").is_file())
    )


def start_partial(partial: Path) -> None:
    """Create the `.NAME.partial` folder a run is assembled in, marked as edgeproof's own.

    An earlier attempt's folder (it holds the marker) is cleared; a folder of that name that
    edgeproof did not start is refused rather than deleted.
    """
    if partial.is_symlink() or (partial.exists() and not _own_partial(partial)):
        raise ConfigError(
            f"`{partial}` exists and was not started by edgeproof; move it away or choose another --out."
        )
    if partial.exists():
        shutil.rmtree(partial)
    partial.mkdir(parents=True)
    (partial / PARTIAL_MARKER).write_text(json.dumps({"pid": os.getpid(), "started": time.time()}) + "\n", encoding="utf-8")


def clean_stale_partials(parent: Path, keep: str) -> list[str]:
    """Delete the `.NAME.partial` folders failed or killed runs left in `parent`; returns their names.

    Only folders edgeproof started (see `_own_partial`; the run's lock ``.locks/NAME`` must exist
    too) whose lock nobody holds are removed; `keep` (the run starting now) is left alone.
    """
    removed: list[str] = []
    for entry in sorted(parent.glob(".*.partial")):
        name = entry.name[1:-len(".partial")]
        lock_dir = parent / ".locks" / name
        if name == keep or not (lock_dir / ".lock").is_file() or not _own_partial(entry):
            continue
        trash = parent / f".{name}.stale-{os.getpid()}"
        try:
            with run_lock(lock_dir, 0.0):  # held only for the rename: a run starting now is not kept waiting
                os.replace(entry, trash)
        except (LockHeldError, OSError):
            continue  # another run is assembling it now, or it went meanwhile
        shutil.rmtree(trash, ignore_errors=True)
        removed.append(entry.name)
    return removed


def cap_parallel_jobs(cfg: Any) -> tuple[Any, str | None]:
    """`cfg` with ``parallel.jobs`` capped at the cores this process may use, and a note when capped."""
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    jobs = cfg.parallel.jobs
    if cfg.parallel.backend != "local" or jobs <= cores:
        return cfg, None
    capped = cfg.model_copy(update={"parallel": cfg.parallel.model_copy(update={"jobs": cores})})
    return capped, f"`parallel.jobs` = {jobs} is more than the {cores} cores available; {cores} workers were used."
