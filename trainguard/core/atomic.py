"""Files that readers see whole: atomic writes, folder locks, sets switched by a commit record.

Goldens, result folders, report files and plots are all written here, so that a reader
(another pytest-xdist worker, a CI step, a person) never sees half a file or half a set:

- one file: written to a uniquely named temp file beside it (`.tmp-<name>.<pid>.<random>`),
  fsynced, and moved into place with `os.replace`;
- a set of files (a golden folder): under the folder's exclusive lock, every file goes to a
  temp file first; a commit record (`.trainguard-commit`) naming which temp file becomes
  which file is written and fsynced; then the renames. A process killed after the record
  exists is rolled forward by the next writer (and readers read the temp files it names);
  killed before it, the old files are untouched.

Readers and cleaners skip names starting with `.tmp-`. Nothing here knows Parquet.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import re
import time
import uuid
from pathlib import Path
from typing import Any, Callable, Collection, Iterator

from .errors import GoldenCorruptError, GoldenError

TEMP_PREFIX = ".tmp-"
#: Commit record of an in-progress (or interrupted) write: which temp file becomes which file.
COMMIT_FILE = ".trainguard-commit"
#: Lock file, only where a folder itself cannot be locked (some network file systems).
LOCK_FILE = ".trainguard-lock"
#: Seconds a writer waits for another writer of the same folder, and a reader for a writer.
WRITE_LOCK_TIMEOUT = 120.0
READ_LOCK_TIMEOUT = 30.0
#: A commit record is a few hundred bytes; anything much larger is not one of ours.
_MAX_COMMIT_BYTES = 64 * 1024
#: Run ids and temp-file names exactly as `FileSet.write` and `temp_path` make them.
_RUN_ID = re.compile(r"[0-9a-f]{32}\Z")
_TEMP_SUFFIX = re.compile(r"\.[0-9]{1,10}\.[0-9a-f]{12}\Z")


def write_error(exc: OSError, path: Path, kept: str) -> GoldenError:
    """A failed write as a message that says what went wrong, what is intact and what to do."""
    if exc.errno == errno.ENOSPC:
        problem, fix = "no space left on the device", f"free space on the disk that holds {path}, then run it again"
    elif exc.errno == errno.EFBIG:
        problem, fix = ("a file grew past the size this process may write (ulimit -f, or the file system's limit)",
                        "raise the limit (ulimit -f unlimited) or write to another disk, then run it again")
    elif exc.errno == errno.EDQUOT:
        problem, fix = "the disk quota is exhausted", f"free space in your quota on the disk that holds {path}"
    elif exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        problem, fix = f"no permission to write there ({short_error(exc)})", "make the folder writable"
    else:
        problem, fix = f"writing failed ({short_error(exc)})", "fix the cause above, then run it again"
    return GoldenError(path, f"could not be written: {problem}; {kept}", fix)


def short_error(exc: BaseException) -> str:
    """The first line of an exception's message (at most 200 characters), for one-line errors."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text[:200]


def temp_path(final: Path) -> Path:
    """A temp file beside `final`, unique per process and call."""
    return final.with_name(f"{TEMP_PREFIX}{final.name}.{os.getpid()}.{uuid.uuid4().hex[:12]}")


def write_atomic(path: Path, data: bytes | str | Callable[[Path], None], fsync: bool = True) -> None:
    """Replace `path` with new content in one step: bytes, text (UTF-8), or a writer called with a temp path."""
    tmp = temp_path(path)
    try:
        if callable(data):
            data(tmp)
        else:
            with open(tmp, "wb") as fh:
                fh.write(data.encode("utf-8") if isinstance(data, str) else data)
        if fsync:
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        with contextlib.suppress(OSError):
            tmp.unlink()


