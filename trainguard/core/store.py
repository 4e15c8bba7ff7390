"""`GoldenStore`: the one way to read, write, find, remove or upgrade golden folders.

A store is a folder of goldens (the golden dir, a results folder, bisect's frozen reference,
calibrate's scratch folder) together with what every access to it must respect: its root
(no symbolic link between the root and a golden, nothing outside it), the size limit of a
golden file, and whether it may be written at all. Layouts, encodings and checks of single
files are `golden_format`'s; writing sets of files atomically is `atomic`'s.

Guarantees (README, "Reliability and security"):

- a write holds the folder's exclusive lock and switches all files of the golden at once
  (commit record), so a reader sees the complete old or the complete new set;
- a read holds a shared lock, verifies every file and checks that all share one run id;
- nothing on the read path uses pickle or eval, and reads never write.
"""

from __future__ import annotations

import os
import time
import uuid
from pathlib import Path
from typing import Any, Callable, Iterable

from . import golden_format as fmt
from .atomic import (
    COMMIT_FILE,
    LOCK_FILE,
    READ_LOCK_TIMEOUT,
    TEMP_PREFIX,
    WRITE_LOCK_TIMEOUT,
    FileSet,
    check_confined,
    check_root,
    folder_lock,
    short_error,
    write_error,
)
from .errors import GoldenCorruptError, GoldenMissingError, UsageError
from .fixes import FixCommands, current
from .paths import golden_folder
from .records import MetricSeries, Run, TensorRecord, TraceEntry

#: Reads of a folder whose files come from different writes are retried this often.
_READ_ATTEMPTS = 8
#: Entries a golden folder may hold that belong to trainguard (prune removes exactly these).
GOLDEN_ENTRIES = (*fmt.KINDS, COMMIT_FILE, LOCK_FILE)


