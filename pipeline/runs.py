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
    "atomic_write_arrow",
    "atomic_write_with",
    "atomic_write_bytes",
    "atomic_write_text",
    "atomic_write_json",
    "atomic_write_parquet",
    "json_text",
    "RunFolder",
    "fingerprint_paths",
    "stable_hash",
    "output_root",
    "run_lock",
    "safe_name",
    "StageCache",
    "CacheDamaged",
    "CACHE_FOLDER",
    "checksum",
    "file_checksum",
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
    return atomic_write_with(path, lambda fh: fh.write(data))


def atomic_write_with(path: str | os.PathLike[str], write: Any) -> Path:
    """Call ``write(file)`` on a temporary file beside `path`, then fsync and rename it into place
    (for files written piece by piece, e.g. a Parquet file batch by batch)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, 0o666 & ~_UMASK)  # the permissions an ordinary open() would give
        with os.fdopen(fd, "wb") as fh:
            write(fh)
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


_INDENT_UP_TO = 64 * 1024  # JSON longer than this (compact) is written compact: indenting runs in pure Python


def json_text(data: Any, *, for_reading: bool = True) -> str:
    """Sorted-key JSON (no NaN) with a final newline: indented for reading, or compact when it is
    long (indenting takes json's pure-Python encoder, seconds for a large search state) or when
    only the program reads it (`for_reading` False: a search checkpoint). The same data always gives
    the same text."""
    compact = json.dumps(data, sort_keys=True, default=str, allow_nan=False, separators=(",", ":"))
    if len(compact) > _INDENT_UP_TO or not for_reading:
        return compact + "\n"
    return json.dumps(data, indent=2, sort_keys=True, default=str, allow_nan=False) + "\n"


def atomic_write_json(path: str | os.PathLike[str], data: Any, *, for_reading: bool = True) -> Path:
    """Write JSON (sorted keys, no NaN; see `json_text`) atomically."""
    return atomic_write_text(path, json_text(data, for_reading=for_reading))


def atomic_write_parquet(path: str | os.PathLike[str], frame: pd.DataFrame) -> Path:
    """Write a DataFrame as Parquet atomically (no index, no pandas metadata timestamps)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(frame, preserve_index=False)
    buf = io.BytesIO()
    pq.write_table(table, buf, compression="zstd")
    return atomic_write_bytes(path, buf.getvalue())


def atomic_write_arrow(path: str | os.PathLike[str], batches: Any, schema: Any) -> Path:
    """Write Arrow record batches (an iterable, consumed once) as one Parquet file atomically (zstd, as
    `atomic_write_parquet`), batch by batch: only one batch is in memory at a time."""
    import pyarrow.parquet as pq

    def write(fh: Any) -> None:
        with pq.ParquetWriter(fh, schema, compression="zstd") as writer:
            for batch in batches:
                writer.write_batch(batch)

    return atomic_write_with(path, write)


def stable_hash(obj: Any) -> str:
    """A short hash of plain data, independent of dict order."""
    text = json.dumps(obj, sort_keys=True, default=str, separators=(",", ":"))
    return hashlib.blake2b(text.encode("utf-8"), digest_size=12).hexdigest()


def fingerprint_paths(paths: list[Path], root: Path | None = None) -> str:
    """Content hash of input files: each file's path relative to `root` (so partition folder names
    such as ``region=eu/`` count), then its bytes (SHA-256, as `checksum`)."""
    h = hashlib.sha256()
    for p in sorted(paths):
        try:
            label = p.relative_to(root).as_posix() if root is not None else p.name
        except ValueError:
            label = p.name
        h.update(label.encode("utf-8") + b"\0")
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


CACHE_FOLDER = ".edgeproof-cache"
_CACHE_MARKER = "EDGEPROOF-STAGE-CACHE"
_ENTRY_FILE = "entry.json"
_ENTRY_KIND = "edgeproof stage cache entry"
_WORK_SUFFIX = ".work"


class CacheDamaged(Exception):
    """A cache entry that is missing files or whose bytes do not match the checksums written with it."""


def checksum(data: bytes) -> str:
    """The checksum a cache entry keeps for each of its files: SHA-256, named in the value (it runs on the
    processor's SHA instructions, about twice as fast as BLAKE2b here on a stage's hundreds of megabytes)."""
    return "sha256:" + hashlib.sha256(data).hexdigest()


def checksum_matches(data: bytes, recorded: str) -> bool:
    """Whether `data` has the `recorded` checksum (entries written before the algorithm was named: BLAKE2b)."""
    if recorded.startswith("sha256:"):
        return checksum(data) == recorded
    return hashlib.blake2b(data, digest_size=16).hexdigest() == recorded


def file_checksum(path: str | os.PathLike[str], recorded: str = "sha256:") -> str:
    """`checksum` of a file's bytes, read in blocks (a file of a million tests is never one bytes object
    in memory); with the algorithm of `recorded` (see `checksum_matches`)."""
    sha = recorded.startswith("sha256:")
    digest = hashlib.sha256() if sha else hashlib.blake2b(digest_size=16)
    with open(path, "rb") as fh:  # blocks by hand: hashlib.file_digest is Python 3.11+, the project runs on 3.10
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return ("sha256:" if sha else "") + digest.hexdigest()


class StageCache:
    """Artifacts of a stage keyed by its inputs, its slice of the configuration and the version.

    The cache is one folder, ``<parent>/.edgeproof-cache/``, carrying a marker file, so it can never
    be mistaken for a user's folder. A finished entry is ``<stage>-<key>/`` holding its files and
    ``entry.json`` (what it is, and the size and checksum of every file). An entry is written in the
    work folder ``<stage>-<key>.work/`` under the entry's lock and renamed into place in one step, so
    readers only ever see complete entries and two runs sharing the cache never touch each other's
    unfinished work; an interrupted attempt leaves the work folder for the next attempt (a stage that
    resumes keeps its parts there). Pruning removes only folders holding an entry file this class
    wrote, never anything matched by name alone.
    """

    def __init__(self, root: str | os.PathLike[str]) -> None:
        self.root = Path(root)

    @classmethod
    def beside(cls, folder: str | os.PathLike[str]) -> "StageCache":
        """The cache shared by every run folder written under `folder`."""
        return cls(Path(folder) / CACHE_FOLDER)

    def open(self) -> "StageCache":
        """Create the cache folder (with its marker), or check that an existing one is edgeproof's.

        The folder is made complete under a temporary name and renamed into place, so a run starting
        at the same moment never sees a cache folder without its marker.
        """
        marker = self.root / _CACHE_MARKER
        note = "The stage cache of edgeproof runs written beside this folder. Safe to delete as a whole; runs recompute what is missing.\n"
        if not marker.is_file() and not self.root.exists():
            self.root.parent.mkdir(parents=True, exist_ok=True)
            tmp = Path(tempfile.mkdtemp(prefix=f"{self.root.name}.", suffix=".tmp", dir=self.root.parent))
            os.chmod(tmp, 0o777 & ~_UMASK)  # as an ordinary mkdir would make it
            atomic_write_text(tmp / _CACHE_MARKER, note)
            try:
                os.rename(tmp, self.root)
            except OSError:  # another run made it first
                shutil.rmtree(tmp, ignore_errors=True)
        if not marker.is_file():
            if not self.root.is_dir() or any(self.root.iterdir()):
                raise ConfigError(
                    f"`{self.root}` exists but is not an edgeproof stage cache (no {_CACHE_MARKER} file); "
                    "move it away or write the run elsewhere."
                )
            atomic_write_text(marker, note)  # an empty folder of that name
        return self

    def entry(self, stage: str, key: str) -> Path:
        """Where a finished entry lives."""
        return self.root / f"{stage}-{key}"

    def lookup(self, stage: str, key: str) -> dict[str, Any] | None:
        """The entry file of a finished entry, or None; raises `CacheDamaged` for a damaged one.

        Cheap: it checks that every listed file is there with its size; `read` checks the bytes.
        """
        folder = self.entry(stage, key)
        if not folder.is_dir():
            return None
        try:
            doc = json.loads((folder / _ENTRY_FILE).read_text(encoding="utf-8"))
        except (OSError, ValueError) as err:
            raise CacheDamaged(f"{_ENTRY_FILE} unreadable ({type(err).__name__})") from err
        if not isinstance(doc, dict) or doc.get("kind") != _ENTRY_KIND or doc.get("stage") != stage or doc.get("key") != key:
            raise CacheDamaged(f"{_ENTRY_FILE} does not describe this entry")
        for name, info in doc["files"].items():
            try:
                size = (folder / name).stat().st_size
            except OSError as err:
                raise CacheDamaged(f"{name} is missing") from err
            if size != info["size"]:
                raise CacheDamaged(f"{name} has {size} bytes, {info['size']} were written")
        with contextlib.suppress(OSError):  # pruning keeps the most recently used
            os.utime(folder / _ENTRY_FILE)
        return doc

    def _listing(self, stage: str, key: str, name: str) -> tuple[Path, dict[str, Any]]:
        """The path of one file of a finished entry and what its entry file lists for it."""
        folder = self.entry(stage, key)
        try:
            doc = json.loads((folder / _ENTRY_FILE).read_text(encoding="utf-8"))
        except (OSError, ValueError) as err:
            raise CacheDamaged(f"{name} unreadable ({type(err).__name__})") from err
        info = doc.get("files", {}).get(name) if isinstance(doc, dict) else None
        if not isinstance(info, dict):
            raise CacheDamaged(f"{name} is not listed in {_ENTRY_FILE}")
        return folder / name, info

    def read(self, stage: str, key: str, name: str) -> bytes:
        """The bytes of one file of a finished entry, checked against its checksum."""
        path, info = self._listing(stage, key, name)
        try:
            data = path.read_bytes()
        except OSError as err:
            raise CacheDamaged(f"{name} unreadable ({type(err).__name__})") from err
        if len(data) != info["size"] or not checksum_matches(data, str(info["checksum"])):
            raise CacheDamaged(f"{name} does not match its checksum")
        return data

    def check(self, stage: str, key: str, name: str) -> Path:
        """The path of one file of a finished entry, its bytes checked against its checksum as `read`
        checks them, read in blocks."""
        path, info = self._listing(stage, key, name)
        try:
            size = path.stat().st_size
            digest = file_checksum(path, str(info["checksum"]))
        except OSError as err:
            raise CacheDamaged(f"{name} unreadable ({type(err).__name__})") from err
        if size != info["size"] or digest != info["checksum"]:
            raise CacheDamaged(f"{name} does not match its checksum")
        return path

    @contextlib.contextmanager
    def writing(self, stage: str, key: str, *, resume: bool = False) -> Iterator[Path | None]:
        """Hold the entry's lock and give its work folder, or None when another run finished the entry
        while this one waited for the lock. Without `resume` the work folder starts empty. The context
        may be left on another thread than the one that entered it (the runner's entry writer)."""
        from filelock import FileLock

        locks = self.root / ".locks"
        locks.mkdir(parents=True, exist_ok=True)
        # not tied to this thread: the runner's writer thread releases it once it has committed the entry
        with FileLock(str(locks / f"{stage}-{key}.lock"), thread_local=False):
            try:
                finished = self.lookup(stage, key) is not None
            except CacheDamaged:
                finished = False  # the caller replaces it
            if finished:
                yield None
                return
            work = self.root / f"{stage}-{key}{_WORK_SUFFIX}"
            if work.exists() and not resume:
                shutil.rmtree(work)
            work.mkdir(parents=True, exist_ok=True)
            yield work

    def commit(self, stage: str, key: str, work: Path, files: dict[str, dict[str, Any]]) -> Path:
        """Write the entry file (sizes and checksums of `files`) and rename the work folder into place.

        Call inside `writing`; files in the work folder that are not listed are removed first.
        """
        listed = set(files)
        for p in work.iterdir():
            if p.name not in listed:
                shutil.rmtree(p) if p.is_dir() else p.unlink()
        atomic_write_json(work / _ENTRY_FILE, {"kind": _ENTRY_KIND, "stage": stage, "key": key, "files": files})
        final = self.entry(stage, key)
        if final.exists():
            self._remove(final)  # a damaged entry (the lock is held: nobody else replaces it)
        os.replace(work, final)
        _fsync_dir(self.root)
        return final

    def discard(self, stage: str, key: str) -> None:
        """Remove a damaged entry (under its lock, so a run writing it is not disturbed)."""
        from filelock import FileLock

        locks = self.root / ".locks"
        locks.mkdir(parents=True, exist_ok=True)
        with FileLock(str(locks / f"{stage}-{key}.lock")):
            final = self.entry(stage, key)
            if final.exists():
                self._remove(final)

    def _remove(self, folder: Path) -> None:
        """Move a folder out of the way in one step, then delete it (readers never see half of it)."""
        trash = self.root / f".trash-{folder.name}-{os.getpid()}-{time.monotonic_ns()}"
        os.replace(folder, trash)
        shutil.rmtree(trash, ignore_errors=True)

    def _entries(self) -> Iterator[tuple[str, float, Path]]:
        """(stage, last use, folder) of every finished entry this cache wrote."""
        for f in self.root.iterdir():
            doc_path = f / _ENTRY_FILE
            if not f.is_dir() or f.name.startswith(".") or not doc_path.is_file():
                continue
            try:
                doc = json.loads(doc_path.read_text(encoding="utf-8"))
                stamp = doc_path.stat().st_mtime
            except (OSError, ValueError):
                continue
            if isinstance(doc, dict) and doc.get("kind") == _ENTRY_KIND and f.name == f"{doc.get('stage')}-{doc.get('key')}":
                yield str(doc["stage"]), stamp, f

    def _prune_work(self, age: float = 86400.0) -> int:
        """Remove work folders left by attempts that died over `age` seconds ago (their lock is free)."""
        from filelock import FileLock, Timeout

        removed = 0
        for f in self.root.glob(f"*{_WORK_SUFFIX}"):
            name = f.name[: -len(_WORK_SUFFIX)]
            lock_path = self.root / ".locks" / f"{name}.lock"
            try:
                if not lock_path.is_file() or f.stat().st_mtime > time.time() - age:
                    continue
                with FileLock(str(lock_path), timeout=0):
                    shutil.rmtree(f)
                    removed += 1
            except (OSError, Timeout):
                continue
        return removed

    def prune(self, keep: int, protect: set[str] | frozenset[str] = frozenset()) -> int:
        """Delete all but the `keep` most recently used entries of each stage; returns how many went.

        Only entries this cache wrote count (their entry file says so); entries named in `protect`
        (``<stage>-<key>``) are kept, and so is every work folder (a run may be writing it).
        """
        if not (self.root / _CACHE_MARKER).is_file():
            return 0
        by_stage: dict[str, list[tuple[float, Path]]] = {}
        for stage, stamp, f in self._entries():
            if f.name not in protect:
                by_stage.setdefault(stage, []).append((stamp, f))
        removed = self._prune_work()
        for entries in by_stage.values():
            entries.sort(reverse=True)
            for _, f in entries[keep:]:
                with contextlib.suppress(OSError):
                    self._remove(f)
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


class RunFolder:
    """One run folder read back (by `load_run`, `compare` and `history`): its JSON files and its
    Parquet tables, with one wording for a table that cannot be read."""

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path)

    @property
    def name(self) -> str:
        """The folder's own name (a `latest` link resolved)."""
        return self.path.resolve().name

    def has(self, name: str) -> bool:
        return (self.path / name).is_file()

    def json(self, name: str, default: Any = "{}") -> Any:
        """The content of a JSON file of the run, or `default` (an empty dict unless given) when it
        is missing or unreadable."""
        try:
            return json.loads((self.path / name).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return {} if default == "{}" else default

    def table(self, name: str, columns: list[str] | None = None) -> pd.DataFrame:
        """A Parquet table of the run; `DataError` naming the file when it cannot be read."""
        from .errors import DataError

        path = self.path / name
        try:
            return pd.read_parquet(path, columns=columns)
        except Exception as err:  # noqa: BLE001 - pyarrow raises several types
            raise DataError(f"`{path}` cannot be read ({type(err).__name__}); re-run that snapshot.") from err


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