def write_temp(folder: Path, final: str, writer: Callable[[Path], None]) -> Path:
    """Write a fresh, fsynced temp file for `final` in `folder` with `writer`; return its path."""
    tmp = temp_path(folder / final)
    try:
        writer(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    return tmp


def fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


# -- folder locks --------------------------------------------------------------------


@contextlib.contextmanager
def folder_lock(folder: Path, exclusive: bool, timeout: float) -> Iterator[None]:
    """Hold `flock` on the folder itself (exclusive for writers, shared for readers).

    Locking the folder's own descriptor leaves no lock file behind. Where a folder cannot be
    locked (some network file systems) writers lock `.trainguard-lock` instead and readers
    that file when it exists. Windows has no `flock`: there the lock is a no-op and only the
    run-id check (readers retry, then report files from different writes) protects sets.
    """
    try:
        import fcntl
    except ImportError:  # Windows
        yield
        return
    mode = fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH
    fd = -1
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
        _flock(fcntl, fd, mode, timeout, folder)
    except OSError as exc:
        if fd != -1:
            os.close(fd)
            fd = -1
        if exc.errno in (errno.ENOENT, errno.ENOTDIR):
            raise
        lock_path = folder / LOCK_FILE
        try:
            if exclusive:
                fd = os.open(lock_path, os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0), 0o644)
            elif lock_path.is_file() and not lock_path.is_symlink():
                fd = os.open(lock_path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0))
            if fd != -1:
                _flock(fcntl, fd, mode, timeout, folder)
        except OSError:
            if fd != -1:
                os.close(fd)
                fd = -1
            if exclusive:
                raise
    try:
        yield
    finally:
        if fd != -1:
            os.close(fd)  # closing the descriptor releases the lock


def _flock(fcntl: Any, fd: int, mode: int, timeout: float, folder: Path) -> None:
    deadline = time.monotonic() + timeout
    delay = 0.001
    while True:
        try:
            fcntl.flock(fd, mode | fcntl.LOCK_NB)
            return
        except BlockingIOError:
            if time.monotonic() >= deadline:
                raise GoldenError(folder, f"is locked by another trainguard process for over {timeout:.0f} s",
                                  "wait for the other bless to finish, or stop it") from None
            time.sleep(delay)
            delay = min(delay * 2, 0.05)


# -- sets of files switched by a commit record -----------------------------------------


class FileSet:
    """The files of one folder that are written together (`names`: e.g. the golden file names)."""

    def __init__(self, folder: Path, names: Collection[str]) -> None:
        self.folder = folder
        self.names = tuple(names)

    def write(self, writers: dict[str, Callable[[Path], None]], run_id: str) -> None:
        """Switch the folder to new files (one writer per name); files of `names` not given are removed.

        The caller holds the folder's exclusive lock and has called `recover` and `clean`.
        """
        written: dict[str, Path] = {}
        try:
            for name, writer in writers.items():
                written[name] = write_temp(self.folder, name, writer)
            remove = [k for k in self.names if k not in writers and (self.folder / k).exists()]
            self._commit(written, remove, run_id)
        finally:
            for tmp in written.values():
                with contextlib.suppress(OSError):
                    if tmp.exists():
                        tmp.unlink()

    def _commit(self, replace: dict[str, Path], remove: list[str], run_id: str) -> None:
        """The commit record is written (and fsynced) first: from then on the switch counts as
        done, and an interrupted one is completed by the next writer and seen whole by readers."""
        record = {"run_id": run_id, "replace": {k: p.name for k, p in replace.items()}, "remove": sorted(remove)}
        write_atomic(self.folder / COMMIT_FILE, json.dumps(record, sort_keys=True).encode())
        fsync_dir(self.folder)
        self._apply(record)

    def _apply(self, record: dict[str, Any]) -> None:
        for final, tmp_name in record["replace"].items():
            tmp = self.folder / tmp_name
            if tmp.is_file() and not tmp.is_symlink():
                os.replace(tmp, self.folder / final)
        for final in record["remove"]:
            path = self.folder / final
            if path.is_symlink() or path.is_file():
                path.unlink()
        fsync_dir(self.folder)
        (self.folder / COMMIT_FILE).unlink()
        fsync_dir(self.folder)

    def recover(self) -> None:
        """Complete a write that was interrupted after its commit point (caller holds the lock)."""
        path = self.folder / COMMIT_FILE
        if not (path.exists() or path.is_symlink()):
            return
        try:
            record = self.read_commit()
        except GoldenCorruptError:
            record = None
        if record is None:
            path.unlink()  # unusable record: the write that follows replaces every file anyway
            return
        self._apply(record)

    def clean(self) -> None:
        """Remove temp files an interrupted earlier write left behind (caller holds the lock)."""
        for leftover in self.folder.glob(TEMP_PREFIX + "*"):
            try:
                if leftover.is_symlink() or leftover.is_file():
                    leftover.unlink()
            except OSError:
                pass

    def read_commit(self) -> dict[str, Any] | None:
        """The commit record of an interrupted write, validated, or None when there is none."""
        path = self.folder / COMMIT_FILE
        if not os.path.lexists(path):
            return None
        if path.is_symlink() or not path.is_file():
            raise GoldenCorruptError(path, "is not a regular file")
        try:
            with open(path, "rb") as fh:
                raw = fh.read(_MAX_COMMIT_BYTES + 1)
        except OSError as exc:
            raise GoldenCorruptError(path, f"cannot be read ({short_error(exc)})") from None
        if len(raw) > _MAX_COMMIT_BYTES:
            raise GoldenCorruptError(path, f"is larger than {_MAX_COMMIT_BYTES} bytes; not a trainguard commit record")
        try:
            record = json.loads(raw.decode("utf-8"))
        except (UnicodeDecodeError, ValueError, RecursionError):
            raise GoldenCorruptError(path, "is not valid JSON") from None
        # Exactly the shape `_commit` writes: three keys, a 32-hex run id, temp names made by `temp_path`.
        ok = (isinstance(record, dict) and set(record) == {"run_id", "replace", "remove"}
              and isinstance(record["run_id"], str) and bool(_RUN_ID.match(record["run_id"]))
              and isinstance(record["replace"], dict) and isinstance(record["remove"], list))
        if ok:
            for final, tmp in record["replace"].items():
                ok = ok and final in self.names and isinstance(tmp, str) and tmp.startswith(TEMP_PREFIX + final + ".") \
                    and bool(_TEMP_SUFFIX.match(tmp[len(TEMP_PREFIX + final):]))
            ok = ok and all(isinstance(r, str) and r in self.names and r not in record["replace"]
                            for r in record["remove"]) and len(set(record["remove"])) == len(record["remove"])
        if not ok:
            raise GoldenCorruptError(path, "is not a valid trainguard commit record", "remove it, then bless again")
        return record

    def resolve(self) -> dict[str, Path]:
        """The file to read for each name present, after an interrupted write's commit."""
        files = {k: self.folder / k for k in self.names if os.path.lexists(self.folder / k)}
        record = self.read_commit()
        if record is not None:
            for final, tmp_name in record["replace"].items():
                tmp = self.folder / tmp_name
                if os.path.lexists(tmp):
                    files[final] = tmp
            for final in record["remove"]:
                files.pop(final, None)
        return files