class GoldenStore:
    """A folder of goldens and the rules every access to it follows.

    Parameters
    ----------
    root : path
        The folder that holds the goldens; golden folders lie below it (`folder(nodeid)`).
    max_bytes : int
        Golden files larger than this are refused before loading (ini `trainguard_max_file_mib`).
    read_only : bool
        Refuse every write (results being adopted, a reference being compared with).
    commands : FixCommands, optional
        The commands error messages quote (the skins pass pytest's); words only otherwise.

    Examples
    --------
    >>> store = GoldenStore("golden")                                  # doctest: +SKIP
    >>> run = store.read(store.folder("tests/test_bakery.py::test_sgd"))  # doctest: +SKIP
    """

    def __init__(self, root: str | os.PathLike[str], max_bytes: int = fmt.DEFAULT_MAX_FILE_BYTES,
                 read_only: bool = False, commands: FixCommands | None = None) -> None:
        self.root = Path(root)
        self.max_bytes = max_bytes
        self.read_only = read_only
        self.commands: FixCommands = commands or current()

    def __repr__(self) -> str:
        return f"GoldenStore({str(self.root)!r}, max_bytes={self.max_bytes}, read_only={self.read_only})"

    # -- where ---------------------------------------------------------------------
    def folder(self, nodeid: str) -> Path:
        """The golden folder of a test (see `paths.golden_relpath`: injective, stable, confined)."""
        return golden_folder(self.root, nodeid)

    def exists(self, folder: str | os.PathLike[str]) -> bool:
        """Whether `folder` holds a golden (or the commit record of one being written)."""
        return exists(folder)

    def find(self) -> list[Path]:
        """Every golden folder below the root (folders holding a golden file), sorted; links not followed."""
        found = []
        for dirpath, dirnames, filenames in os.walk(self.root, followlinks=False):
            dirnames.sort()
            if fmt.METRICS_FILE in filenames or fmt.STATE_FILE in filenames or COMMIT_FILE in filenames:
                found.append(Path(dirpath))
        return sorted(found)

    # -- reading -------------------------------------------------------------------
    def read(self, folder: str | os.PathLike[str], accept_format_1: bool = False, light: bool = False) -> Run:
        """Read a golden folder as one consistent set. Never writes anything.

        Format-1 files (no digest) are refused unless `accept_format_1` (upgrade only).
        `light` reads what a bit-identical run needs and no more: no trace file, and (format 4
        on) the state's stored values left undecoded. A check reads light first and reads
        the whole golden only when something differs (`guard.check`).

        Raises
        ------
        GoldenMissingError
            No golden in `folder`.
        GoldenCorruptError, GoldenVersionError
            A file is damaged, edited, too large, of an unknown format, or the set is mixed;
            the message names the file.
        """
        folder = Path(folder)
        check_confined(folder, self.root)
        if not exists(folder):
            raise GoldenMissingError(folder, "no golden here")
        if not folder.is_dir():
            raise GoldenCorruptError(folder, "is not a folder")
        ids: list[Any] = []
        files_of = FileSet(folder, fmt.KINDS)
        try:
            lock = folder_lock(folder, exclusive=False, timeout=READ_LOCK_TIMEOUT)
            lock.__enter__()
        except OSError as exc:
            raise GoldenCorruptError(folder, f"cannot be opened ({short_error(exc)})") from None
        try:
            for attempt in range(_READ_ATTEMPTS):
                files = files_of.resolve()
                record = files_of.read_commit()
                _require_pair(folder, files)
                if light:
                    files.pop(fmt.TRACE_FILE, None)
                reads = {kind: self._read_file(path, kind, accept_format_1, light) for kind, path in files.items()}
                ids = [(kind, r.run_id) for kind, r in reads.items()]
                if record is not None and any(r != record["run_id"] for _, r in ids):
                    raise GoldenCorruptError(folder / COMMIT_FILE, "names files of another write than its own (run id "
                                             f"{record['run_id']}); trainguard never writes such a record",
                                             f"remove {folder / COMMIT_FILE} and any .tmp-* files beside it")
                if len({r for _, r in ids}) == 1:
                    return _run_from(files, reads)
                time.sleep(0.005 * (attempt + 1))  # a writer without a lock (Windows) may be mid-switch
        finally:
            lock.__exit__(None, None, None)
        described = ", ".join(f"{k}: {r or 'none (format 1)'}" for k, r in ids)
        raise GoldenCorruptError(folder, f"holds files from different writes (run ids {described}); the set is mixed",
                                 "restore the folder from version control, or re-bless the test")

    def has_trace(self, folder: str | os.PathLike[str]) -> bool:
        """Whether the golden in `folder` holds a trace file (not read: see `read(light=True)`)."""
        return fmt.TRACE_FILE in FileSet(Path(folder), fmt.KINDS).resolve()

    def read_file(self, path: str | os.PathLike[str], kind: str | None = None) -> tuple[Any, Any]:
        """One golden file on its own (for `trainguard show FILE`): its records and metadata.

        `kind` (default: the file's name) says how to read it: `metrics.parquet` gives metrics
        by name, `state.parquet` records by name, `trace.parquet` the trace entries.
        """
        path = Path(path)
        kind = kind or (path.name if path.name in fmt.KINDS else fmt.METRICS_FILE)
        got = self._read_file(path, kind)
        if kind == fmt.STATE_FILE:
            return fmt.tensors_from_table(path, got.table), got.meta
        if kind == fmt.TRACE_FILE:
            return fmt.trace_from_table(path, got.table), got.meta
        return got.metrics(path), got.meta

    def read_snapshot(self, folder: Path, blobs: dict[str, bytes]) -> Run:
        """A golden from file contents held in memory (a commit's, for `trainguard audit`), read with the
        same limits and checks as a file on disk; format 1 is accepted, since history is only reported."""
        files = {kind: folder / kind for kind in blobs}
        _require_pair(folder, blobs)
        reads = {kind: fmt.read_file(files[kind], kind, self.max_bytes, self.commands, data=data, accept_format_1=True)
                 for kind, data in blobs.items()}
        if len({r.run_id for r in reads.values()}) != 1:
            raise GoldenCorruptError(folder, "holds files from different writes; the set is mixed")
        return _run_from(files, reads)

    def _read_file(self, path: Path, kind: str, accept_format_1: bool = False, light: bool = False) -> fmt.FileRead:
        skip = ("values",) if light and kind == fmt.STATE_FILE else ()
        return fmt.read_file(path, kind, self.max_bytes, self.commands, accept_format_1=accept_format_1, skip=skip)

    def format_versions(self, folder: Path) -> set[int]:
        """The format versions of a golden's files (one value for a golden trainguard wrote)."""
        return {self._read_file(p, k, accept_format_1=True).version
                for k, p in FileSet(folder, fmt.KINDS).resolve().items()}

    # -- writing -------------------------------------------------------------------
    def _writable(self, folder: Path) -> None:
        self._refuse_if_read_only(folder)
        check_root(self.root, "goldens")
        check_confined(folder, self.root)

    def _refuse_if_read_only(self, path: Path) -> None:
        if self.read_only:
            raise UsageError(f"{path}: the golden store {self.root} is read-only here; nothing was written")

    def write(self, folder: str | os.PathLike[str], run: Run) -> None:
        """Write `run` as the golden in `folder`: all files or none, as one set.

        Holds the folder's exclusive lock throughout; completes an interrupted earlier write and
        removes leftover temp files first (only under the lock, so never another writer's).
        """
        folder = Path(folder)
        self._writable(folder)
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise write_error(exc, folder, "no golden was changed") from None
        check_confined(folder, self.root)
        for kind in fmt.KINDS:
            path = folder / kind
            if path.exists() and not path.is_symlink() and not path.is_file():
                raise GoldenCorruptError(path, "is not a regular file (a folder?) where trainguard keeps a golden file",
                                         "remove it, then bless again")
        meta_json = fmt.encode_meta(run.meta)
        run_id = uuid.uuid4().hex
        tables = {kind: fmt.seal(kind, table, meta_json, run_id) for kind, table in fmt.tables_of(run).items()}
        self._switch(folder, tables, run_id)

    def _switch(self, folder: Path, tables: dict[str, Any], run_id: str) -> None:
        files = FileSet(folder, fmt.KINDS)
        with folder_lock(folder, exclusive=True, timeout=WRITE_LOCK_TIMEOUT):
            files.recover()
            files.clean()
            try:
                files.write({kind: fmt.parquet_writer(kind, table) for kind, table in tables.items()}, run_id)
            except OSError as exc:  # disk full, file too large: the temp files are gone, the old set stands
                raise write_error(exc, folder, "the previous golden there is intact") from None

    def remove(self, folder: str | os.PathLike[str]) -> bool:
        """Delete one golden folder's files (links are unlinked, never followed), then the empty folders
        up to the root. A folder that also holds subfolders keeps them and everything but its golden files.
        False (and nothing removed) when a symbolic link lies on the way from the root."""
        folder = Path(folder)
        self._refuse_if_read_only(folder)
        if not _inside_without_links(folder, self.root):
            return False
        entries = list(os.scandir(folder))
        nested = any(e.is_dir(follow_symlinks=False) for e in entries)
        for entry in entries:
            if entry.is_dir(follow_symlinks=False):
                continue
            if nested and entry.name not in GOLDEN_ENTRIES and not entry.name.startswith(TEMP_PREFIX):
                continue
            os.unlink(entry.path)
        current = folder
        while current != self.root:
            try:
                current.rmdir()  # only when empty
            except OSError:
                break
            current = current.parent
        return True

    def import_files(self, files: Iterable[tuple[str, bytes]]) -> int:
        """Copy golden files in as they are (bisect's frozen reference): (path relative to the root, bytes).

        Only plain relative paths below the root are taken; nothing is followed or overwritten
        through a link. Returns how many files were written.
        """
        self._refuse_if_read_only(self.root)
        count = 0
        root = self.root.resolve()
        for rel, data in files:
            parts = Path(rel).parts
            if not parts or rel.startswith("/") or ".." in parts:
                continue
            target = root.joinpath(*parts)
            check_confined(target.parent, root)
            target.parent.mkdir(parents=True, exist_ok=True)
            check_confined(target.parent, root)
            if target.is_symlink():
                target.unlink()
            target.write_bytes(data)
            count += 1
        return count

    # -- upgrading -----------------------------------------------------------------
    def upgrade(self, held_format_2: Callable[[Path], bool] | None = None) -> list[tuple[Path, str]]:
        """Convert every golden below the root to the current format, in place.

        This is the one place format-1 goldens (no digest) are accepted, and it vouches for
        their content: the caller must say so to its user. A folder whose files mix formats,
        or whose format-1 file `held_format_2(path)` says was format 2 before (git history),
        is refused: that is a downgrade, the way to hide an edit from the digest check.
        Reads (and so validates) every golden first and writes nothing if any is unusable.
        Then each older folder is rewritten as one set under its lock, with the same data and
        the same `trainguard.meta` bytes, plus a run id, the writer version and the digest.
        Folders already at the current format are not touched, so a second run changes nothing.
        Returns (folder, "upgraded from format N" | "current") per golden folder.
        """
        if not self.root.is_dir():
            raise GoldenMissingError(self.root, "no such golden folder")
        folders = self.find()
        versions = {}
        for folder in folders:
            self.read(folder, accept_format_1=True)
            versions[folder] = self.format_versions(folder)
            if len(versions[folder]) > 1:
                raise GoldenCorruptError(folder, f"mixes golden formats {' and '.join(map(str, sorted(versions[folder])))}: "
                                         "a golden partly rewritten in an older format (format 1 has no digest) "
                                         "hides an edit; refusing to upgrade it",
                                         "restore the folder from version control, or re-bless the test")
            if held_format_2 is not None and 1 in versions[folder]:
                for kind, path in FileSet(folder, fmt.KINDS).resolve().items():
                    if held_format_2(path):
                        raise GoldenCorruptError(path, "is format 1 now but was format 2 in the last commit: a "
                                                 "downgrade hides edits from the digest check; refusing to upgrade it",
                                                 f"restore it: git checkout HEAD -- {path}")
        out = []
        for folder in folders:
            if versions[folder] == {fmt.FORMAT_VERSION}:
                out.append((folder, "current"))
                continue
            self._writable(folder)
            files = FileSet(folder, fmt.KINDS)
            with folder_lock(folder, exclusive=True, timeout=WRITE_LOCK_TIMEOUT):
                files.recover()
                files.clean()
                old = sorted(self.format_versions(folder))
                if old == [fmt.FORMAT_VERSION]:  # another process upgraded it meanwhile
                    out.append((folder, "current"))
                    continue
                run_id = uuid.uuid4().hex
                present = files.resolve()
                # A trace before format 3 grouped its events another way; it cannot be renumbered
                # without the run, so it is dropped (a re-bless records a new one).
                dropped = fmt.TRACE_FILE in present and min(old) < fmt.TRACE_FORMAT
                tables = {kind: self._upgraded(path, kind, run_id) for kind, path in present.items()
                          if not (dropped and kind == fmt.TRACE_FILE)}
                files.write({kind: fmt.parquet_writer(kind, table) for kind, table in tables.items()}, run_id)
            out.append((folder, f"upgraded from format {', '.join(map(str, old))}"
                        + (" (its trace was dropped: re-bless the test to record one)" if dropped else "")))
        return out

    def _upgraded(self, path: Path, kind: str, run_id: str) -> Any:
        import pyarrow as pa

        got = self._read_file(path, kind, accept_format_1=True)
        schema = fmt.schema_of(kind)
        raw_meta = fmt.pq_metadata(path)
        columns = [got.table.column(f.name) if f.name in got.table.column_names else pa.nulls(got.table.num_rows, f.type)
                   for f in schema]
        table = pa.Table.from_arrays(columns, schema=schema)
        return fmt.seal(kind, table, raw_meta.get(fmt.KEY_META, b"{}"), run_id)


