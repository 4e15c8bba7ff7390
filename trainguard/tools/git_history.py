"""Goldens as they were in an earlier commit: what `upgrade-goldens` and `audit` compare with.

Only `git` plumbing with fixed arguments runs here; file contents come back as bytes and are
read by the same bounded, verifying reader as the work tree's goldens (never unpickled,
never written to disk).
"""

from __future__ import annotations

import subprocess
from pathlib import Path

from ..core.errors import TrainguardError
from ..core.golden_format import KEY_VERSION
from ..core.parquet_bounds import BoundsError, key_values

#: A golden file larger than this in history is reported, not read (the work tree's limit applies too).
_GIT_TIMEOUT = 120


def _git(args: list[str], cwd: Path, check: bool = True) -> subprocess.CompletedProcess[bytes]:
    try:
        done = subprocess.run(["git", *args], cwd=cwd, capture_output=True, timeout=_GIT_TIMEOUT)
    except FileNotFoundError:
        raise TrainguardError("git is not installed; audit and history checks need it") from None
    except subprocess.TimeoutExpired:
        raise TrainguardError(f"git {' '.join(args[:2])} took over {_GIT_TIMEOUT} s") from None
    if check and done.returncode != 0:
        message = done.stderr.decode("utf-8", "replace").strip().splitlines()
        raise TrainguardError(f"git {' '.join(args)} failed: {message[0] if message else done.returncode}")
    return done


def repo_root(start: Path) -> Path | None:
    """The top folder of the git work tree holding `start`, or None outside one."""
    folder = start if start.is_dir() else start.parent
    done = _git(["rev-parse", "--show-toplevel"], folder, check=False)
    if done.returncode != 0:
        return None
    return Path(done.stdout.decode().strip())


def resolve_rev(root: Path, rev: str) -> str:
    """The commit id of `rev`; a clear error when it does not name one."""
    if rev.startswith("-"):
        raise TrainguardError(f"{rev!r} is not a revision (it starts with '-')")
    done = _git(["rev-parse", "--verify", "--quiet", f"{rev}^{{commit}}"], root, check=False)
    if done.returncode != 0:
        raise TrainguardError(f"{rev!r} does not name a commit in {root}; try a branch, tag or commit id "
                              "(e.g. origin/main; in a shallow CI clone fetch it first: git fetch --depth=50 origin main)")
    return done.stdout.decode().strip()


def files_at(root: Path, rev: str, folder: Path) -> list[str]:
    """Paths (relative to the repository root, '/'-separated) of the files under `folder` at `rev`."""
    rel = folder.resolve().relative_to(root.resolve()).as_posix()
    done = _git(["ls-tree", "-r", "-z", "--name-only", rev, "--", rel or "."], root)
    return [p for p in done.stdout.decode("utf-8", "surrogateescape").split("\0") if p]


def blob_size(root: Path, rev: str, relpath: str) -> int | None:
    done = _git(["cat-file", "-s", f"{rev}:{relpath}"], root, check=False)
    if done.returncode != 0:
        return None
    return int(done.stdout.decode().strip())


def show(root: Path, rev: str, relpath: str, max_bytes: int) -> bytes | None:
    """A file's bytes at `rev`, or None when it did not exist there; refused above `max_bytes`."""
    size = blob_size(root, rev, relpath)
    if size is None:
        return None
    if size > max_bytes:
        raise TrainguardError(f"{relpath} at {rev[:12]} is {size} bytes, over the {max_bytes}-byte golden file limit")
    return _git(["cat-file", "blob", f"{rev}:{relpath}"], root).stdout


def format_at(root: Path, rev: str, path: Path, max_bytes: int) -> int | None:
    """The golden format a file had at `rev` (None: absent, or not a trainguard file)."""
    try:
        rel = path.resolve().relative_to(root.resolve()).as_posix()
    except ValueError:
        return None
    data = show(root, rev, rel, max_bytes)
    if data is None:
        return None
    try:
        raw = key_values(data).get(KEY_VERSION, b"")
    except BoundsError:
        return None
    return int(raw) if raw.isdigit() and len(raw) < 10 else None


def held_format_2(max_bytes: int):  # type: ignore[no-untyped-def]
    """A check for `GoldenStore.upgrade`: was this file format 2 (or later) in the last commit?"""

    def check(path: Path) -> bool:
        root = repo_root(path.parent)
        if root is None:
            return False
        done = _git(["rev-parse", "--verify", "--quiet", "HEAD"], root, check=False)
        if done.returncode != 0:
            return False
        version = format_at(root, "HEAD", path, max_bytes)
        return version is not None and version >= 2

    return check


def changed_files(root: Path, rev: str) -> list[str]:
    """Tracked files that differ between `rev` and the work tree, plus untracked ones, '/'-separated."""
    diff = _git(["diff", "--name-only", "-z", "--no-renames", rev, "--"], root).stdout
    untracked = _git(["ls-files", "--others", "--exclude-standard", "-z"], root).stdout
    names = {p for p in (diff + b"\0" + untracked).decode("utf-8", "surrogateescape").split("\0") if p}
    return sorted(names)