# -- confinement ---------------------------------------------------------------------


def check_root(root: Path, what: str) -> None:
    """Refuse to write into a root folder that is a symbolic link (writes would land wherever it points)."""
    if root.is_symlink():
        raise GoldenCorruptError(root, f"is a symbolic link; trainguard does not write {what} through links",
                                 f"give the real folder instead: {os.path.realpath(root)}")


def write_confined(root: Path, relpath: str, data: bytes | str | Callable[[Path], None], what: str,
                   fsync: bool = False) -> Path:
    """Write `root/relpath` atomically, refusing a link at the root or anywhere below it on the way."""
    check_root(root, what)
    target = root / relpath
    root.mkdir(parents=True, exist_ok=True)
    check_confined(target.parent, root)
    target.parent.mkdir(parents=True, exist_ok=True)
    check_confined(target.parent, root)
    if target.is_symlink():
        raise GoldenCorruptError(target, "is a symbolic link; trainguard does not write through links",
                                 "remove the link")
    try:
        write_atomic(target, data, fsync=fsync)
    except OSError as exc:
        raise write_error(exc, target, "nothing was replaced") from None
    return target


def check_confined(folder: Path, root: str | os.PathLike[str] | None) -> None:
    """Refuse a folder that is, or sits below, a symbolic link (up to `root`), or lies outside `root`."""
    if folder.is_symlink():
        raise GoldenCorruptError(folder, "is a symbolic link; golden folders must be real folders",
                                 "replace the link with the folder it points to")
    if root is None:
        return
    root_abs = Path(os.path.abspath(root))
    here = Path(os.path.abspath(folder))
    try:
        rel = here.relative_to(root_abs)
    except ValueError:
        raise GoldenCorruptError(folder, f"is outside the golden dir {root}") from None
    current = root_abs
    for part in rel.parts:
        current = current / part
        if current.is_symlink():
            raise GoldenCorruptError(current, "is a symbolic link inside the golden dir; golden folders must be "
                                     "real folders", "replace the link with the folder it points to")
    if here.exists() and root_abs.exists():
        real_root = os.path.realpath(root_abs)
        if os.path.commonpath([real_root, os.path.realpath(here)]) != real_root:
            raise GoldenCorruptError(folder, f"leads outside the golden dir {root}")