def _require_pair(folder: Path, present: Iterable[str]) -> None:
    """Metrics and state are always written together: one without the other is a damaged golden."""
    for kind in (fmt.METRICS_FILE, fmt.STATE_FILE):
        if kind not in present:
            raise GoldenCorruptError(folder / kind, "is missing while its sibling golden file exists")


def _run_from(files: dict[str, Path], reads: dict[str, fmt.FileRead]) -> Run:
    metrics = reads[fmt.METRICS_FILE].metrics(files[fmt.METRICS_FILE])
    tensors = fmt.tensors_from_table(files[fmt.STATE_FILE], reads[fmt.STATE_FILE].table)
    trace = (fmt.trace_from_table(files[fmt.TRACE_FILE], reads[fmt.TRACE_FILE].table)
             if fmt.TRACE_FILE in reads and reads[fmt.TRACE_FILE].version >= fmt.TRACE_FORMAT else None)
    return Run(metrics=metrics, tensors=tensors, meta=reads[fmt.METRICS_FILE].meta, trace=trace)


def _inside_without_links(folder: Path, root: Path) -> bool:
    """`folder` lies below `root`, and neither it nor any folder between them is a symbolic link."""
    try:
        rel = folder.relative_to(root)
    except ValueError:
        return False
    if not rel.parts or ".." in rel.parts:
        return False
    current = root
    for part in rel.parts:
        current = current / part
        if current.is_symlink() or not current.is_dir():
            return False
    return True


# -- one-call forms (the public API's read_run / write_run) ------------------------------------


def exists(folder: str | os.PathLike[str]) -> bool:
    """Whether `folder` holds a golden (or the commit record of one being written)."""
    folder = Path(folder)
    return any(os.path.lexists(folder / name) for name in (fmt.METRICS_FILE, fmt.STATE_FILE, COMMIT_FILE))


def _store_for(folder: Path, root: str | os.PathLike[str] | None, max_bytes: int) -> GoldenStore:
    return GoldenStore(root if root is not None else folder, max_bytes=max_bytes)


def read_run(folder: str | os.PathLike[str], max_bytes: int = fmt.DEFAULT_MAX_FILE_BYTES,
             root: str | os.PathLike[str] | None = None) -> Run:
    """Read a golden (or result) folder as one consistent set. Never writes anything.

    Parameters
    ----------
    folder : path
        The golden folder (the one holding `metrics.parquet` and `state.parquet`).
    max_bytes : int
        Larger golden files are refused before loading (default 512 MiB).
    root : path, optional
        The golden dir: a symbolic link anywhere between it and `folder` is refused.

    Raises
    ------
    GoldenMissingError, GoldenVersionError, GoldenCorruptError
        Each names the file and, where there is one, the fix.

    Examples
    --------
    >>> run = read_run("golden/tests/test_depot.py/test_depot_sgd")   # doctest: +SKIP
    >>> run.metrics["loss"].values[-1], run.meta["reason"]             # doctest: +SKIP
    """
    folder = Path(folder)
    return _store_for(folder, root, max_bytes).read(folder)


def write_run(folder: str | os.PathLike[str], run: Run, root: str | os.PathLike[str] | None = None) -> None:
    """Write `run` as a golden (or result) folder: all files or none, as one set.

    Parameters
    ----------
    folder : path
        The golden folder; created if missing.
    run : Run
        What to store; `run.meta` becomes the files' `trainguard.meta`.
    root : path, optional
        The golden dir `folder` must stay inside (no symbolic link between them).

    Raises
    ------
    GoldenError
        The folder is a link, lies outside `root`, or holds something that is not a golden file.

    Examples
    --------
    >>> write_run("golden/demo", Run(metrics={"loss": MetricSeries([0, 1], [0.9, 0.7])}))  # doctest: +SKIP
    """
    folder = Path(folder)
    _store_for(folder, root, fmt.DEFAULT_MAX_FILE_BYTES).write(folder, run)


def find_goldens(root: str | os.PathLike[str]) -> list[Path]:
    """Every golden folder below `root` (folders holding a golden file), sorted, symlinks not followed."""
    return GoldenStore(root).find()


def upgrade_goldens(root: str | os.PathLike[str], max_bytes: int = fmt.DEFAULT_MAX_FILE_BYTES) -> list[tuple[Path, str]]:
    """`GoldenStore(root, max_bytes).upgrade()`: every golden below `root` to the current format."""
    return GoldenStore(root, max_bytes=max_bytes).upgrade()


def read_metrics(path: str | os.PathLike[str], max_bytes: int = fmt.DEFAULT_MAX_FILE_BYTES) -> tuple[dict[str, MetricSeries], Any]:
    """Read one `metrics.parquet`: the series by metric name, and the file's metadata."""
    path = Path(path)
    got = fmt.read_file(path, fmt.METRICS_FILE, max_bytes)
    return got.metrics(path), got.meta


def read_state(path: str | os.PathLike[str], max_bytes: int = fmt.DEFAULT_MAX_FILE_BYTES) -> tuple[dict[str, TensorRecord], Any]:
    """Read one `state.parquet`: the records by tensor name, and the file's metadata."""
    path = Path(path)
    got = fmt.read_file(path, fmt.STATE_FILE, max_bytes)
    return fmt.tensors_from_table(path, got.table), got.meta


def read_trace(path: str | os.PathLike[str], max_bytes: int = fmt.DEFAULT_MAX_FILE_BYTES) -> list[TraceEntry]:
    """Read one `trace.parquet` into entries in recording order."""
    path = Path(path)
    return fmt.trace_from_table(path, fmt.read_file(path, fmt.TRACE_FILE, max_bytes).table)
